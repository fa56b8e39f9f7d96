"""Linear-time likelihood against the dense multivariate normal (scipy)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from hypothesis import HealthCheck, given, settings

from cladewise.engine import dense, loglik, loglik_and_grad
from cladewise.engine.testing import random_tree
from cladewise.errors import InputError
from engine_cases import cases, make_case, nan_unobserved

FIELDS = ["lengths", "y", "R", "E", "err_var", "mu"]


def _dense_loglik(case):
    # Reference: the multivariate normal density of all observed cells with
    # covariance C (x) R + I (x) E + diag(err_var), evaluated by scipy.stats
    # (Felsenstein 1973, Am. J. Hum. Genet. 25:471 for the BM covariance C).
    return dense.loglik(**case)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cases())
def test_loglik_matches_scipy_dense(case):
    ref = _dense_loglik(case)
    got = loglik(**nan_unobserved(case))
    got2, _ = loglik_and_grad(**case)
    assert got == pytest.approx(ref, rel=1e-8, abs=1e-10)
    assert got2 == pytest.approx(ref, rel=1e-8, abs=1e-10)


def test_single_trait_no_error_matches_textbook_bm():
    # One trait, no error, no E: y ~ N(mu 1, sigma^2 C), evaluated directly with
    # scipy.stats.multivariate_normal on trees.covariance (Felsenstein 1973).
    from cladewise.data.trees import FlatTree, covariance

    rng = np.random.default_rng(7)
    parent, lengths = random_tree(25, rng, max_children=3)
    tree = FlatTree(parent, lengths, tuple(str(i) for i in range(25)))
    y = rng.normal(size=(25, 1))
    ref = scipy.stats.multivariate_normal.logpdf(y[:, 0], np.full(25, 0.3), 1.7 * covariance(tree))
    got = loglik(parent, lengths, y, np.ones((25, 1), bool), [[1.7]], [[0.0]], np.zeros((25, 1)), [0.3])
    assert got == pytest.approx(ref, rel=1e-10)


def test_single_tip_tree_with_root_edge():
    # One species: y ~ N(mu, t_root R + E + diag(err)) (plain multivariate normal).
    R = np.array([[1.0, 0.3], [0.3, 0.5]])
    E = np.array([[0.2, 0.0], [0.0, 0.1]])
    err = np.array([[0.05, 0.02]])
    y = np.array([[0.4, -1.0]])
    mu = np.array([0.1, 0.2])
    ref = scipy.stats.multivariate_normal.logpdf(y[0], mu, 1.5 * R + E + np.diag(err[0]))
    got, g = loglik_and_grad([-1], [1.5], y, np.ones((1, 2), bool), R, E, err, mu)
    assert got == pytest.approx(ref, rel=1e-12)
    # d/dmu log N(y; mu, S) = S^-1 (y - mu) (standard Gaussian identity, from memory)
    S = 1.5 * R + E + np.diag(err[0])
    np.testing.assert_allclose(g["mu"], np.linalg.solve(S, y[0] - mu), rtol=1e-10)


def _fd_grad(case, name, eps=1e-6):
    x = case[name]
    out = np.zeros_like(x)
    for ix in np.ndindex(x.shape):
        for sign in (1.0, -1.0):
            xx = x.copy()
            xx[ix] += sign * eps
            if name in ("R", "E") and ix[0] != ix[1]:
                xx[ix[::-1]] += sign * eps  # keep the matrix symmetric
            c = dict(case)
            c[name] = xx
            out[ix] += sign * _dense_loglik(c) / (2 * eps)
    return out


@pytest.mark.parametrize(
    "seed,n_tips,k,opts",
    [
        (1, 9, 2, dict(root_edge=True, with_E=True, p_missing=0.3, n_species_missing=1)),
        (2, 12, 3, dict(max_children=4, zero_internal=0.4, with_E=True)),
        (3, 7, 1, dict(root_edge=True, with_err=True, p_missing=0.0)),
        (4, 10, 2, dict(with_err=False, with_E=False, p_missing=0.25)),
        pytest.param(5, 8, 4, dict(with_E=True, root_edge=True, p_missing=0.4), marks=pytest.mark.slow),  # own k path: slow set
    ],
)
def test_gradient_matches_finite_differences_of_dense(seed, n_tips, k, opts):
    # Central finite differences of the scipy dense log density (common practice
    # step 1e-6); symmetric matrices are perturbed symmetrically, so the check on
    # an off-diagonal pair is d[i, j] + d[j, i].
    case = make_case(seed, n_tips, k, **opts)
    case["err_var"] = case["err_var"] + 0.05  # keep the finite difference away from 0
    _, grad = loglik_and_grad(**case)
    for name in FIELDS:
        fd = _fd_grad(case, name)
        an = grad[name]
        if name in ("R", "E"):
            an = an + an.T - np.diag(np.diag(an))
        if name in ("y", "err_var"):
            fd = np.where(case["observed"], fd, 0.0)
        np.testing.assert_allclose(an, fd, rtol=1e-5, atol=1e-6, err_msg=name)
        if name in ("y", "err_var"):
            assert np.all(grad[name][~case["observed"]] == 0.0)


def test_gradient_matches_pytensor_autodiff_of_dense_formula():
    # Reverse-mode autodiff of the dense Gaussian log density written in PyTensor
    # (an independent implementation of the same formula).
    import pytensor
    import pytensor.tensor as pt

    case = make_case(11, 8, 2, root_edge=True, with_E=True, p_missing=0.2)
    n, k = case["y"].shape
    obs = case["observed"].ravel()
    C = dense.tip_covariance(case["parent"], case["lengths"], n)
    R, E, ev, mu, y = (pt.dmatrix("R"), pt.dmatrix("E"), pt.dmatrix("ev"), pt.dvector("mu"),
                       pt.dmatrix("y"))
    cov = pt.linalg.kron(pt.as_tensor(C), R) + pt.linalg.kron(pt.eye(n), E) + pt.diag(ev.ravel())
    cov = cov[obs][:, obs]
    r = (y - mu[None, :]).ravel()[obs]
    L = pt.linalg.cholesky(cov)
    z = pt.linalg.solve_triangular(L, r, lower=True)
    lp = -0.5 * (z @ z) - pt.log(pt.diag(L)).sum() - 0.5 * obs.sum() * np.log(2 * np.pi)
    f = pytensor.function(
        [R, E, ev, mu, y], [lp, *pt.grad(lp, [R, E, ev, mu, y])], mode="FAST_COMPILE"
    )
    ref = f(case["R"], case["E"], case["err_var"], case["mu"], case["y"])
    got, grad = loglik_and_grad(**case)
    assert got == pytest.approx(float(ref[0]), rel=1e-10)
    # autodiff of a function that reads both triangles gives d[i,j] for each entry;
    # with a symmetric argument the sum over a pair is what a symmetric change sees
    for name, a in (("R", ref[1]), ("E", ref[2])):
        np.testing.assert_allclose(grad[name] + grad[name].T, a + a.T, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(grad["err_var"], ref[3], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(grad["mu"], ref[4], rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(grad["y"], ref[5], rtol=1e-8, atol=1e-10)


def test_no_observations_gives_zero():
    case = make_case(3, 6, 2)
    case["observed"][:] = False
    lp, g = loglik_and_grad(**case)
    assert lp == 0.0
    assert all(np.all(v == 0) for v in g.values())


@pytest.mark.parametrize(
    "change,match",
    [
        (dict(lengths="negative"), "branch lengths"),
        (dict(R="asym"), "symmetric"),
        (dict(R="indef"), "positive definite"),
        (dict(y="nan_observed"), "NaN"),
        (dict(observed="shape"), "observed must have the shape"),
        (dict(parent="order"), "post-order"),
        (dict(lengths="zero_tip"), "zero-length branch"),
    ],
)
def test_bad_input_raises_input_error(change, match):
    case = make_case(5, 6, 2, with_err=False)
    (key, what), = change.items()
    if what == "negative":
        case["lengths"][2] = -0.1
    elif what == "asym":
        case["R"][0, 1] += 0.1
    elif what == "indef":
        case["R"] = np.diag([1.0, -0.5])
    elif what == "nan_observed":
        case["observed"][0, 0] = True
        case["y"][0, 0] = np.nan
    elif what == "shape":
        case["observed"] = case["observed"][:, :1]
    elif what == "order":
        case["parent"][0] = 0
    elif what == "zero_tip":
        case["observed"][0] = True
        case["lengths"][0] = 0.0
    with pytest.raises(InputError, match=match):
        loglik(**case)
