"""The HTML report of a fit and of a model comparison.

One small real fit (12 species, 2 chains x 200 draws) is shared by the tests of
this file through a module-scoped fixture.
"""

from __future__ import annotations

import io
import re
import time
import warnings

import arviz as az
import numpy as np
import pandas as pd
import pytest
from treegen import random_tree

from cladewise.errors import InputError
from cladewise.data.trees import FlatTree
from cladewise.data.treefiles import format_newick

EVIL = "<script>alert(1)</script>"
FIGURES = ["tree", "posterior_densities", "species_scatter", "contrasts", "predictive_check",
           "rank_plots", "pareto_k"]


@pytest.fixture(scope="module")
def fit_dir(tmp_path_factory):
    from cladewise.model.build import ModelData, ModelSpec
    from cladewise.inference.fit import fit
    from cladewise.report import write_fit_report
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.studies.simulate import simulate_traits

    rng = np.random.default_rng(42)
    base = random_tree(12, rng, ultrametric=True)
    names = list(base.tip_names)
    names[3] = EVIL
    tree = FlatTree(base.parent, base.length, tuple(names))
    R = np.array([[1.0, 0.6], [0.6, 1.0]]) * 0.2
    se = np.full((12, 2), 0.1)
    y = simulate_traits(tree, R, np.zeros(2), se=se, rng=rng)
    y[5, 1] = np.nan  # one missing value: the contrasts must prune that species
    values = pd.DataFrame(y, index=names, columns=["size", "shape"])
    data = ModelData(tree=tree, values=values,
                     se=pd.DataFrame(se, index=names, columns=["size", "shape"]))
    spec = ModelSpec.from_dict({"kind": "correlated", "traits": ["size", "shape"],
                                "measurement_error": "se"})
    opts = SamplingOptions(chains=2, draws=200, tune=200, seed=7, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(data, spec, opts)
    out = tmp_path_factory.mktemp("report") / "fit"
    res.save(out)
    t0 = time.perf_counter()
    path = write_fit_report(out)
    return out, path, time.perf_counter() - t0


def test_species_names_are_escaped(fit_dir):
    out, path, _ = fit_dir
    text = path.read_text(encoding="utf-8")
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "<script>alert(1)" not in text
    # the only script is ours (the image counter), and it holds no species name
    assert len(re.findall(r"<script\b", text)) == 1
    for svg in (out / "figures").glob("*.svg"):
        body = svg.read_text(encoding="utf-8")
        # matplotlib keeps text as an XML comment beside the glyph paths: escaped
        assert "<script" not in body.lower(), svg.name
        if "alert(1)" in body:
            assert "&lt;script&gt;alert(1)&lt;/script&gt;" in body, svg.name


def test_all_figures_and_tables_written(fit_dir):
    out, path, _ = fit_dir
    expected = FIGURES if "log_likelihood" in az.from_netcdf(out / "posterior.nc").groups() else FIGURES[:-1]
    for name in expected:
        for ext in ("png", "svg"):
            f = out / "figures" / f"{name}.{ext}"
            assert f.is_file() and f.stat().st_size > 1000, f
    text = path.read_text(encoding="utf-8")
    assert text.count('src="data:image/png;base64,') == len(expected)
    for t in ("results", "priors", "diagnostics", "environment"):
        assert (out / "tables" / f"{t}.csv").is_file(), t
    # the results table holds the rows of the fit's own summary.csv
    res = pd.read_csv(out / "tables" / "results.csv")
    summ = pd.read_csv(out / "summary.csv")
    assert list(res["quantity"]) == list(summ["quantity"])
    np.testing.assert_allclose(res["mean"], summ["mean"])


def test_fit_folder_keeps_log_likelihood(fit_dir):
    """The Pareto k figure needs the log_likelihood group of the saved fit."""
    out, _, _ = fit_dir
    groups = az.from_netcdf(out / "posterior.nc").groups()
    assert "log_likelihood" in groups, (
        "posterior.nc has no log_likelihood group: fitting.py names the variable 'species', the same "
        "as its dimension, so xarray makes it a coordinate and arviz drops the empty group")


def test_no_network_resources(fit_dir):
    _, path, _ = fit_dir
    text = path.read_text(encoding="utf-8")
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", text, re.I)
    assert not re.search(r"<link\b", text, re.I)
    assert not re.search(r"url\(\s*['\"]?\s*(https?:)?//", text, re.I)
    assert "@import" not in text


def test_report_sections_present(fit_dir):
    _, path, _ = fit_dir
    text = path.read_text(encoding="utf-8")
    for anchor in ("data", "model", "diagnostics", "results", "checks", "cautions", "reproduce"):
        assert f'<section id="{anchor}">' in text
    assert "R ⊗ C(θ)" in text and "y_ij ~ Normal(Y_ij, s_ij²)" in text
    assert "not causation" in text
    assert 'id="results-table"' in text


def test_never_replace_foreign_files(fit_dir, tmp_path):
    from cladewise.report import write_fit_report

    out, path, _ = fit_dir
    other = tmp_path / "fit2"
    other.mkdir()
    for f in ("posterior.nc", "summary.json", "summary.csv"):
        (other / f).write_bytes((out / f).read_bytes())
    (other / "report.html").write_text("<html>my own notes</html>")
    with pytest.raises(InputError, match="not written by cladewise"):
        write_fit_report(other)
    assert (other / "report.html").read_text() == "<html>my own notes</html>"


def test_not_a_fit_folder(tmp_path):
    from cladewise.report import write_fit_report

    with pytest.raises(InputError, match="not a cladewise fit folder"):
        write_fit_report(tmp_path)


def test_command_line(fit_dir, tmp_path, capsys):
    from cladewise.cli.main import main

    out, path, _ = fit_dir
    before = path.stat().st_mtime_ns
    assert main(["report", str(out)]) == 0  # our own report is regenerated
    assert path.stat().st_mtime_ns >= before
    assert "report.html" in capsys.readouterr().out
    assert main(["report", str(tmp_path)]) == 2
    assert "is not a cladewise" in capsys.readouterr().err


def test_missing_summary_keys_are_tolerated(fit_dir, tmp_path):
    """An older summary.json with few keys still gives a report."""
    import json

    from cladewise.report import write_fit_report

    out, _, _ = fit_dir
    other = tmp_path / "old"
    other.mkdir()
    (other / "posterior.nc").write_bytes((out / "posterior.nc").read_bytes())
    full = json.loads((out / "summary.json").read_text())
    (other / "summary.json").write_text(json.dumps({"model": full["model"], "traits": full["traits"]}))
    text = write_fit_report(other).read_text(encoding="utf-8")
    assert "No diagnostics were saved" in text and "&lt;script&gt;" in text


# ----------------------------------------------------------------------- tree plot
def test_tree_layout_against_dendropy():
    """Tip order is a planar drawing: every clade's tips are contiguous, and x is the
    distance from the root (both checked on the clades and distances of DendroPy)."""
    import dendropy

    from cladewise.report import tree_layout

    tree = random_tree(30, np.random.default_rng(3), ultrametric=False)
    x, y = tree_layout(tree)
    dt = dendropy.Tree.get(data=format_newick(tree) + ";" if not format_newick(tree).endswith(";")
                           else format_newick(tree), schema="newick", preserve_underscores=True)
    rank = {tree.tip_names[i]: y[i] for i in range(tree.n_tips)}
    assert sorted(rank.values()) == list(range(tree.n_tips))
    for node in dt.internal_nodes():
        r = sorted(rank[leaf.taxon.label] for leaf in node.leaf_nodes())
        assert r[-1] - r[0] == len(r) - 1, "a clade's tips must be drawn next to each other"
    for leaf in dt.leaf_node_iter():
        i = tree.tip_names.index(leaf.taxon.label)
        assert x[i] == pytest.approx(leaf.distance_from_root(), rel=1e-8)


def test_tree_switches_to_compact_mode():
    from cladewise.report import COMPACT_ABOVE, plot_tree

    rng = np.random.default_rng(0)
    big = random_tree(2000, rng, ultrametric=True)
    vals = rng.normal(size=(2000, 3))
    vals[::7, 1] = np.nan
    t0 = time.perf_counter()
    fig = plot_tree(big, vals, ["a", "b", "c"])
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    elapsed = time.perf_counter() - t0
    assert fig.cladewise_compact
    assert len(fig.axes[0].texts) == 0  # no tip labels
    assert elapsed < 20  # bounded; about 1-2 s on a 2-core machine
    small = random_tree(COMPACT_ABOVE, rng, ultrametric=True)
    fig2 = plot_tree(small, rng.normal(size=(COMPACT_ABOVE, 1)), ["a"])
    assert not fig2.cladewise_compact
    assert len(fig2.axes[0].texts) == COMPACT_ABOVE


def test_band_hdi_matches_arviz():
    """The per-x credible band uses the same narrowest-interval rule as arviz.hdi."""
    from cladewise.report.figures import _hdi_columns

    rng = np.random.default_rng(1)
    draws = rng.gamma(2.0, size=(4000, 5))
    ours = _hdi_columns(draws, 0.9)
    for j in range(5):
        ref = az.hdi(draws[:, j], hdi_prob=0.9)
        np.testing.assert_allclose(ours[j], ref, rtol=1e-12)


# ---------------------------------------------------------------- comparison report
def _loo_idata(rng, shift):
    ll = rng.normal(-1.0 - shift, 0.3, size=(2, 100, 15))
    return az.from_dict(posterior={"a": rng.normal(size=(2, 100))}, log_likelihood={"y": ll},
                        coords={"species": [f"sp{i}" for i in range(14)] + [EVIL]},
                        dims={"y": ["species"]})


def test_comparison_report(tmp_path):
    from cladewise.report import write_comparison_report

    rng = np.random.default_rng(5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cmp = az.compare({"brownian": _loo_idata(rng, 0.0), "lambda <b>": _loo_idata(rng, 0.2)})
    infl = {"brownian": pd.Series({EVIL: 0.83}), "lambda <b>": []}
    path = write_comparison_report(cmp, tmp_path, influential=infl)
    text = path.read_text(encoding="utf-8")
    assert path.name == "compare_report.html"
    assert "lambda &lt;b&gt;" in text and "lambda <b>" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text and "<script>alert(1)" not in text
    assert (tmp_path / "figures" / "compare_elpd.png").is_file()
    assert (tmp_path / "figures" / "compare_elpd.svg").is_file()
    table = pd.read_csv(tmp_path / "tables" / "comparison.csv")
    # an arviz table is read in the comparison's own column names
    np.testing.assert_allclose(table["elpd"], cmp["elpd_loo"])
    np.testing.assert_allclose(table["diff_se"], cmp["dse"])

    class Result:  # what a comparison runner may hand over instead of a bare table
        table = cmp
        influential = {"brownian": [EVIL]}

    text2 = write_comparison_report(Result(), tmp_path / "obj").read_text(encoding="utf-8")
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text2
    with pytest.raises(InputError, match="no elpd column"):
        write_comparison_report(pd.DataFrame({"x": [1]}), tmp_path / "bad")


def _comparison_result():
    """A ComparisonResult built from its public fields, in the layout compare_fits writes."""
    from cladewise.evaluation.compare import ComparisonResult

    table = pd.DataFrame({
        "model": ["bm", "ou", "lambda"], "rank": [1, 2, 3],
        "elpd": [-20.0, -21.0, -35.0], "se": [3.0, 3.5, 4.0],
        "elpd_diff": [0.0, 1.0, 15.0], "diff_se": [0.0, 1.5, 2.5],
        "p_loo": [3.1, 3.4, 2.9], "weight": [0.7, 0.3, 0.0], "n_high_k": [0, 2, 0],
        "verdict": ["highest ELPD (best expected prediction of a held-out species)",
                    "not distinguishable by LOO from bm: ELPD lower by 1.00 with se 1.50",
                    "predicts held-out species worse than bm: ELPD lower by 15.00"],
    })
    return ComparisonResult(table=table, loo={}, signature="x", loglik_kind="joint",
                            notes=["models fitted with the same seed"])


def test_comparison_page_reads_the_columns_the_comparison_writes(tmp_path):
    from cladewise.report import write_comparison_report
    from cladewise.report.compare_report import comparison_figure

    res = _comparison_result()
    text = write_comparison_report(res, tmp_path).read_text(encoding="utf-8")
    # the verdicts of the comparison itself, one per model that is not the best
    assert 'id="verdicts"' in text
    assert "ou: not distinguishable by LOO from bm" in text
    assert "lambda: predicts held-out species worse than bm" in text
    # the high-Pareto-k banner names the model with flagged species
    assert 'id="high-pareto-k"' in text and "ou (2)" in text
    assert "se of difference" in text and ">diff_se<" not in text
    assert "models fitted with the same seed" in text  # the comparison's own notes
    # the difference bars are +- 2 se of the difference wide (matplotlib's errorbar segments)
    fig = comparison_figure(res.table.set_index("model"))
    bars = fig.axes[0].containers[0].lines[2][0].get_segments()
    widths = [seg[1][0] - seg[0][0] for seg in bars]
    np.testing.assert_allclose(widths, 4 * res.table["diff_se"].to_numpy())
    centres = [0.5 * (seg[1][0] + seg[0][0]) for seg in bars]
    np.testing.assert_allclose(centres, -res.table["elpd_diff"].to_numpy())
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_no_banner_without_high_pareto_k(tmp_path):
    from cladewise.report import write_comparison_report

    res = _comparison_result()
    res.table["n_high_k"] = 0
    text = write_comparison_report(res, tmp_path).read_text(encoding="utf-8")
    assert 'id="high-pareto-k"' not in text and 'id="verdicts"' in text


# ------------------------------------------------------- labels shared with the summary
def test_rank_plot_titles_are_summary_labels(fit_dir):
    from cladewise.report.data import read_fit_folder
    from cladewise.report.figures import main_quantities

    out, _, _ = fit_dir
    view = read_fit_folder(out)
    summary = set(pd.read_csv(out / "summary.csv")["quantity"])
    titles = list(main_quantities(view))
    assert titles and set(titles) <= summary, (titles, summary)
    assert "evo_slope[size ~ shape]" in titles and "evo_corr[size, shape]" in titles
    # the drawn values are the posterior draws of that element
    ref = view.posterior["evo_slope"].sel(trait="size", trait_="shape").values
    np.testing.assert_array_equal(main_quantities(view)["evo_slope[size ~ shape]"], ref)


def test_tree_panels_say_log_for_logged_traits(fit_dir):
    import matplotlib.pyplot as plt

    from cladewise.report.data import read_fit_folder
    from cladewise.report.figures import tree_figure

    out, _, _ = fit_dir
    view = read_fit_folder(out)
    view.info = dict(view.info, data_summary={"traits": [{"name": "size", "logged": True},
                                                          {"name": "shape", "logged": False}]})
    fig, _ = tree_figure(view, compact=False)
    labels = [ax.get_xlabel() for ax in fig.axes]
    assert "log(size)" in labels and "shape" in labels and "size" not in labels
    plt.close(fig)
    fig, _ = tree_figure(view, compact=True)
    ticks = [t.get_text() for ax in fig.axes for t in ax.get_xticklabels()]
    assert "log(size)" in ticks
    plt.close(fig)


# ------------------------------------------------------- study and tree-sample figures
def _pooled_idata(rng):
    """Three trees x two chains of made-up draws, pooled as fit_tree_sample pools them."""
    corr = np.empty((6, 300, 2, 2))
    shifts = np.repeat([-0.3, 0.0, 0.4], 2)
    for c in range(6):
        r = np.clip(rng.normal(shifts[c], 0.1, size=300), -0.99, 0.99)
        corr[c] = np.stack([np.stack([np.ones(300), r], -1), np.stack([r, np.ones(300)], -1)], 1)
    rate = rng.gamma(2.0, size=(6, 300, 2)) + shifts[:, None, None] + 1
    idata = az.from_dict(posterior={"evo_corr": corr, "evo_rate": rate},
                         coords={"trait": ["a", "b"], "trait_": ["a", "b"]},
                         dims={"evo_corr": ["trait", "trait_"], "evo_rate": ["trait"]})
    idata.posterior = idata.posterior.assign_coords(tree=("chain", np.repeat([0, 4, 9], 2)))
    return idata


def test_tree_sample_figure_and_variance_columns(tmp_path):
    from cladewise.inference.treesample import per_tree_summary, tree_variance_share
    from cladewise.report.study_figures import plot_tree_sample

    idata = _pooled_idata(np.random.default_rng(8))
    paths = plot_tree_sample(idata, tmp_path / "tree_sample")
    assert [p.name for p in paths] == ["tree_sample.png", "tree_sample.svg"]
    assert paths[0].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    per = per_tree_summary(idata)
    assert set(per["quantity"]) == {"evo_corr[a, b]", "evo_rate[a]", "evo_rate[b]"}
    # per-tree intervals are arviz's HDI of that tree's draws
    draws = idata.posterior["evo_corr"].values[2:4, :, 0, 1].ravel()
    row = per[(per["tree"] == 4) & (per["quantity"] == "evo_corr[a, b]")].iloc[0]
    np.testing.assert_allclose([row.hdi_low, row.hdi_high], az.hdi(draws, hdi_prob=0.95))
    share = tree_variance_share(idata)
    assert "within_tree_sd" in share.columns and "within_sd" not in share.columns
    # law of total variance with equal tree weights (numpy population variances)
    all_corr = idata.posterior["evo_corr"].values[:, :, 0, 1]
    means = [all_corr[k:k + 2].mean() for k in (0, 2, 4)]
    within = np.mean([all_corr[k:k + 2].var() for k in (0, 2, 4)])
    r = share.set_index("quantity").loc["evo_corr[a, b]"]
    assert r.between_sd == pytest.approx(np.std(means))
    assert r.within_tree_sd == pytest.approx(np.sqrt(within))


def test_power_figure_reads_the_renamed_share_column(tmp_path):
    from cladewise.report.study_figures import plot_power
    from cladewise.studies.power import PowerResult

    table = pd.DataFrame({"true_correlation": [0.0, 0.5], "n_datasets": [10, 10],
                          "share_hdi_excludes_zero": [0.1, 0.6], "share_hdi_excludes_zero_mcse": [0.09, 0.15],
                          "pearson_share": [0.3, 0.8], "pearson_mcse": [0.14, 0.13]})
    res = PowerResult(table, pd.DataFrame(), {"hdi_prob": 0.95, "alpha": 0.05, "n_species": 6, "n_datasets": 10})
    fig = plot_power(res)
    line = fig.axes[0].containers[0].lines[0]
    np.testing.assert_allclose(line.get_ydata(), table["share_hdi_excludes_zero"])
    import matplotlib.pyplot as plt

    plt.close(fig)


# --------------------------------------------------------------------- progress
def test_progress_quiet_unless_terminal():
    from cladewise.report import Progress

    buf = io.StringIO()
    p = Progress(3, "writing figures", stream=buf)
    p.step("tree")
    assert buf.getvalue() == ""
    p2 = Progress(3, "writing figures", stream=buf, enabled=True)
    p2.step("tree")
    assert "writing figures 1/3: tree" in buf.getvalue()
