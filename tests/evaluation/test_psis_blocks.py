"""PSIS-LOO in blocks of species equals ArviZ's PSIS-LOO on the whole matrix.

Reference: ``arviz.loo`` (ArviZ, Vehtari, Gelman & Gabry 2017, Stat. Comput. 27:1413)
run on the full (chain, draw, species) array; the blocked version must give the same
pointwise terms, Pareto k, total, se and p_loo.
"""

import arviz as az
import numpy as np
import pytest
import xarray as xr

from cladewise.evaluation import loo


def _draws(seed: int = 3, chains: int = 4, draws: int = 300, n: int = 57) -> tuple[xr.DataArray, xr.Dataset]:
    rng = np.random.default_rng(seed)
    # a few species with heavy-tailed log densities, so that some Pareto k are large
    scale = np.where(rng.uniform(size=n) < 0.15, 3.0, 0.3)
    ll = rng.normal(-1.0, 1.0, size=(chains, draws, n)) * scale - rng.gamma(1.0, 1.0, size=(1, 1, n))
    da = xr.DataArray(ll, dims=("chain", "draw", "species"),
                      coords={"chain": np.arange(chains), "draw": np.arange(draws),
                              "species": [f"sp{i}" for i in range(n)]})
    # an autocorrelated parameter: its relative ESS enters ArviZ's k-hat threshold and MCSE
    mu = np.cumsum(rng.normal(size=(chains, draws)), axis=1) * 0.1
    post = xr.Dataset({"mu": xr.DataArray(mu, dims=("chain", "draw"))})
    return da, post


@pytest.mark.parametrize("block_species", [1, 10, 56])
def test_blocked_psis_equals_arviz_on_the_whole_matrix(monkeypatch, block_species):
    ll, post = _draws()
    whole = az.loo(az.InferenceData(log_likelihood=xr.Dataset({"y": ll}), posterior=post), pointwise=True)
    monkeypatch.setattr(loo, "PSIS_CHUNK_BYTES", 8 * ll.sizes["chain"] * ll.sizes["draw"] * block_species)
    got = loo.psis(ll, post, "species")
    np.testing.assert_allclose(got.loo_i.values, whole.loo_i.values, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(got.pareto_k.values, whole.pareto_k.values, rtol=1e-12, atol=1e-12)
    for field in ("elpd_loo", "se", "p_loo"):
        assert float(got[field]) == pytest.approx(float(whole[field]), rel=1e-12, abs=1e-12)
    assert int(got.n_data_points) == ll.sizes["species"] and bool(got.warning) == bool(whole.warning)
    assert list(got.loo_i["species"].values) == list(ll["species"].values)
