"""Numpy entry points of the linear-time engine (validation happens here, once)."""

from __future__ import annotations

import numpy as np

from cladewise.engine import entries
from cladewise.errors import InputError

__all__ = [
    "loglik",
    "loglik_and_grad",
    "loo_conditionals",
    "loo_logdensity",
    "loo_logdensity_draws",
    "ancestral_states",
]


def _check_tree(parent: np.ndarray, lengths: np.ndarray, n_tips: int) -> None:
    n = parent.shape[0]
    if parent.ndim != 1 or n < n_tips or n == 0:
        raise InputError(
            f"parent must be a 1-d array with one entry per node (at least the {n_tips} "
            f"tips); got shape {parent.shape}. Pass FlatTree.parent."
        )
    if parent[-1] != -1:
        raise InputError("the last node must be the root (parent -1); build the tree with FlatTree")
    idx = np.arange(n - 1)
    if np.any(parent[:-1] <= idx) or np.any(parent[:-1] >= n) or np.any(parent[:-1] < n_tips):
        raise InputError(
            "parent must list tips first and internal nodes in post-order "
            "(parent[i] > i, tips never parents); build the tree with FlatTree"
        )
    if lengths.shape[-1] != n:
        raise InputError(
            f"lengths has {lengths.shape[-1]} entries per tree but the tree has {n} nodes"
        )
    if not np.all(np.isfinite(lengths)) or np.any(lengths < 0):
        raise InputError("branch lengths must be finite and >= 0; fix or drop negative branches")


def _check_cov(name: str, M: np.ndarray, k: int, semidefinite: bool) -> None:
    if M.shape[-2:] != (k, k):
        raise InputError(f"{name} must be {k} x {k} (one row per trait); got {M.shape}")
    if not np.all(np.isfinite(M)):
        raise InputError(f"{name} contains NaN or infinite values")
    if not np.allclose(M, np.swapaxes(M, -1, -2), rtol=1e-10, atol=1e-12):
        raise InputError(f"{name} must be symmetric")
    ev = np.linalg.eigvalsh(0.5 * (M + np.swapaxes(M, -1, -2)))
    scale = max(1.0, float(np.abs(ev).max()))
    bad = np.any(ev < -1e-12 * scale) if semidefinite else np.any(ev <= 0.0)
    if bad:
        kind = "positive semidefinite" if semidefinite else "positive definite"
        raise InputError(f"{name} must be {kind}")


def _error_cov(err_var: np.ndarray, observed: np.ndarray, draws: bool) -> tuple[np.ndarray, bool]:
    """Measurement error as ``(..., N, k, k)`` covariances and whether it was diagonal.

    Single values: ``(N, k)`` variances or ``(N, k, k)`` covariances. Draws: ``(N, k)``,
    ``(S, N, k)`` variances or ``(S, N, k, k)`` covariances.
    """
    n_tips, k = observed.shape
    full_ndim = 4 if draws else 3
    if err_var.ndim == full_ndim or (draws and err_var.ndim == 3 and err_var.shape[1:] != (n_tips, k)):
        if err_var.shape[-3:] != (n_tips, k, k):
            raise InputError(
                f"a full measurement-error covariance must be (species x traits x traits) = "
                f"({n_tips}, {k}, {k}) per draw; got {err_var.shape}"
                + (" (pass one covariance for all draws as shape (1, N, k, k))" if draws else "")
            )
        if not np.all(np.isfinite(err_var)):
            raise InputError("the measurement-error covariance contains NaN or infinite values; "
                             "put 0 in the rows and columns of unobserved traits")
        if not np.allclose(err_var, np.swapaxes(err_var, -1, -2), rtol=1e-10, atol=1e-12):
            raise InputError("each species' measurement-error covariance must be symmetric")
        # only the observed rows and columns enter the likelihood
        mask = observed[:, :, None] & observed[:, None, :]
        ev = np.linalg.eigvalsh(np.where(mask, err_var, 0.0))
        scale = np.maximum(1.0, np.abs(ev).max(axis=-1, keepdims=True))
        if np.any(ev < -1e-10 * scale):
            raise InputError(
                "a species' measurement-error covariance (observed traits) is not positive "
                "semidefinite; check the error correlations (|r| <= 1) and variances"
            )
        return np.ascontiguousarray(err_var), False
    if err_var.shape[-2:] != (n_tips, k) or err_var.ndim > (3 if draws else 2):
        raise InputError(
            f"err_var must be (species x traits) variances {observed.shape} or "
            f"(species x traits x traits) covariances; got {err_var.shape}"
        )
    if not np.all(np.isfinite(err_var)) or np.any(err_var < 0):
        raise InputError("measurement-error variances must be finite and >= 0")
    full = np.zeros(err_var.shape + (k,))
    idx = np.arange(k)
    full[..., idx, idx] = err_var
    return full, True


def _check_regime(regime, R: np.ndarray, n_nodes: int, draws: bool) -> np.ndarray:
    """Validate a per-branch regime index against ``R``; return it as int64 (2-d for draws)."""
    n_reg = R.shape[-3]
    regime = np.asarray(regime)
    if regime.dtype.kind not in "iu":
        if regime.dtype.kind == "f" and np.all(np.isfinite(regime)) and np.all(regime % 1 == 0):
            regime = regime.astype(np.int64)
        else:
            raise InputError("regime must hold integer regime numbers, one per node")
    regime = np.ascontiguousarray(regime, dtype=np.int64)
    if regime.shape[-1:] != (n_nodes,) or regime.ndim > (2 if draws else 1):
        raise InputError(
            f"regime must have one entry per node ({n_nodes}); got shape {regime.shape}"
        )
    if regime.size and (regime.min() < 0 or regime.max() >= n_reg):
        raise InputError(
            f"regime numbers must lie in 0..{n_reg - 1} (one rate matrix per regime in R); "
            f"got values from {regime.min()} to {regime.max()}"
        )
    return regime.reshape(-1, n_nodes) if draws else regime


def _prepare(parent, lengths, y, observed, R, E, err_var, mu, draws: bool = False,
             regime=None):
    parent = np.ascontiguousarray(parent, dtype=np.int64)
    y = np.array(y, dtype=np.float64, copy=True, ndmin=2)
    if y.ndim != 2:
        raise InputError(f"y must be (species x traits); got shape {y.shape}")
    n_tips, k = y.shape
    observed = np.ascontiguousarray(observed, dtype=bool)
    if observed.shape != y.shape:
        raise InputError(f"observed must have the shape of y {y.shape}; got {observed.shape}")
    if not np.all(np.isfinite(y[observed])):
        raise InputError("y has NaN or infinite values in cells marked observed; mark them missing")
    y[~observed] = 0.0
    lengths = np.ascontiguousarray(lengths, dtype=np.float64)
    R = np.ascontiguousarray(R, dtype=np.float64)
    E = np.ascontiguousarray(E, dtype=np.float64)
    err_var = np.ascontiguousarray(err_var, dtype=np.float64)
    mu = np.ascontiguousarray(mu, dtype=np.float64)
    _check_tree(parent, lengths, n_tips)
    _check_cov("R", R, k, semidefinite=False)
    _check_cov("E", E, k, semidefinite=True)
    err, diagonal = _error_cov(err_var, observed, draws)
    if mu.shape[-1:] != (k,) or not np.all(np.isfinite(mu)):
        raise InputError(f"mu must hold {k} finite root means; got shape {mu.shape}")
    if regime is not None:
        r_ndim = 4 if draws else 3
        if R.ndim == r_ndim - 1:
            R = R[..., None, :, :] if draws else R[None]
        if R.ndim != r_ndim:
            raise InputError(
                "with regimes R must be (regimes x traits x traits)"
                + (" per draw" if draws else "") + f"; got shape {R.shape}"
            )
        regime = _check_regime(regime, R, parent.shape[0], draws)
    if not draws:
        if (lengths.ndim != 1 or R.ndim != (2 if regime is None else 3) or E.ndim != 2
                or mu.ndim != 1):
            raise InputError("lengths, R, E, err_var and mu must be single values, not draws")
        _check_tips(parent, lengths, observed, E, err)
    if regime is not None:
        return (parent, lengths, y, observed, R, regime, E, err, mu), diagonal
    return (parent, lengths, y, observed, R, E, err, mu), diagonal


def _check_tips(parent, lengths, observed, E, err) -> None:
    n_tips = observed.shape[0]
    bad = (lengths[:n_tips] == 0) & observed.any(axis=1)
    for i in np.flatnonzero(bad):
        o = observed[i]
        S = E[np.ix_(o, o)] + err[i][np.ix_(o, o)]
        if np.linalg.eigvalsh(S).min() <= 0:
            raise InputError(
                f"species {i} sits on a zero-length branch with no measurement error: its "
                "observation would be a point mass. Give it a positive branch length or an "
                "error variance."
            )


def _call(task: str, args: tuple, with_regime: bool):
    """Run ``task`` on validated arguments with the kernels made for this trait count.

    Only the path for this k is compiled (:func:`cladewise.engine.entries.kernel_for`);
    without regimes, ``R`` becomes one regime.
    """
    if with_regime:
        parent, lengths, y, observed, R, regime, E, err, mu = args
    else:
        parent, lengths, y, observed, R, E, err, mu = args
        if task == "loo_logdens_draws":
            R = R[:, None]
            regime = np.zeros((1, parent.shape[0]), np.int64)
        else:
            R = R[None]
            regime = np.zeros(parent.shape[0], np.int64)
    fn, extra = entries.kernel_for(task, y.shape[1])
    return fn(parent, lengths, y, observed, np.ascontiguousarray(R), regime, E, err, mu, *extra)


def loglik(parent, lengths, y, observed, R, E, err_var, mu, *, regime=None) -> float:
    """Log-likelihood of the observed cells, computed in O(N k^3).

    Parameters
    ----------
    parent : (n_nodes,) int
        FlatTree parent array.
    lengths : (n_nodes,) float
        Branch lengths (``lengths[root]`` is the root edge).
    y : (N, k) float
        Observed species means; unobserved cells may hold anything (NaN included).
    observed : (N, k) bool
        Which cells of ``y`` are observed.
    R, E : (k, k) float
        Evolutionary rate matrix (positive definite) and species-level covariance
        (positive semidefinite; zeros when absent). With ``regime``, ``R`` is
        ``(n_regimes, k, k)``: one rate matrix per regime.
    err_var : (N, k) or (N, k, k) float
        Measurement-error variances, or each species' full error covariance
        (symmetric, positive semidefinite on its observed traits; the rows and
        columns of unobserved traits are ignored).
    mu : (k,) float
        Root mean.
    regime : (n_nodes,) int, optional
        Regime of each branch (multi-rate Brownian motion, O'Meara et al. 2006): the
        branch above node ``v`` has covariance ``lengths[v] * R[regime[v]]``.

    Returns
    -------
    float
    """
    args, _ = _prepare(parent, lengths, y, observed, R, E, err_var, mu, regime=regime)
    return float(_call("loglik", args, regime is not None))


def loglik_and_grad(
    parent, lengths, y, observed, R, E, err_var, mu, *, regime=None
) -> tuple[float, dict]:
    """Log-likelihood and its gradient with respect to every float input.

    Returns
    -------
    logp : float
    grad : dict
        Keys ``"lengths", "y", "R", "E", "err_var", "mu"``, same shapes as the
        inputs, zero at unobserved cells. ``grad["R"]`` and ``grad["E"]`` are
        symmetric matrix derivatives: a symmetric change ``dR`` changes ``logp`` by
        ``sum(grad["R"] * dR)``. For a full ``(N, k, k)`` error covariance,
        ``grad["err_var"]`` holds the partial derivative with respect to every entry
        (symmetric, zero in the rows and columns of unobserved cells), so that too
        is read as ``sum(grad["err_var"] * dS)``. With ``regime`` (see :func:`loglik`)
        ``grad["R"]`` is ``(n_regimes, k, k)``, one matrix derivative per regime.
    """
    args, diagonal = _prepare(parent, lengths, y, observed, R, E, err_var, mu,
                              regime=regime)
    logp, dl, dy, dR, dE, dev, dmu = _call("value_and_grad", args, regime is not None)
    if regime is None:
        dR = dR[0]
    if diagonal:
        dev = np.ascontiguousarray(np.diagonal(dev, axis1=1, axis2=2))
    grad = {"lengths": dl, "y": dy, "R": dR, "E": dE, "err_var": dev, "mu": dmu}
    return float(logp), grad


def loo_conditionals(
    parent, lengths, y, observed, R, E, err_var, mu, *, regime=None
) -> tuple[np.ndarray, np.ndarray]:
    """Predictive of each species' observation vector given all other species.

    Measurement error and ``E`` are included. Returns ``mean (N, k)`` and
    ``cov (N, k, k)``. ``regime``: see :func:`loglik`.
    """
    args, _ = _prepare(parent, lengths, y, observed, R, E, err_var, mu, regime=regime)
    mean, cov, _, _ = _call("loo", args, regime is not None)
    return mean, cov


def loo_logdensity(
    parent, lengths, y, observed, R, E, err_var, mu, *, regime=None
) -> np.ndarray:
    """Log density of each species' observed cells under its leave-one-out predictive.

    Zero for a species with nothing observed. Shape ``(N,)``. ``regime``: see
    :func:`loglik`.
    """
    args, _ = _prepare(parent, lengths, y, observed, R, E, err_var, mu, regime=regime)
    return _call("loo", args, regime is not None)[2]


def loo_logdensity_draws(
    parent, lengths, y, observed, R, E, err_var, mu, *, regime=None
) -> np.ndarray:
    """:func:`loo_logdensity` for many posterior draws, looped in numba.

    Parameters
    ----------
    lengths : (S, n_nodes) or (n_nodes,)
    R, E : (S, k, k)
    err_var : (N, k), (S, N, k) or (S, N, k, k)
        Variances (diagonal error) or full error covariances; a single full
        covariance shared by all draws is passed as ``(1, N, k, k)``.
    mu : (S, k)
    regime : (n_nodes,) or (S, n_nodes) int, optional
        Regime of each branch (see :func:`loglik`); ``R`` is then
        ``(S, n_regimes, k, k)``.

    Returns
    -------
    (S, N) array; NaN for a draw whose likelihood cannot be evaluated.
    """
    args, _ = _prepare(parent, lengths, y, observed, R, E, err_var, mu, draws=True,
                       regime=regime)
    if regime is None:
        parent, lengths, y, observed, R, E, err, mu = args
    else:
        parent, lengths, y, observed, R, regime, E, err, mu = args
    if R.ndim != (3 if regime is None else 4) or E.ndim != 3 or mu.ndim != 2:
        raise InputError("R and E must be (draws, k, k) and mu (draws, k)")
    S = R.shape[0]
    lengths2 = lengths.reshape(-1, lengths.shape[-1])
    err4 = err.reshape(-1, *err.shape[-3:])
    for name, a in (("E", E), ("mu", mu), ("lengths", lengths2), ("err_var", err4)):
        if a.shape[0] not in ((S,) if name in ("E", "mu") else (1, S)):
            raise InputError(f"{name} has {a.shape[0]} draws but R has {S}")
    if regime is not None:
        if regime.shape[0] not in (1, S):
            raise InputError(f"regime has {regime.shape[0]} rows but R has {S} draws")
        return _call("loo_logdens_draws", (parent, lengths2, y, observed, R, regime, E, err4, mu), True)
    return _call("loo_logdens_draws", (parent, lengths2, y, observed, R, E, err4, mu), False)


def ancestral_states(
    parent, lengths, y, observed, R, E, err_var, mu, *, regime=None
) -> tuple[np.ndarray, np.ndarray]:
    """Posterior of the latent value at every node given all data.

    Returns ``mean (n_nodes, k)`` and ``cov (n_nodes, k, k)``; rows ``0..N-1`` are
    the latent true species means, the others the internal nodes. ``regime``: see
    :func:`loglik`.
    """
    args, _ = _prepare(parent, lengths, y, observed, R, E, err_var, mu, regime=regime)
    mean, cov, _ = _call("ancestral", args, regime is not None)
    return mean, cov
