"""The exact linear-time Gaussian tree likelihood.

Model (species i = 1..N, traits j = 1..k). Latent species values ``X`` (N x k)
follow multivariate Brownian motion with rate matrix ``R`` on the tree; the branch
lengths are inputs (already transformed by an evolution model, and differentiable).
Species ``i`` is observed as ``y_i = x_i + e_i`` with ``e_i ~ N(0, E + S_i)``, where
the measurement-error covariance ``S_i`` is ``diag(err_var[i])`` for ``(N, k)``
variances or ``err_var[i]`` itself for a full ``(N, k, k)`` array (traits measured
on the same specimens have correlated errors); only observed cells enter (the
rows and columns of ``S_i`` for unobserved cells are dropped), so for them

    vec(Y) ~ N(1 (x) mu,  C (x) R + I (x) E + blockdiag(S_1, ..., S_N)),

with ``C`` the shared-path-length matrix of the tree (plus the root edge).

Root treatment
--------------
The root mean ``mu`` is a parameter: the likelihood is *conditional on mu* (it is
the ordinary likelihood, not a restricted/REML one that integrates ``mu`` out; put
a prior on ``mu`` in a Bayesian model). With a root edge (``lengths[root] > 0``)
the root value itself is random, ``x_root ~ N(mu, lengths[root] * R)``, which adds
``lengths[root] * R`` of covariance shared by every species; with the default
root edge of 0 the root value equals ``mu``.

Method
------
An upward (pruning) pass sends canonical-form messages ``exp(-x'Jx/2 + h'x + c)``
from the tips to the root (Felsenstein 1973; Ho & Ané 2014); missing cells carry
zero precision and polytomies combine all children. A downward pass gives every
node's distribution given the data outside its subtree, which yields the
leave-one-species-out predictive of every species, ancestral state posteriors, and
the exact gradient through the Price/Bonnet identity for Gaussian expectations.
Time and memory are O(N k^3); no N x N array is ever formed.

Entry points
------------
``loglik``, ``loglik_and_grad``, ``loo_conditionals``, ``loo_logdensity``,
``loo_logdensity_draws``, ``ancestral_states`` (numpy in, validated once) and
``tree_loglik`` (PyTensor scalar for PyMC models, with a numba implementation for
nutpie). :mod:`cladewise.engine.kernels` holds the numba kernels,
:mod:`cladewise.engine.dense` the dense scipy reference.
"""

from __future__ import annotations

from cladewise.engine.api import (
    ancestral_states,
    loglik,
    loglik_and_grad,
    loo_conditionals,
    loo_logdensity,
    loo_logdensity_draws,
)


def __getattr__(name: str):
    # PyTensor is imported lazily: the numpy entry points should not pay its import.
    if name in ("tree_loglik", "TreeLoglik", "TreeLoglikRegimes"):
        from cladewise.engine import op

        return getattr(op, name)
    raise AttributeError(f"module 'cladewise.engine' has no attribute {name!r}")


__all__ = [
    "loglik",
    "loglik_and_grad",
    "loo_conditionals",
    "loo_logdensity",
    "loo_logdensity_draws",
    "ancestral_states",
    "tree_loglik",
    "TreeLoglik",
    "TreeLoglikRegimes",
]
