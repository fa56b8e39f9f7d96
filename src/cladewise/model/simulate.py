"""Forward simulation of continuous traits on a tree: the generative model the engine fits.

Model::

    X (n_tips x k)   multivariate Brownian motion with rate matrix R on the given
                     (possibly transformed) branch lengths, started at the root
                     value ``mu`` plus ``length[root] * R`` of root-edge variance;
    Y = X + D        true species means, D ~ Normal(0, E) independently per species;
    observed         Y + Normal(0, se^2) per species.

Draws are exact: one pre-order pass from the root to the tips,
``x_child = x_parent + sqrt(t_child) * L z`` with ``L L' = R``, vectorised over
replicates and over all nodes at the same depth. Used by the posterior predictive
(:mod:`cladewise.inference.fit`) and by simulated data sets
(:mod:`cladewise.studies.simulate`).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from cladewise.errors import InputError
from cladewise.data.trees import FlatTree

__all__ = ["RngLike", "as_rng", "square_matrix", "matrix_root", "branch_lengths", "per_species", "simulate_traits"]

RngLike = np.random.Generator | int | None


# ----------------------------------------------------------------- validation
def as_rng(rng: RngLike) -> np.random.Generator:
    if isinstance(rng, np.random.Generator):
        return rng
    return np.random.default_rng(rng)


def square_matrix(M: Any, k: int | None, name: str) -> np.ndarray:
    """A symmetric k x k matrix from a scalar (k = 1), a vector (diagonal) or a matrix."""
    A = np.asarray(M, dtype=float)
    if A.ndim == 0:
        A = A.reshape(1, 1) if k in (None, 1) else np.eye(k) * float(A)
    elif A.ndim == 1:
        A = np.diag(A)
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise InputError(f"{name} must be a square matrix; got shape {A.shape}.")
    if k is not None and A.shape[0] != k:
        raise InputError(f"{name} must be {k} x {k} (one row per trait); got {A.shape}.")
    if not np.all(np.isfinite(A)):
        raise InputError(f"{name} contains NaN or infinite values.")
    if not np.allclose(A, A.T, rtol=1e-10, atol=1e-12):
        raise InputError(f"{name} must be symmetric.")
    return 0.5 * (A + A.T)


def matrix_root(A: np.ndarray, name: str) -> np.ndarray:
    """L with L L' = A; accepts positive semi-definite matrices (e.g. a zero E)."""
    try:
        return np.linalg.cholesky(A)
    except np.linalg.LinAlgError:
        pass
    w, V = np.linalg.eigh(A)
    scale = max(float(np.abs(w).max()), 1e-300)
    if w.min() < -1e-10 * scale:
        raise InputError(
            f"{name} is not positive semi-definite (smallest eigenvalue {w.min():.3g}); "
            "check the variances and correlations (|correlation| <= 1 and jointly "
            "consistent)."
        )
    return V * np.sqrt(np.clip(w, 0.0, None))


def branch_lengths(tree: FlatTree, lengths: Any) -> np.ndarray:
    ln = tree.length if lengths is None else np.asarray(lengths, dtype=float)
    if ln.shape != (tree.n_nodes,):
        raise InputError(
            f"lengths must have one entry per node ({tree.n_nodes}); got shape {ln.shape}."
        )
    if not np.all(np.isfinite(ln)) or np.any(ln < 0):
        raise InputError("branch lengths must be finite and >= 0 to simulate on them.")
    return ln


def _depth_levels(tree: FlatTree) -> list[np.ndarray]:
    """Non-root nodes grouped by depth (number of edges from the root), top first."""
    depth = np.zeros(tree.n_nodes, dtype=np.int64)
    par = tree.parent
    for i in range(tree.n_nodes - 2, -1, -1):
        depth[i] = depth[par[i]] + 1
    order = np.argsort(depth[:-1], kind="stable")
    bounds = np.cumsum(np.bincount(depth[:-1])[1:])
    return [g for g in np.split(order, bounds[:-1]) if g.size]


def per_species(v: Any, n: int, k: int, name: str) -> np.ndarray:
    """Broadcast a scalar, per-trait vector or (n, k) array to (n, k)."""
    a = np.asarray(v, dtype=float)
    try:
        a = np.broadcast_to(a, (n, k)).copy()
    except ValueError:
        raise InputError(
            f"{name} must be a number, one value per trait ({k}) or an array of shape "
            f"({n}, {k}); got shape {a.shape}."
        ) from None
    if not np.all(np.isfinite(a)) or np.any(a < 0):
        raise InputError(f"{name} must be finite and >= 0.")
    return a


# ----------------------------------------------------------------- simulation
def simulate_traits(
    tree: FlatTree,
    R: Any,
    mu: Any,
    *,
    lengths: Any = None,
    E: Any = None,
    se: Any = None,
    rng: RngLike = None,
    n_reps: int | None = None,
    regime: Any = None,
) -> np.ndarray:
    """Exact Gaussian draws of species values on a tree.

    Parameters
    ----------
    tree : FlatTree
    R : array_like, (k, k)
        Brownian rate matrix (a scalar for one trait, a vector for a diagonal R).
    mu : array_like, (k,)
        Root value.
    lengths : array_like, (n_nodes,), optional
        Branch lengths to use instead of ``tree.length`` (e.g. after a model
        transform). ``lengths[root]`` is the root edge.
    E : array_like, (k, k), optional
        Species-level covariance added independently to every species.
    se : array_like, optional
        Measurement standard errors: scalar, per trait ``(k,)`` or ``(n_tips, k)``.
    rng : numpy Generator or int seed, optional
    n_reps : int, optional
        Number of independent replicates.
    regime : array_like of int, (n_nodes,), optional
        Regime of every branch (multi-rate Brownian motion, O'Meara et al. 2006):
        ``R`` is then ``(n_regimes, k, k)`` and the branch above node v evolves
        with ``R[regime[v]]``.

    Returns
    -------
    ndarray
        ``(n_tips, k)``, or ``(n_reps, n_tips, k)`` when ``n_reps`` is given; rows in
        the order of ``tree.tip_names``. Covariance of the flattened rows is
        ``kron(C, R) + kron(I, E) + diag(se^2)``.
    """
    if regime is not None:
        Rs = np.asarray(R, dtype=float)
        if Rs.ndim != 3:
            raise InputError(f"with regimes R must be (regimes x traits x traits); got shape {Rs.shape}.")
        reg = np.asarray(regime, dtype=np.int64)
        if reg.shape != (tree.n_nodes,) or reg.min() < 0 or reg.max() >= Rs.shape[0]:
            raise InputError(f"regime must hold one regime number (0..{Rs.shape[0] - 1}) per node "
                             f"({tree.n_nodes}); got shape {reg.shape}.")
        Rs = np.stack([square_matrix(Rs[r], Rs.shape[1], f"R[{r}]") for r in range(Rs.shape[0])])
        R = Rs[0]
    else:
        R = square_matrix(R, None, "R")
        Rs, reg = R[None], np.zeros(tree.n_nodes, np.int64)
    k = R.shape[0]
    try:
        mu_v = np.broadcast_to(np.asarray(mu, dtype=float), (k,))
    except ValueError:
        mu_v = None
    if mu_v is None or not np.all(np.isfinite(mu_v)):
        raise InputError(f"mu must be one finite value per trait ({k}); got {mu!r}.")
    ln = branch_lengths(tree, lengths)
    gen = as_rng(rng)
    reps = 1 if n_reps is None else int(n_reps)
    if reps < 1:
        raise InputError("n_reps must be at least 1.")
    Ls = np.stack([matrix_root(Rs[r], "R") for r in range(Rs.shape[0])])
    n, m = tree.n_tips, tree.n_nodes

    # Increments on every branch at once (each with its regime's matrix root); the
    # pre-order pass only adds them up.
    incr = np.einsum("rmj,mkj->rmk", gen.standard_normal((reps, m, k)), Ls[reg])
    incr *= np.sqrt(ln)[None, :, None]
    x = np.empty((reps, m, k))
    x[:, -1] = mu_v + incr[:, -1]
    par = tree.parent
    for nodes in _depth_levels(tree):
        x[:, nodes] = x[:, par[nodes]] + incr[:, nodes]
    out = x[:, :n]
    if E is not None:
        LE = matrix_root(square_matrix(E, k, "E"), "E")
        out = out + gen.standard_normal((reps, n, k)) @ LE.T
    if se is not None:
        s = per_species(se, n, k, "se")
        out = out + gen.standard_normal((reps, n, k)) * s
    return out[0] if n_reps is None else out
