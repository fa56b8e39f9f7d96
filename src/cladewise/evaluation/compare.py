"""Model comparison by leave-one-species-out ELPD.

Models fitted to the same data are ranked by PSIS-LOO ELPD with stacking weights (Yao,
Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13:917-1007); fits of different data,
or a regression's conditional likelihood against a joint model's, are refused.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace
from typing import Any, Mapping, Sequence

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr

from cladewise.errors import InputError

from cladewise.evaluation.loo import (
    DIFF_SE_FACTOR,
    K_THRESHOLD,
    LooResult,
    ScoredFit,
    as_fit_result,
    loo_species,
    observed_signature,
    observed_values,
    scored_fit,
    sorted_observed,
    table_records,
)

__all__ = ["ComparisonResult", "compare_fits", "list_names"]


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
            "table": table_records(self.table),
            "models": {name: r.to_dict() for name, r in self.loo.items()},
            "notes": list(self.notes),
        }


def _kind(view: ScoredFit) -> str:
    kind = view.info.get("loglik_kind")
    if kind is None and view.built is not None:
        kind = view.built.loglik_kind
    if kind not in ("joint", "conditional"):
        raise InputError(
            f"{view.label}: cannot tell what its log-likelihood measures (no 'loglik_kind' in its "
            "summary); refit it with the current cladewise"
        )
    return kind


def _refuse_repeated_fit(views: list[ScoredFit]) -> None:
    # one fit under two names would be ranked against itself, with weight split evenly
    for i, a in enumerate(views):
        for b in views[i + 1:]:
            if a.idata is b.idata or a.idata.posterior.equals(b.idata.posterior):
                raise InputError(
                    f"{a.label!r} and {b.label!r} hold identical posterior draws: the same fit is given twice. "
                    "Compare different models fitted to the same data."
                )


def _check_comparable(views: list[ScoredFit], obs: list[xr.DataArray]) -> tuple[str, list[str]]:
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
                f"(only in {ref.label!r}: {list_names(only_a)}; only in {v.label!r}: {list_names(only_b)}). "
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
        a, b = sorted_observed(ref_obs), sorted_observed(o)
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


def list_names(names: Sequence[str], k: int = 5) -> str:
    """Up to ``k`` names and how many more, for messages ('none' when empty)."""
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
    views = [scored_fit(f, str(n)) for n, f in fits.items()]
    _refuse_repeated_fit(views)
    obs = [observed_values(v) for v in views]
    kind, notes = _check_comparable(views, obs)
    # species with no observed value are left out of LOO (same cells in every fit)
    has_obs = np.isfinite(np.asarray(obs[0].values, float)).any(axis=1)
    order = [str(s) for s, h in zip(obs[0]["species"].values, has_obs) if h]
    given = dict(loo or {})
    results: dict[str, LooResult] = {}
    for v in views:
        r = given.get(v.label) or loo_species(v.idata if v.built is None else as_fit_result(v))
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
    return ComparisonResult(table=table, loo=results, signature=observed_signature(obs[0]), loglik_kind=kind, notes=notes)

