"""Leave-one-species-out cross-validation on the tree (PSIS-LOO).

Species share ancestry, so the log-likelihood terms that LOO needs are *conditional*
densities ``log p(y_i | y_-i, theta)`` of one species given all the others (Bürkner,
Gabry & Vehtari 2021, Computational Statistics 36:1243-1261), not marginal densities
of each species alone. Every fit stores them per draw (computed by the tree engine
in linear time); this module turns them into PSIS-LOO estimates (Vehtari, Gelman &
Gabry 2017, Statistics and Computing 27:1413-1432). A fit pooled over a tree sample is
scored as the equal-weight mixture it reports: PSIS per tree, combined per species by
log-mean-exp across trees.

Model comparison is in :mod:`cladewise.evaluation.compare`; exact refits of
influential species and leave-one-clade-out in :mod:`cladewise.evaluation.refits`.
"""

from __future__ import annotations

import hashlib
import json
import math
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping, Sequence

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr
from scipy.special import logsumexp

from cladewise.errors import InputError
from cladewise.inference.draws import LOGLIK_VAR, pointwise_loglik


__all__ = [
    "LooResult",
    "ScoredFit",
    "loo_species",
    "scored_fit",
    "loglik_matrix",
    "observed_values",
    "replace_pointwise",
    "data_signature",
    "sorted_observed",
    "observed_signature",
    "table_records",
    "psis",
    "result_from_elpd",
    "psis_over_trees",
    "K_THRESHOLD",
    "DIFF_SE_FACTOR",
    "LOO_VAR",
    "as_fit_result",
]

#: Pareto k above which the importance-sampling estimate of a species is unreliable
#: (Vehtari et al. 2024, JMLR 25(72)).
K_THRESHOLD = 0.7
#: an ELPD difference smaller than this many standard errors is called "not
#: distinguishable" (common practice; Vehtari et al. 2017 discuss the se of differences)
DIFF_SE_FACTOR = 2.0

LOO_VAR = "pointwise"  # variable name of the private InferenceData handed to ArviZ



# --------------------------------------------------------------------------- results
@dataclass
class LooResult:
    """PSIS-LOO estimate for one fit, per species (or per held-out clade).

    Attributes
    ----------
    elpd, se, p_loo : float
        Expected log predictive density of a held-out unit, its standard error and the
        effective number of parameters.
    pointwise : DataFrame
        Index = species (or clade) names; columns ``elpd_i``, ``pareto_k``,
        ``estimate`` ("PSIS" or "exact refit") and, for species, the observed values.
    unit : str
        "species" or "clade".
    n_draws : int
    good_k : float
        Sample-size-dependent Pareto k bound of Vehtari et al. 2024 (at most 0.7).
    members : dict
        Clade name -> its species (clade LOO only).
    elpd_data : arviz.ELPDData
        The object ArviZ works with (updated after exact refits).
    notes : list of str
    """

    elpd: float
    se: float
    p_loo: float
    pointwise: pd.DataFrame
    unit: str
    n_draws: int
    good_k: float
    elpd_data: Any
    members: dict[str, list[str]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    threshold: float = K_THRESHOLD

    @property
    def flagged(self) -> list[str]:
        """Units whose Pareto k exceeds the threshold and were not refitted."""
        p = self.pointwise
        bad = (p["pareto_k"] > self.threshold) & (p["estimate"] != "exact refit")
        return list(p.index[bad])

    @property
    def refitted(self) -> list[str]:
        """Units whose PSIS estimate was replaced by an exact refit."""
        return list(self.pointwise.index[self.pointwise["estimate"] == "exact refit"])

    def to_text(self) -> str:
        what = "species" if self.unit == "species" else "clade"
        lines = [
            f"Leave-one-{what}-out cross-validation (PSIS-LOO, {self.n_draws} draws): "
            f"ELPD {self.elpd:.2f} (se {self.se:.2f}), effective parameters p_loo {self.p_loo:.2f}",
        ]
        if self.refitted:
            lines.append(f"Exact refits replaced the estimate for: {', '.join(self.refitted)}")
        hi = self.flagged
        if hi:
            lines.append(
                f"Pareto k above {self.threshold:g} for {len(hi)} {what}(s): their estimate is unreliable "
                "(Vehtari et al. 2024); they are unusually influential. Consider refit_influential()."
            )
            value_cols = [c for c in self.pointwise.columns if c not in ("elpd_i", "pareto_k", "estimate")]
            for name in hi:
                row = self.pointwise.loc[name]
                vals = ", ".join(
                    f"{c} = {row[c]:.4g}" for c in value_cols if isinstance(row[c], (float, np.floating)) and np.isfinite(row[c])
                )
                extra = f" ({vals})" if vals else ""
                lines.append(f"  - {name}: k = {row['pareto_k']:.2f}, elpd_i = {row['elpd_i']:.2f}{extra}")
        else:
            lines.append(f"All Pareto k <= {self.threshold:g}: the importance-sampling estimates are reliable.")
        lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)

    def to_dict(self) -> dict[str, Any]:
        pw = self.pointwise.reset_index().rename(columns={"index": self.unit})
        return {
            "unit": self.unit,
            "elpd": self.elpd,
            "se": self.se,
            "p_loo": self.p_loo,
            "n_draws": self.n_draws,
            "k_threshold": self.threshold,
            "good_k": self.good_k,
            "flagged": self.flagged,
            "refitted": self.refitted,
            "pointwise": table_records(pw),
            "members": self.members,
            "notes": list(self.notes),
        }



def table_records(df: pd.DataFrame) -> list[dict[str, Any]]:
    out = []
    for rec in df.to_dict(orient="records"):
        clean = {}
        for k, v in rec.items():
            if isinstance(v, (np.floating, float)):
                v = float(v) if np.isfinite(v) else None
            elif isinstance(v, np.integer):
                v = int(v)
            elif isinstance(v, np.bool_):
                v = bool(v)
            clean[str(k)] = v
        out.append(clean)
    return out



# --------------------------------------------------------------------------- inputs
@dataclass
class ScoredFit:
    """What cross-validation needs from a fit, whatever form it came in."""

    label: str
    idata: az.InferenceData
    info: dict[str, Any]
    built: Any = None


def scored_fit(fit: Any, label: str = "fit") -> ScoredFit:
    from cladewise.inference.fit import FitResult
    from cladewise.inference.results import load_fit

    if isinstance(fit, FitResult):
        return ScoredFit(label, fit.idata, dict(fit.info), fit.built)
    if isinstance(fit, az.InferenceData):
        info = {}
        raw = fit.posterior.attrs.get("cladewise_info") if "posterior" in fit.groups() else None
        if raw:
            try:
                info = json.loads(raw)
            except (TypeError, ValueError):
                info = {}
        return ScoredFit(label, fit, info, None)
    if isinstance(fit, (str, Path)):
        idata, summ = load_fit(fit)
        return ScoredFit(label, idata, dict(summ), None)
    raise InputError(
        f"{label}: expected a FitResult, an InferenceData or a saved fit folder, got {type(fit).__name__}"
    )


def loglik_matrix(view: ScoredFit) -> xr.DataArray:
    """Per-draw leave-one-species-out log densities (chain, draw, species)."""
    idata = view.idata
    if "log_likelihood" in idata.groups():
        ds = idata.log_likelihood
        names = [LOGLIK_VAR] if LOGLIK_VAR in ds.data_vars else list(ds.data_vars)
        for name in names:
            da = ds[name]
            if da.dims == ("chain", "draw", "species"):
                return da
    if view.built is not None:
        # A fit whose log_likelihood group is missing can still be scored when the
        # model is at hand: recompute the conditionals from the posterior draws.
        return pointwise_loglik(view.built, idata)
    raise InputError(
        f"{view.label}: the fit has no per-species log-likelihood (log_likelihood group with "
        "dims chain, draw, species); refit it with the current cladewise so the group is saved"
    )


def observed_values(view: ScoredFit) -> xr.DataArray:
    idata = view.idata
    if "observed_data" not in idata.groups() or "y" not in idata.observed_data:
        if view.built is not None:
            b = view.built
            return xr.DataArray(b.y, dims=("species", "trait"), coords={"species": b.species, "trait": b.traits})
        raise InputError(f"{view.label}: the fit has no observed_data group; refit it with the current cladewise")
    return idata.observed_data["y"]


# --------------------------------------------------------------------------- PSIS
#: PSIS-LOO works on this many bytes of log densities at a time (units are independent)
PSIS_CHUNK_BYTES = 64 * 2**20


def psis(ll: xr.DataArray, posterior: xr.Dataset | None, unit: str) -> Any:
    """ArviZ PSIS-LOO on a (chain, draw, unit) array of pointwise log densities.

    Each unit's importance weights depend only on its own column, so the units are
    handled in blocks of about :data:`PSIS_CHUNK_BYTES` and the results joined: ArviZ
    makes several working copies of what it is given, which for 100,000 species and
    4,000 draws would be tens of GB. The joined result is ArviZ's, term for term.
    """
    ll = ll.rename({ll.dims[2]: unit}) if ll.dims[2] != unit else ll
    per = max(1, PSIS_CHUNK_BYTES // (8 * ll.sizes["chain"] * ll.sizes["draw"]))
    n = ll.sizes[unit]
    if n <= per:
        return _psis_block(ll, posterior)
    parts = [_psis_block(ll.isel({unit: slice(i, i + per)}), posterior) for i in range(0, n, per)]
    loo_i = xr.concat([p.loo_i for p in parts], dim=unit)
    ed = parts[0].copy()
    ed["loo_i"] = loo_i
    ed["pareto_k"] = xr.concat([p.pareto_k for p in parts], dim=unit)
    ed["elpd_loo"] = float(loo_i.sum())
    ed["se"] = float(math.sqrt(n * np.var(loo_i.values)))  # ArviZ's formula
    ed["p_loo"] = float(sum(float(p.p_loo) for p in parts))  # a sum over units
    ed["n_data_points"] = int(n)
    ed["warning"] = bool(any(bool(p.warning) for p in parts))
    return ed


def _psis_block(ll: xr.DataArray, posterior: xr.Dataset | None) -> Any:
    ds = xr.Dataset({LOO_VAR: ll.rename(LOO_VAR)})
    groups = {"log_likelihood": ds}
    if posterior is not None:
        groups["posterior"] = posterior
    idata = az.InferenceData(**groups)
    with warnings.catch_warnings():
        # ArviZ warns about high Pareto k; we report them in words instead.
        warnings.simplefilter("ignore")
        return az.loo(idata, pointwise=True, var_name=LOO_VAR)


def result_from_elpd(elpd_data: Any, unit_names: Sequence[str], unit: str, values: pd.DataFrame | None,
                      members: dict[str, list[str]] | None = None, notes: list[str] | None = None) -> LooResult:
    loo_i = np.asarray(elpd_data.loo_i, dtype=float)
    k = np.asarray(elpd_data.pareto_k, dtype=float)
    pw = pd.DataFrame({"elpd_i": loo_i, "pareto_k": k, "estimate": "PSIS"}, index=pd.Index(list(unit_names), name=unit))
    if values is not None:
        pw = pw.join(values)
    n_draws = int(elpd_data.n_samples)
    good_k = float(getattr(elpd_data, "good_k", min(1 - 1 / math.log10(n_draws), K_THRESHOLD)))
    return LooResult(
        elpd=float(elpd_data.elpd_loo), se=float(elpd_data.se), p_loo=float(elpd_data.p_loo),
        pointwise=pw, unit=unit, n_draws=n_draws, good_k=good_k, elpd_data=elpd_data,
        members=dict(members or {}), notes=list(notes or []),
    )


def psis_over_trees(ll: xr.DataArray, posterior: xr.Dataset | None) -> tuple[Any, int]:
    """PSIS-LOO per tree, combined per species as the equal-weight mixture.

    Draws pooled over T trees come from the mixture posterior ``(1/T) sum_t p_t(theta|y)``.
    Its leave-one-out predictive density is ``p(y_i | y_-i) = (1/T) sum_t p_t(y_i | y_-i)``
    when every tree keeps its equal weight; PSIS on the pooled draws would instead
    estimate the harmonic mean over trees, which is smaller and gives no warning. Each
    tree's term is estimated by PSIS on that tree's draws, and the terms are combined
    by log-mean-exp. Pareto k is the largest over trees (the least reliable term).

    Returns the ArviZ ELPD object (pointwise ``loo_i`` and ``pareto_k`` replaced) and
    the number of trees (1 when the draws carry no ``tree`` coordinate).
    """
    trees = np.asarray(ll.coords["tree"].values) if "tree" in ll.coords else None
    if trees is None or len(np.unique(trees)) < 2:
        return psis(ll, posterior, "species"), 1
    loo_t, k_t, parts = [], [], []
    for t in np.unique(trees):
        chains = ll["chain"].values[trees == t]
        sub_post = posterior.sel(chain=chains) if posterior is not None and "chain" in posterior.dims else None
        ed = psis(ll.sel(chain=chains), sub_post, "species")
        parts.append(ed)
        loo_t.append(np.asarray(ed.loo_i, dtype=float))
        k_t.append(np.asarray(ed.pareto_k, dtype=float))
    n_t = len(parts)
    loo_i = logsumexp(np.stack(loo_t), axis=0) - math.log(n_t)
    k = np.max(np.stack(k_t), axis=0)
    vals = ll.values.reshape(-1, ll.shape[-1])
    lppd_i = logsumexp(vals, axis=0) - math.log(vals.shape[0])
    ed = parts[0].copy()
    coords = {"species": ll["species"].values}
    ed["loo_i"] = xr.DataArray(loo_i, dims=("species",), coords=coords, name="loo_i")
    ed["pareto_k"] = xr.DataArray(k, dims=("species",), coords=coords, name="pareto_k")
    ed["elpd_loo"] = float(loo_i.sum())
    ed["se"] = float(math.sqrt(loo_i.size * np.var(loo_i)))
    ed["p_loo"] = float(lppd_i.sum() - loo_i.sum())
    ed["n_samples"] = int(vals.shape[0])
    ed["warning"] = bool((k > ed["good_k"]).any())
    return ed, n_t


def loo_species(fit: Any) -> LooResult:
    """PSIS-LOO over species from a fit's stored leave-one-species-out conditionals.

    Species without any observed value have nothing to predict and are left out
    (they neither add to the ELPD nor count in its standard error). For a fit pooled
    over a tree sample the estimate is that of the equal-weight mixture over trees:
    PSIS per tree, combined per species by log-mean-exp (:func:`psis_over_trees`).

    Parameters
    ----------
    fit : FitResult, InferenceData or path of a saved fit folder

    Returns
    -------
    LooResult
        ELPD, its se, p_loo, per-species ``elpd_i`` and Pareto k; species with
        k > 0.7 are named with their observed values in ``to_text()``.
    """
    view = scored_fit(fit)
    ll = loglik_matrix(view)
    obs = observed_values(view)
    names = [str(s) for s in ll["species"].values]
    ll = ll.assign_coords(species=names)
    values = pd.DataFrame(obs.values, index=[str(s) for s in obs["species"].values],
                          columns=[str(t) for t in obs["trait"].values])
    values = values.reindex(names)
    notes = []
    empty = values.isna().all(axis=1)
    if empty.any():
        ll = ll.sel(species=[s for s, e in zip(names, empty) if not e])
        values = values.loc[~empty]
        notes.append(f"{int(empty.sum())} species without observed values are left out of LOO "
                     "(nothing to predict)")
    posterior = view.idata.posterior if "posterior" in view.idata.groups() else None
    elpd_data, n_trees = psis_over_trees(ll, posterior)
    if n_trees > 1:
        notes.append(
            f"pooled over {n_trees} trees: each species' predictive density is the mean over trees of the "
            "per-tree PSIS-LOO densities (the equal-weight mixture); Pareto k is the largest over trees"
        )
    return result_from_elpd(elpd_data, [str(s) for s in ll["species"].values], "species", values, notes=notes)


def replace_pointwise(res: LooResult, new_elpd: Mapping[str, float], note: str | None = None) -> LooResult:
    """A copy of ``res`` whose ``elpd_i`` of some units are exact values."""
    pw = res.pointwise.copy()
    for name, v in new_elpd.items():
        pw.loc[name, "elpd_i"] = float(v)
        pw.loc[name, "estimate"] = "exact refit"
    loo_i = pw["elpd_i"].to_numpy(dtype=float)
    n = loo_i.size
    elpd = float(loo_i.sum())
    se = float(math.sqrt(n * np.var(loo_i)))
    # lppd is unchanged (full-data posterior), so p_loo = lppd - elpd moves with elpd
    p_loo = res.p_loo + (res.elpd - elpd)
    ed = res.elpd_data.copy()
    ed["elpd_loo"] = elpd
    ed["se"] = se
    ed["p_loo"] = p_loo
    old = ed["loo_i"]
    ed["loo_i"] = xr.DataArray(loo_i, dims=old.dims, coords=old.coords) if isinstance(old, xr.DataArray) else loo_i
    notes = list(res.notes) + ([note] if note else [])
    return replace(res, elpd=elpd, se=se, p_loo=p_loo, pointwise=pw, elpd_data=ed, notes=notes)



# --------------------------------------------------------------------------- compare
def data_signature(fit: Any) -> str:
    """SHA-256 of the data a fit's log-likelihood scores: species, traits and values.

    Species and traits are sorted first, so the same data in another order gives the
    same signature.
    """
    return observed_signature(observed_values(scored_fit(fit)))


def sorted_observed(obs: xr.DataArray) -> xr.DataArray:
    sp = sorted(str(s) for s in obs["species"].values)
    tr = sorted(str(t) for t in obs["trait"].values)
    o = obs.assign_coords(species=[str(s) for s in obs["species"].values], trait=[str(t) for t in obs["trait"].values])
    return o.sel(species=sp, trait=tr)


def observed_signature(obs: xr.DataArray) -> str:
    o = sorted_observed(obs)
    vals = np.asarray(o.values, dtype=np.float64)
    mask = np.isfinite(vals)
    h = hashlib.sha256()
    h.update(json.dumps([list(o["species"].values), list(o["trait"].values)]).encode())
    h.update(mask.tobytes())
    h.update(np.where(mask, vals, 0.0).tobytes())
    return h.hexdigest()


def as_fit_result(view: ScoredFit) -> Any:
    """A minimal :class:`~cladewise.inference.fit.FitResult` around a scored fit."""
    from cladewise.inference.fit import FitResult

    return FitResult(idata=view.idata, summary=pd.DataFrame(), diagnostics=None, built=view.built, info=view.info)
