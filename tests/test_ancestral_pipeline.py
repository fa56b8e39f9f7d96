"""Ancestral values and predictions through the pipeline, the fit folder and the report.

The sampler is replaced by prior draws (test_pipeline's stand-in), so no compile: what
is checked is the plumbing (kept tree-only tips, files, groups, report), while the
numbers are checked against dense conditioning in tests/inference/test_ancestral.py.
"""

from __future__ import annotations

import json

import arviz as az
import numpy as np
import pandas as pd

from cladewise.config.analysis import load_spec
from cladewise.pipeline import fit_from_spec
from test_pipeline import _fake_draws, _no_sampler, _spec, _write_data


def test_tree_only_tips_are_kept_and_predicted_and_reported(tmp_path, monkeypatch):
    from cladewise.report import write_fit_report

    table = _write_data(tmp_path / "data", n=10)
    table.iloc[2:].to_csv(tmp_path / "data" / "traits.csv", index=False)  # two tips lose their row
    spec = _spec(tmp_path)
    spec.write_text(spec.read_text().replace("[data]\n", "[data]\nkeep_tree_only = true\n"))
    assert load_spec(spec).data.keep_tree_only is True
    _no_sampler(monkeypatch, interrupt=False)
    res = fit_from_spec(spec, out=tmp_path / "fit", progress=False)
    out = tmp_path / "fit"
    assert len(res.built.species) == 10
    pred = pd.read_csv(out / "predictions.csv")
    lost = set(table["species"].iloc[:2])
    assert set(pred["species"]) == lost and len(pred) == 4  # both traits of both species
    assert (pred["hdi_low"] < pred["mean"]).all() and (pred["mean"] < pred["hdi_high"]).all()
    anc = pd.read_csv(out / "ancestral.csv")
    assert len(anc) == 9 * 2 and set(anc["trait"]) == {"a", "b"}  # 9 internal nodes of 10 tips
    assert anc[["tip_a", "tip_b"]].notna().all().all()
    idata = az.from_netcdf(out / "posterior.nc")
    assert idata["ancestral"]["node_mean"].shape == (9, 2)
    assert idata["predictions"]["predicted_value"].sizes["cell"] == 4
    js = json.loads((out / "summary.json").read_text())
    assert js["ancestral"]["n_predicted_cells"] == 4
    assert any("keep_tree_only" in n for n in js["notes"])
    html = write_fit_report(out).read_text()
    assert "PREDICTIONS" in html and "Ancestral values" in html
    assert (out / "figures" / "ancestral_1.png").is_file()


def test_pruned_by_default_and_ancestral_can_be_turned_off(tmp_path, monkeypatch):
    table = _write_data(tmp_path / "data", n=8)
    table.iloc[1:].to_csv(tmp_path / "data" / "traits.csv", index=False)
    _no_sampler(monkeypatch, interrupt=False)
    res = fit_from_spec(_spec(tmp_path), out=tmp_path / "fit", progress=False, ancestral=False)
    assert len(res.built.species) == 7
    assert not (tmp_path / "fit" / "ancestral.csv").exists()
    assert "ancestral" not in az.from_netcdf(tmp_path / "fit" / "posterior.nc").groups()


def test_tree_sample_fit_reconstructs_on_the_reference_tree(tmp_path, monkeypatch):
    import cladewise.inference.sampling as sampling

    _write_data(tmp_path / "data", n=8, n_trees=2)
    _no_sampler(monkeypatch, interrupt=False)
    monkeypatch.setattr(sampling, "sample", lambda built, opts, **kw: _fake_draws(built))
    fit_from_spec(_spec(tmp_path, trees=True), out=tmp_path / "fit", progress=False, n_trees=2)
    js = json.loads((tmp_path / "fit" / "summary.json").read_text())
    assert js["ancestral"]["reference_tree_only"] is True
    anc = pd.read_csv(tmp_path / "fit" / "ancestral.csv")
    assert anc["node"].nunique() == 7 and np.isfinite(anc["mean"]).all()  # padding nodes left out


def test_discrete_traits_get_state_probabilities_in_the_folder_and_report(tmp_path, monkeypatch):
    """Threshold model: predicted and ancestral state probabilities reach the fit folder and report.

    The numbers themselves are checked against dense Gaussian conditioning of the
    liabilities in tests/model/test_threshold.py; here they must be probabilities that
    sum to 1 and equal the library functions' values for the same draws.
    """
    from cladewise.evaluation.discrete import state_probabilities
    from cladewise.report import write_fit_report

    table = _write_data(tmp_path / "data", n=10)
    table["night"] = np.where(table["b"] > table["b"].median(), "yes", "no")
    table.loc[[1, 4], "night"] = ""  # two unknown states, to be predicted
    table.to_csv(tmp_path / "data" / "traits.csv", index=False)
    spec = _spec(tmp_path, model='kind = "correlated"\ntraits = ["a", "night"]\n'
                 'discrete = { night = ["no", "yes"] }')
    _no_sampler(monkeypatch, interrupt=False)
    import nutpie

    # the liabilities have a flat prior (their density is the tree likelihood), so the
    # stand-in draws are random points on the unconstrained scale, not prior draws
    monkeypatch.setattr(nutpie, "sample", lambda built, **kw: _point_draws(built))
    res = fit_from_spec(spec, out=tmp_path / "fit", progress=False)
    out = tmp_path / "fit"
    sp = pd.read_csv(out / "state_predictions.csv")
    assert set(sp["species"]) == set(table["species"].iloc[[1, 4]])
    np.testing.assert_allclose(sp["P(no)"] + sp["P(yes)"], 1.0, rtol=1e-9)
    ref = state_probabilities(res, seed=int(res.info["sampling"]["seed"]))
    np.testing.assert_allclose(sp["P(yes)"].to_numpy(), ref["P(yes)"].to_numpy(), rtol=1e-9)
    ns = pd.read_csv(out / "ancestral_states.csv")
    assert len(ns) == 9 and (ns["trait"] == "night").all()
    np.testing.assert_allclose(ns["P(no)"] + ns["P(yes)"], 1.0, rtol=1e-9)
    html = write_fit_report(out).read_text()
    assert "PREDICTED probabilities" in html and "State probabilities at the root" in html


def _point_draws(built, n_chains=2, n_draws=6):
    """Stand-in posterior: small random points on the unconstrained scale (no compile, no sampler)."""
    import xarray as xr

    model = built.model
    outs = model.unobserved_value_vars  # free variables on their own scale, and deterministics
    fn = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore", point_fn=False,
                          mode="FAST_COMPILE")
    shapes = model.eval_rv_shapes()
    rng = np.random.default_rng(3)
    rows = []
    for _ in range(n_chains * n_draws):
        pt = {v.name: 0.1 * rng.standard_normal(shapes[v.name]) for v in model.value_vars}
        rows.append(fn(**pt))
    dims = model.named_vars_to_dims
    data = {}
    for j, var in enumerate(outs):
        arr = np.stack([r[j] for r in rows]).reshape((n_chains, n_draws) + np.shape(rows[0][j]))
        data[var.name] = (("chain", "draw") + tuple(dims.get(var.name, ())) if var.name in dims else
                          ("chain", "draw") + tuple(f"{var.name}_dim_{d}" for d in range(arr.ndim - 2)), arr)
    coords = {k: list(v) for k, v in model.coords.items()}
    post = xr.Dataset({k: (d, a) for k, (d, a) in data.items()},
                      coords={"chain": np.arange(n_chains), "draw": np.arange(n_draws),
                              **{k: v for k, v in coords.items() if any(k in d for d, _ in data.values())}})
    stats = {"diverging": (("chain", "draw"), np.zeros((n_chains, n_draws), bool)),
             "energy": (("chain", "draw"), rng.standard_normal((n_chains, n_draws)))}
    return az.InferenceData(posterior=post, sample_stats=xr.Dataset(stats, coords={
        "chain": np.arange(n_chains), "draw": np.arange(n_draws)}))


def test_probit_regression_and_measured_traits_reach_the_folder_and_report(tmp_path, monkeypatch):
    """A discrete response regressed on a trait, and a discrete trait beside traits with standard errors.

    Plumbing only (the numbers are checked against statsmodels' probit and dense
    Gaussian algebra in tests/model/test_threshold_combined.py): state predictions for
    the species without a state, no node states for a regression, replicated states
    that are state codes, and a report that renders.
    """
    import nutpie

    from cladewise.report import write_fit_report

    table = _write_data(tmp_path / "data", n=10)
    table["night"] = np.where(table["b"] > table["b"].median(), "yes", "no")
    table.loc[[3], "night"] = ""
    table["a_se"] = 0.1
    table.to_csv(tmp_path / "data" / "traits.csv", index=False)
    _no_sampler(monkeypatch, interrupt=False)
    monkeypatch.setattr(nutpie, "sample", lambda built, **kw: _point_draws(built))
    spec = _spec(tmp_path, model='kind = "regression"\nformula = "night ~ a"\ndiscrete = { night = ["no", "yes"] }')
    res = fit_from_spec(spec, out=tmp_path / "fit", progress=False)
    out = tmp_path / "fit"
    sp = pd.read_csv(out / "state_predictions.csv")
    assert list(sp["species"]) == [table["species"].iloc[3]]
    assert 0.0 < float(sp["P(yes)"].iloc[0]) < 1.0
    assert not (out / "ancestral_states.csv").exists()
    rep = res.idata.posterior_predictive["y_rep"].values
    assert set(np.unique(rep)) <= {0.0, 1.0}
    assert "coef" in res.idata.posterior
    assert "PREDICTED probabilities" in write_fit_report(out).read_text()

    spec2 = _spec(tmp_path, model='kind = "correlated"\ntraits = ["a", "night"]\nmeasurement_error = "se"\n'
                  'species_covariance = true\ndiscrete = { night = ["no", "yes"] }')
    res2 = fit_from_spec(spec2, out=tmp_path / "fit2", progress=False)
    assert {"phylo_share", "species_corr", "evo_corr"} <= set(res2.idata.posterior)
    assert (tmp_path / "fit2" / "ancestral_states.csv").is_file()
    write_fit_report(tmp_path / "fit2")
