"""Measurement error of the species means: known standard errors or specimen-based.

Part of the model builder (:mod:`cladewise.model.build`): the error enters the
engine as each species' variance (N, k) or k x k covariance (N, k, k) of its means.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from cladewise.errors import InputError
from cladewise.model import within_species as ws
from cladewise.model.priors import PriorInfo

__all__ = ["check_error_correlation_spec", "error_blocks", "measurement_error"]


def check_error_correlation_spec(spec: Any) -> None:
    """Check ``[model] error_correlation`` against the measurement-error mode and kind."""
    if spec.error_correlation is None:
        return
    if spec.measurement_error != "se":
        raise InputError(
            "[model] error_correlation is only used with measurement_error = 'se' (species means with "
            "standard errors); with specimen rows the within-species correlation is estimated"
        )
    if spec.kind == "regression":
        raise InputError("[model] error_correlation applies to kind = 'correlated' or 'independent', "
                         "not to a regression (its response is a single trait)")
    # with discrete traits the matrix is over the continuous traits (liabilities have no error)
    disc = getattr(spec, "discrete", None) or {}
    ws.check_error_correlation(spec.error_correlation, len([t for t in spec.traits if t not in disc]))


def error_blocks(err_var, n: int, k: int):
    """blockdiag of the species' error covariances (dense check only)."""
    if err_var.ndim == 2:
        return pt.diag(pt.flatten(err_var))
    # [i, a, j, b] = delta_ij S_i[a, b]
    return (pt.eye(n)[:, None, :, None] * err_var[:, :, None, :]).reshape((n * k, n * k))


def measurement_error(spec: Any, data: Any, cols: list, observed: np.ndarray, priors: list, notes: list,
                      dims: tuple[str, str] = ("trait", "trait_")):
    """Variance (N, k) or covariance (N, k, k) of the errors of the species means.

    ``measurement_error`` of the spec: ``none`` (zero), ``se`` (known standard errors,
    optionally correlated across traits), ``specimens`` (within-species covariance
    from specimen rows, or partially pooled per-trait variances). Appends to
    ``priors`` and ``notes``. ``dims``: the model's coordinates of ``cols`` (the
    continuous traits only, in a model with discrete traits).
    """
    n, k = observed.shape
    mode = spec.measurement_error
    if mode == "none":
        return pt.zeros((n, k))
    if mode == "se":
        if data.se is None:
            raise InputError(
                "measurement_error = 'se' needs standard errors: add <trait>_se columns (or "
                "<trait>_n and <trait>_sd), or use per-specimen rows with measurement_error = 'specimens'"
            )
        out = np.zeros((n, k))
        for j, c in enumerate(cols):
            if c is None or c not in data.se.columns:
                raise InputError(f"no standard errors for {c!r}")
            se = data.se[c].to_numpy(dtype=float)
            have = np.isfinite(se) & observed[:, j]
            lack = observed[:, j] & ~np.isfinite(se)
            if not have.any():
                raise InputError(f"no species has a standard error for {c!r}")
            if lack.any():
                fill = float(np.median(se[have]))
                notes.append(
                    f"{int(lack.sum())} species had no standard error for {c!r}; the median ({fill:.3g}) was used"
                )
                se = np.where(lack, fill, se)
            out[:, j] = np.where(observed[:, j], se**2, 0.0)
        rho = ws.error_correlation_matrix(spec.error_correlation, k) if k >= 2 else None
        if rho is None:
            priors.append(PriorInfo("measurement error", "known: squared standard errors from the table", "as given"))
            return pm.Data("obs_err_var", out)
        priors.append(PriorInfo("measurement error", "known: standard errors from the table, correlated across "
                                "traits by [model] error_correlation", "as given"))
        return ws.se_error_covariance(pm.Data("obs_err_var", out), rho)
    if k >= 2 and data.specimens is not None:
        # traits measured on the same specimens: full within-species covariance
        stats = ws.specimen_statistics(data.specimens, data.species, cols)
        return ws.within_species_error(stats, observed, cols, priors, PriorInfo, dims=dims)
    if k >= 2:
        notes.append("no specimen rows were given, only per-trait variances: the errors of the species "
                     "means are treated as independent across traits")
    # specimens: partially pooled within-species variances
    if data.n is None or data.sample_var is None:
        raise InputError(
            "measurement_error = 'specimens' needs a per-specimen table: set specimens = true in [data]"
        )
    nn = np.zeros((n, k))
    s2 = np.full((n, k), np.nan)
    for j, c in enumerate(cols):
        if c is None or c not in data.n.columns:
            raise InputError(f"no specimen counts for {c!r}")
        nn[:, j] = np.nan_to_num(data.n[c].to_numpy(dtype=float))
        s2[:, j] = data.sample_var[c].to_numpy(dtype=float)
    # a zero sample variance (a value repeated for every specimen) carries no information
    has_var = (nn >= 2) & np.isfinite(s2) & (np.nan_to_num(s2) > 0) & observed
    centre = np.array([
        np.log(np.median(s2[has_var[:, j], j])) if has_var[:, j].any() else 0.0 for j in range(k)
    ])
    for j, c in enumerate(cols):
        if not has_var[:, j].any():
            raise InputError(f"no species has two or more specimens of {c!r}: within-species variance cannot be estimated")
    log_mean = pm.Normal("within_log_var_mean", mu=centre, sigma=2.0, dims=dims[0])
    log_sd = pm.HalfNormal("within_log_var_sd", sigma=1.0, dims=dims[0])
    z = pm.Normal("within_z", 0.0, 1.0, dims=("species", dims[0]))
    var_w = pt.exp(log_mean[None, :] + log_sd[None, :] * z)
    pm.Deterministic("within_sd", pt.sqrt(pt.exp(log_mean)), dims=dims[0])
    idx = np.nonzero(has_var)
    dof = nn[idx] - 1.0
    # (n-1) s^2 / sigma^2 ~ chi^2(n-1)  <=>  s^2 ~ Gamma((n-1)/2, rate=(n-1)/(2 sigma^2))
    pm.Gamma("within_sample_var", alpha=dof / 2.0, beta=dof / (2.0 * var_w[idx]), observed=s2[idx])
    priors.append(PriorInfo("within-species log variance", "Normal(log median s^2, 2) mean, HalfNormal(1) spread",
                            "partial pooling across species; species with one specimen borrow strength"))
    nsafe = np.where(observed & (nn > 0), nn, 1.0)
    return pt.where(observed, var_w / nsafe, 0.0)
