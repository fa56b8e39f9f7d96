"""The one path from spec to fit: dispatch, output guard first, starting-point check,
a self-describing fit folder, interrupts.

Data are invented (random trees from ``treegen``, traits drawn with the package's
forward model); expected values come from the files written here (pandas) or from
published rules named beside each check.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import threading

import numpy as np
import pandas as pd
import pytest

import cladewise.inference.pooled as pooled_module
import cladewise.pipeline as pipeline
from cladewise.data.treefiles import format_newick
from cladewise.errors import FitInterrupted, InputError
from cladewise.model.simulate import simulate_traits
from cladewise.pipeline import check_spec, fit_from_spec, uses_tree_sample

from treegen import random_tree

FAST = {"chains": 2, "draws": 150, "tune": 150, "seed": 3}


def _write_data(folder, n=12, scale=1.0, values_scale=1.0, se=True, n_trees=3, constant=False, seed=0):
    """Invented data: a tree file, a sample of trees, a table with standard errors."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    tree = random_tree(n, rng, True)
    tree = tree.with_lengths(tree.length * scale)
    (folder / "tree.nwk").write_text(format_newick(tree, digits=17) + "\n")
    sample = [random_tree(n, np.random.default_rng(seed + 10 + i), True) for i in range(n_trees)]
    (folder / "trees.nwk").write_text("".join(format_newick(t.with_lengths(t.length * scale), digits=17) + "\n"
                                              for t in sample))
    y = simulate_traits(tree.with_lengths(tree.length / scale), np.array([[1.0, 0.5], [0.5, 1.0]]),
                        np.zeros(2), rng=rng) * values_scale
    if constant:
        y[:, 1] = 2.5
    table = pd.DataFrame({"species": tree.tip_names, "a": y[:, 0], "b": y[:, 1]})
    if se:
        table["a_se"] = np.round(rng.uniform(0.05, 0.2, n), 4)
        table["b_se"] = np.round(rng.uniform(0.05, 0.2, n), 4)
    table.to_csv(folder / "traits.csv", index=False)
    return table


def _spec(folder, data="data", tree=True, trees=False, model=None, extra=""):
    lines = ["[data]"]
    if tree:
        lines.append(f'tree = "{data}/tree.nwk"')
    if trees:
        lines.append(f'trees = "{data}/trees.nwk"')
    lines.append(f'traits = "{data}/traits.csv"')
    lines += ["", "[model]", model or 'kind = "correlated"\ntraits = ["a", "b"]\nmeasurement_error = "se"']
    lines += ["", "[sampling]"] + [f"{k} = {v}" for k, v in FAST.items()]
    p = folder / "spec.toml"
    p.write_text("\n".join(lines) + "\n" + extra)
    return p


# --------------------------------------------------------------------------- dispatch
@pytest.fixture()
def spy(monkeypatch):
    """Replace both fitting routines by recorders: the dispatch is tested without sampling."""
    calls = []

    def single(*a, **k):
        calls.append("single")
        raise RuntimeError("stop here")

    def sample(*a, **k):
        calls.append(("sample", len(a[2]), k.get("n_trees")))
        raise RuntimeError("stop here")

    monkeypatch.setattr(pipeline, "fit", single)
    monkeypatch.setattr(pooled_module, "fit_tree_sample", sample)
    return calls


def test_one_pipeline_chooses_single_tree_or_tree_sample(tmp_path, spy):
    _write_data(tmp_path / "data")
    cases = [
        (dict(tree=True, trees=True), {}, "single"),  # a spec's sample is used only when asked for
        (dict(tree=True, trees=True), {"n_trees": 2}, ("sample", 3, 2)),
        (dict(tree=True, trees=False), {"trees": tmp_path / "data" / "trees.nwk"}, ("sample", 3, None)),
        (dict(tree=False, trees=True), {}, ("sample", 3, None)),  # only a sample: fit over it
    ]
    for spec_kw, call_kw, expected in cases:
        spy.clear()
        spec = _spec(tmp_path, **spec_kw)
        with pytest.raises(RuntimeError, match="stop here"):
            fit_from_spec(spec, **call_kw)
        assert spy == [expected], (spec_kw, call_kw)


def test_uses_tree_sample_takes_plain_values(tmp_path):
    _write_data(tmp_path / "data")
    from cladewise.config.analysis import load_spec

    both = load_spec(_spec(tmp_path, trees=True))
    assert not uses_tree_sample(both)
    assert uses_tree_sample(both, n_trees=2) and uses_tree_sample(both, trees="x.nwk")
    assert uses_tree_sample(load_spec(_spec(tmp_path, tree=False, trees=True)))


def test_grid_runs_through_the_pipeline(tmp_path, monkeypatch):
    from cladewise.config.grid import GridJob
    from cladewise.studies.remote_fit import pack_job, run_packed_job

    _write_data(tmp_path / "data")
    spec = _spec(tmp_path, trees=True)
    seen = {}

    def record(spec, **kw):
        # the worker's own copies of the files, with the client's content
        seen.update(kw, spec=spec, traits=spec.data.traits.read_bytes(), trees_text=kw["trees"].read_text(),
                    spec_text=spec.path.read_text())
        raise InputError("recorded")

    monkeypatch.setattr(pipeline, "fit_from_spec", record)
    job = GridJob("g1", str(spec), trees=str(tmp_path / "data" / "trees.nwk"), n_trees=2, sampling={"draws": 50})
    row = run_packed_job(pack_job(job))
    assert row["status"] == "failed" and "recorded" in row["message"] and row["files"] == {}
    assert seen["traits"] == (tmp_path / "data" / "traits.csv").read_bytes()
    assert seen["trees_text"] == (tmp_path / "data" / "trees.nwk").read_text()
    assert seen["spec"].path != spec and seen["spec_text"] == spec.read_text()
    assert seen["n_trees"] == 2 and seen["draws"] == 50


def test_output_folder_is_checked_before_any_work(tmp_path, spy):
    _write_data(tmp_path / "data")
    spec = _spec(tmp_path)
    (tmp_path / "taken.txt").write_text("mine")
    for out in (tmp_path / "taken.txt", tmp_path, tmp_path / "data"):
        with pytest.raises(InputError):
            fit_from_spec(spec, out=out, overwrite=True)
    assert spy == []  # nothing was fitted
    assert (tmp_path / "taken.txt").read_text() == "mine"


# --------------------------------------------------------------------------- check
def test_check_spec_summarises_and_builds(tmp_path):
    table = _write_data(tmp_path / "data")
    report = check_spec(_spec(tmp_path))
    assert report.data_summary.n_species == len(table)
    assert report.model["kind"] == "correlated"
    assert "finite at the starting point" in report.to_text()


@pytest.mark.parametrize("kw, words", [
    # the tree reader refuses these first; the start check is the second line of defence
    ({"scale": 1e300}, r"tree height .*is 1\.\d+e\+301.*Rescale"),
    ({"scale": 1e-300}, r"tree height .*is \d\.\d+e-(299|300).*Rescale"),
    ({"values_scale": 1e200}, r"\d\.\d+e\+(199|200).*too large.*Rescale"),
])
def test_extreme_scales_never_reach_the_sampler(tmp_path, kw, words):
    _write_data(tmp_path / "data", **kw)
    spec = _spec(tmp_path)
    with pytest.raises(InputError, match=words):
        check_spec(spec)


def test_starting_point_check_names_the_term_and_cause(tmp_path, monkeypatch):
    # An early burst fixed at rate change -3000 per unit time shrinks every branch below
    # the root to exp(-3000 t) ~ 0 (Harmon et al. 2010 transform), so with exact species
    # means the tree covariance is singular and the log density is -inf at the start.
    # (Extreme scales are refused earlier, by the readers; the rate prior on the tip sd
    # makes the model itself invariant to the tree's units.)
    import nutpie

    import cladewise.inference.compile_cache as compile_cache

    compiled = []
    monkeypatch.setattr(nutpie, "compile_pymc_model", lambda *a, **k: compiled.append(1))
    monkeypatch.setattr(compile_cache, "compile_cached", lambda *a, **k: compiled.append(1))
    _write_data(tmp_path / "data", se=False)
    model = ('kind = "correlated"\ntraits = ["a", "b"]\nevolution = "early_burst"\n'
             "fixed = { rate_change = -3000.0 }")
    with pytest.raises(InputError) as err:
        fit_from_spec(_spec(tmp_path, model=model), draws=10)
    msg = str(err.value)
    assert "sampler cannot start" in msg and "tree_loglik" in msg and "rate_change = -3000" in msg
    assert compiled == []  # refused before the sampler was compiled


def test_too_few_species_and_zero_height_tree_are_refused(tmp_path):
    _write_data(tmp_path / "few" / "data", n=2)
    with pytest.raises(InputError, match="only 2 species matched.*at least 3"):
        check_spec(_spec(tmp_path / "few"))
    _write_data(tmp_path / "flat" / "data")
    tree = (tmp_path / "flat" / "data" / "tree.nwk").read_text()
    import re

    (tmp_path / "flat" / "data" / "tree.nwk").write_text(re.sub(r":[0-9.eE+-]+", ":0", tree))
    with pytest.raises(InputError, match="zero height|tree height is 0|no height"):
        check_spec(_spec(tmp_path / "flat"))


def test_constant_trait_is_refused(tmp_path):
    _write_data(tmp_path / "data", constant=True)
    with pytest.raises(InputError, match="variance|constant"):
        check_spec(_spec(tmp_path))


# --------------------------------------------------------------------------- a real fit
@pytest.fixture(scope="module")
def saved_fits(tmp_path_factory):
    root = tmp_path_factory.mktemp("pipeline")
    table = _write_data(root / "data", n=14)
    spec = _spec(root)
    corr = fit_from_spec(spec, out=root / "fits" / "correlated", progress=False)
    indep_spec = root / "indep.toml"
    indep_spec.write_text(spec.read_text().replace('kind = "correlated"', 'kind = "independent"'))
    fit_from_spec(indep_spec, out=root / "fits" / "independent", progress=False)
    return root, table, corr


@pytest.mark.slow
def test_fit_folder_describes_itself(saved_fits):
    import arviz as az

    root, table, corr = saved_fits
    folder = root / "fits" / "correlated"
    assert (folder / ".cladewise-output").is_file()
    js = json.loads((folder / "summary.json").read_text())
    assert js["spec_text"] == (root / "spec.toml").read_text()
    assert js["tree_newick"].startswith("(") and js["partial"] is False
    idata = az.from_netcdf(folder / "posterior.nc")
    se = idata.constant_data["se"].to_series().unstack()[["a", "b"]]
    want = table.set_index("species")[["a_se", "b_se"]]
    assert np.allclose(se.loc[want.index].to_numpy(), want.to_numpy())


@pytest.mark.slow
def test_report_and_compare_work_without_the_data_files(saved_fits, tmp_path):
    from cladewise.evaluation.compare import compare_fits
    from cladewise.report import write_fit_report
    from cladewise.report.data import read_fit_folder

    root, table, _ = saved_fits
    moved = tmp_path / "moved"
    shutil.move(str(root / "data"), str(moved))
    try:
        folder = root / "fits" / "correlated"
        view = read_fit_folder(folder)
        want = table.set_index("species").loc[view.species, ["a_se", "b_se"]].to_numpy()
        assert view.se is not None and np.allclose(view.se, want)
        assert not any("read again" in n or "could not be read" in n for n in view.notes)
        assert write_fit_report(folder).is_file()
        result = compare_fits({"correlated": folder, "independent": root / "fits" / "independent"})
        assert set(result.table["model"]) == {"correlated", "independent"}
    finally:
        shutil.move(str(moved), str(root / "data"))


# --------------------------------------------------------------------------- interrupts
def _interrupting_sampler(monkeypatch, after_seconds=4.0):
    """Run nutpie for far too many draws and send SIGINT (Ctrl-C) after a few seconds."""
    import nutpie

    real = nutpie.sample

    def slow(compiled, **kw):
        kw["draws"] = 1_000_000
        timer = threading.Timer(after_seconds, os.kill, (os.getpid(), signal.SIGINT))
        timer.start()
        try:
            return real(compiled, **kw)
        finally:
            timer.cancel()

    monkeypatch.setattr(nutpie, "sample", slow)


@pytest.mark.slow
def test_interrupt_saves_nothing_by_default(tmp_path, monkeypatch):
    _write_data(tmp_path / "data", n=8)
    _interrupting_sampler(monkeypatch)
    with pytest.raises(FitInterrupted) as err:
        fit_from_spec(_spec(tmp_path), out=tmp_path / "fit", progress=False)
    assert "nothing was saved" in str(err.value) and "\n" not in str(err.value)
    assert isinstance(err.value, KeyboardInterrupt)
    assert not (tmp_path / "fit").exists()
    assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]


@pytest.mark.slow
def test_interrupt_keeps_partial_draws_when_asked(tmp_path, monkeypatch):
    _write_data(tmp_path / "data", n=8)
    _interrupting_sampler(monkeypatch)
    with pytest.raises(FitInterrupted) as err:
        fit_from_spec(_spec(tmp_path), out=tmp_path / "fit", keep_partial=True, progress=False)
    assert err.value.saved == (tmp_path / "fit").resolve()
    js = json.loads((tmp_path / "fit" / "summary.json").read_text())
    assert js["partial"] is True
    assert any("PARTIAL" in n for n in js["notes"])
    assert not js["diagnostics"]["ok"] and "partial fit" in js["diagnostics"]["problems"][0]
    import arviz as az

    post = az.from_netcdf(tmp_path / "fit" / "posterior.nc").posterior
    assert 0 < post.sizes["draw"] < 1_000_000
    assert np.isfinite(post["evo_corr"].values).all()


# --------------------------------------------------------------------------- cheap versions (no sampler)
def _fake_draws(built, n_chains=2, n_draws=6):
    """Draws that stand in for a sampler's: prior draws of every variable."""
    import pymc as pm

    model = built.model
    names = [rv.name for rv in model.free_RVs] + [d.name for d in model.deterministics]
    prior = pm.sample_prior_predictive(draws=n_chains * n_draws, model=model, var_names=names, random_seed=1,
                                       compile_kwargs={"mode": "FAST_COMPILE"}).prior
    post = prior.stack(s=("chain", "draw")).drop_vars(["s", "chain", "draw"])
    post = post.assign_coords(s=pd.MultiIndex.from_product([range(n_chains), range(n_draws)],
                                                           names=["chain", "draw"])).unstack("s")
    post = post.transpose("chain", "draw", ...)
    rng = np.random.default_rng(0)
    stats = {"diverging": (("chain", "draw"), np.zeros((n_chains, n_draws), bool)),
             "energy": (("chain", "draw"), rng.standard_normal((n_chains, n_draws)))}
    import arviz as az
    import xarray as xr

    return az.InferenceData(posterior=post, sample_stats=xr.Dataset(stats, coords={
        "chain": np.arange(n_chains), "draw": np.arange(n_draws)}))


def _no_sampler(monkeypatch, interrupt: bool):
    """nutpie replaced: no compile; sample() returns stand-in draws, after a Ctrl-C if asked.

    Like nutpie, the stand-in catches the KeyboardInterrupt and returns the draws
    made so far: the pipeline must notice the interrupt all the same.
    """
    import nutpie

    import cladewise.inference.sampling as sampling

    def fake_sample(built, **kw):
        draws = _fake_draws(built)
        if interrupt:
            try:
                os.kill(os.getpid(), signal.SIGINT)
                for _ in range(1000):  # the handler runs between bytecodes
                    pass
            except KeyboardInterrupt:
                return draws
        return draws

    # "compiling" hands the built model itself to the stand-in sampler
    monkeypatch.setattr(sampling, "compile_model", lambda built, sampler="nutpie": built)
    monkeypatch.setattr(nutpie, "sample", fake_sample)


def test_fit_folder_is_self_describing_cheap(tmp_path, monkeypatch):
    from cladewise.report.data import read_fit_folder

    table = _write_data(tmp_path / "data", n=8)
    _no_sampler(monkeypatch, interrupt=False)
    fit_from_spec(_spec(tmp_path), out=tmp_path / "fit", progress=False)
    shutil.move(str(tmp_path / "data"), str(tmp_path / "elsewhere"))
    view = read_fit_folder(tmp_path / "fit")
    want = table.set_index("species").loc[view.species, ["a_se", "b_se"]].to_numpy()
    assert view.se is not None and np.allclose(view.se, want)
    assert view.tree is not None and view.tree.n_tips == 8
    js = json.loads((tmp_path / "fit" / "summary.json").read_text())
    assert js["spec_text"] == (tmp_path / "spec.toml").read_text() and js["tree_newick"].endswith(";")


def test_interrupt_is_noticed_although_the_sampler_swallows_it(tmp_path, monkeypatch):
    _write_data(tmp_path / "data", n=8)
    _no_sampler(monkeypatch, interrupt=True)
    with pytest.raises(FitInterrupted, match="nothing was saved"):
        fit_from_spec(_spec(tmp_path), out=tmp_path / "fit", progress=False)
    assert not (tmp_path / "fit").exists()
    with pytest.raises(FitInterrupted, match="marked partial") as err:
        fit_from_spec(_spec(tmp_path), out=tmp_path / "fit", keep_partial=True, progress=False)
    assert err.value.saved == (tmp_path / "fit").resolve()
    js = json.loads((tmp_path / "fit" / "summary.json").read_text())
    assert js["partial"] is True and not js["diagnostics"]["ok"]
