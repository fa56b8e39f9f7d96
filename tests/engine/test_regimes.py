"""Multi-rate Brownian motion in the engine (one rate matrix per regime) against dense
references written here.

Reference (O'Meara, Ané, Sanderson & Wainwright 2006, Evolution 60:922-933, multi-rate
Brownian motion; its multivariate form with one rate matrix per regime): the tip
covariance is ``sum_r C_r (x) R_r`` where ``C_r[i, j]`` is the length of the path
shared by tips i and j (from the top of the root edge) that lies in regime r.
Observations add ``I (x) E + blockdiag(S_i)``. Densities and conditionals are then
computed with scipy on the dense matrix.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.stats

from cladewise.engine import (
    ancestral_states,
    loglik,
    loglik_and_grad,
    loo_conditionals,
    loo_logdensity,
    loo_logdensity_draws,
)
from cladewise.engine.dense import error_blocks
from cladewise.engine.testing import random_rate_matrix
from cladewise.errors import InputError
from engine_cases import make_case


# --------------------------------------------------------------------- dense reference
def regime_node_covariances(parent, lengths, regime, n_reg):
    """``C_r[u, v]``: shared root-to-node path of nodes u and v spent in regime r."""
    n = len(parent)
    path = [None] * n
    path[n - 1] = {n - 1}
    for v in range(n - 2, -1, -1):
        path[v] = path[parent[v]] | {v}
    C = np.zeros((n_reg, n, n))
    for u in range(n):
        for v in range(u, n):
            for w in path[u] & path[v]:
                C[regime[w], u, v] += lengths[w]
            C[:, v, u] = C[:, u, v]
    return C


def dense_parts(case, R, regime):
    n_tips, k = case["y"].shape
    Cn = regime_node_covariances(case["parent"], case["lengths"], regime, R.shape[0])
    cov_x = sum(np.kron(Cn[r], R[r]) for r in range(R.shape[0]))
    cov_tips = cov_x[: n_tips * k, : n_tips * k]
    cov_y = (cov_tips + np.kron(np.eye(n_tips), case["E"])
             + scipy.linalg.block_diag(*error_blocks(case["err_var"])))
    return cov_x, cov_y


def dense_loglik(case, R, regime):
    _, cov = dense_parts(case, R, regime)
    n_tips = case["y"].shape[0]
    obs = np.ravel(case["observed"])
    return scipy.stats.multivariate_normal.logpdf(
        np.ravel(case["y"])[obs], np.tile(case["mu"], n_tips)[obs], cov[np.ix_(obs, obs)])


def dense_loo(case, R, regime):
    _, cov = dense_parts(case, R, regime)
    y, observed, mu = case["y"], case["observed"], case["mu"]
    n_tips, k = y.shape
    obs = np.ravel(observed)
    yv, mv = np.ravel(y), np.tile(mu, n_tips)
    mean, ccov, ld = np.empty((n_tips, k)), np.empty((n_tips, k, k)), np.zeros(n_tips)
    for i in range(n_tips):
        blk = slice(i * k, (i + 1) * k)
        rest = obs.copy()
        rest[blk] = False
        A = scipy.linalg.solve(cov[np.ix_(rest, rest)], cov[blk][:, rest].T).T
        mean[i] = mv[blk] + A @ (yv[rest] - mv[rest])
        ccov[i] = cov[blk, blk] - A @ cov[blk][:, rest].T
        o = observed[i]
        if o.any():
            ld[i] = scipy.stats.multivariate_normal.logpdf(y[i, o], mean[i, o],
                                                           ccov[i][np.ix_(o, o)])
    return mean, ccov, ld


def _case(seed, n_tips, k, n_reg, **kw):
    case = make_case(seed, n_tips, k, **kw)
    rng = np.random.default_rng(seed + 1000)
    R = np.stack([random_rate_matrix(k, rng) * s for s in rng.uniform(0.3, 3.0, n_reg)])
    # regimes on random branches (stronger than painted clades: every pattern occurs)
    regime = rng.integers(0, n_reg, len(case["parent"]))
    return case, R, regime


CASES = [(1, 12, 1, 2, {}), (2, 14, 2, 3, {"with_E": True}),
         (3, 11, 3, 2, {"root_edge": True, "with_E": True}),
         (4, 13, 2, 2, {"max_children": 4, "root_edge": True, "err_full": True}),
         (5, 10, 1, 3, {"zero_internal": 0.3, "n_species_missing": 1})]


@pytest.mark.parametrize("seed,n,k,n_reg,kw", CASES)
def test_regime_loglik_loo_match_dense_closed_form(seed, n, k, n_reg, kw):
    case, R, regime = _case(seed, n, k, n_reg, **kw)
    ref = dense_loglik(case, R, regime)
    args = {kk: v for kk, v in case.items() if kk != "R"}
    assert loglik(**args, R=R, regime=regime) == pytest.approx(ref, rel=1e-8, abs=1e-8)
    mean, cov = loo_conditionals(**args, R=R, regime=regime)
    ld = loo_logdensity(**args, R=R, regime=regime)
    rmean, rcov, rld = dense_loo(case, R, regime)
    np.testing.assert_allclose(mean, rmean, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(cov, rcov, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(ld, rld, rtol=1e-8, atol=1e-9)


@pytest.mark.parametrize("seed,n,k,n_reg,kw", CASES[:4])
def test_regime_ancestral_states_match_dense_conditioning(seed, n, k, n_reg, kw):
    # Reference: joint Gaussian of all nodes' latent values (covariance
    # sum_r C_r (x) R_r over nodes) and the observations, conditioned with scipy.
    case, R, regime = _case(seed, n, k, n_reg, **kw)
    args = {kk: v for kk, v in case.items() if kk != "R"}
    mean, cov = ancestral_states(**args, R=R, regime=regime)
    cov_x, cov_y = dense_parts(case, R, regime)
    n_tips = case["y"].shape[0]
    nn = len(case["parent"])
    obs = np.ravel(case["observed"])
    cov_xy = cov_x[:, : n_tips * k][:, obs]
    A = scipy.linalg.solve(cov_y[np.ix_(obs, obs)], cov_xy.T).T
    pm_ = np.tile(case["mu"], nn) + A @ (np.ravel(case["y"])[obs]
                                         - np.tile(case["mu"], n_tips)[obs])
    pc = cov_x - A @ cov_xy.T
    np.testing.assert_allclose(mean, pm_.reshape(nn, k), rtol=1e-7, atol=1e-8)
    ref_cov = np.stack([pc[v * k:(v + 1) * k, v * k:(v + 1) * k] for v in range(nn)])
    np.testing.assert_allclose(cov, ref_cov, rtol=1e-7, atol=1e-8)


@pytest.mark.parametrize("seed,n,k,n_reg,kw", CASES)
def test_regime_gradient_by_finite_differences(seed, n, k, n_reg, kw):
    # Central differences of the engine's own value (itself checked against the dense
    # closed form above), for every regime's rate matrix, the branch lengths and mu.
    case, R, regime = _case(seed, n, k, n_reg, **kw)
    args = {kk: v for kk, v in case.items() if kk not in ("R",)}
    _, g = loglik_and_grad(**args, R=R, regime=regime)
    assert g["R"].shape == R.shape
    h = 1e-6

    def f(**over):
        a = dict(args, R=R, regime=regime)
        a.update(over)
        return loglik(**a)

    for r in range(n_reg):
        for i in range(k):
            for j in range(i + 1):
                dR = np.zeros_like(R)
                dR[r, i, j] += h
                dR[r, j, i] = dR[r, i, j]
                num = (f(R=R + dR) - f(R=R - dR)) / (2 * h)
                ana = np.sum(g["R"] * dR) / h
                assert ana == pytest.approx(num, rel=1e-5, abs=1e-6)
    for v in range(len(case["parent"])):
        if case["lengths"][v] < 1e-3:
            continue
        d = np.zeros_like(case["lengths"])
        d[v] = h
        num = (f(lengths=case["lengths"] + d) - f(lengths=case["lengths"] - d)) / (2 * h)
        assert g["lengths"][v] == pytest.approx(num, rel=1e-5, abs=1e-6)
    for i in range(k):
        d = np.zeros(k)
        d[i] = h
        num = (f(mu=case["mu"] + d) - f(mu=case["mu"] - d)) / (2 * h)
        assert g["mu"][i] == pytest.approx(num, rel=1e-5, abs=1e-6)


@pytest.mark.parametrize("k", [1, 2, 3])
def test_one_regime_equals_the_single_matrix_engine(k):
    # Backward compatibility: R of shape (k, k) and R[None] with regime zero agree,
    # as do two identical regimes.
    case = make_case(40 + k, 15, k, with_E=True, root_edge=True)
    zeros = np.zeros(len(case["parent"]), int)
    args = {kk: v for kk, v in case.items() if kk != "R"}
    lp, g = loglik_and_grad(**case)
    lp1, g1 = loglik_and_grad(**args, R=case["R"][None], regime=zeros)
    assert lp1 == pytest.approx(lp, rel=1e-12)
    np.testing.assert_allclose(g1["R"][0], g["R"], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(g1["lengths"], g["lengths"], rtol=1e-10, atol=1e-12)
    R2 = np.stack([case["R"], case["R"]])
    alt = np.arange(len(zeros)) % 2
    lp2, g2 = loglik_and_grad(**args, R=R2, regime=alt)
    assert lp2 == pytest.approx(lp, rel=1e-12)
    np.testing.assert_allclose(g2["R"].sum(axis=0), g["R"], rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("k", [1, 2, 3])
def test_regime_draws_kernel_matches_single_calls(k):
    case, R, regime = _case(50 + k, 12, k, 2)
    args = {kk: v for kk, v in case.items() if kk not in ("R", "E", "mu")}
    rng = np.random.default_rng(3)
    S = 3
    Rs = np.stack([R * s for s in rng.uniform(0.5, 2.0, S)])
    Es = np.stack([case["E"]] * S)
    mus = rng.normal(size=(S, k))
    regs = np.stack([regime, 1 - regime, regime])
    out = loo_logdensity_draws(**args, R=Rs, E=Es, mu=mus, regime=regs)
    out1 = loo_logdensity_draws(**args, R=Rs, E=Es, mu=mus, regime=regime)
    for s in range(S):
        ref = loo_logdensity(**args, R=Rs[s], E=Es[s], mu=mus[s], regime=regs[s])
        np.testing.assert_allclose(out[s], ref, rtol=1e-12)
        ref1 = loo_logdensity(**args, R=Rs[s], E=Es[s], mu=mus[s], regime=regime)
        np.testing.assert_allclose(out1[s], ref1, rtol=1e-12)


def test_regime_input_errors():
    case, R, regime = _case(60, 8, 2, 2)
    args = {kk: v for kk, v in case.items() if kk != "R"}
    with pytest.raises(InputError, match="0..1"):
        loglik(**args, R=R, regime=np.full(len(regime), 2))
    with pytest.raises(InputError, match="one entry per node"):
        loglik(**args, R=R, regime=regime[:-1])
    bad = R.copy()
    bad[1] = -bad[1]
    with pytest.raises(InputError, match="positive definite"):
        loglik(**args, R=bad, regime=regime)


def test_op_with_regimes_value_grad_and_numba():
    # The PyTensor Op against the dense closed form (value), PyTensor's own finite
    # differences (gradient, every regime's R), and its numba implementation (nutpie).
    pytensor = pytest.importorskip("pytensor")
    import pytensor.tensor as pt

    from cladewise.engine import tree_loglik

    case, R, regime = _case(70, 9, 2, 2, with_E=True)
    case["y"][~case["observed"]] = 0.0
    par, obs = case["parent"], case["observed"]
    Rv = pt.dtensor3("R")
    lp = tree_loglik(par, case["lengths"], case["y"], obs, Rv, case["E"], case["err_var"],
                     case["mu"], regime=regime)
    for mode in ("FAST_COMPILE", "NUMBA"):
        f = pytensor.function([Rv], [lp, pt.grad(lp, Rv)], mode=mode)
        val, g = f(R)
        assert float(val) == pytest.approx(dense_loglik(case, R, regime), rel=1e-10)
        args = {kk: v for kk, v in case.items() if kk != "R"}
        _, ref = loglik_and_grad(**args, R=R, regime=regime)
        np.testing.assert_allclose(g, ref["R"], rtol=1e-10, atol=1e-12)

    def fn(lengths, R3, mu):
        return tree_loglik(par, lengths, case["y"], obs, 0.5 * (R3 + R3.dimshuffle(0, 2, 1)),
                           case["E"], case["err_var"], mu, regime=regime)

    pytensor.gradient.verify_grad(
        fn, [case["lengths"], R, case["mu"]], rng=np.random.default_rng(1), eps=1e-6,
        abs_tol=1e-4, rel_tol=1e-4, mode="FAST_COMPILE")
