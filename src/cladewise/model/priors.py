"""Parameters and their priors: each builder creates PyMC variables and describes its priors.

Called by :func:`cladewise.model.build.build_model` inside a ``pm.Model`` context.
Every builder appends a :class:`PriorInfo` (parameter, distribution, reason) for each
prior it places, so the printed results list every prior used.

Defaults are weakly informative and scaled to the data:

- rates: a half-normal prior (scale 2 trait sds) on each trait's *tip sd*,
  ``sqrt(R_jj t)`` with t the mean root-to-tip variance of the transformed tree at
  the current parameters; the rate is ``tip_sd^2 / t``. The prior therefore follows
  alpha, kappa, delta or the early-burst rate and never puts the rate the data need
  in its tail; under Brownian motion it is the former prior on sqrt-rates with scale
  ``2 sd / sqrt(mean root-to-tip length)``.
- evolutionary correlations: LKJ(1), uniform over correlation matrices.
- Pagel's lambda: Beta(1, 1); OU alpha: half-normal with scale 3 / tree height;
  kappa: Uniform(0, 1.5), even over (0, 1] and a little above; delta: LogNormal(0, 0.5);
  early burst: Normal(0, 3 / tree height).
- regression: predictors centred and scaled inside the model; slopes Normal(0, 2.5
  sd(y) / sd(x)), the intercept at the predictors' means Normal(mean y, 5 sd(y)).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from cladewise.errors import InputError
from cladewise.config.analysis import MODEL_PRIORS
from cladewise.model.evolution import MODELS

__all__ = [
    "PriorInfo",
    "PRIOR_KEYS",
    "PARAMETER_NAMES",
    "scale_facts",
    "evolution_parameters",
    "rate_terms",
    "species_terms",
    "regression_terms",
    "regression_coefficients",
]

#: prior overrides accepted in ``[model.priors]`` / ``ModelSpec.priors`` (declared,
#: with their ranges, in ``cladewise.config.analysis.MODEL_PRIORS``)
PRIOR_KEYS: dict[str, str] = {name: key.help for name, key in MODEL_PRIORS.keys.items()}



@dataclass
class PriorInfo:
    """One prior, in words, for the printed results."""

    parameter: str
    distribution: str
    reason: str


def scale_facts(values: np.ndarray) -> tuple[float, float]:
    v = values[np.isfinite(values)]
    if v.size < 2:
        raise InputError("a trait needs at least two observed species")
    sd = float(np.std(v, ddof=1))
    if not sd > 0:
        raise InputError("a trait has no variance across species (all values equal); it cannot be modelled")
    return float(np.mean(v)), sd



PARAMETER_NAMES = {"lam": "lambda", "alpha": "alpha", "kappa": "kappa", "delta": "delta",
                "rate_change": "rate_change"}


def evolution_parameters(spec: Any, pri: dict, height: float, priors: list[PriorInfo]) -> dict:
    model = spec.evolution
    if model == "bm":
        return {}
    if spec.fixed:
        (key, value), = spec.fixed.items()
        inner = MODELS[model][0]
        priors.append(PriorInfo(PARAMETER_NAMES[inner], f"fixed at {value:g}", "set in the spec"))
        # data, not a constant: one compiled model can be re-run at other fixed values
        fixed = pm.Data(f"fixed_{PARAMETER_NAMES[inner]}", np.asarray(float(value)))
        return {inner: fixed}
    if model == "lambda":
        a, b = pri.get("lambda_beta", [1.0, 1.0])
        lam = pm.Beta("lambda", alpha=float(a), beta=float(b))
        priors.append(PriorInfo("lambda", f"Beta({a:g}, {b:g})", "Pagel's lambda lies in [0, 1]; uniform by default"))
        return {"lam": lam}
    if model == "ou":
        s = float(pri.get("alpha_scale", 3.0)) / height
        alpha = pm.HalfNormal("alpha", sigma=s)
        pm.Deterministic("half_life", math.log(2.0) / alpha)
        priors.append(PriorInfo("alpha", f"HalfNormal({s:.4g})",
                                "scale 3 / tree height: half-lives shorter than ~0.1 tree heights are unlikely a priori"))
        return {"alpha": alpha}
    if model == "kappa":
        top = float(pri.get("kappa_max", 1.5))
        if not top > 1.0:
            raise InputError(f"[model.priors] kappa_max = {top:g} must be above 1 so that Brownian motion "
                             "(kappa = 1) stays inside the prior; 1.5 is the default")
        priors.append(PriorInfo("kappa", f"Uniform(0, {top:g})",
                                "even over (0, 1] and a little above: both limits, change at speciation "
                                "(kappa near 0) and gradual change (kappa = 1), can be found"))
        return {"kappa": pm.Uniform("kappa", lower=np.float64(0.0), upper=np.float64(top))}
    if model == "delta":
        s = float(pri.get("delta_sd", 0.5))
        priors.append(PriorInfo("delta", f"LogNormal(0, {s:g})", "centred on delta = 1 (Brownian motion)"))
        return {"delta": pm.LogNormal("delta", mu=0.0, sigma=s)}
    if model == "early_burst":
        s = float(pri.get("rate_change_scale", 3.0)) / height
        priors.append(PriorInfo("rate_change", f"Normal(0, {s:.4g})",
                                "scale 3 / tree height: the rate may change about e^3-fold over the tree"))
        return {"rate_change": pm.Normal("rate_change", 0.0, s)}
    raise AssertionError(model)  # pragma: no cover


def rate_terms(spec, y, observed, traits, t_mean, pri, priors):
    """Rates through the sd of a species value along the tree (the tip sd).

    The prior sits on ``tip_sd_j = sqrt(R_jj t)``, t the mean root-to-tip variance of
    the *transformed* tree at the current parameters (``t_mean``), which the data
    inform directly; the rate is ``tip_sd^2 / t``. Under OU with large alpha, small
    kappa or a strong early burst, t changes by orders of magnitude, and a prior on
    the rate itself would put the needed value in its tail.
    """
    k = len(traits)
    means, sds = zip(*(scale_facts(y[observed[:, j], j]) for j in range(k)))
    means, sds = np.array(means), np.array(sds)
    scales = 2.0 * float(pri.get("rate_scale", 1.0)) * sds
    root_sd = float(pri.get("root_sd", 5.0)) * sds
    mu = pm.Normal("root_mean", mu=means, sigma=root_sd, dims="trait")
    priors.append(PriorInfo("root_mean", "Normal(trait mean, " + ", ".join(f"{s:.3g}" for s in root_sd) + ")",
                            "5 trait sds around the observed mean"))
    scale_txt = ", ".join(f"{s:.3g}" for s in scales)
    why = ("2 x trait sd; the rate is tip_sd^2 / (mean root-to-tip variance of the transformed tree), "
           "so the prior follows the evolution model's parameters")
    inv_sqrt_t = 1.0 / pt.sqrt(t_mean)
    if spec.kind == "independent":
        tip_sd = pm.HalfNormal("tip_sd", sigma=scales, dims="trait")
        sigma = tip_sd * inv_sqrt_t
        R = pt.diag(sigma**2)
        priors.append(PriorInfo("tip_sd (sqrt of rate x tree variance)", f"HalfNormal({scale_txt})", why))
    else:
        eta = float(pri.get("lkj_eta", 1.0))
        # Cholesky factor of the tip covariance. Sampling sds and partial correlations
        # apart was measured in benchmarks/bench_calibration.py and diverged as often or
        # more (one chain stuck near correlation 1), so the factor stays.
        tip_chol, corr, _ = pm.LKJCholeskyCov(
            "tip_chol", n=k, eta=eta, sd_dist=pm.HalfNormal.dist(sigma=scales, shape=k), compute_corr=True
        )
        chol = tip_chol * inv_sqrt_t
        R = pt.dot(chol, chol.T)
        pm.Deterministic("evo_corr", corr, dims=("trait", "trait_"))
        # slope of the row trait on the column trait: R_yx / R_xx
        pm.Deterministic("evo_slope", R / pt.diag(R)[None, :], dims=("trait", "trait_"))
        priors.append(PriorInfo("evolutionary correlation matrix", f"LKJ(eta={eta:g})",
                                "eta = 1 is uniform over correlation matrices"))
        priors.append(PriorInfo("tip sd of each trait (sqrt of rate x tree variance)", f"HalfNormal({scale_txt})", why))
    pm.Deterministic("evo_rate", pt.diag(R), dims="trait")
    return R, mu


def species_terms(y, observed, traits, pri, priors):
    k = len(traits)
    sds = np.array([scale_facts(y[observed[:, j], j])[1] for j in range(k)])
    scales = float(pri.get("species_scale", 1.0)) * sds
    if k == 1:
        s = pm.HalfNormal("species_sd", sigma=scales, dims="trait")
        E = pt.diag(s**2)
    else:
        cholE, corrE, _ = pm.LKJCholeskyCov(
            "species_chol", n=k, eta=2.0, sd_dist=pm.HalfNormal.dist(sigma=scales, shape=k), compute_corr=True
        )
        E = pt.dot(cholE, cholE.T)
        pm.Deterministic("species_corr", corrE, dims=("trait", "trait_"))
        priors.append(PriorInfo("species-level correlation matrix", "LKJ(eta=2)", "mildly favours small residual correlations"))
    priors.append(PriorInfo("species-level sds", "HalfNormal(" + ", ".join(f"{s:.3g}" for s in scales) + ")",
                            "one trait sd"))
    return E


def regression_coefficients(X, predictors, observed, ymean, ysd, pri, priors):
    """Coefficients sampled on centred, scaled predictors; reported on the user's scale.

    Each non-intercept column x_j enters as z_j = (x_j - m_j) / s_j (mean and sd over
    the species used). With an intercept this is an exact reparametrisation of the
    same likelihood, and the intercept sampled is the response at the predictors'
    means, which is nearly uncorrelated with the slopes; priors are placed on that
    scale. Reported: ``coef`` (intercept at the predictors' zero, slopes per unit x)
    and ``intercept_at_mean`` (the response at the predictors' means). Returns the
    fitted values ``X beta`` (N,) as a tensor of the design's data container.
    """
    coef_scale = pri.get("coef_scale", 2.5)
    obs = observed[:, 0]
    p = len(predictors)
    has_icpt = "Intercept" in predictors
    i0 = predictors.index("Intercept") if has_icpt else -1
    slope = np.array([j != i0 for j in range(p)])
    centre = np.zeros(p)
    scale = np.ones(p)
    for j in np.flatnonzero(slope):
        col = X[obs, j]
        # without an intercept, centring would change the model: only scale then
        centre[j] = float(np.mean(col)) if has_icpt else 0.0
        scale[j] = float(np.std(col, ddof=1)) if col.size > 1 else 1.0
        if not scale[j] > 0:
            scale[j] = 1.0
    if coef_scale == "flat":
        b_z = pm.Flat("coef_z", shape=p)
        priors.append(PriorInfo("coef", "flat (improper)", "requested in the spec"))
    else:
        loc = np.where(slope, 0.0, ymean)
        sd = np.where(slope, float(coef_scale) * ysd, 5.0 * ysd)
        b_z = pm.Normal("coef_z", mu=loc, sigma=sd, shape=p)
        user_sd = sd / scale
        txt = ", ".join(f"{predictors[j]}: Normal(0, {user_sd[j]:.3g})" for j in np.flatnonzero(slope))
        if has_icpt:
            txt = f"intercept at the predictors' means: Normal({ymean:.3g}, {5.0 * ysd:.3g})" + (f"; {txt}" if txt else "")
        priors.append(PriorInfo(
            "coef", txt,
            f"slopes {coef_scale} x sd(y)/sd(x) (common practice for weakly informative priors); "
            "predictors are centred and scaled inside the model so the intercept prior does not pull the slopes"))
    b_user = b_z / scale
    if has_icpt:
        at_mean = b_z[i0]
        pm.Deterministic("intercept_at_mean", at_mean)
        icpt = at_mean - pt.sum(b_user * centre)
        beta = pt.set_subtensor(b_user[i0], icpt)
    else:
        beta = b_user
    pm.Deterministic("coef", beta, dims="term")
    X_d = pm.Data("design", X)
    # centred design from the data container, so swapped designs stay exact
    Z = (X_d - centre[None, :]) / scale[None, :]
    return pt.dot(Z, b_z)


def regression_terms(y, observed, X, predictors, ymean, ysd, t_mean, pri, priors):
    """Coefficients (:func:`regression_coefficients`) and the residual rate of a regression.

    Returns ``(R, mu, residuals)``: the engine sees the residuals ``y - X beta`` with
    root mean 0.
    """
    fitted = regression_coefficients(X, predictors, observed, ymean, ysd, pri, priors)
    scale_r = 2.0 * float(pri.get("rate_scale", 1.0)) * ysd
    tip_sd = pm.HalfNormal("tip_sd", sigma=scale_r)
    sigma = tip_sd / pt.sqrt(t_mean)
    priors.append(PriorInfo("tip_sd (sqrt of residual rate x tree variance)", f"HalfNormal({scale_r:.3g})",
                            "2 x sd(y); the residual rate is tip_sd^2 / (mean root-to-tip variance of the "
                            "transformed tree)"))
    R = pt.reshape(sigma**2, (1, 1))
    pm.Deterministic("evo_rate", pt.diag(R), dims="trait")
    y_d = pm.Data("obs_values", np.where(observed, y, 0.0))
    resid = pt.where(observed, y_d - fitted[:, None], 0.0)
    return R, pt.zeros(1), resid
