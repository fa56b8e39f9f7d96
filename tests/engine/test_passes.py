"""Leave-one-species-out conditionals and ancestral states against dense conditioning."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings

from cladewise.engine import (
    ancestral_states,
    dense,
    loo_conditionals,
    loo_logdensity,
    loo_logdensity_draws,
)
from cladewise.engine.testing import random_rate_matrix, random_tree
from engine_cases import cases, make_case, nan_unobserved


# Reference for LOO: the conditional of one species' block given all other observed
# cells by explicit Gaussian conditioning of the dense covariance, solved with scipy
# (Bürkner, Gabry & Vehtari 2021, Computational Statistics 36:1243-1261, give the
# same conditionals for non-factorised multivariate normal models).
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cases(max_tips=30))
def test_loo_matches_dense_conditioning(case):
    mean, cov = loo_conditionals(**nan_unobserved(case))
    ld = loo_logdensity(**case)
    rmean, rcov, rld = dense.loo_conditionals(**case)
    np.testing.assert_allclose(mean, rmean, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(cov, rcov, rtol=1e-8, atol=1e-9)
    np.testing.assert_allclose(ld, rld, rtol=1e-8, atol=1e-9)
    assert np.all(ld[~case["observed"].any(axis=1)] == 0.0)


# Reference for ancestral states: Gaussian conditioning of the joint covariance of
# all nodes' latent values and the observations (Brownian motion: the covariance of
# two nodes is the shared path from the root, Felsenstein 1973).
@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cases(max_tips=25))
def test_ancestral_states_match_dense_conditioning(case):
    mean, cov = ancestral_states(**nan_unobserved(case))
    rmean, rcov = dense.ancestral_states(**case)
    np.testing.assert_allclose(mean, rmean, rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(cov, rcov, rtol=1e-7, atol=1e-8)


def test_ancestral_tip_without_error_is_its_observation():
    # With no measurement error and no E a tip's latent value is its observed value
    # exactly (y = x), which the dense reference cannot show by a near-singular solve.
    case = make_case(4, 10, 2, with_err=False, with_E=False, p_missing=0.0)
    mean, cov = ancestral_states(**case)
    np.testing.assert_allclose(mean[:10], case["y"], atol=1e-10)
    np.testing.assert_allclose(cov[:10], 0.0, atol=1e-10)


def test_loo_logdensity_draws_matches_single_calls():
    rng = np.random.default_rng(12)
    n, k, S = 15, 2, 5
    parent, _ = random_tree(n, rng, max_children=3)
    base = make_case(6, n, k, with_E=True)
    lengths = rng.exponential(1.0, (S, parent.size))
    lengths[:, -1] = 0.0
    R = np.stack([random_rate_matrix(k, rng) for _ in range(S)])
    E = np.stack([random_rate_matrix(k, rng, 0.3) for _ in range(S)])
    mu = rng.normal(size=(S, k))
    out = loo_logdensity_draws(parent, lengths, base["y"], base["observed"], R, E,
                               base["err_var"], mu)
    assert out.shape == (S, n)
    for s in range(S):
        # each draw against the dense reference
        _, _, rld = dense.loo_conditionals(parent, lengths[s], base["y"], base["observed"],
                                           R[s], E[s], base["err_var"], mu[s])
        np.testing.assert_allclose(out[s], rld, rtol=1e-8, atol=1e-9)
    # shared lengths (one tree) broadcast over draws
    out1 = loo_logdensity_draws(parent, lengths[0], base["y"], base["observed"], R, E,
                                np.broadcast_to(base["err_var"], (S, n, k)), mu)
    for s in range(S):
        ref = loo_logdensity(parent, lengths[0], base["y"], base["observed"], R[s], E[s],
                             base["err_var"], mu[s])
        np.testing.assert_allclose(out1[s], ref, rtol=1e-12)


def test_loo_logdensity_draws_rejects_mismatched_draws():
    from cladewise.errors import InputError

    case = make_case(1, 5, 2)
    with pytest.raises(InputError, match="draws"):
        loo_logdensity_draws(case["parent"], case["lengths"], case["y"], case["observed"],
                             np.stack([case["R"]] * 3), np.stack([case["E"]] * 2),
                             case["err_var"], np.zeros((3, 2)))
