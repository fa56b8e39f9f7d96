"""Exact refits of influential species and leave-one-clade-out cross-validation.

Species whose PSIS estimate is unreliable (Pareto k above 0.7; Vehtari, Simpson, Gelman,
Yao & Gabry 2024, JMLR 25(72)) are refitted without their data and scored exactly;
whole clades can be held out, which is stricter about predicting new lineages.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any, Mapping, Sequence

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr
from scipy.special import logsumexp

from cladewise.errors import InputError
from cladewise.inference.draws import EngineDraws, pointwise_loglik

from cladewise.evaluation.loo import (
    K_THRESHOLD,
    LooResult,
    loo_species,
    psis,
    replace_pointwise,
    result_from_elpd,
)
from cladewise.evaluation.compare import list_names

__all__ = ["refit_influential", "loo_clades"]


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

    if getattr(built, "discrete", None) is not None:
        raise InputError("exact leave-one-out refits are not available for models with discrete traits yet "
                         "(a held-out species' liability would have no likelihood); report the PSIS estimate "
                         "with its Pareto k")
    data = replace(built.data, notes=list(built.data.notes))
    hb = build_model(data, built.spec, likelihood="tree")
    m = hb.model
    ei = hb.engine_inputs
    with m:
        mask = pm.Data(_HOLDOUT, hb.observed.astype("float64"))
        kept = tree_loglik(m["tree_parent"], ei["lengths"], ei["y"], mask, ei["R"], ei["E"], ei["err_var"], ei["mu"],
                           regime=m["tree_regime"] if hb.painting is not None else None)
        kept = kept - (mask * ei["log_scale"][:, None]).sum()  # OU rescaling (BuiltModel.engine_inputs)
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
            raise InputError(f"unknown species {unknown}; the model has {list_names(all_species)}")
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
    cache = EngineDraws(hb)
    exact: dict[str, float] = {}
    for name in chosen:
        i = all_species.index(name)
        mask = hb.observed.astype("float64")
        mask[i, :] = 0.0
        post = sample(hb, opts, compiled=compiled, tree_values={_HOLDOUT: mask})
        ll_i = pointwise_loglik(hb, post, cache).values[:, :, i].ravel()
        exact[name] = float(logsumexp(ll_i) - math.log(ll_i.size))
    return replace_pointwise(loo, exact, note)


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
                    f"{list_names(known) if known else 'none (give clades as lists of species)'}"
                )
            name = key or c
        else:
            members = [str(s) for s in c]
            unknown = [s for s in members if s not in names]
            if unknown or not members:
                raise InputError(f"clade {key or members!r}: unknown species {list_names(unknown)}" if unknown
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
    cache = EngineDraws(built)
    d, (nc, nd) = cache.draws(idata)
    S = nc * nd
    parent = tree.parent
    obs = built.observed
    per_draw_y = not np.allclose(d["y"], d["y"][:1])
    ev = d["err_var"]
    regime = None if getattr(built, "painting", None) is None else built.painting.node_regime
    out = np.zeros((S, len(groups)))
    masks = []
    for tips in groups.values():
        m = obs.copy()
        m[tips, :] = False
        masks.append(m)
    for s in range(S):
        y = d["y"][s] if per_draw_y else d["y"][0]
        args = (d["lengths"][s], d["R"][s], d["E"][s], ev[s] if ev.ndim >= 3 else ev, d["mu"][s])
        full = loglik(parent, args[0], y, obs, args[1], args[2], args[3], args[4], regime=regime)
        for g, m in enumerate(masks):
            # less log D per held-out observed cell: OU rescaling (BuiltModel.engine_inputs)
            jac = float(((obs & ~m).sum(axis=1) * d["log_scale"][s]).sum())
            out[s, g] = full - loglik(parent, args[0], y, m, args[1], args[2], args[3], args[4],
                                      regime=regime) - jac
    names = list(groups)
    ll = xr.DataArray(out.reshape(nc, nd, -1), dims=("chain", "draw", "clade"),
                      coords={"chain": np.arange(nc), "draw": np.arange(nd), "clade": names})
    elpd_data = psis(ll, idata.posterior, "clade")
    members = {n: [tree.tip_names[int(i)] for i in tips] for n, tips in groups.items()}
    sizes = pd.DataFrame({"n_species": [len(members[n]) for n in names]}, index=names)
    notes = ["single-species LOO keeps close relatives in the data and is optimistic about new lineages; "
             "clade LOO predicts each clade from the rest of the tree"]
    return result_from_elpd(elpd_data, names, "clade", sizes.astype(float), members=members, notes=notes)

