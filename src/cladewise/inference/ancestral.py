"""Ancestral values and predictions for species without data, from a finished fit.

For a thinned set of posterior draws (at most :data:`MAX_DRAWS`, evenly spaced over
all chains), the tree engine gives, given the data and that draw's parameters, the
Gaussian conditional of the value at every node (:func:`cladewise.engine.ancestral_states`,
linear in the number of species). One value per node is drawn from each of these
conditionals, so the saved draws follow the posterior of the node values with the
parameter uncertainty integrated out. Means and standard deviations are averaged
from the conditionals (the law of total variance: smaller Monte Carlo error than
the raw draws); the 95% HDI comes from the draws.

What is reconstructed
---------------------
* Internal nodes and the root: the trait value of the ancestor (for a ``regression``,
  the response's phylogenetic residual: the part of the response not explained by
  the predictors, since an ancestor's predictor values are not modelled).
* Species with missing cells (and tips kept without a table row): the species'
  *true mean value* of each missing trait (the latent species mean, measurement
  error not added), given the species' own observed traits and all other species.
  With a species-level covariance E the species' own deviation is included; for a
  regression the prediction is ``x_i beta`` plus the residual, and needs the
  species' predictors.

Node values are drawn from each node's marginal conditional: use them for the
value at one node, not for differences between nodes (those would need joint draws).

Ornstein-Uhlenbeck: the engine works with Brownian values z on the OU lengths; the
trait value at every node is ``mu + D_v (z_v - mu)`` with ``D_v = exp(alpha (T - h_v))``
(Hansen 1997; Ho & Ane 2014), which the model supplies as ``node_scale``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from cladewise.engine import ancestral_states
from cladewise.errors import InputError

__all__ = [
    "MAX_DRAWS",
    "MAX_TIPS",
    "KEEP_DRAWS_LIMIT",
    "Reconstruction",
    "reconstruct",
    "node_conditionals",
    "species_conditionals",
    "node_names",
    "hdi_along_first",
    "thinned_draws",
]

#: posterior draws used at most (evenly thinned); Monte Carlo error of an HDI end is small beside its width
MAX_DRAWS = 1000
#: ``cladewise fit`` reconstructs by default up to this many species (``--no-ancestral`` turns it off)
MAX_TIPS = 20_000
#: node (and predicted-cell) draws are saved in posterior.nc only up to this many values
#: (draws x nodes x traits; float32, so at most 16 MB)
KEEP_DRAWS_LIMIT = 4_000_000
HDI_PROB = 0.95


@dataclass
class Reconstruction:
    """Ancestral values and predictions of one fit.

    ``nodes``: one row per internal node and trait (ancestral.csv); ``predictions``:
    one row per missing cell (predictions.csv); ``ancestral`` and ``predicted`` the
    InferenceData groups; ``notes`` what the user should know.
    """

    nodes: pd.DataFrame
    predictions: pd.DataFrame
    ancestral: xr.Dataset
    predicted: xr.Dataset | None
    notes: list[str] = field(default_factory=list)


# --------------------------------------------------------------------------- one draw
def node_conditionals(parent: np.ndarray, inputs: dict[str, np.ndarray], observed: np.ndarray,
                      regime: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Conditional mean and covariance of every node's value, on the trait scale.

    Parameters
    ----------
    parent : (n_nodes,) int
    inputs : dict
        One draw's engine inputs (``lengths, y, R, E, err_var, mu`` and, optionally,
        ``node_scale``) as returned by ``BuiltModel.engine_function``.
    observed : (N, k) bool
    regime : (n_nodes,) int, optional
        Regime of each branch of a multi-rate model (``inputs["R"]`` is then
        ``(regimes, k, k)``).

    Returns
    -------
    mean (n_nodes, k), cov (n_nodes, k, k)
        Rows ``0..N-1`` are the species' phylogenetic components (without E), the
        others the internal nodes.
    """
    mu = np.asarray(inputs["mu"], dtype=float)
    m, c = ancestral_states(parent, inputs["lengths"], inputs["y"], observed, inputs["R"], inputs["E"],
                            inputs["err_var"], mu, regime=regime)
    D = inputs.get("node_scale")
    if D is not None:
        D = np.asarray(D, dtype=float)
        m = mu + D[:, None] * (m - mu)
        c = c * (D**2)[:, None, None]
    return m, c


def species_conditionals(inputs: dict[str, np.ndarray], observed: np.ndarray, tip_mean: np.ndarray,
                         tip_cov: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Conditional of the true species means ``Y_i = X_i + eps_i`` for the species ``rows``.

    ``tip_mean``/``tip_cov`` are the engine's conditionals of the phylogenetic
    components X (engine scale, all tips). ``eps_i ~ N(0, E)`` is the species-level
    deviation; it is correlated with the species' own observations, so given
    ``X_i`` it has the conditional ``N(K r, E - K E[o, :])``, ``K = E[:, o] S_oo^-1``,
    ``r = y_o - X_o`` and ``S`` the species' total error (E plus measurement error).
    Returned on the trait scale (OU: ``mu + D_i (Y'_i - mu)``).
    """
    k = observed.shape[1]
    mu = np.asarray(inputs["mu"], dtype=float)
    Es = np.asarray(inputs.get("E_species", inputs["E"]), dtype=float)
    log_scale = np.asarray(inputs.get("log_scale", np.zeros(observed.shape[0])), dtype=float)
    D = np.exp(log_scale[rows])
    mean = tip_mean[rows].copy()
    cov = tip_cov[rows].copy()
    if np.any(Es != 0):
        Ei = Es[None] / (D**2)[:, None, None]  # engine scale: E / D_i^2 under exact OU
        err = np.asarray(inputs["err_var"], dtype=float)
        if err.ndim == 2:
            err = err[:, :, None] * np.eye(k)[None]
        S = err[rows] + np.asarray(inputs["E"], dtype=float)[None]
        y = np.asarray(inputs["y"], dtype=float)[rows]
        obs = observed[rows]
        patterns, which = np.unique(obs, axis=0, return_inverse=True)
        for p, o in enumerate(patterns):
            sel = np.flatnonzero(which.ravel() == p)
            E_sel = Ei[sel]
            if not o.any():
                cov[sel] = cov[sel] + E_sel
                continue
            oi = np.flatnonzero(o)
            Soo = S[sel][:, oi][:, :, oi]
            Eko = E_sel[:, :, oi]  # (n, k, |o|)
            K = np.linalg.solve(Soo, np.swapaxes(Eko, 1, 2)).swapaxes(1, 2)  # E[:, o] S_oo^-1
            r = y[sel][:, oi] - mean[sel][:, oi]
            A = np.broadcast_to(np.eye(k), (len(sel), k, k)).copy()
            A[:, :, oi] -= K
            P = cov[sel]
            mean[sel] = mean[sel] + np.einsum("nkj,nj->nk", K, r)
            cov[sel] = (A @ P @ np.swapaxes(A, 1, 2)) + E_sel - K @ E_sel[:, oi, :]
    mean = mu + D[:, None] * (mean - mu)
    cov = cov * (D**2)[:, None, None]
    return mean, cov


def _draw_gaussian(mean: np.ndarray, cov: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One draw from each N(mean[i], cov[i]); semidefinite covariances allowed."""
    cov = 0.5 * (cov + np.swapaxes(cov, 1, 2))
    w, V = np.linalg.eigh(cov)
    L = V * np.sqrt(np.clip(w, 0.0, None))[:, None, :]
    z = rng.standard_normal(mean.shape)
    return mean + np.einsum("nij,nj->ni", L, z)


# --------------------------------------------------------------------------- helpers
def hdi_along_first(x: np.ndarray, prob: float = HDI_PROB) -> tuple[np.ndarray, np.ndarray]:
    """Narrowest interval holding ``prob`` of the draws, for every column of ``x`` (draws first).

    The same rule as ArviZ's ``hdi`` (window of ``floor(prob * S)`` sorted draws).
    """
    s = np.sort(x, axis=0)
    S = s.shape[0]
    m = int(np.floor(prob * S))
    if m >= S or S < 2:
        return s[0], s[-1]
    widths = s[m:] - s[: S - m]
    i = np.argmin(widths, axis=0)
    lo = np.take_along_axis(s, i[None], axis=0)[0]
    hi = np.take_along_axis(s, (i + m)[None], axis=0)[0]
    return lo, hi


def thinned_draws(total: int, max_draws: int = MAX_DRAWS) -> np.ndarray:
    """Indices of at most ``max_draws`` draws evenly spaced over ``total`` (chains x draws, flattened)."""
    if total <= max_draws:
        return np.arange(total)
    return np.unique(np.linspace(0, total - 1, max_draws).round().astype(int))


def node_names(tree: Any) -> pd.DataFrame:
    """Every internal node's label (from the tree file), a defining species pair and clade size.

    The pair ``tip_a``, ``tip_b`` are two species whose most recent common ancestor is
    the node (one below each of its first two children).
    """
    n, N = tree.n_tips, tree.n_nodes
    rep = np.arange(N)
    size = np.zeros(N, dtype=np.int64)
    size[:n] = 1
    first = np.full(N, -1)
    second = np.full(N, -1)
    for i in range(N - 1):  # post-order: children before parents
        p = tree.parent[i]
        size[p] += size[i]
        if first[p] < 0:
            first[p] = i
        elif second[p] < 0:
            second[p] = i
    for v in range(n, N):  # a node's first child has a smaller index, so rep is ready
        rep[v] = rep[first[v]] if first[v] >= 0 else v
    nodes = np.arange(n, N)
    tips = list(tree.tip_names)

    def name(c: int) -> str:
        return tips[rep[c]] if 0 <= c and rep[c] < n else ""

    h = tree.heights()
    return pd.DataFrame({
        "node": nodes,
        "label": [lab or "" for lab in tree.node_labels],
        "tip_a": [name(first[v]) for v in nodes],
        "tip_b": [name(second[v]) for v in nodes],
        "n_species": size[nodes],
        "height": h[nodes],
    })


# --------------------------------------------------------------------------- regression
def _regression_parts(built: Any, post: xr.Dataset, total: int) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients per draw (S, p) and which species have all predictors."""
    coef = post["coef"].values.reshape(total, -1)
    return coef, np.asarray(built.design_ok, dtype=bool)


# --------------------------------------------------------------------------- driver
def reconstruct(
    built: Any,
    idata: Any,
    *,
    max_draws: int = MAX_DRAWS,
    seed: int = 0,
    tree: Any = None,
    keep_draws: bool | None = None,
) -> Reconstruction:
    """Ancestral values of every internal node and predictions of every missing cell.

    Parameters
    ----------
    built : BuiltModel
        The fitted model (its compiled parameter -> engine mapping is reused).
    idata : InferenceData
        The fit's posterior.
    max_draws : int
        Posterior draws used at most (evenly thinned over chains and draws).
    seed : int
        Seed of the node-value draws.
    tree : FlatTree, optional
        The tree whose nodes are reported (default ``built.data.tree``). A tree
        sample's model runs on a padded reference tree; pass the unpadded one and
        the padding nodes above its root are left out.
    keep_draws : bool, optional
        Keep the node draws in the InferenceData group (default: when there are at
        most :data:`KEEP_DRAWS_LIMIT` values).

    Returns
    -------
    Reconstruction
    """
    if max_draws < 1:
        raise InputError("max_draws must be at least 1")
    model_tree = built.data.tree
    tree = tree or model_tree
    n, k = built.observed.shape
    n_real = tree.n_nodes
    if tree.n_tips != n or n_real > model_tree.n_nodes:
        raise InputError("the tree for ancestral values must be the model's tree (or its unpadded form)")
    if "tip_mean" in built.engine_inputs:
        # the engine sees deviations from each tip's expected value; node expected values
        # under a regime history are not computed yet, so node values would be wrong
        raise InputError("ancestral values and predictions are not available for multi-optimum OU "
                         "models yet; fit the single-optimum or multi-rate model for them")
    painting = getattr(built, "painting", None)
    regime = None if painting is None else np.asarray(painting.node_regime, dtype=np.int64)
    post = idata.posterior
    names = [rv.name for rv in built.model.free_RVs]
    missing = [v for v in names if v not in post]
    if missing:
        raise InputError(f"the posterior lacks {missing}: these draws do not belong to this model")
    nc, nd = int(post.sizes["chain"]), int(post.sizes["draw"])
    total = nc * nd
    pick = thinned_draws(total, max_draws)
    S = len(pick)
    arrays = {v: post[v].values.reshape((total,) + post[v].shape[2:]) for v in names}
    fn = built.engine_function(extra=("node_scale", "E_species"))
    regression = built.spec.kind == "regression"
    coef = pred_ok = None
    if regression:
        coef, pred_ok = _regression_parts(built, post, total)
    observed = built.observed
    # species with a missing cell that can be predicted
    rows = np.flatnonzero((~observed).any(axis=1) & (pred_ok if regression else True))
    n_int = n_real - n
    rng = np.random.default_rng(seed)
    node_draws = np.empty((S, n_int, k), dtype=np.float32)
    # sums of conditional means and of conditional variance + squared mean, both taken
    # about the first draw's means (no cancellation when the spread between draws is 0)
    node_m = np.zeros((n_int, k))
    node_m2 = np.zeros((n_int, k))
    pred_draws = np.empty((S, len(rows), k), dtype=np.float32)
    pred_m = np.zeros((len(rows), k))
    pred_m2 = np.zeros((len(rows), k))
    root = n_real - 1
    internal = np.r_[n:root, root]  # model-tree indices of the reported internal nodes
    parent = model_tree.parent
    bad = 0
    shift_n = shift_p = None
    for a, s in enumerate(pick):
        d = fn({v: arrays[v][s] for v in names})
        try:
            mean, cov = node_conditionals(parent, d, observed, regime)
        except InputError:
            bad += 1
            mean = cov = None
        if mean is None or not np.all(np.isfinite(mean)):
            node_draws[a] = np.nan
            pred_draws[a] = np.nan
            bad += mean is not None
            continue
        mi, ci = mean[internal], cov[internal]
        node_draws[a] = _draw_gaussian(mi, ci, rng)
        shift_n = mi if shift_n is None else shift_n
        node_m += mi - shift_n
        node_m2 += np.diagonal(ci, axis1=1, axis2=2) + (mi - shift_n) ** 2
        if len(rows):
            # engine-scale tip conditionals (undo the node_scale mapping for the tips)
            D = np.asarray(d["node_scale"], dtype=float)[:n]
            mu = np.asarray(d["mu"], dtype=float)
            tm = mu + (mean[:n] - mu) / D[:, None]
            tc = cov[:n] / (D**2)[:, None, None]
            pm_, pc = species_conditionals(d, observed, tm, tc, rows)
            if regression:
                pm_ = pm_ + (built.design[rows] @ coef[s])[:, None]
            pred_draws[a] = _draw_gaussian(pm_, pc, rng)
            shift_p = pm_ if shift_p is None else shift_p
            pred_m += pm_ - shift_p
            pred_m2 += np.diagonal(pc, axis1=1, axis2=2) + (pm_ - shift_p) ** 2
    good = S - bad
    if good == 0:
        raise InputError("no posterior draw gave finite ancestral values; check the fit's diagnostics")
    notes = []
    if bad:
        notes.append(f"{bad} of {S} draws gave no finite ancestral values and were left out")
    ok = np.isfinite(node_draws[:, 0, 0]) if n_int else np.ones(S, bool)
    traits = list(built.traits)
    trait_names = [f"{t} (residual)" for t in traits] if regression else list(traits)
    disc = getattr(built, "discrete", None)
    if disc is not None:
        # a discrete trait is reconstructed as its liability (threshold model); the
        # probabilities of its states come from cladewise.evaluation.discrete
        for j in disc.columns:
            trait_names[j] = f"{traits[j]} ({'residual ' if regression else ''}liability)"
        notes.append("discrete traits are reconstructed and predicted on their liability scale; state "
                     "probabilities: cladewise.evaluation.discrete.node_state_probabilities and "
                     "state_probabilities")
    names_df = node_names(tree)

    def summary(draws, m, m2, shift):
        dev = m / good
        sd = np.sqrt(np.maximum(m2 / good - dev**2, 0.0))
        mean = shift + dev
        lo, hi = np.full(mean.shape, np.nan), np.full(mean.shape, np.nan)
        for c in range(0, draws.shape[1], 1024):  # in slices: no float64 copy of all draws at once
            lo[c:c + 1024], hi[c:c + 1024] = hdi_along_first(draws[ok, c:c + 1024].astype(float))
        return mean, sd, lo, hi

    nmean, nsd, nlo, nhi = summary(node_draws, node_m, node_m2, shift_n)
    rows_csv = []
    for i, r in enumerate(names_df.itertuples(index=False)):
        for j, t in enumerate(trait_names):
            rows_csv.append({"node": int(r.node), "label": r.label, "tip_a": r.tip_a, "tip_b": r.tip_b,
                             "n_species": int(r.n_species), "trait": t, "mean": nmean[i, j], "sd": nsd[i, j],
                             "hdi_low": nlo[i, j], "hdi_high": nhi[i, j]})
    nodes_df = pd.DataFrame(rows_csv)
    ncoords = {"node": names_df["node"].to_numpy(), "trait": trait_names,
               "node_label": ("node", names_df["label"].to_numpy(dtype=str)),
               "tip_a": ("node", names_df["tip_a"].to_numpy(dtype=str)),
               "tip_b": ("node", names_df["tip_b"].to_numpy(dtype=str))}
    dv = {
        "node_mean": (("node", "trait"), nmean), "node_sd": (("node", "trait"), nsd),
        "node_hdi_low": (("node", "trait"), nlo), "node_hdi_high": (("node", "trait"), nhi),
        "tree_parent": (("tree_node",), tree.parent), "tree_length": (("tree_node",), tree.length),
        "tip_name": (("tip",), np.asarray(tree.tip_names, dtype=str)),
    }
    if keep_draws is None:
        keep_draws = S * n_int * k <= KEEP_DRAWS_LIMIT
    if keep_draws:
        dv["node_value"] = (("chain", "draw", "node", "trait"), node_draws[None])
    else:
        notes.append(f"the {S} draws of each node's value were not saved (over {KEEP_DRAWS_LIMIT:,} values); "
                     "ancestral.csv holds their summaries")
    what = ("the response's phylogenetic residual at each ancestor (the part not explained by the predictors)"
            if regression else "trait values of the ancestors")
    anc = xr.Dataset(dv, coords={**ncoords, **({"chain": [0], "draw": pick} if keep_draws else {})},
                     attrs={"what": what, "n_draws": int(good), "hdi_prob": HDI_PROB,
                            "method": "per posterior draw, one value from each node's conditional given the "
                                      "data (tree engine); mean and sd by total variance, HDI from the draws"})

    pred_df = pd.DataFrame(columns=["species", "trait", "mean", "sd", "hdi_low", "hdi_high",
                                    "observed_traits", "what"])
    predicted = None
    if len(rows):
        pmean, psd, plo, phi = summary(pred_draws, pred_m, pred_m2, shift_p)
        cells = [(i, j) for i in range(len(rows)) for j in range(k) if not observed[rows[i], j]]
        ci = np.array([c[0] for c in cells])
        cj = np.array([c[1] for c in cells])
        species = built.species  # a property that builds a list: once, not per cell
        sp = [species[rows[i]] for i in ci]
        tr = [traits[j] for j in cj]
        n_obs = observed[rows].sum(axis=1)[ci]
        pred_df = pd.DataFrame({
            "species": sp, "trait": tr, "mean": pmean[ci, cj], "sd": psd[ci, cj],
            "hdi_low": plo[ci, cj], "hdi_high": phi[ci, cj], "observed_traits": n_obs,
            "what": "prediction: true species mean (no measurement error)",
        })
        cdims = ("cell",)
        pv = {}
        if S * len(cells) <= KEEP_DRAWS_LIMIT:
            pv["predicted_value"] = (("chain", "draw", "cell"), pred_draws[:, ci, cj][None])
        else:
            notes.append(f"the draws of the {len(cells):,} predicted cells were not saved (over "
                         f"{KEEP_DRAWS_LIMIT:,} values); predictions.csv holds their summaries")
        predicted = xr.Dataset(
            {**pv,
             "predicted_mean": (cdims, pmean[ci, cj]), "predicted_sd": (cdims, psd[ci, cj]),
             "predicted_hdi_low": (cdims, plo[ci, cj]), "predicted_hdi_high": (cdims, phi[ci, cj])},
            coords={"chain": [0], "draw": pick, "cell": np.arange(len(cells)),
                    "cell_species": ("cell", np.asarray(sp, dtype=str)),
                    "cell_trait": ("cell", np.asarray(tr, dtype=str))},
            attrs={"what": "predicted true species means of missing cells (latent mean, no measurement "
                           "error), given the species' observed traits and all other species",
                   "n_draws": int(good), "hdi_prob": HDI_PROB},
        )
    if regression:
        lack = (~observed[:, 0]) & ~pred_ok
        if lack.any():
            notes.append(f"{int(lack.sum())} species without a response also lack a predictor: "
                         "no prediction is made for them")
    return Reconstruction(nodes_df, pred_df, anc, predicted, notes)


# --------------------------------------------------------------------------- attach to a fit
def add_reconstruction(result: Any, *, max_draws: int = MAX_DRAWS, seed: int | None = None,
                       tree: Any = None, pooled: bool = False) -> Reconstruction:
    """Reconstruct and attach the result to a fit: InferenceData groups, CSV tables, notes.

    Adds the group ``ancestral`` (and ``predictions`` when some cells are missing) to
    ``result.idata``, ``ancestral.csv`` and ``predictions.csv`` to ``result.tables``
    and a short record to ``result.info["ancestral"]``. ``pooled``: a tree-sample
    fit, reconstructed on its reference ``tree`` with the pooled parameter draws.
    """
    import warnings

    if seed is None:
        seed = int((result.info.get("sampling") or {}).get("seed") or 0)
    rec = reconstruct(result.built, result.idata, max_draws=max_draws, seed=seed, tree=tree)
    if pooled:
        rec.notes.insert(0, "ancestral values and predictions are on the reference tree (the first tree, or "
                            "the spec's `tree`), with parameter draws pooled over the tree sample")
    with warnings.catch_warnings():
        # 'ancestral' is a group of our own; ArviZ warns about names outside its scheme
        warnings.simplefilter("ignore", UserWarning)
        for name, ds in (("ancestral", rec.ancestral), ("predictions", rec.predicted)):
            if ds is None:
                continue
            if name in result.idata.groups():
                setattr(result.idata, name, ds)
            else:
                result.idata.add_groups({name: ds})
    result.tables["ancestral.csv"] = rec.nodes
    if len(rec.predictions):
        result.tables["predictions.csv"] = rec.predictions
    state_files = _add_state_tables(result, max_draws, seed) if not pooled else []
    result.info["ancestral"] = {
        "n_draws": int(rec.ancestral.attrs["n_draws"]), "what": rec.ancestral.attrs["what"],
        "n_nodes": int(rec.ancestral.sizes["node"]), "n_predicted_cells": int(len(rec.predictions)),
        "reference_tree_only": bool(pooled), "notes": list(rec.notes), "state_tables": state_files,
    }
    result.info["notes"] = list(result.info.get("notes", [])) + rec.notes
    return rec


def _add_state_tables(result: Any, max_draws: int, seed: int) -> list[str]:
    """Discrete traits: probabilities of each state for species without one and at every node.

    ``state_predictions.csv`` (species, trait, P(state) ...) and ``ancestral_states.csv``
    (trait, node, species below, P(state) ...), from the liabilities' conditionals
    (:mod:`cladewise.evaluation.discrete`). Returns the file names added.
    """
    setup = getattr(result.built, "discrete", None)
    if setup is None:
        return []
    from cladewise.evaluation.discrete import node_state_probabilities, state_probabilities

    added = []
    pred = state_probabilities(result, max_draws=max_draws, seed=seed)
    if len(pred):
        result.tables["state_predictions.csv"] = pred
        added.append("state_predictions.csv")
    if result.built.spec.kind == "regression":  # node states need predictor values at the nodes
        return added
    names = node_names(result.built.data.tree)
    parts = []
    for t in setup.traits:
        df = node_state_probabilities(result, t.name, max_draws=max_draws, seed=seed)
        df.insert(0, "trait", t.name)
        parts.append(df)
    nodes = pd.concat(parts, ignore_index=True)
    if {"node", "tip_a", "tip_b"} <= set(names.columns):
        nodes = nodes.merge(names[["node", "tip_a", "tip_b"]], on="node", how="left")
    result.tables["ancestral_states.csv"] = nodes
    added.append("ancestral_states.csv")
    return added

