"""Within-species covariance between traits measured on the same specimens.

When two traits are measured on the same individuals, the errors of their species
means are correlated: with within-species covariance ``W`` and ``n`` specimens
measured for both, ``Cov(mean_a, mean_b) = W_ab / n``. Treating them as independent
pushes the within-species correlation into the evolutionary rate matrix (a false
evolutionary correlation). The model here estimates a full ``k x k`` within-species
covariance and passes each species' error covariance of its means to the engine.

Model (``measurement_error = "specimens"``, two or more traits, specimen rows)
-------------------------------------------------------------------------------
``W_i = D_i Omega D_i``: one within-species correlation matrix ``Omega`` shared by
all species (LKJ prior, eta = 2, reported as ``within_corr``) and per-species,
per-trait standard deviations ``D_i`` partially pooled across species on the log
variance scale (as for the single-trait model).

Each species' specimen rows contribute a likelihood term of their own:

* **complete rows** (every modelled trait measured), ``c_i`` of them: the scatter
  matrix ``A_i = (c_i - 1) S_i`` about their own mean has
  ``A_i ~ Wishart(c_i - 1, W_i)`` (Anderson 2003, An Introduction to Multivariate
  Statistical Analysis, section 7.2). When ``c_i - 1 < k`` (or ``A_i`` is singular)
  the Wishart has no density and the term is the Gaussian density of the
  ``c_i - 1`` orthonormal (Helmert) contrasts of the rows, which depends on ``W_i``
  in exactly the same way (``-(c_i - 1)/2 log|W_i| - tr(W_i^-1 A_i)/2``).
* **rows lacking some traits**, trait by trait: the sum of squares of all ``n_a``
  rows with trait ``a`` exceeds that of the complete rows by
  ``SS_inc ~ W_aa chi^2(n_a - c_i)`` (``n_a - 1`` degrees of freedom when
  ``c_i = 0``): the increment is the within-sum of the extra rows plus the
  between-group term of the two means, both independent of the complete rows'
  scatter (normal theory: a sample mean is independent of its scatter). The
  increments of two traits share the complete rows' means; that weak dependence
  is ignored.

The error covariance of the species means (each trait's mean uses every specimen
that has the trait) is ``Cov(mean_a, mean_b) = W_ab n_ab / (n_a n_b)``, with
``n_ab`` the number of specimens measured for both; rows and columns of a trait the
species lacks are dropped by the engine.

Species-mean tables (``measurement_error = "se"``)
--------------------------------------------------
``[model] error_correlation`` states the within-species correlation of the errors
of the means: one number (every trait pair) or a ``k x k`` matrix (traits in the
model's order). The error covariance is ``S_i = D_i Rho D_i`` with ``D_i`` the given
standard errors. Default 0: independent errors.

LOO holds out a species' means, not its sample (co)variances: those stay in the
fit as information about ``W``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd
import pymc as pm
import pytensor.tensor as pt
from scipy.special import gammaln

from cladewise.errors import InputError

__all__ = [
    "SpecimenStats",
    "specimen_statistics",
    "wishart_logp",
    "wishart_logp_from_parts",
    "within_species_error",
    "within_species_logp",
    "check_error_correlation",
    "error_correlation_matrix",
    "se_error_covariance",
    "draw_errors",
    "describe",
    "simulate_specimens",
]

LOG_2PI = math.log(2.0 * math.pi)


# --------------------------------------------------------------------------- statistics
@dataclass
class SpecimenStats:
    """Sufficient statistics of the specimen rows of every species (species order).

    Attributes
    ----------
    n : (N, k) specimens measured for each trait.
    n_pair : (N, k, k) specimens measured for both traits (diagonal = ``n``).
    nu : (N,) degrees of freedom of the complete rows (their count - 1, >= 0).
    scatter : (N, k, k) scatter matrix of the complete rows about their mean.
    inc_ss : (N, k) sum of squares of all rows of a trait minus that of the complete rows.
    inc_dof : (N, k) degrees of freedom of ``inc_ss``.
    """

    n: np.ndarray
    n_pair: np.ndarray
    nu: np.ndarray
    scatter: np.ndarray
    inc_ss: np.ndarray
    inc_dof: np.ndarray

    def mean_error_factor(self, observed: np.ndarray) -> np.ndarray:
        """``F[i, a, b] = n_ab / (n_a n_b)`` (0 where a trait is unobserved): ``S_i = W_i * F_i``."""
        n = np.where(observed & (self.n > 0), self.n, np.inf)
        F = self.n_pair / (n[:, :, None] * n[:, None, :])
        mask = observed[:, :, None] & observed[:, None, :]
        return np.where(mask, F, 0.0)


def specimen_statistics(specimens: pd.DataFrame, species: Sequence[str], traits: Sequence[str],
                        species_col: str = "species") -> SpecimenStats:
    """Reduce specimen rows to the statistics of the within-species likelihood.

    Parameters
    ----------
    specimens : DataFrame
        One row per specimen: ``species_col`` and one column per trait (NaN = not measured).
    species : species in model order; species without rows get zero counts.
    traits : the modelled traits, in model order.
    """
    missing = [t for t in traits if t not in specimens.columns]
    if missing:
        raise InputError(f"the specimen table has no column(s) {missing}; check [model] traits")
    N, k = len(species), len(traits)
    pos = {s: i for i, s in enumerate(species)}
    n = np.zeros((N, k))
    n_pair = np.zeros((N, k, k))
    nu = np.zeros(N)
    scatter = np.zeros((N, k, k))
    inc_ss = np.zeros((N, k))
    inc_dof = np.zeros((N, k))
    for name, rows in specimens.groupby(species_col, sort=False):
        i = pos.get(name)
        if i is None:
            continue
        X = rows[list(traits)].to_numpy(dtype=float)
        have = np.isfinite(X)
        n[i] = have.sum(axis=0)
        n_pair[i] = have.T.astype(float) @ have.astype(float)
        full = have.all(axis=1)
        c = int(full.sum())
        Xc = X[full]
        ss_c = np.zeros(k)
        if c >= 2:
            D = Xc - Xc.mean(axis=0)
            scatter[i] = D.T @ D
            nu[i] = c - 1
            ss_c = np.diag(scatter[i]).copy()
        for a in range(k):
            col = X[have[:, a], a]
            if col.size < 2:
                continue
            ss_all = float(((col - col.mean()) ** 2).sum())
            inc_dof[i, a] = col.size - c if c >= 1 else col.size - 1
            inc_ss[i, a] = max(ss_all - ss_c[a], 0.0) if inc_dof[i, a] > 0 else 0.0
    return SpecimenStats(n=n, n_pair=n_pair, nu=nu, scatter=scatter, inc_ss=inc_ss, inc_dof=inc_dof)


# --------------------------------------------------------------------------- Wishart
def _log_multigamma(a: np.ndarray, k: int) -> np.ndarray:
    a = np.asarray(a, dtype=float)
    return k * (k - 1) / 4.0 * math.log(math.pi) + sum(gammaln(a + (1.0 - j) / 2.0) for j in range(1, k + 1))


def wishart_logp_from_parts(logdet_A, nu, k: int, logdet_W, trace_WinvA):
    """Log density of ``A ~ Wishart(nu, W)`` (scale ``W``, ``E[A] = nu W``) from its parts.

    ``(nu - k - 1)/2 log|A| - tr(W^-1 A)/2 - nu k/2 log 2 - nu/2 log|W| - log Gamma_k(nu/2)``
    (Anderson 2003, section 7.2). ``logdet_A`` and ``nu`` are data (numpy); the
    ``W`` parts may be PyTensor expressions.
    """
    nu = np.asarray(nu, dtype=float)
    const = (0.5 * (nu - k - 1.0) * np.asarray(logdet_A, dtype=float) - 0.5 * nu * k * math.log(2.0)
             - _log_multigamma(nu / 2.0, k))
    return const - 0.5 * nu * logdet_W - 0.5 * trace_WinvA


def wishart_logp(A: np.ndarray, nu, W):
    """Log density of ``A ~ Wishart(nu, W)`` as a PyTensor expression (batched over a leading axis).

    ``A`` (data) is ``(k, k)`` or ``(m, k, k)``; ``W`` a tensor of the same shape.
    """
    A = np.asarray(A, dtype=float)
    k = A.shape[-1]
    W = pt.as_tensor_variable(W)
    sign_A, logdet_A = np.linalg.slogdet(A)
    if np.any(sign_A <= 0):
        raise InputError("a Wishart observation must be positive definite")
    L = pt.linalg.cholesky(W)
    logdet_W = 2.0 * pt.log(pt.diagonal(L, axis1=-2, axis2=-1)).sum(axis=-1)
    Winv_A = pt.linalg.solve(W, pt.as_tensor_variable(A))
    trace = pt.trace(Winv_A) if A.ndim == 2 else pt.diagonal(Winv_A, axis1=-2, axis2=-1).sum(axis=-1)
    return wishart_logp_from_parts(logdet_A, nu, k, logdet_W, trace)


def _term_constants(stats: SpecimenStats, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """W-free constants of the complete-row and increment terms, and which apply.

    Wishart / chi-square where the density exists; otherwise the Gaussian density
    of the orthonormal contrasts (same dependence on ``W``).
    """
    nu = stats.nu
    use_w = nu >= 1
    sign, logdet_A = np.linalg.slogdet(stats.scatter)
    regular = use_w & (nu >= k) & (sign > 0)
    const_w = np.where(
        regular,
        wishart_logp_from_parts(np.where(regular, logdet_A, 0.0), np.where(regular, nu, k), k, 0.0, 0.0),
        -0.5 * nu * k * LOG_2PI,
    )
    d = stats.inc_dof
    use_c = d >= 1
    chi = use_c & (stats.inc_ss > 0)
    dd = np.where(use_c, d, 1.0)
    const_c = np.where(
        chi,
        (0.5 * dd - 1.0) * np.log(np.where(chi, stats.inc_ss, 1.0)) - 0.5 * dd * math.log(2.0) - gammaln(0.5 * dd),
        -0.5 * dd * LOG_2PI,
    )
    return np.where(use_w, const_w, 0.0), use_w, np.where(use_c, const_c, 0.0), use_c


def within_species_logp(stats: SpecimenStats, sd, corr):
    """Log density of all species' specimen statistics given ``W_i = D_i corr D_i``.

    ``sd`` is ``(N, k)`` (tensor or numpy), ``corr`` ``(k, k)``. Works on numpy and
    PyTensor inputs alike.
    """
    k = stats.n.shape[1]
    const_w, use_w, const_c, use_c = _term_constants(stats, k)
    lib = np if isinstance(sd, np.ndarray) and isinstance(corr, np.ndarray) else pt
    if k == 2:  # closed form: LAPACK calls on a 2 x 2 matrix cost more than the algebra
        r = corr[0, 1]
        det = 1.0 - r * r
        corr_inv = lib.stack([lib.stack([1.0 / det, -r / det]), lib.stack([-r / det, 1.0 / det])])
        logdet_corr = lib.log(det)
    else:
        corr_inv = (pt.linalg.inv if lib is pt else np.linalg.inv)(corr)
        logdet_corr = pt.log(pt.linalg.det(corr)) if lib is pt else np.linalg.slogdet(corr)[1]
    # Every species in one dense expression, with zero weights where a term does not
    # apply: picking out the species that have it (gathers, and scatters in the
    # gradient) cost more per gradient than the arithmetic itself.
    nu = np.where(use_w, stats.nu, 0.0)
    scatter = np.where(use_w[:, None, None], stats.scatter, 0.0)
    dof = np.where(use_c, stats.inc_dof, 0.0)
    ss = np.where(use_c, stats.inc_ss, 0.0)
    log_s = lib.log(sd)
    inv_s = 1.0 / sd
    # complete rows: -nu/2 log|W_i| - tr(W_i^-1 A_i)/2 with W^-1 = D^-1 corr^-1 D^-1
    trace = (corr_inv[None, :, :] * scatter * inv_s[:, :, None] * inv_s[:, None, :]).sum()
    wishart = (const_w.sum() - (nu[:, None] * log_s).sum() - 0.5 * nu.sum() * logdet_corr
               - 0.5 * trace)
    # increments: -d/2 log s^2 - SS / (2 s^2), trait by trait
    increments = const_c.sum() - (dof * log_s).sum() - 0.5 * (ss * inv_s * inv_s).sum()
    return wishart + increments


#: LKJ shape of the prior on the within-species correlation matrix
WITHIN_CORR_ETA = 2.0


def lkj_corr(name: str, k: int, eta: float) -> Any:
    """A ``k x k`` correlation matrix with an LKJ(eta) prior (a PyMC random variable inside).

    For ``k = 2`` the LKJ density ``(1 - r^2)^(eta - 1)`` is Beta(eta, eta) on
    ``(r + 1) / 2`` (Lewandowski, Kurowicka & Joe 2009, J. Multivariate Anal. 100:1989);
    that form avoids the matrix factorisations of PyMC's ``LKJCorr`` at every
    gradient, which in a small model cost as much as the tree likelihood.
    """
    if k == 2:
        r = 2.0 * pm.Beta(f"{name}_half", alpha=eta, beta=eta) - 1.0
        return pt.stack([pt.stack([pt.ones_like(r), r]), pt.stack([r, pt.ones_like(r)])])
    return pm.LKJCorr(name, n=k, eta=eta, return_matrix=True)


def within_species_error(stats: SpecimenStats, observed: np.ndarray, traits: Sequence[str],
                         priors: list, prior_info: Any, dims: tuple[str, str] = ("trait", "trait_")) -> Any:
    """PyMC terms of the within-species covariance; returns the ``(N, k, k)`` error of the means.

    Must be called inside a model with ``species`` and ``dims`` (default ``trait``,
    ``trait_``) coords.
    Adds ``within_corr`` (shared within-species correlation), ``within_sd`` (typical
    within-species sd per trait) and the specimen likelihood ``within_species_loglik``.
    """
    N, k = observed.shape
    counted = (stats.n >= 2) & observed
    for j, t in enumerate(traits):
        if not counted[:, j].any():
            raise InputError(
                f"no species has two or more specimens of {t!r}: within-species variance cannot be estimated"
            )
    if not (stats.nu >= 1).any():
        raise InputError(
            "no species has two or more specimens with every trait measured, so the within-species "
            "correlation cannot be estimated; measure some specimens for all traits, or fit the "
            "traits one at a time"
        )
    with np.errstate(divide="ignore", invalid="ignore"):
        pooled = np.where(stats.inc_dof + stats.nu[:, None] > 0,
                          (stats.inc_ss + np.diagonal(stats.scatter, axis1=1, axis2=2))
                          / np.maximum(stats.inc_dof + stats.nu[:, None], 1), np.nan)
    centre = np.array([
        np.log(np.median(pooled[counted[:, j] & (pooled[:, j] > 0), j]))
        if (counted[:, j] & (pooled[:, j] > 0)).any() else 0.0
        for j in range(k)
    ])
    log_mean = pm.Normal("within_log_var_mean", mu=centre, sigma=2.0, dims=dims[0])
    log_sd = pm.HalfNormal("within_log_var_sd", sigma=1.0, dims=dims[0])
    z = pm.Normal("within_z", 0.0, 1.0, dims=("species", dims[0]))
    sd = pt.exp(0.5 * (log_mean[None, :] + log_sd[None, :] * z))
    pm.Deterministic("within_sd", pt.sqrt(pt.exp(log_mean)), dims=dims[0])
    corr = pm.Deterministic("within_corr", lkj_corr("within_corr_lkj", k, WITHIN_CORR_ETA), dims=dims)
    pm.Potential("within_species_loglik", within_species_logp(stats, sd, corr))
    priors.append(prior_info("within-species log variance", "Normal(log median s^2, 2) mean, HalfNormal(1) spread",
                             "partial pooling across species; species with one specimen borrow strength"))
    priors.append(prior_info("within-species correlation matrix", f"LKJ(eta={WITHIN_CORR_ETA:g})",
                             "shared by all species; mildly favours small correlations"))
    F = stats.mean_error_factor(observed)
    W = sd[:, :, None] * sd[:, None, :] * corr[None, :, :]
    return W * F


# --------------------------------------------------------------------------- species-mean tables
def check_error_correlation(value: Any, n_traits: int | None = None) -> None:
    """Validate ``[model] error_correlation`` (a number in (-1, 1) or a k x k matrix)."""
    if value is None:
        return
    if isinstance(value, bool):
        raise InputError("[model] error_correlation must be a number in (-1, 1) or a matrix, not true/false")
    if isinstance(value, (int, float)):
        if not -1.0 < float(value) < 1.0:
            raise InputError(f"[model] error_correlation = {value} must lie strictly between -1 and 1")
        return
    try:
        M = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError("[model] error_correlation must be a number or a square matrix of numbers "
                         "(one row per trait, in the order of [model] traits)") from None
    if M.ndim != 2 or M.shape[0] != M.shape[1] or (n_traits is not None and M.shape[0] != n_traits):
        raise InputError(f"[model] error_correlation must be a {n_traits or 'k'} x {n_traits or 'k'} "
                         f"matrix (one row per trait); got shape {M.shape}")
    if not np.allclose(np.diag(M), 1.0) or not np.allclose(M, M.T):
        raise InputError("[model] error_correlation must be symmetric with ones on the diagonal")
    if np.linalg.eigvalsh(M).min() <= 0:
        raise InputError("[model] error_correlation is not a valid correlation matrix (not positive definite)")


def error_correlation_matrix(value: Any, k: int) -> np.ndarray | None:
    """The ``k x k`` correlation of the errors of the means, or None for independent errors."""
    if value is None:
        return None
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        if float(value) == 0.0:
            return None
        M = np.full((k, k), float(value))
        np.fill_diagonal(M, 1.0)
        if np.linalg.eigvalsh(M).min() <= 0:
            raise InputError(f"error_correlation = {value} is not a valid common correlation for {k} traits "
                             f"(it must exceed {-1.0 / (k - 1):.3g})")
        return M
    check_error_correlation(value, k)
    return np.asarray(value, dtype=float)


def se_error_covariance(err_var, rho: np.ndarray):
    """``S_i = D_i rho D_i`` from squared standard errors ``(N, k)`` (tensor): ``(N, k, k)``."""
    sd = pt.sqrt(err_var)
    return sd[:, :, None] * sd[:, None, :] * pt.as_tensor_variable(rho)[None, :, :]


# --------------------------------------------------------------------------- helpers
def draw_errors(err: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One draw of measurement errors ``(N, k)`` from variances ``(N, k)`` or covariances ``(N, k, k)``."""
    err = np.asarray(err, dtype=float)
    if err.ndim == 2:
        return rng.standard_normal(err.shape) * np.sqrt(err)
    # eigen-root: the error of an unobserved trait is 0 (a singular block)
    vals, vecs = np.linalg.eigh(0.5 * (err + np.swapaxes(err, 1, 2)))
    root = vecs * np.sqrt(np.clip(vals, 0.0, None))[:, None, :]
    return np.einsum("nij,nj->ni", root, rng.standard_normal(err.shape[:2]))


def describe(measurement_error: str, error_correlation: Any, full_within: bool) -> str:
    """Plain words for the error assumption used, for the model description."""
    if measurement_error == "specimens":
        if full_within:
            return ("within-species covariance estimated from specimens (shared within-species correlation, "
                    "species' errors of the means correlated across traits)")
        return "within-species variance estimated from specimens (errors of the means independent across traits)"
    if measurement_error == "se":
        if error_correlation is None or (isinstance(error_correlation, (int, float))
                                         and float(error_correlation) == 0.0):
            return "known standard errors (errors of the means assumed independent across traits)"
        return f"known standard errors with error correlation {error_correlation} between traits"
    return "no measurement error"


def simulate_specimens(tree: Any, R: np.ndarray, mu: np.ndarray, W: np.ndarray, n_specimens: Any,
                       rng: np.random.Generator, traits: Sequence[str] | None = None) -> pd.DataFrame:
    """Invented specimen rows: species values by Brownian motion, specimens around them.

    Species values ``X ~ N(1 mu', C (x) R)`` on ``tree`` (dense; a few hundred species);
    each specimen is ``x_i + e`` with ``e ~ N(0, W)`` (``W`` k x k, or ``(N, k, k)``
    per species). ``n_specimens`` is an int or a per-species array. Returns a frame
    with a ``species`` column and one column per trait.
    """
    from cladewise.data.trees import covariance

    R = np.asarray(R, dtype=float)
    k = R.shape[0]
    names = list(traits) if traits is not None else [f"trait{j + 1}" for j in range(k)]
    C = covariance(tree)
    N = C.shape[0]
    Lc = np.linalg.cholesky(C + 1e-12 * np.eye(N))
    Lr = np.linalg.cholesky(R)
    X = np.asarray(mu, dtype=float)[None, :] + Lc @ rng.standard_normal((N, k)) @ Lr.T
    W = np.asarray(W, dtype=float)
    Ws = np.broadcast_to(W, (N, k, k)) if W.ndim == 2 else W
    counts = np.broadcast_to(np.asarray(n_specimens, dtype=int), (N,))
    rows = []
    for i in range(N):
        Lw = np.linalg.cholesky(Ws[i])
        rows.append(X[i] + rng.standard_normal((counts[i], k)) @ Lw.T)
    values = np.concatenate(rows)
    sp = np.repeat(np.asarray(tree.tip_names, dtype=object), counts)
    return pd.DataFrame({"species": sp, **{t: values[:, j] for j, t in enumerate(names)}})
