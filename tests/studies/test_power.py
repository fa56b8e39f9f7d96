"""Power study: false positives on a structured tree, spec validation, output folder.

One test samples (one compile, then 24 short fits: about 20 s on an idle 2-core machine,
up to ~80 s when other heavy jobs share it); everything else needs no sampling.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from cladewise.cli.main import main
from cladewise.errors import InputError
from cladewise.report.study_figures import save_power_figure
from cladewise.studies.power import PowerResult, _power_table, measurement_se, run_power_study
from cladewise.config.power import load_power_spec
from cladewise.inference.sampling import SamplingOptions
from cladewise.data.trees import FlatTree
from cladewise.data.treefiles import parse_newick


# ------------------------------------------------------------------ trees
def _clade(names: list[str], height: float) -> str:
    """Balanced ultrametric Newick text of ``names`` with crown age ``height``."""
    if len(names) == 1:
        return names[0]
    half = len(names) // 2
    child_h = 0.6 * height
    parts = []
    for sub in (names[:half], names[half:]):
        length = height - child_h if len(sub) > 1 else height
        parts.append(f"{_clade(sub, child_h)}:{length:.6g}")
    return "(" + ",".join(parts) + ")"


def two_clade_tree(m: int = 10, stem: float = 1.0, crown: float = 0.1) -> FlatTree:
    """Two clades of ``m`` species each: long stems, short tips (Felsenstein 1985, fig. 5 idea)."""
    a = _clade([f"a{i}" for i in range(m)], crown)
    b = _clade([f"b{i}" for i in range(m)], crown)
    return parse_newick(f"({a}:{stem},{b}:{stem});")


# ------------------------------------------------------------------ sampling
def test_false_positives_phylogenetic_vs_pearson_on_two_clade_tree():
    # Felsenstein 1985 (Am. Nat. 125:1-15): traits evolving independently on a tree of
    # two deep clades look correlated to a test that treats species as independent,
    # because the species are in effect two data points. A direct numpy simulation of
    # this tree (20 species, stems 1.0, crowns 0.1) gives a Pearson false-positive
    # rate near 0.70; the phylogenetic model should stay near its nominal 0.05.
    tree = two_clade_tree()
    res = run_power_study(
        tree, correlations=[0.0], n_datasets=24, rates=[1.0, 1.0], se=0.05, seed=11,
        options=SamplingOptions(chains=2, draws=300, tune=300, progress=False),
    )
    print(res.to_text())
    row = res.table.iloc[0]
    assert row.n_datasets == 24 and len(res.fits) == 24
    # n = 24: a calibrated 95% HDI has P(>= 5 of 24 exclude 0) below 1% (binomial, p = 0.05).
    assert row.share_hdi_excludes_zero <= 0.2, res.to_text()
    # binomial with p = 0.70, n = 24: P(share < 0.4) is below 0.1%.
    assert row.pearson_share >= 0.4, res.to_text()
    assert row.pearson_share > row.share_hdi_excludes_zero + 0.2
    # the recorded Pearson p-values are scipy's on the simulated data (checked via r):
    r = res.fits["pearson_r"].to_numpy()
    df = tree.n_tips - 2
    t = r * np.sqrt(df / (1 - r**2))
    p_from_r = 2 * stats.t.sf(np.abs(t), df=df)  # t test of a Pearson r, n - 2 df (textbook)
    np.testing.assert_allclose(res.fits["pearson_p"], p_from_r, rtol=1e-6)


# ------------------------------------------------------------------ fast: pieces
def test_measurement_se_from_within_variance_and_specimens():
    tree = two_clade_tree(m=3)
    # standard error of a mean of n specimens: sqrt(variance / n) (textbook)
    se = measurement_se(tree, within_variance=[0.04, 0.09], specimens=4)
    np.testing.assert_allclose(se, np.tile([0.1, 0.15], (6, 1)))
    counts = {name: i + 1 for i, name in enumerate(tree.tip_names)}
    se = measurement_se(tree, within_variance=0.36, specimens=counts)
    np.testing.assert_allclose(se[:, 0], np.sqrt(0.36 / np.arange(1, 7)))
    assert measurement_se(tree) is None and measurement_se(tree, se=0.0) is None
    with pytest.raises(InputError, match="not both"):
        measurement_se(tree, se=0.1, within_variance=0.1, specimens=3)
    with pytest.raises(InputError, match="go together"):
        measurement_se(tree, within_variance=0.1)
    with pytest.raises(InputError, match="every tip"):
        measurement_se(tree, within_variance=0.1, specimens={"a0": 3})


def test_power_table_shares_and_binomial_mcse():
    rng = np.random.default_rng(3)
    fits = pd.DataFrame({
        "true_correlation": np.repeat([0.0, 0.5], 40),
        "dataset": np.tile(np.arange(1, 41), 2),
        "evo_corr_mean": rng.normal(size=80), "pearson_r": rng.normal(size=80),
        "phylo_significant": rng.random(80) < 0.3, "pearson_significant": rng.random(80) < 0.6,
        "divergences": np.zeros(80, int), "rhat": np.ones(80),
    })
    table = _power_table(fits)
    for (_, g), (_, row) in zip(fits.groupby("true_correlation"), table.iterrows()):
        k = int(g["phylo_significant"].sum())
        assert row.share_hdi_excludes_zero == pytest.approx(k / 40)
        # Monte Carlo se of a share: sd of Binomial(n, p) / n (scipy)
        assert row.share_hdi_excludes_zero_mcse == pytest.approx(stats.binom(40, k / 40).std() / 40)
        kp = int(g["pearson_significant"].sum())
        assert row.pearson_mcse == pytest.approx(stats.binom(40, kp / 40).std() / 40)


def test_run_power_study_rejects_bad_input_before_compiling():
    tree = two_clade_tree(m=3)
    with pytest.raises(InputError, match="between -1 and 1"):
        run_power_study(tree, correlations=[0.0, 1.2])
    with pytest.raises(InputError, match="rates"):
        run_power_study(tree, rates=[1.0, -1.0])
    with pytest.raises(InputError, match="two different names"):
        run_power_study(tree, traits=["x"])


# ------------------------------------------------------------------ command line
TREE_TEXT = "((a:1,b:1):1,(c:1,(d:0.5,e:0.5):0.5):1);\n"


def _write_spec(folder: Path, power: str, tree: bool = True) -> Path:
    if tree:
        (folder / "tree.nwk").write_text(TREE_TEXT)
    path = folder / "power.toml"
    path.write_text('# invented test spec\n[data]\ntree = "tree.nwk"\n\n[power]\n' + power)
    return path


def test_power_spec_reads_a_valid_spec(tmp_path):
    path = _write_spec(tmp_path, 'traits = ["x", "y"]\nrates = [0.5, 2.0]\ncorrelations = [0.0, 0.3]\n'
                                 "n_datasets = 7\nwithin_variance = 0.1\nspecimens_per_species = [2, 5]\n"
                                 "seed = 3\n[sampling]\ndraws = 200\n")
    spec = load_power_spec(path)
    assert spec.tree.n_tips == 5
    assert spec.kwargs["traits"] == ["x", "y"]
    assert spec.kwargs["correlations"] == [0.0, 0.3]
    assert spec.kwargs["rates"] == [0.5, 2.0]
    assert spec.kwargs["specimens"] == (2, 5)
    assert spec.options.draws == 200 and spec.options.chains == 2


@pytest.mark.parametrize(
    "power, message",
    [
        ("rates = [1, 1]\ncorrelation = 0.2\n", "did you mean 'correlations'"),
        ("correlations = [0.0]\n", "needs rates"),
        ("rates = [1, 1]\ncorrelations = [0.0, 1.0]\n", "strictly between -1 and 1"),
        ('rates = "fast"\n', "number or a list"),
        ("rates = [1, 0]\n", "> 0"),
        ("rates = [1, 1]\nn_datasets = 1\n", "n_datasets"),
        ("rates = [1, 1]\nstandard_errors = 0.1\nwithin_variance = 0.1\nspecimens_per_species = 3\n", "not both"),
        ("rates = [1, 1]\nwithin_variance = 0.1\n", "go together"),
        ("rates = [1, 1]\nwithin_variance = 0.1\nspecimens_per_species = { a = 2 }\n", "every tip"),
        ("rates = [1, 1]\nalpha = 0.9\n", "alpha"),
        ('rates = [1, 1]\ntraits = ["x", "x"]\n', 'traits = \\["x", "x"\\]: lists "x" twice'),
    ],
)
def test_power_spec_rejects_mistakes_with_a_message(tmp_path, power, message):
    with pytest.raises(InputError, match=message):
        load_power_spec(_write_spec(tmp_path, power))


def test_power_spec_needs_tree_and_power_table(tmp_path):
    path = _write_spec(tmp_path, "rates = [1, 1]\n", tree=False)
    with pytest.raises(InputError, match="does not exist"):
        load_power_spec(path)
    (tmp_path / "tree.nwk").write_text(TREE_TEXT)
    (tmp_path / "other.toml").write_text('[data]\ntree = "tree.nwk"\n')
    with pytest.raises(InputError, match=r"\[power\] table"):
        load_power_spec(tmp_path / "other.toml")


def test_power_command_refuses_a_non_empty_folder(tmp_path, capsys):
    spec = _write_spec(tmp_path, "rates = [1, 1]\nn_datasets = 2\n")
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("earlier results")
    status = main(["power", str(spec), "--out", str(out)])
    err = capsys.readouterr().err
    assert status == 2
    assert "not empty" in err and "--overwrite" in err and "Traceback" not in err
    assert sorted(p.name for p in out.iterdir()) == ["keep.txt"]
    assert (out / "keep.txt").read_text() == "earlier results"


def test_power_command_reports_a_spec_error_without_traceback(tmp_path, capsys):
    spec = _write_spec(tmp_path, "rates = [1, 1]\nseed = -4\n")
    status = main(["power", str(spec), "--out", str(tmp_path / "new")])
    err = capsys.readouterr().err
    assert status == 2 and "seed" in err and "Traceback" not in err
    assert not (tmp_path / "new").exists()


def test_power_result_save_writes_table_and_figures_and_refuses_overwrite(tmp_path):
    fits = pd.DataFrame({
        "true_correlation": [0.0, 0.0, 0.4, 0.4], "dataset": [1, 2, 1, 2],
        "evo_corr_mean": [0.1, -0.1, 0.3, 0.5], "pearson_r": [0.2, 0.6, 0.5, 0.7],
        "phylo_significant": [False, False, True, False], "pearson_significant": [False, True, True, True],
        "divergences": [0, 0, 0, 1], "rhat": [1.0, 1.0, 1.0, 1.0],
    })
    settings = {"n_species": 5, "n_datasets": 2, "rates": [1.0, 1.0], "measurement_error": "none",
                "hdi_prob": 0.95, "alpha": 0.05}
    res = PowerResult(_power_table(fits), fits, settings)
    paths = res.save(tmp_path / "out")
    assert set(paths) == {"table", "fits", "json"}  # no drawing in studies/
    paths.update(save_power_figure(res, tmp_path / "out"))
    back = pd.read_csv(paths["table"])
    assert back["share_hdi_excludes_zero"].tolist() == [0.0, 0.5]
    assert back["fits_with_warnings"].tolist() == [0, 1]
    assert paths["png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "<svg" in paths["svg"].read_text()[:2000]
    assert "0.500 +- 0.354" in res.to_text()  # sqrt(0.5 * 0.5 / 2) = 0.354
    with pytest.raises(InputError, match="not empty"):
        res.save(tmp_path / "out")
