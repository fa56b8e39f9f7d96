"""Leave-one-species-out and leave-one-clade-out cross-validation; model comparison.

Species share ancestry, so the log-likelihood terms that LOO needs are *conditional*
densities ``log p(y_i | y_-i, theta)`` of one species given all the others (Bürkner,
Gabry & Vehtari 2021, Computational Statistics 36:1243-1261), not marginal densities
of each species alone. Every fit stores them per draw (computed by the tree engine
in linear time); this module turns them into PSIS-LOO estimates (Vehtari, Gelman &
Gabry 2017, Statistics and Computing 27:1413-1432), compares models by ELPD with
stacking weights (Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis
13:917-1007), replaces unreliable importance-sampling estimates (Pareto k above
0.7; Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72)) by exact refits, and
holds out whole clades.

Public functions: :func:`loo_species`, :func:`compare_fits`,
:func:`refit_influential`, :func:`loo_clades`, :func:`data_signature`.
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

__all__ = [
    "LooResult",
    "ComparisonResult",
    "loo_species",
    "compare_fits",
    "refit_influential",
    "loo_clades",
    "data_signature",
    "K_THRESHOLD",
]

#: Pareto k above which the importance-sampling estimate of a species is unreliable
#: (Vehtari et al. 2024, JMLR 25(72)).
K_THRESHOLD = 0.7
#: an ELPD difference smaller than this many standard errors is called "not
#: distinguishable" (common practice; Vehtari et al. 2017 discuss the se of differences)
DIFF_SE_FACTOR = 2.0

_LOO_VAR = "pointwise"  # variable name of the private InferenceData handed to ArviZ


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
            "pointwise": _records(pw),
            "members": self.members,
            "notes": list(self.notes),
        }


@dataclass
class ComparisonResult:
    """Models ranked by leave-one-species-out ELPD.

    Attributes
    ----------
    table : DataFrame
        One row per model, best first: ``model, rank, elpd, se, elpd_diff, diff_se,
        p_loo, weight, n_high_k, verdict``.
    loo : dict
        Model name -> :class:`LooResult`.
    signature : str
        Hash of the data every model was scored on (species, traits, observed values).
    loglik_kind : str
        "joint" or "conditional".
    notes : list of str
    """

    table: pd.DataFrame
    loo: dict[str, LooResult]
    signature: str
    loglik_kind: str
    notes: list[str] = field(default_factory=list)

    @property
    def influential(self) -> dict[str, dict[str, float]]:
        """Model -> {species: Pareto k} for species above the k threshold (not refitted)."""
        return {
            name: {s: float(r.pointwise.loc[s, "pareto_k"]) for s in r.flagged} for name, r in self.loo.items()
        }

    def to_text(self) -> str:
        cols = ["model", "elpd", "se", "elpd_diff", "diff_se", "p_loo", "weight", "n_high_k"]
        with pd.option_context("display.width", 160):
            tab = self.table[cols].to_string(index=False, float_format=lambda v: f"{v:.2f}")
        target = ("each species' response given its predictors and all other species"
                  if self.loglik_kind == "conditional" else "each species' traits given all other species")
        lines = [
            "Model comparison by leave-one-species-out cross-validation (PSIS-LOO; "
            "weights by stacking, Yao et al. 2018)",
            f"Predicted: {target}.",
            tab,
            "",
        ]
        lines += [f"{r.model}: {r.verdict}" for r in self.table.itertuples()]
        lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": "PSIS-LOO over species (Vehtari, Gelman & Gabry 2017); stacking weights (Yao et al. 2018)",
            "loglik_kind": self.loglik_kind,
            "data_signature": self.signature,
            "diff_se_factor": DIFF_SE_FACTOR,
            "table": _records(self.table),
            "models": {name: r.to_dict() for name, r in self.loo.items()},
            "notes": list(self.notes),
        }


def _records(df: pd.DataFrame) -> list[dict[str, Any]]:
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
class _FitView:
    """What cross-validation needs from a fit, whatever form it came in."""

    label: str
    idata: az.InferenceData
    info: dict[str, Any]
    built: Any = None


def _view(fit: Any, label: str = "fit") -> _FitView:
    from cladewise.inference.fit import FitResult, load_fit

    if isinstance(fit, FitResult):
        return _FitView(label, fit.idata, dict(fit.info), fit.built)
    if isinstance(fit, az.InferenceData):
        info = {}
        raw = fit.posterior.attrs.get("cladewise_info") if "posterior" in fit.groups() else None
        if raw:
            try:
                info = json.loads(raw)
            except (TypeError, ValueError):
                info = {}
        return _FitView(label, fit, info, None)
    if isinstance(fit, (str, Path)):
        idata, summ = load_fit(fit)
        return _FitView(label, idata, dict(summ), None)
    raise InputError(
        f"{label}: expected a FitResult, an InferenceData or a saved fit folder, got {type(fit).__name__}"
    )


def _loglik_matrix(view: _FitView) -> xr.DataArray:
    """Per-draw leave-one-species-out log densities (chain, draw, species)."""
    idata = view.idata
    if "log_likelihood" in idata.groups():
        ds = idata.log_likelihood
        from cladewise.inference.fit import LOGLIK_VAR

        names = [LOGLIK_VAR] if LOGLIK_VAR in ds.data_vars else list(ds.data_vars)
        for name in names:
            da = ds[name]
            if da.dims == ("chain", "draw", "species"):
                return da
    if view.built is not None:
        # A fit whose log_likelihood group is missing can still be scored when the
        # model is at hand: recompute the conditionals from the posterior draws.
        return _pointwise_from_draws(view.built, idata, _EngineCache(view.built))
    raise InputError(
        f"{view.label}: the fit has no per-species log-likelihood (log_likelihood group with "
        "dims chain, draw, species); refit it with the current cladewise so the group is saved"
    )


def _observed(view: _FitView) -> xr.DataArray:
    idata = view.idata
    if "observed_data" not in idata.groups() or "y" not in idata.observed_data:
        if view.built is not None:
            b = view.built
            return xr.DataArray(b.y, dims=("species", "trait"), coords={"species": b.species, "trait": b.traits})
        raise InputError(f"{view.label}: the fit has no observed_data group; refit it with the current cladewise")
    return idata.observed_data["y"]


# --------------------------------------------------------------------------- PSIS
def _psis(ll: xr.DataArray, posterior: xr.Dataset | None, unit: str) -> Any:
    """ArviZ PSIS-LOO on a (chain, draw, unit) array of pointwise log densities."""
    ll = ll.rename({ll.dims[2]: unit}) if ll.dims[2] != unit else ll
    ds = xr.Dataset({_LOO_VAR: ll.rename(_LOO_VAR)})
    groups = {"log_likelihood": ds}
    if posterior is not None:
        groups["posterior"] = posterior
    idata = az.InferenceData(**groups)
    with warnings.catch_warnings():
        # ArviZ warns about high Pareto k; we report them in words instead.
        warnings.simplefilter("ignore")
        return az.loo(idata, pointwise=True, var_name=_LOO_VAR)


def _result_from_elpd(elpd_data: Any, unit_names: Sequence[str], unit: str, values: pd.DataFrame | None,
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


def loo_species(fit: Any) -> LooResult:
    """PSIS-LOO over species from a fit's stored leave-one-species-out conditionals.

    Parameters
    ----------
    fit : FitResult, InferenceData or path of a saved fit folder

    Returns
    -------
    LooResult
        ELPD, its se, p_loo, per-species ``elpd_i`` and Pareto k; species with
        k > 0.7 are named with their observed values in ``to_text()``.
    """
    view = _view(fit)
    ll = _loglik_matrix(view)
    elpd_data = _psis(ll, view.idata.posterior if "posterior" in view.idata.groups() else None, "species")
    obs = _observed(view)
    values = pd.DataFrame(obs.values, index=[str(s) for s in obs["species"].values],
                          columns=[str(t) for t in obs["trait"].values])
    values = values.reindex([str(s) for s in ll["species"].values])
    notes = []
    empty = values.isna().all(axis=1)
    if empty.any():
        notes.append(f"{int(empty.sum())} species without observed values add 0 to the ELPD")
    return _result_from_elpd(elpd_data, [str(s) for s in ll["species"].values], "species", values, notes=notes)


def _replace_pointwise(res: LooResult, new_elpd: Mapping[str, float], note: str | None = None) -> LooResult:
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
    return _signature(_observed(_view(fit)))


def _sorted_obs(obs: xr.DataArray) -> xr.DataArray:
    sp = sorted(str(s) for s in obs["species"].values)
    tr = sorted(str(t) for t in obs["trait"].values)
    o = obs.assign_coords(species=[str(s) for s in obs["species"].values], trait=[str(t) for t in obs["trait"].values])
    return o.sel(species=sp, trait=tr)


def _signature(obs: xr.DataArray) -> str:
    o = _sorted_obs(obs)
    vals = np.asarray(o.values, dtype=np.float64)
    mask = np.isfinite(vals)
    h = hashlib.sha256()
    h.update(json.dumps([list(o["species"].values), list(o["trait"].values)]).encode())
    h.update(mask.tobytes())
    h.update(np.where(mask, vals, 0.0).tobytes())
    return h.hexdigest()


def _kind(view: _FitView) -> str:
    kind = view.info.get("loglik_kind")
    if kind is None and view.built is not None:
        kind = view.built.loglik_kind
    if kind not in ("joint", "conditional"):
        raise InputError(
            f"{view.label}: cannot tell what its log-likelihood measures (no 'loglik_kind' in its "
            "summary); refit it with the current cladewise"
        )
    return kind


def _check_comparable(views: list[_FitView], obs: list[xr.DataArray]) -> tuple[str, list[str]]:
    """Refuse fits scored on different data; return (loglik_kind, notes)."""
    notes: list[str] = []
    ref, ref_obs = views[0], obs[0]
    ref_species = [str(s) for s in ref_obs["species"].values]
    ref_kind = _kind(ref)
    for v, o in zip(views[1:], obs[1:]):
        sp = [str(s) for s in o["species"].values]
        if set(sp) != set(ref_species):
            only_a = sorted(set(ref_species) - set(sp))
            only_b = sorted(set(sp) - set(ref_species))
            raise InputError(
                f"{ref.label!r} and {v.label!r} were fitted to different species "
                f"(only in {ref.label!r}: {_few(only_a)}; only in {v.label!r}: {_few(only_b)}). "
                "LOO scores are only comparable on the same species: refit both on the same table and tree."
            )
        if sp != ref_species:
            notes.append(f"{v.label!r} lists the species in another order; they were matched by name")
        kind = _kind(v)
        if kind != ref_kind:
            reg, joint = (ref, v) if ref_kind == "conditional" else (v, ref)
            raise InputError(
                f"{reg.label!r} is a regression (its log-likelihood is the response given the predictors) "
                f"but {joint.label!r} models all its traits jointly; their ELPDs predict different things "
                "and cannot be compared. Compare regressions with regressions of the same response, and "
                "joint models with joint models of the same traits."
            )
        tr = [str(t) for t in o["trait"].values]
        ref_tr = [str(t) for t in ref_obs["trait"].values]
        if set(tr) != set(ref_tr):
            what = "responses" if kind == "conditional" else "traits"
            raise InputError(
                f"{ref.label!r} and {v.label!r} model different {what} ({', '.join(ref_tr)} vs {', '.join(tr)}); "
                f"LOO can only compare models of the same {what}."
            )
        a, b = _sorted_obs(ref_obs), _sorted_obs(o)
        va, vb = np.asarray(a.values, float), np.asarray(b.values, float)
        ma, mb = np.isfinite(va), np.isfinite(vb)
        if not np.array_equal(ma, mb):
            i, j = np.argwhere(ma != mb)[0]
            extra = (" (a regression only uses species whose predictors are all present: "
                     "fill or drop the missing predictor values so both use the same species)"
                     if kind == "conditional" else "")
            raise InputError(
                f"{ref.label!r} and {v.label!r} observe different cells: e.g. {a['species'].values[i]} / "
                f"{a['trait'].values[j]} is present in only one of them{extra}. Compare fits of the same data."
            )
        if not np.array_equal(va[ma], vb[mb]):
            diff = np.argwhere(ma & (np.where(ma, va, 0) != np.where(mb, vb, 0)))[0]
            i, j = diff
            raise InputError(
                f"{ref.label!r} and {v.label!r} were fitted to different values: {a['species'].values[i]} / "
                f"{a['trait'].values[j]} is {va[i, j]:.6g} in one and {vb[i, j]:.6g} in the other (a different "
                "table, transformation or unit?). LOO scores are only comparable on the same data."
            )
    if ref_kind == "conditional":
        preds = {v.label: tuple(v.info.get("predictors") or ()) for v in views}
        if len(set(preds.values())) > 1:
            notes.append(
                "regressions with different predictors are compared on the same target: the response "
                "of each species given its predictors and the other species"
            )
    return ref_kind, notes


def _few(names: Sequence[str], k: int = 5) -> str:
    if not names:
        return "none"
    return ", ".join(names[:k]) + (f" and {len(names) - k} more" if len(names) > k else "")


def _verdict(name: str, best: str, diff: float, dse: float, n_high: int) -> str:
    if name == best:
        text = "highest ELPD (best expected prediction of a held-out species)"
    elif not np.isfinite(dse) or dse == 0:
        text = f"ELPD lower than {best} by {diff:.2f}; the standard error of the difference is not available"
    elif diff <= DIFF_SE_FACTOR * dse:
        text = (f"not distinguishable by LOO from {best}: ELPD lower by {diff:.2f} with se {dse:.2f} "
                f"(within {DIFF_SE_FACTOR:g} standard errors)")
    else:
        text = (f"predicts held-out species worse than {best}: ELPD lower by {diff:.2f}, "
                f"about {diff / dse:.1f} standard errors of the difference")
    if n_high:
        text += f"; {n_high} species with Pareto k > {K_THRESHOLD:g} make its estimate less reliable"
    return text


def compare_fits(
    fits: Mapping[str, Any],
    loo: Mapping[str, LooResult] | None = None,
    seed: int = 0,
) -> ComparisonResult:
    """Rank fits of the same data by leave-one-species-out ELPD.

    Parameters
    ----------
    fits : dict
        Model name -> FitResult, InferenceData or saved fit folder (at least two).
    loo : dict, optional
        Precomputed :class:`LooResult` per model name (e.g. after
        :func:`refit_influential`); others are computed with :func:`loo_species`.
    seed : int
        Seed of ArviZ's stacking optimiser (kept for reproducible weights).

    Returns
    -------
    ComparisonResult

    Raises
    ------
    InputError
        When the fits were scored on different data: other species, traits or
        values, or a regression (response given predictors) against a joint model.
    """
    if len(fits) < 2:
        raise InputError("compare needs at least two fits")
    names = [str(n) for n in fits]
    if len(set(names)) != len(names):
        raise InputError("model names must differ")
    views = [_view(f, str(n)) for n, f in fits.items()]
    obs = [_observed(v) for v in views]
    kind, notes = _check_comparable(views, obs)
    order = [str(s) for s in obs[0]["species"].values]
    given = dict(loo or {})
    results: dict[str, LooResult] = {}
    for v in views:
        r = given.get(v.label) or loo_species(v.idata if v.built is None else _fit_like(v))
        r = replace(r, pointwise=r.pointwise.reindex(order))
        ed = r.elpd_data.copy()
        for key in ("loo_i", "pareto_k"):
            if key in ed and isinstance(ed[key], xr.DataArray):
                dim = ed[key].dims[0]
                ed[key] = ed[key].assign_coords({dim: [str(s) for s in ed[key][dim].values]}).sel({dim: order})
        results[v.label] = replace(r, elpd_data=ed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cmp = az.compare({n: r.elpd_data for n, r in results.items()}, method="stacking", seed=seed)
    best = str(cmp.index[0])
    rows = []
    for name, row in cmp.iterrows():
        r = results[str(name)]
        n_high = len(r.flagged)
        diff, dse = float(row["elpd_diff"]), float(row["dse"])
        rows.append({
            "model": str(name), "rank": int(row["rank"]) + 1,
            "elpd": float(row["elpd_loo"]), "se": float(row["se"]),
            "elpd_diff": diff, "diff_se": dse, "p_loo": float(row["p_loo"]),
            "weight": float(row["weight"]), "n_high_k": n_high,
            "verdict": _verdict(str(name), best, diff, dse, n_high),
        })
    table = pd.DataFrame(rows)
    return ComparisonResult(table=table, loo=results, signature=_signature(obs[0]), loglik_kind=kind, notes=notes)


def _fit_like(view: _FitView) -> Any:
    from cladewise.inference.fit import FitResult

    return FitResult(idata=view.idata, summary=pd.DataFrame(), diagnostics=None, built=view.built, info=view.info)


# --------------------------------------------------------------------------- engine per draw
class _EngineCache:
    """Compiles a model's engine-input function once and evaluates it per draw."""

    def __init__(self, built: Any) -> None:
        self.built = built
        self.fn = built.engine_function()
        self.names = [rv.name for rv in built.model.free_RVs]

    def draws(self, idata: az.InferenceData) -> tuple[dict[str, np.ndarray], tuple[int, int]]:
        post = idata.posterior
        missing = [n for n in self.names if n not in post]
        if missing:
            raise InputError(
                f"the posterior lacks {missing}: these draws do not belong to this model"
            )
        nc, nd = int(post.sizes["chain"]), int(post.sizes["draw"])
        arrays = {n: post[n].values.reshape((nc * nd,) + post[n].shape[2:]) for n in self.names}
        outs = [self.fn({n: arrays[n][s] for n in self.names}) for s in range(nc * nd)]
        return {k: np.stack([o[k] for o in outs]) for k in outs[0]}, (nc, nd)


def _pointwise_from_draws(built: Any, idata: az.InferenceData, cache: _EngineCache) -> xr.DataArray:
    """log p(y_i | y_-i, theta_s) for every draw s and species i (full data)."""
    from cladewise.engine import loo_logdensity_draws

    d, (nc, nd) = cache.draws(idata)
    parent = built.data.tree.parent
    y = d["y"]
    if np.allclose(y, y[:1]):
        ll = loo_logdensity_draws(parent, d["lengths"], y[0], built.observed, d["R"], d["E"], d["err_var"], d["mu"])
    else:
        # regression residuals y - X beta change with every draw
        ll = np.stack([
            loo_logdensity_draws(parent, d["lengths"][s:s + 1], y[s], built.observed, d["R"][s:s + 1],
                                 d["E"][s:s + 1], d["err_var"][s:s + 1], d["mu"][s:s + 1])[0]
            for s in range(y.shape[0])
        ])
    return xr.DataArray(
        ll.reshape(nc, nd, -1), dims=("chain", "draw", "species"),
        coords={"chain": np.arange(nc), "draw": np.arange(nd), "species": list(built.species)},
    )


# --------------------------------------------------------------------------- exact refits
_HOLDOUT = "holdout_observed"


def _holdout_model(built: Any) -> Any:
    """The model rebuilt with a switchable observed mask (``pm.Data``).

    The log density is ``prior + loglik(cells in the mask)``: the original likelihood
    term of all cells is cancelled and replaced by the masked one. Priors stay those
    of the full-data fit (their data-based scales are not recomputed without the
    held-out species), so the refit posterior is exactly ``p(theta | y_-i)`` of the
    model that was fitted. One compilation serves every held-out species.
    """
    import pymc as pm

    from cladewise.model.build import build_model
    from cladewise.engine import tree_loglik

    data = replace(built.data, notes=list(built.data.notes))
    hb = build_model(data, built.spec, likelihood="tree")
    m = hb.model
    ei = hb.engine_inputs
    with m:
        mask = pm.Data(_HOLDOUT, hb.observed.astype("float64"))
        kept = tree_loglik(m["tree_parent"], ei["lengths"], ei["y"], mask, ei["R"], ei["E"], ei["err_var"], ei["mu"])
        pm.Potential("holdout_correction", kept - m["tree_loglik"])
    return hb


def refit_influential(
    built: Any,
    idata: az.InferenceData,
    options: Any = None,
    threshold: float = K_THRESHOLD,
    max_refits: int = 10,
    loo: LooResult | None = None,
    species: Sequence[str] | None = None,
) -> LooResult:
    """Replace unreliable PSIS estimates by exact leave-one-species-out refits.

    For every species with Pareto k above ``threshold`` (at most ``max_refits``, the
    highest k first) the model is sampled again with that species' cells left out,
    and ``elpd_i = log mean_s p(y_i | y_-i, theta_s)`` is computed with the engine's
    conditional at the refit draws ``theta_s ~ p(theta | y_-i)`` (Vehtari, Gelman &
    Gabry 2017, section 2.1). For a regression, ``y_i`` is the response given the
    predictors. The tree keeps the held-out tip, which is exact: a tip with no data
    contributes nothing to the likelihood.

    Parameters
    ----------
    built : BuiltModel
        The model that produced ``idata``.
    idata : InferenceData
        Its posterior (with the log_likelihood group, or it is recomputed).
    options : SamplingOptions, optional
        Sampler settings for the refits (default: those of a quick fit, 2 chains).
    threshold : float
        Pareto k above which a species is refitted (0.7: Vehtari et al. 2024).
    max_refits : int
        Upper limit on the number of refits.
    loo : LooResult, optional
        PSIS result to update (computed when absent).
    species : sequence of str, optional
        Refit exactly these species instead of those chosen by ``threshold``.

    Returns
    -------
    LooResult
        With ``estimate == "exact refit"`` for the refitted species.

    Notes
    -----
    With ``measurement_error = "specimens"`` the held-out species' specimen variance
    still informs its within-species variance; only its mean is held out.
    """
    from cladewise.inference.fit import FitResult
    from cladewise.inference.sampling import SamplingOptions, compile_model, sample

    if loo is None:
        loo = loo_species(FitResult(idata=idata, summary=pd.DataFrame(), diagnostics=None, built=built,
                                    info={"loglik_kind": built.loglik_kind}))
    opts = options or SamplingOptions(chains=2, draws=500, tune=500, progress=False)
    all_species = list(built.species)
    if species is not None:
        unknown = [s for s in species if s not in all_species]
        if unknown:
            raise InputError(f"unknown species {unknown}; the model has {_few(all_species)}")
        chosen = list(species)
        note = None
    else:
        if max_refits < 0:
            raise InputError("max_refits must be >= 0")
        pk = loo.pointwise["pareto_k"]
        over = pk[pk > threshold].sort_values(ascending=False)
        chosen = [str(s) for s in over.index[:max_refits]]
        note = None
        if len(over) > max_refits:
            note = (f"{len(over) - max_refits} more species had Pareto k > {threshold:g} but were not "
                    f"refitted (max_refits = {max_refits}); their estimates remain unreliable")
    if not chosen:
        return loo
    hb = _holdout_model(built)
    compiled = compile_model(hb, opts.sampler)
    cache = _EngineCache(hb)
    exact: dict[str, float] = {}
    for name in chosen:
        i = all_species.index(name)
        mask = hb.observed.astype("float64")
        mask[i, :] = 0.0
        post = sample(hb, opts, compiled=compiled, tree_values={_HOLDOUT: mask})
        ll_i = _pointwise_from_draws(hb, post, cache).values[:, :, i].ravel()
        exact[name] = float(logsumexp(ll_i) - math.log(ll_i.size))
    return _replace_pointwise(loo, exact, note)


# --------------------------------------------------------------------------- clades
def _clade_groups(tree: Any, clades: Any, cut_height: float | None) -> dict[str, np.ndarray]:
    names = list(tree.tip_names)
    below = tree.tips_below()
    groups: dict[str, np.ndarray] = {}
    if (clades is None) == (cut_height is None):
        raise InputError("give either clades (names or species lists) or cut_height, not both or neither")
    if cut_height is not None:
        h = tree.heights()
        total = float(h[: tree.n_tips].max())
        if not 0 < cut_height < total:
            raise InputError(f"cut_height must lie between 0 and the tree height {total:.4g}; got {cut_height}")
        par = tree.parent
        for v in range(tree.n_nodes - 1):
            # the branch above v crosses the cut: v heads one clade
            if h[par[v]] < cut_height <= h[v]:
                tips = below[v]
                label = tree.node_labels[v - tree.n_tips] if v >= tree.n_tips else None
                groups[label or _clade_name(names, tips)] = tips
        covered = np.zeros(tree.n_tips, bool)
        for tips in groups.values():
            covered[tips] = True
        for i in np.flatnonzero(~covered):
            # a tip that ends before the cut height stays on its own
            groups[names[i]] = np.array([i])
        return groups
    if isinstance(clades, str):
        clades = [clades]
    items = clades.items() if isinstance(clades, Mapping) else [(None, c) for c in clades]
    labels = list(tree.node_labels)
    for key, c in items:
        if isinstance(c, str):
            if c in labels:
                tips = below[tree.n_tips + labels.index(c)]
            elif c in names:
                tips = np.array([names.index(c)])
            else:
                known = [lab for lab in labels if lab]
                raise InputError(
                    f"{c!r} is neither an internal node label of the tree nor a species; labelled clades: "
                    f"{_few(known) if known else 'none (give clades as lists of species)'}"
                )
            name = key or c
        else:
            members = [str(s) for s in c]
            unknown = [s for s in members if s not in names]
            if unknown or not members:
                raise InputError(f"clade {key or members!r}: unknown species {_few(unknown)}" if unknown
                                 else "a clade needs at least one species")
            tips = np.array(sorted(names.index(s) for s in members))
            name = key or _clade_name(names, tips)
        if name in groups:
            raise InputError(f"clade {name!r} is given twice")
        groups[str(name)] = np.asarray(tips, dtype=np.int64)
    seen = np.zeros(tree.n_tips, int)
    for tips in groups.values():
        seen[tips] += 1
    if (seen > 1).any():
        raise InputError(
            "clades overlap (e.g. " + names[int(np.argmax(seen > 1))] + " is in two of them); "
            "give disjoint clades so that their ELPDs add up"
        )
    return groups


def _clade_name(names: Sequence[str], tips: np.ndarray) -> str:
    if len(tips) == 1:
        return names[int(tips[0])]
    return f"{names[int(tips[0])]} .. {names[int(tips[-1])]} ({len(tips)} species)"


def loo_clades(
    built: Any,
    idata: az.InferenceData,
    clades: Any = None,
    cut_height: float | None = None,
) -> LooResult:
    """Leave-one-clade-out cross-validation: predict a whole clade from the rest.

    Single-species LOO asks how well the model predicts a species whose sister species
    are still in the data; close relatives make that easy, so it is optimistic about
    predicting a *new lineage*. Holding out whole clades asks the harder question.
    For each clade ``c`` and posterior draw ``theta_s``::

        log p(y_c | y_rest, theta_s) = loglik(all data) - loglik(data without c)

    with the engine's linear-time log-likelihood; PSIS then estimates
    ``log p(y_c | y_rest)`` as for species (Vehtari, Gelman & Gabry 2017). Expect
    high Pareto k for large clades: leaving out many species moves the posterior far.

    Parameters
    ----------
    built : BuiltModel
        The model that produced ``idata``.
    idata : InferenceData
        Its posterior.
    clades : str, list or dict, optional
        Internal node labels of the tree (``tree.node_labels``), lists of species
        names, or a dict name -> either; clades must not overlap.
    cut_height : float, optional
        Instead of ``clades``: cut the tree at this distance from the root; every
        branch crossing the cut heads one clade (tips ending earlier stay alone).

    Returns
    -------
    LooResult
        ``unit == "clade"``; ``members`` maps each clade to its species.
    """
    from cladewise.engine import loglik

    tree = built.data.tree
    groups = _clade_groups(tree, clades, cut_height)
    cache = _EngineCache(built)
    d, (nc, nd) = cache.draws(idata)
    S = nc * nd
    parent = tree.parent
    obs = built.observed
    per_draw_y = not np.allclose(d["y"], d["y"][:1])
    ev = d["err_var"]
    out = np.zeros((S, len(groups)))
    masks = []
    for tips in groups.values():
        m = obs.copy()
        m[tips, :] = False
        masks.append(m)
    for s in range(S):
        y = d["y"][s] if per_draw_y else d["y"][0]
        args = (d["lengths"][s], d["R"][s], d["E"][s], ev[s] if ev.ndim >= 3 else ev, d["mu"][s])
        full = loglik(parent, args[0], y, obs, args[1], args[2], args[3], args[4])
        for g, m in enumerate(masks):
            out[s, g] = full - loglik(parent, args[0], y, m, args[1], args[2], args[3], args[4])
    names = list(groups)
    ll = xr.DataArray(out.reshape(nc, nd, -1), dims=("chain", "draw", "clade"),
                      coords={"chain": np.arange(nc), "draw": np.arange(nd), "clade": names})
    elpd_data = _psis(ll, idata.posterior, "clade")
    members = {n: [tree.tip_names[int(i)] for i in tips] for n, tips in groups.items()}
    sizes = pd.DataFrame({"n_species": [len(members[n]) for n in names]}, index=names)
    notes = ["single-species LOO keeps close relatives in the data and is optimistic about new lineages; "
             "clade LOO predicts each clade from the rest of the tree"]
    return _result_from_elpd(elpd_data, names, "clade", sizes.astype(float), members=members, notes=notes)
