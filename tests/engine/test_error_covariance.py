"""Full per-species measurement-error covariance (traits measured on the same specimens).

References: the dense multivariate normal of all observed cells with covariance
``R (x) C + E (x) I + blockdiag(S_i)`` (trait-major order here, built in the test
itself), evaluated and conditioned with scipy; the Brownian-motion covariance ``C``
of shared path lengths is Felsenstein (1973, Am. J. Hum. Genet. 25:471-492).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.stats

from cladewise.engine import (
    ancestral_states,
    dense,
    loglik,
    loglik_and_grad,
    loo_conditionals,
    loo_logdensity,
    loo_logdensity_draws,
)
from cladewise.errors import InputError
from engine_cases import make_case

CASES = [
    (1, 9, 2, dict(root_edge=True, with_E=True, p_missing=0.3, n_species_missing=1)),
    (2, 14, 3, dict(max_children=4, zero_internal=0.4, with_E=True, p_missing=0.25)),
    (3, 8, 1, dict(root_edge=True, p_missing=0.2)),
    (4, 11, 2, dict(max_children=3, p_missing=0.0)),
    # k = 4 compiles a trait-count path of its own (a minute on a fresh install): slow set;
    # k = 3 runs the same generated-kernel code in CI
    pytest.param(5, 10, 4, dict(with_E=True, root_edge=True, p_missing=0.4), marks=pytest.mark.slow),
]


def _case(seed, n, k, opts):
    return make_case(seed, n, k, err_full=True, **opts)


def _trait_major(case):
    """Mean, covariance and values of the observed cells, trait-major (``j * N + i``)."""
    y, obs = case["y"], case["observed"]
    n, k = y.shape
    C = dense.tip_covariance(case["parent"], case["lengths"], n)
    S = case["err_var"]
    blocks = np.zeros((k * n, k * n))
    for i in range(n):
        ix = np.arange(k) * n + i
        blocks[np.ix_(ix, ix)] = S[i]
    cov = np.kron(case["R"], C) + np.kron(case["E"], np.eye(n)) + blocks
    keep = obs.T.ravel()
    return (np.repeat(case["mu"], n)[keep], cov[np.ix_(keep, keep)], y.T.ravel()[keep])


@pytest.mark.parametrize("seed,n,k,opts", CASES)
def test_value_matches_scipy_dense_with_full_error_covariance(seed, n, k, opts):
    case = _case(seed, n, k, opts)
    assert case["err_var"].shape == (n, k, k)
    mean, cov, val = _trait_major(case)
    ref = scipy.stats.multivariate_normal.logpdf(val, mean, cov)
    assert loglik(**case) == pytest.approx(ref, rel=1e-8)
    assert loglik_and_grad(**case)[0] == pytest.approx(ref, rel=1e-8)
    assert dense.loglik(**case) == pytest.approx(ref, rel=1e-8)


@pytest.mark.parametrize("k", [1, 2, 3])
def test_diagonal_full_array_equals_variances(k):
    case = make_case(31, 12, k, with_E=True, p_missing=0.2)
    lp, g = loglik_and_grad(**case)
    full = dict(case, err_var=case["err_var"][:, :, None] * np.eye(k))
    lp3, g3 = loglik_and_grad(**full)
    assert lp3 == pytest.approx(lp, rel=1e-13)
    np.testing.assert_allclose(np.diagonal(g3["err_var"], axis1=1, axis2=2), g["err_var"],
                               rtol=1e-12, atol=1e-14)
    for name in ("lengths", "y", "R", "E", "mu"):
        np.testing.assert_allclose(g3[name], g[name], rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("seed,n,k,opts", CASES[:3] + CASES[4:])
def test_unobserved_rows_and_columns_of_the_error_are_ignored(seed, n, k, opts):
    # A missing cell carries zero precision: whatever its error entries hold, the
    # likelihood equals the scipy density of the observed cells alone.
    case = _case(seed, n, k, opts)
    obs = case["observed"]
    if obs.all():
        pytest.skip("no missing cell")
    rng = np.random.default_rng(seed)
    junk = case["err_var"].copy()
    for i in range(n):
        for a in np.flatnonzero(~obs[i]):
            v = rng.normal(size=k) * 5.0
            junk[i, a, :] = v
            junk[i, :, a] = v
            junk[i, a, a] = 100.0 + rng.random()
    mean, cov, val = _trait_major(case)
    ref = scipy.stats.multivariate_normal.logpdf(val, mean, cov)
    lp, g = loglik_and_grad(**dict(case, err_var=junk))
    assert lp == pytest.approx(ref, rel=1e-8)
    mask = obs[:, :, None] & obs[:, None, :]
    assert np.all(g["err_var"][~mask] == 0.0)


def _fd(case, name, eps=1e-6):
    x = case[name]
    out = np.zeros_like(x)
    for ix in np.ndindex(x.shape):
        for sign in (1.0, -1.0):
            xx = x.copy()
            xx[ix] += sign * eps
            sym = (name in ("R", "E") and ix[0] != ix[1]) or (name == "err_var" and ix[1] != ix[2])
            if sym:
                j = (ix[1], ix[0]) if name != "err_var" else (ix[0], ix[2], ix[1])
                xx[j] += sign * eps
            mean, cov, val = _trait_major(dict(case, **{name: xx}))
            out[ix] += sign * scipy.stats.multivariate_normal.logpdf(val, mean, cov) / (2 * eps)
    return out


@pytest.mark.parametrize("seed,n,k,opts", [CASES[0], CASES[1], CASES[2]])
def test_gradient_matches_finite_differences_of_scipy(seed, n, k, opts):
    # Central differences (step 1e-6, common practice); symmetric matrices are
    # perturbed symmetrically, so an off-diagonal pair compares with d[i,j] + d[j,i].
    case = _case(seed, n, k, opts)
    _, grad = loglik_and_grad(**case)
    for name in ("lengths", "y", "R", "E", "err_var", "mu"):
        an = grad[name]
        if name in ("R", "E"):
            an = an + an.T - np.diag(np.diag(an))
        if name == "err_var":
            an = an + np.swapaxes(an, 1, 2) - an * np.eye(k)
        fd = _fd(case, name)
        if name == "y":
            fd = np.where(case["observed"], fd, 0.0)
        if name == "err_var":
            fd = np.where(case["observed"][:, :, None] & case["observed"][:, None, :], fd, 0.0)
        np.testing.assert_allclose(an, fd, rtol=1e-5, atol=1e-6, err_msg=name)


def _loo_reference(case):
    """Explicit Gaussian conditioning of one species' block on all other observed cells."""
    y, obs = case["y"], case["observed"]
    n, k = y.shape
    C = dense.tip_covariance(case["parent"], case["lengths"], n)
    S = case["err_var"]
    full = np.kron(case["R"], C) + np.kron(case["E"], np.eye(n))
    for i in range(n):
        ix = np.arange(k) * n + i
        full[np.ix_(ix, ix)] += S[i]
    yv, ov = y.T.ravel(), obs.T.ravel()
    mv = np.repeat(case["mu"], n)
    means, covs, logd = np.empty((n, k)), np.empty((n, k, k)), np.zeros(n)
    for i in range(n):
        ix = np.arange(k) * n + i
        rest = ov.copy()
        rest[ix] = False
        A = scipy.linalg.solve(full[np.ix_(rest, rest)], full[np.ix_(rest, ix)], assume_a="pos").T
        means[i] = mv[ix] + A @ (yv[rest] - mv[rest])
        covs[i] = full[np.ix_(ix, ix)] - A @ full[np.ix_(rest, ix)]
        o = obs[i]
        if o.any():
            logd[i] = scipy.stats.multivariate_normal.logpdf(y[i, o], means[i, o], covs[i][np.ix_(o, o)])
    return means, covs, logd


@pytest.mark.parametrize("seed,n,k,opts", CASES)
def test_loo_conditionals_match_explicit_conditioning(seed, n, k, opts):
    case = _case(seed, n, k, opts)
    mean, cov = loo_conditionals(**case)
    ld = loo_logdensity(**case)
    rmean, rcov, rld = _loo_reference(case)
    np.testing.assert_allclose(mean, rmean, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(cov, rcov, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(ld, rld, rtol=1e-8, atol=1e-9)


@pytest.mark.parametrize("seed,n,k,opts", CASES)
def test_ancestral_states_match_dense_conditioning(seed, n, k, opts):
    # dense.ancestral_states conditions the joint Gaussian of all nodes and the
    # observations with scipy.linalg.solve
    case = _case(seed, n, k, opts)
    mean, cov = ancestral_states(**case)
    rmean, rcov = dense.ancestral_states(**case)
    np.testing.assert_allclose(mean, rmean, rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(cov, rcov, rtol=1e-7, atol=1e-8)


def test_loo_logdensity_draws_with_full_error():
    rng = np.random.default_rng(3)
    base = _case(7, 12, 2, dict(with_E=True, p_missing=0.2))
    S = 3
    n, k = base["y"].shape
    R = np.stack([base["R"] * rng.uniform(0.5, 2.0) for _ in range(S)])
    E = np.stack([base["E"]] * S)
    err = np.stack([base["err_var"] * rng.uniform(0.5, 2.0) for _ in range(S)])
    mu = rng.normal(size=(S, k))
    out = loo_logdensity_draws(base["parent"], base["lengths"], base["y"], base["observed"],
                               R, E, err, mu)
    for s in range(S):
        c = dict(base, R=R[s], E=E[s], err_var=err[s], mu=mu[s])
        np.testing.assert_allclose(out[s], _loo_reference(c)[2], rtol=1e-8, atol=1e-9)
    one = loo_logdensity_draws(base["parent"], base["lengths"], base["y"], base["observed"],
                               R, E, err[:1], mu)
    np.testing.assert_allclose(one[0], out[0], rtol=1e-12)


@pytest.mark.parametrize("bad,match", [("asym", "symmetric"), ("indef", "semidefinite"),
                                       ("shape", "covariance must be")])
def test_bad_error_covariance_raises_input_error(bad, match):
    case = _case(9, 6, 2, dict(p_missing=0.0))
    err = case["err_var"]
    if bad == "asym":
        err[0, 0, 1] += 0.1
    elif bad == "indef":
        err[1] = [[1.0, 2.0], [2.0, 1.0]]
    else:
        case["err_var"] = err[:, :1, :]
    with pytest.raises(InputError, match=match):
        loglik(**case)
