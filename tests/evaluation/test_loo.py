"""Leave-one-species-out cross-validation and model comparison.

References checked against:
- Gaussian conditioning of a dense multivariate normal (scipy.stats), the
  leave-one-out conditional of Bürkner, Gabry & Vehtari 2021 (Computational
  Statistics 36:1243-1261); covariance kron(C, R) + diag(se^2) with C the shared
  path lengths (Felsenstein 1973, Am. J. Hum. Genet. 25:471).
- Pagel's lambda: C_lambda = lambda C + (1 - lambda) diag(C) (Pagel 1999, Nature 401:877).
- PSIS-LOO against exact leave-one-out refits (Vehtari, Gelman & Gabry 2017,
  Statistics and Computing 27:1413-1432).
"""

from __future__ import annotations

import json
import math
import time
import warnings

import arviz as az
import numpy as np
import pandas as pd
import pytest
import scipy.stats

from cladewise.model.build import ModelData, ModelSpec, build_model
from cladewise.cli.main import main as cli_main
from cladewise.evaluation.compare import compare_fits
from cladewise.evaluation.loo import loo_species
from cladewise.evaluation.refits import loo_clades, refit_influential
from cladewise.errors import InputError
from cladewise.inference.fit import FitResult, finish_fit, pointwise_loglik
from cladewise.inference.sampling import SamplingOptions, sample
from cladewise.studies.simulate import simulate_dataset
from treegen import random_tree

warnings.filterwarnings("ignore", category=RuntimeWarning)
warnings.filterwarnings("ignore", category=UserWarning)

FAST = SamplingOptions(sampler="pymc", chains=2, draws=400, tune=400, seed=11, progress=False)
# one chain runs in-process (no worker start-up), which keeps exact refits cheap
REFIT = SamplingOptions(sampler="pymc", chains=1, draws=800, tune=400, seed=5, progress=False)


# --------------------------------------------------------------------------- helpers
def _shared_path_cov(tree) -> np.ndarray:
    """C_ij = total length of the branches shared by the root-to-tip paths of i and j.

    Written from the definition, independently of cladewise.data.trees.covariance.
    """
    paths = []
    for i in range(tree.n_tips):
        v, nodes = i, set()
        while v != -1:
            nodes.add(v)
            v = int(tree.parent[v])
        paths.append(nodes)
    n = tree.n_tips
    C = np.empty((n, n))
    for i in range(n):
        for j in range(n):
            C[i, j] = sum(tree.length[v] for v in paths[i] & paths[j])
    return C


def _dense_loo(y: np.ndarray, observed: np.ndarray, mean: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """log p(observed cells of species i | all other observed cells), by explicit
    Gaussian conditioning (Rasmussen & Williams 2006, eq. A.6) and scipy."""
    n, k = y.shape
    flat_obs = observed.ravel()
    out = np.zeros(n)
    for i in range(n):
        own = np.zeros((n, k), bool)
        own[i] = observed[i]
        a = np.flatnonzero(own.ravel())
        if a.size == 0:
            continue
        b = np.flatnonzero(flat_obs & ~own.ravel())
        Sab = cov[np.ix_(a, b)]
        Sbb = cov[np.ix_(b, b)]
        m = mean.ravel()[a] + Sab @ np.linalg.solve(Sbb, y.ravel()[b] - mean.ravel()[b])
        S = cov[np.ix_(a, a)] - Sab @ np.linalg.solve(Sbb, Sab.T)
        out[i] = scipy.stats.multivariate_normal.logpdf(y.ravel()[a], m, S)
    return out


def _one_draw(point: dict[str, np.ndarray]) -> az.InferenceData:
    return az.from_dict(posterior={k: np.asarray(v, float)[None, None] for k, v in point.items()})


def _sim_data(n: int, corr: float, seed: int, se: float = 0.2) -> ModelData:
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, True)
    sd = np.array([1.0, 0.7])
    R = np.outer(sd, sd) * np.array([[1.0, corr], [corr, 1.0]])
    sim = simulate_dataset(tree, ["a", "b"], R, [0.0, 1.0], se=se, seed=seed + 1)
    tab = sim.species.set_index("species")
    se_tab = tab[["a_se", "b_se"]].rename(columns={"a_se": "a", "b_se": "b"})
    return ModelData(tree, tab[["a", "b"]], se=se_tab)


def _fit(data: ModelData, kind: str, opts: SamplingOptions = FAST) -> FitResult:
    built = build_model(data, ModelSpec(kind=kind, traits=["a", "b"], measurement_error="se"))
    return finish_fit(built, sample(built, opts), opts, predictive_draws=0)


# --------------------------------------------------------------------------- conditionals
def test_conditionals_correlated_bm_with_se_and_missing_match_dense_conditioning():
    rng = np.random.default_rng(21)
    tree = random_tree(7, rng, ultrametric=False)
    y = rng.normal(size=(7, 2))
    y[2, 1] = np.nan
    y[5, 0] = np.nan
    se = rng.uniform(0.1, 0.4, size=(7, 2))
    species = list(tree.tip_names)
    data = ModelData(tree, pd.DataFrame(y, index=species, columns=["a", "b"]),
                     se=pd.DataFrame(se, index=species, columns=["a", "b"]))
    built = build_model(data, ModelSpec(kind="correlated", traits=["a", "b"], measurement_error="se"))
    # PyMC packs the lower-triangular Cholesky factor row by row: [L00, L10, L11] (from memory;
    # the assertion on R below checks it)
    L = np.array([[1.3, 0.0], [-0.8, 0.6]])
    mu = np.array([0.4, -0.2])
    # the sampled factor is that of the tip covariance R t, t the mean root-to-tip length
    t = float(np.mean(np.diag(_shared_path_cov(tree))))
    packed = np.sqrt(t) * np.array([L[0, 0], L[1, 0], L[1, 1]])
    idata = _one_draw({"root_mean": mu, "tip_chol": packed})
    R = L @ L.T
    engine = built.engine_function()({"root_mean": mu, "tip_chol": packed})
    np.testing.assert_allclose(engine["R"], R, rtol=1e-12)

    observed = np.isfinite(y)
    cov = np.kron(_shared_path_cov(tree), R) + np.diag((se**2).ravel())
    ref = _dense_loo(np.nan_to_num(y), observed, np.tile(mu, (7, 1)), cov)
    got = pointwise_loglik(built, idata).values[0, 0]
    np.testing.assert_allclose(got, ref, rtol=1e-8, atol=1e-10)


def test_conditionals_lambda_regression_are_response_given_predictors():
    rng = np.random.default_rng(5)
    tree = random_tree(9, rng, ultrametric=True)
    x = rng.normal(size=9)
    yv = 1.0 + 0.5 * x + rng.normal(scale=0.5, size=9)
    yv[3] = np.nan  # missing response
    x[6] = np.nan  # missing predictor: species 6 does not inform the regression
    species = list(tree.tip_names)
    data = ModelData(tree, pd.DataFrame({"y": yv, "x": x}, index=species))
    built = build_model(data, ModelSpec(kind="regression", formula="y ~ x", evolution="lambda"))
    lam = 0.6
    # sampled on centred predictors; the reported coefficients and rate come from the model
    point = {"lambda": np.array(lam), "coef_z": np.array([1.1, 0.3]), "tip_sd": np.array(0.9)}
    got = pointwise_loglik(built, _one_draw(point)).values[0, 0]
    import pytensor

    m = built.model
    beta, rate = pytensor.function(m.free_RVs, [m["coef"], m["evo_rate"]], on_unused_input="ignore")(
        *[point[rv.name] for rv in m.free_RVs])
    sd = float(np.sqrt(rate[0]))

    C = _shared_path_cov(tree)
    C_lam = lam * C + (1 - lam) * np.diag(np.diag(C))  # Pagel 1999
    observed = (np.isfinite(yv) & np.isfinite(x))[:, None]
    resid = (yv - beta[0] - beta[1] * np.nan_to_num(x))[:, None]  # y - X beta
    ref = _dense_loo(np.nan_to_num(resid), observed, np.zeros((9, 1)), sd**2 * C_lam)
    np.testing.assert_allclose(got, ref, rtol=1e-8, atol=1e-10)
    assert got[3] == 0.0 and got[6] == 0.0


# --------------------------------------------------------------------------- fitted fixtures
@pytest.fixture(scope="module")
def small_fits():
    """Correlated and independent fits of 8 species simulated with correlation 0.9."""
    data = _sim_data(8, 0.9, seed=3)
    t0 = time.perf_counter()
    fits = {"correlated": _fit(data, "correlated"), "independent": _fit(data, "independent")}
    fits["_seconds"] = time.perf_counter() - t0
    return fits


def test_psis_loo_agrees_with_exact_refits(small_fits):
    fit = small_fits["correlated"]
    loo = loo_species(fit)
    k = loo.pointwise["pareto_k"]
    # the two species with the highest k still below 0.7: the hardest reliable ones for PSIS
    pick = list(k[k <= 0.7].sort_values().index[-2:])
    exact = refit_influential(fit.built, fit.idata, REFIT, loo=loo, species=pick)
    assert sorted(exact.refitted) == sorted(pick)  # order follows sampled Pareto k
    for s in pick:
        diff = exact.pointwise.loc[s, "elpd_i"] - loo.pointwise.loc[s, "elpd_i"]
        # Tolerance 0.15 nats per species: Monte Carlo error of both estimates with ~800
        # draws and k < 0.7 (Vehtari et al. 2017, sec. 4); the value is common practice.
        assert abs(diff) < 0.15, (s, diff)
    untouched = [s for s in loo.pointwise.index if s not in pick]
    np.testing.assert_allclose(exact.pointwise.loc[untouched, "elpd_i"], loo.pointwise.loc[untouched, "elpd_i"])
    assert exact.elpd == pytest.approx(exact.pointwise["elpd_i"].sum())


def test_refit_influential_replaces_exactly_the_high_k_species(small_fits):
    fit = small_fits["correlated"]
    loo = loo_species(fit)
    k = loo.pointwise["pareto_k"]
    # 0.7 is the usual cut (Vehtari et al. 2024); whether a species of this small fit
    # exceeds it depends on the draws, so the threshold is set between the two largest
    # k values: exactly one species is then flagged, and it must be the one refitted.
    second, first = np.sort(k.to_numpy())[-2:]
    thr = float(second + first) / 2
    out = refit_influential(fit.built, fit.idata, REFIT, threshold=thr, loo=loo, max_refits=1)
    top = str(k.idxmax())
    assert out.refitted == [top] and out.flagged == []
    assert np.isfinite(out.pointwise.loc[top, "elpd_i"])
    untouched = [s for s in k.index if s != top]
    np.testing.assert_allclose(out.pointwise.loc[untouched, "elpd_i"], loo.pointwise.loc[untouched, "elpd_i"])
    assert out.elpd == pytest.approx(out.pointwise["elpd_i"].sum())
    if first > 0.7:
        assert top in loo.to_text()  # species above 0.7 are named in the output


def test_correlated_model_wins_on_strongly_correlated_data(small_fits):
    cmp = compare_fits({k: v for k, v in small_fits.items() if not k.startswith("_")})
    top = cmp.table.iloc[0]
    assert top["model"] == "correlated"
    assert top["elpd"] > cmp.table.iloc[1]["elpd"]
    assert cmp.table["weight"].sum() == pytest.approx(1.0, abs=1e-6)
    assert "correlated" in cmp.to_text()


def test_clade_loo_single_species_clades_equal_species_loo(small_fits):
    # holding out one species as a "clade" must reproduce the stored conditional:
    # loglik(all) - loglik(all but i) = log p(y_i | y_-i) (chain rule of probability)
    fit = small_fits["correlated"]
    names = list(fit.built.species)
    clades = loo_clades(fit.built, fit.idata, clades=[[s] for s in names])
    ll = fit.idata.log_likelihood
    var = list(ll.data_vars)[0]
    lpd = np.log(np.exp(ll[var].values.reshape(-1, len(names))).mean(axis=0))
    species = loo_species(fit)
    np.testing.assert_allclose(clades.pointwise["elpd_i"].to_numpy(), species.pointwise["elpd_i"].to_numpy(), atol=1e-6)
    assert np.all(species.pointwise["elpd_i"].to_numpy() <= lpd + 1e-9)
    cut = loo_clades(fit.built, fit.idata, cut_height=0.5 * float(fit.built.data.tree.tip_heights().max()))
    assert sorted(sum(cut.members.values(), [])) == sorted(names)


# --------------------------------------------------------------------------- refusals
def _altered(fit: FitResult, **info) -> FitResult:
    return FitResult(fit.idata.copy(), fit.summary, fit.diagnostics, None, {**fit.info, **info})


def test_refuses_different_values(small_fits):
    a = small_fits["correlated"]
    b = _altered(small_fits["independent"])
    b.idata.observed_data["y"][0, 0] = b.idata.observed_data["y"][0, 0] + 1.0
    with pytest.raises(InputError, match="different values"):
        compare_fits({"a": a, "b": b})


def test_refuses_different_species(small_fits):
    a = small_fits["correlated"]
    b = _altered(small_fits["independent"])
    b.idata = b.idata.assign_coords(species=["x0"] + list(b.idata.observed_data["species"].values[1:]),
                                    groups=["observed_data", "log_likelihood"])
    with pytest.raises(InputError, match="different species"):
        compare_fits({"a": a, "b": b})


def test_refuses_regression_against_joint_model(small_fits):
    a = small_fits["correlated"]
    b = _altered(small_fits["independent"], loglik_kind="conditional", predictors=["Intercept", "b"])
    with pytest.raises(InputError, match="regression"):
        compare_fits({"joint": a, "regression": b})


def test_accepts_same_data_in_another_species_order(small_fits):
    a = small_fits["correlated"]
    b = _altered(small_fits["independent"])
    order = list(b.idata.observed_data["species"].values[::-1])
    b.idata.observed_data = b.idata.observed_data.sel(species=order)
    b.idata.log_likelihood = b.idata.log_likelihood.sel(species=order)
    ref = compare_fits({"a": a, "b": small_fits["independent"]})
    got = compare_fits({"a": a, "b": b})
    np.testing.assert_allclose(got.table["elpd"], ref.table["elpd"])
    np.testing.assert_allclose(got.table["diff_se"], ref.table["diff_se"])
    assert any("order" in n for n in got.notes)


# --------------------------------------------------------------------------- command line
def test_compare_command_writes_files_and_refuses_to_overwrite(small_fits, tmp_path, capsys):
    d1 = small_fits["correlated"].save(tmp_path / "corr")
    d2 = small_fits["independent"].save(tmp_path / "indep")
    out = tmp_path / "cmp"
    assert cli_main(["compare", str(d1), str(d2), "--out", str(out)]) == 0
    table = pd.read_csv(out / "compare.csv")
    assert list(table["model"]) == ["corr", "indep"]
    js = json.loads((out / "compare.json").read_text())
    assert set(js["models"]) == {"corr", "indep"} and js["loglik_kind"] == "joint"
    before = (out / "compare.csv").read_text()
    assert cli_main(["compare", str(d1), str(d2), "--out", str(out)]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert (out / "compare.csv").read_text() == before
    assert cli_main(["compare", str(d1), str(d2), "--out", str(out), "--overwrite", "--names", "x", "y"]) == 0
    assert list(pd.read_csv(out / "compare.csv")["model"]) == ["x", "y"]
    # default output folder: the folder holding the first fit
    assert cli_main(["compare", str(d1), str(d2)]) == 0
    assert (tmp_path / "compare.json").is_file()


# --------------------------------------------------------------------------- slow
@pytest.mark.slow
def test_psis_total_elpd_matches_exact_loo_by_refitting_every_species():
    data = _sim_data(12, 0.6, seed=8)
    fit = _fit(data, "correlated", SamplingOptions(chains=2, draws=600, tune=500, seed=2, progress=False))
    loo = loo_species(fit)
    exact = refit_influential(fit.built, fit.idata, SamplingOptions(chains=2, draws=600, tune=500, seed=9, progress=False),
                              loo=loo, species=list(fit.built.species))
    d = exact.pointwise["elpd_i"] - loo.pointwise["elpd_i"]
    # |total difference| below 2 se of the pointwise differences plus 0.3 nats of Monte
    # Carlo error (Vehtari et al. 2017 compare PSIS-LOO with exact LOO the same way;
    # the 0.3 allowance is common practice)
    se_d = math.sqrt(len(d) * np.var(d))
    assert abs(d.sum()) < 2 * se_d + 0.3, (d.sum(), se_d)


@pytest.mark.slow
@pytest.mark.parametrize("corr, expect_win", [(0.9, True), (0.0, False)])
def test_elpd_detects_evolutionary_correlation_on_40_species(corr, expect_win):
    data = _sim_data(40, corr, seed=31)
    opts = SamplingOptions(chains=2, draws=500, tune=500, seed=4, progress=False)
    cmp = compare_fits({"correlated": _fit(data, "correlated", opts), "independent": _fit(data, "independent", opts)})
    row = cmp.table.set_index("model")
    if expect_win:
        assert cmp.table.iloc[0]["model"] == "correlated"
        assert row.loc["independent", "elpd_diff"] > 2 * row.loc["independent", "diff_se"]
    else:
        other = cmp.table.iloc[1]
        assert other["elpd_diff"] < 2 * other["diff_se"]
        assert "not distinguishable" in other["verdict"]
