"""Fitting from Python objects (cladewise.fit_traits): the same data path, settings and
fit as a spec file, clear errors for bad input, and the display of results.

Data: the invented demo (demo_data/) and tiny invented trees. The reference for the
"same as the spec route" checks is the spec route itself (prepare_analysis,
fit_from_spec), read from the same files with pandas (pandas.read_csv).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import cladewise
from cladewise.data.treefiles import format_newick, read_tree
from cladewise.errors import InputError
from cladewise.inference.diagnostics import Diagnostics
from cladewise.inference.fit import FitResult
from cladewise.pipeline import fit_from_spec, prepare_analysis


def _frame(path) -> pd.DataFrame:
    return pd.read_csv(path, comment="#")


def _same_model_data(a, b) -> None:
    assert list(a.tree.tip_names) == list(b.tree.tip_names)
    np.testing.assert_array_equal(a.tree.parent, b.tree.parent)
    np.testing.assert_array_equal(a.tree.length, b.tree.length)
    pd.testing.assert_frame_equal(a.values, b.values, check_exact=True)
    for name in ("se", "n", "sample_var"):
        fa, fb = getattr(a, name), getattr(b, name)
        assert (fa is None) == (fb is None), name
        if fa is not None:
            pd.testing.assert_frame_equal(fa, fb, check_exact=True)
    assert (a.specimens is None) == (b.specimens is None)
    if a.specimens is not None:
        pd.testing.assert_frame_equal(a.specimens.reset_index(drop=True), b.specimens.reset_index(drop=True),
                                      check_exact=True)
    assert a.notes == b.notes


def test_species_table_builds_the_same_model_data_as_the_spec(repo_root, demo_data):
    # reference: the spec route (prepare_analysis) on the same files
    spec = prepare_analysis(repo_root / "models" / "demo_lambda_regression.toml")
    prep = cladewise.prepare_traits(
        demo_data / "vadicola_tree.nwk", _frame(demo_data / "vadicola_species.csv"),
        formula="prey_size_mm ~ head_width_mm + stream_temp_c", evolution="lambda", measurement_error="se",
        log=["head_width_mm", "prey_size_mm"], chains=4, draws=1000, tune=1000, seed=2024)
    _same_model_data(prep.model_data, spec.model_data)
    assert prep.model_spec == spec.model_spec
    assert prep.options == spec.options
    assert prep.data_summary.to_dict()["n_species"] == spec.data_summary.to_dict()["n_species"]


def test_specimen_table_builds_the_same_model_data_as_the_spec(repo_root, demo_data):
    spec = prepare_analysis(repo_root / "models" / "demo_correlated.toml")
    newick = (demo_data / "vadicola_tree.nwk").read_text()
    prep = cladewise.prepare_traits(
        newick, _frame(demo_data / "vadicola_specimens.csv"), traits=["head_width_mm", "prey_size_mm"],
        specimens=True, log=["head_width_mm", "prey_size_mm"], measurement_error="specimens", seed=2024)
    _same_model_data(prep.model_data, spec.model_data)
    assert prep.model_spec == spec.model_spec
    assert prep.model_spec.kind == "correlated"  # two traits, no formula


def test_tree_as_object_string_or_file_gives_the_same_data(demo_data):
    table = _frame(demo_data / "vadicola_species.csv")
    path = demo_data / "vadicola_tree.nwk"
    a = cladewise.prepare_traits(path, table, traits=["head_width_mm"]).model_data
    b = cladewise.prepare_traits(str(path), table, traits=["head_width_mm"]).model_data
    c = cladewise.prepare_traits(read_tree(path), table, traits=["head_width_mm"]).model_data
    d = cladewise.prepare_traits(format_newick(read_tree(path), digits=17), table, traits=["head_width_mm"]).model_data
    for other in (b, c, d):
        _same_model_data(a, other)


def test_species_as_index_and_missing_values(demo_data):
    table = _frame(demo_data / "vadicola_species.csv")
    a = cladewise.prepare_traits(demo_data / "vadicola_tree.nwk", table, traits=["stream_temp_c"]).model_data
    b = cladewise.prepare_traits(demo_data / "vadicola_tree.nwk", table.set_index("species"),
                                 traits=["stream_temp_c"]).model_data
    _same_model_data(a, b)
    assert a.values["stream_temp_c"].isna().sum() == 1  # the demo's one blank cell stays missing


TREE = "((a:1,b:1):1,(c:1.5,d:1.5):0.5,e:2);"


def _tiny() -> pd.DataFrame:
    return pd.DataFrame({"species": list("abcde"), "x": [1.0, 1.2, 0.3, 0.1, 0.8], "y": [2.0, 2.5, 1.0, 0.7, 1.9]})


@pytest.mark.parametrize("tree, table, traits, match", [
    ("((a:1,b:1):1,(c:1.5,d:1.5):0.5,e:2", _tiny(), ["x"], "Newick"),
    ("((a:1,b:1):1,(c:1.5,d:1.5:0.5,e:2);", _tiny(), ["x"], "Newick string"),
    ("no_such_tree_file.nwk", _tiny(), ["x"], "neither a file that exists nor Newick"),
    (TREE, _tiny().rename(columns={"species": "taxon"}), ["x"], "no species column 'species'"),
    (TREE, _tiny(), ["z"], "no trait column 'z'"),
    (TREE, _tiny(), ["X"], "Did you mean 'x'"),
    (TREE, _tiny(), "x", "list of column names"),
    (TREE, _tiny().assign(x=["1.0", "1,2", "0.3", "0.1", "0.8"]), ["x"], "row 1"),
    (TREE, [1, 2, 3], ["x"], "DataFrame"),
    (12, _tiny(), ["x"], "tree must be"),
])
def test_bad_input_gives_a_clear_input_error(tree, table, traits, match):
    with pytest.raises(InputError, match=match):
        cladewise.prepare_traits(tree, table, traits=traits)


def test_bad_settings_are_checked_by_the_spec_tables():
    with pytest.raises(InputError, match="evolution"):
        cladewise.prepare_traits(TREE, _tiny(), traits=["x", "y"], evolution="brownian-ish")
    with pytest.raises(InputError, match="chains"):
        cladewise.prepare_traits(TREE, _tiny(), traits=["x", "y"], chains=0)


def _fake_result() -> FitResult:
    summary = pd.DataFrame([{"quantity": "evo_corr[x, y]", "variable": "evo_corr", "mean": 0.41, "sd": 0.2,
                             "hdi_low": 0.02, "hdi_high": 0.77, "prob_positive": 0.97, "r_hat": 1.001,
                             "ess_bulk": 1500.0, "ess_tail": 1200.0}])
    diag = Diagnostics(max_rhat=1.001, min_ess_bulk=1500, min_ess_tail=1200, divergences=0, min_bfmi=0.9,
                       n_draws=4000)
    info = {"description": "correlated evolution <of> x, y", "n_species": 5, "traits": ["x", "y"]}
    return FitResult(idata=None, summary=summary, diagnostics=diag, built=None, info=info)


def test_result_displays_as_text_and_html():
    res = _fake_result()
    text = repr(res)
    assert text == str(res) == res.to_text()
    assert "evo_corr[x, y]" in text and "0.41" in text
    html = res._repr_html_()
    assert "<table>" in html and "evo_corr[x, y]" in html and "0.41" in html
    assert "&lt;of&gt;" in html  # user text escaped
    assert "not evidence that one trait causes" in html


@pytest.mark.slow
def test_notebook_call_gives_the_same_summary_as_the_spec_route(repo_root, demo_data, tmp_path):
    # reference: fit_from_spec on the demo spec with the same data, settings and seed
    small = {"chains": 2, "draws": 60, "tune": 60, "seed": 5}
    by_spec = fit_from_spec(repo_root / "models" / "demo_lambda_regression.toml", progress=False, **small)
    by_call = cladewise.fit_traits(
        demo_data / "vadicola_tree.nwk", _frame(demo_data / "vadicola_species.csv"),
        formula="prey_size_mm ~ head_width_mm + stream_temp_c", evolution="lambda", measurement_error="se",
        log=["head_width_mm", "prey_size_mm"], progress=False, **small)
    pd.testing.assert_frame_equal(by_call.summary, by_spec.summary)
    assert "fit_traits(" in by_call.info["command"]
    page = by_call.report(tmp_path / "fit")
    assert page.name == "report.html" and "fit_traits(" in page.read_text()
    with pytest.raises(InputError, match="not empty"):
        by_call.report(tmp_path / "fit")
