"""The generated k = 3..6 kernels and the per-k entry points against the general
kernels and the dense scipy reference.

References: the dense multivariate normal of the tree model (Felsenstein 1973,
Am. J. Hum. Genet. 25:471: Brownian motion gives a Gaussian with shared-path
covariance) evaluated by scipy in ``cladewise.engine.dense``; finite differences of
that dense density for the gradient; and the general O(N k^3) kernels, which the
generated kernels (other but equivalent k x k algebra) must reproduce to rounding.
"""

from __future__ import annotations

import importlib

import numpy as np
import pytest

from cladewise.engine import (
    ancestral_states,
    dense,
    entries,
    codegen_small,
    kernels,
    loglik,
    loglik_and_grad,
    loo_conditionals,
    loo_logdensity_draws,
)
from cladewise.engine.api import _prepare
from engine_cases import make_case

# each k compiles its own kernels (about a minute on a fresh install): CI checks k = 3
FAST_K = [3]
SLOW_K = [pytest.param(k, marks=pytest.mark.slow) for k in (4, 5, 6)]


def _case(seed, k, **kw):
    # awkward on purpose: polytomies, zero-length internal branches, missing cells,
    # species with nothing observed, a root edge, E and full error covariances
    base = dict(max_children=4, zero_internal=0.2, root_edge=True, with_E=True, err_full=True,
                p_missing=0.25, n_species_missing=2)
    base.update(kw)
    return make_case(seed, 30, k, **base)


def _regime_args(case, n_regimes=1, seed=0):
    args, _ = _prepare(**case)
    parent, lengths, y, observed, R, E, err, mu = args
    rng = np.random.default_rng(seed)
    k = R.shape[0]
    Rs = [R] + [R * (0.5 + rng.random()) + 0.1 * np.eye(k) for _ in range(n_regimes - 1)]
    regime = rng.integers(0, n_regimes, parent.shape[0]).astype(np.int64)
    return parent, lengths, y, observed, np.ascontiguousarray(np.stack(Rs)), regime, E, err, mu


@pytest.mark.parametrize("k", FAST_K + SLOW_K)
@pytest.mark.parametrize("n_regimes", [1, 3])
@pytest.mark.parametrize("root_edge", [True, False])
def test_compact_equals_general_kernels(k, n_regimes, root_edge):
    # without a root edge the root's outside is a point mass (mu), and so are the
    # outsides of nodes below it through zero-length branches
    case = _case(100 + k, k, root_edge=root_edge, zero_internal=0.4)
    args = _regime_args(case, n_regimes, seed=k)
    gen = importlib.import_module(f"cladewise.engine.kernels_k{k}")
    general = kernels.value_and_grad_regimes_kernel(*args)
    compact = getattr(gen, f"value_and_grad_k{k}")(*args)
    for a, b, name in zip(general, compact, ["logp", "lengths", "y", "R", "E", "err", "mu"]):
        np.testing.assert_allclose(b, a, rtol=1e-10, atol=1e-12, err_msg=name)
    assert getattr(gen, f"loglik_k{k}")(*args) == pytest.approx(general[0], rel=1e-12)
    for g, c in zip(kernels.loo_regimes_kernel(*args), getattr(gen, f"loo_k{k}")(*args)):
        np.testing.assert_allclose(c, g, rtol=1e-10, atol=1e-12)
    for g, c in zip(kernels.ancestral_regimes_kernel(*args), getattr(gen, f"ancestral_k{k}")(*args)):
        np.testing.assert_allclose(c, g, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("k", FAST_K + SLOW_K)
@pytest.mark.parametrize("root_edge", [True, False])
def test_compact_matches_scipy_dense(k, root_edge):
    # value, leave-one-out predictives and ancestral states against dense scipy
    case = _case(200 + k, k, root_edge=root_edge)
    assert loglik(**case) == pytest.approx(dense.loglik(**case), rel=1e-8)
    mean, cov = loo_conditionals(**case)
    dmean, dcov, _ = dense.loo_conditionals(**case)
    np.testing.assert_allclose(mean, dmean, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(cov, dcov, rtol=1e-8, atol=1e-10)
    amean, acov = ancestral_states(**case)
    dam, dac = dense.ancestral_states(**case)
    np.testing.assert_allclose(amean, dam, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(acov, dac, rtol=1e-8, atol=1e-9)


@pytest.mark.parametrize("k", FAST_K)
def test_compact_gradient_finite_differences_of_dense(k):
    # central differences of the scipy dense log density along random symmetric
    # directions of R and E and random directions of y, mu, lengths (common practice)
    case = _case(300 + k, k, max_children=3)
    case["y"][~case["observed"]] = 0.0
    _, grad = loglik_and_grad(**case)
    rng = np.random.default_rng(k)
    eps = 1e-6
    for name in ["R", "E", "y", "mu", "lengths", "err_var"]:
        d = rng.normal(size=np.shape(case[name]))
        if name in ("R", "E"):
            d = d + d.T
        if name == "err_var":
            d = d + np.swapaxes(d, 1, 2)
        if name == "y":
            d = d * case["observed"]
        if name == "lengths":
            d = np.abs(d)  # keep lengths >= 0
        plus = dict(case, **{name: case[name] + eps * d})
        minus = dict(case, **{name: case[name] - eps * d})
        if name == "lengths":
            minus = dict(case, **{name: case[name]})
            fd = (dense.loglik(**plus) - dense.loglik(**minus)) / eps
            assert np.sum(grad[name] * d) == pytest.approx(fd, rel=1e-4, abs=1e-5), name
            continue
        fd = (dense.loglik(**plus) - dense.loglik(**minus)) / (2 * eps)
        assert np.sum(grad[name] * d) == pytest.approx(fd, rel=1e-6, abs=1e-7), name


@pytest.mark.parametrize("k", FAST_K)
def test_draws_entry_equals_general(k):
    case = _case(400 + k, k, err_full=False)
    rng = np.random.default_rng(k)
    S = 3
    R = np.stack([case["R"] * (1 + 0.2 * s) for s in range(S)])
    E = np.stack([case["E"]] * S)
    mu = case["mu"] + rng.normal(size=(S, k))
    lengths = np.stack([case["lengths"] * (1 + 0.1 * s) for s in range(S)])
    got = loo_logdensity_draws(case["parent"], lengths, case["y"], case["observed"], R, E,
                               case["err_var"], mu)
    for s in range(S):
        _, _, ref = dense.loo_conditionals(case["parent"], lengths[s], case["y"], case["observed"],
                                           R[s], E[s], case["err_var"], mu[s])
        np.testing.assert_allclose(got[s], ref, rtol=1e-8, atol=1e-10)


def test_kernel_for_picks_one_path_per_k():
    assert entries.kernel_for("value_and_grad", 1)[0] is entries.value_and_grad_k1
    assert entries.kernel_for("value_and_grad", 2)[0] is entries.value_and_grad_k2
    fn, extra = entries.kernel_for("loo", 4)
    if entries.COMPACT_SMALL_K:
        assert fn is importlib.import_module("cladewise.engine.kernels_k4").loo_k4 and extra == ()
    else:
        assert fn is kernels.loo_regimes_kernel and extra == ()
    assert entries.kernel_for("ancestral", 7)[0] is kernels.ancestral_regimes_kernel
    with pytest.raises(ValueError):
        entries.kernel_for("nothing", 2)


@pytest.mark.parametrize("k", [1, 2])
def test_per_k_entries_equal_general_dispatch(k):
    # the k = 1 and k = 2 entry points run the same closed-form passes as the
    # run-time dispatching kernels
    case = _case(500 + k, k)
    args = _regime_args(case, 2, seed=k)
    a = kernels.value_and_grad_regimes_kernel(*args)
    b = entries.kernel_for("value_and_grad", k)[0](*args)
    for x, y in zip(a, b):
        np.testing.assert_allclose(y, x, rtol=1e-13, atol=1e-14)


@pytest.mark.parametrize("k", codegen_small.GENERATED_K)
def test_generated_modules_are_current(k):
    # the committed kernels_k{k}.py is exactly what the generator writes (no stale
    # copy; numba's cache is keyed on that file)
    assert codegen_small.module_path(k).read_text() == codegen_small.module_source(k), (
        "run: PYTHONPATH=src python -m cladewise.engine.codegen_small")


def test_entries_and_generator_agree_on_k():
    assert entries.GENERATED_K == codegen_small.GENERATED_K


def test_generated_kernels_reject_an_indefinite_rate_matrix():
    # an indefinite R is no covariance: the kernels factor R (Cholesky) and return -inf
    # rather than a number (the numpy API rejects such an R before the kernels)
    case = _case(600, 3)
    args = list(_regime_args(case))
    args[4] = np.diag([1.0, 0.5, -0.3])[None].copy()
    gen = importlib.import_module("cladewise.engine.kernels_k3")
    assert gen.loglik_k3(*args) == -np.inf
    logp, *grads = gen.value_and_grad_k3(*args)
    assert logp == -np.inf and all(np.all(g == 0.0) for g in grads)
