"""Phylogenetic signal per trait: Blomberg's K through the data path, the lambda posterior
through the one fit path, and the files of `cladewise signal`.

Data: the invented demo (demo_data/) and data simulated here with numpy on random trees.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import cladewise
from cladewise.evaluation.blomberg import blomberg_k
from cladewise.evaluation.signal import trait_signal
from cladewise.model.build import ModelData
from cladewise.pipeline import prepare_analysis

from treegen import random_tree


def _frame(path) -> pd.DataFrame:
    return pd.read_csv(path, comment="#")


def test_k_table_from_a_dataframe_matches_the_k_of_each_trait(demo_data, repo_root):
    res = cladewise.signal_traits(demo_data / "vadicola_tree.nwk", _frame(demo_data / "vadicola_species.csv"),
                                  traits=["head_width_mm", "prey_size_mm", "stream_temp_c"],
                                  log=["head_width_mm", "prey_size_mm"], with_lambda=False, permutations=99, seed=4)
    data = prepare_analysis(repo_root / "models" / "demo_lambda_regression.toml").model_data
    table = res.table
    assert list(table["trait"]) == ["head_width_mm", "prey_size_mm", "stream_temp_c"]
    for j, t in enumerate(table["trait"]):
        ref = blomberg_k(data.tree, data.values[t].to_numpy(), permutations=99, seed=4 + j)
        assert table.loc[j, "K"] == ref.k and table.loc[j, "K_p_value"] == ref.p_value
    # stream_temp_c has one blank cell: that species is left out of its K, and said so
    assert table.set_index("trait").loc["stream_temp_c", "n_species_K"] == data.tree.n_tips - 1
    assert any("stream_temp_c: 1 species without a value" in n for n in res.to_text().splitlines())
    assert "lambda_mean" not in table.columns
    assert "<table>" in res._repr_html_() and "K is descriptive" in repr(res)


@pytest.mark.slow
def test_lambda_posterior_recovers_signal_and_its_absence():
    # recovery on simulated data: values drawn with Brownian motion on the tree have
    # lambda = 1; values drawn independently of the tree have lambda = 0 (Pagel 1999).
    from cladewise.data.trees import covariance
    from cladewise.inference.sampling import SamplingOptions

    rng = np.random.default_rng(31)
    tree = random_tree(60, rng, ultrametric=True)
    C = covariance(tree)
    bm = np.linalg.cholesky(C) @ rng.normal(size=60)
    iid = rng.normal(size=60) * np.sqrt(C[0, 0])
    values = pd.DataFrame({"bm": bm, "iid": iid}, index=list(tree.tip_names))
    data = ModelData(tree=tree, values=values)
    opts = SamplingOptions(chains=2, draws=300, tune=300, seed=2, progress=False)
    res = trait_signal(data, options=opts, permutations=199)
    t = res.table.set_index("trait")
    assert t.loc["bm", "lambda_mean"] > 0.7 and t.loc["bm", "lambda_hdi_high"] > 0.95
    assert t.loc["iid", "lambda_mean"] < 0.35 and t.loc["iid", "lambda_hdi_low"] < 0.05
    assert t.loc["bm", "P(lambda>0.1)"] > 0.95
    assert t.loc["bm", "K_p_value"] < 0.05
    draws = res["bm"].lambda_draws
    assert draws.shape == (2, 300) and np.all((draws >= 0) & (draws <= 1))


def test_lambda_fits_take_the_measurement_error_of_each_trait(demo_data, monkeypatch):
    # no sampling: the one-trait fit is replaced by a recorder of the settings it gets
    import types

    import xarray as xr

    import cladewise.evaluation.signal as sig

    seen = {}

    def fake_fit(data, trait, me, priors, opts):
        seen[trait] = (me, priors)
        post = xr.Dataset({"lambda": (("chain", "draw"), np.full((2, 5), 0.5))})
        return types.SimpleNamespace(idata=types.SimpleNamespace(posterior=post), diagnostics=None,
                                     info={"notes": []})

    monkeypatch.setattr(sig, "_lambda_fit", fake_fit)
    res = cladewise.signal_traits(demo_data / "vadicola_tree.nwk", _frame(demo_data / "vadicola_species.csv"),
                                  traits=["head_width_mm", "stream_temp_c"], measurement_error="se",
                                  priors={"lambda_beta": [2.0, 2.0], "lkj_eta": 2.0}, permutations=0)
    # stream_temp_c has no standard-error column: its model has none, and the output says so
    assert seen["head_width_mm"][0] == "se" and seen["stream_temp_c"][0] == "none"
    assert "no standard errors in the table" in res.to_text()
    assert res.table.set_index("trait").loc["stream_temp_c", "lambda_mean"] == 0.5
    assert np.isnan(res.table.loc[0, "K_p_value"])  # no permutations, no p-value
