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
