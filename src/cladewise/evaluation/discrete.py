"""Per-draw quantities of discrete traits under the threshold model.

The liabilities are Gaussian given the parameters, so every probability of a state is
a normal probability of an interval between thresholds:

- **LOO** (:func:`pointwise_loglik_discrete`): species i's term is the log of
  ``p(x_i | rest) P(state_i | x_i, rest)``, with ``x_i`` its observed continuous
  values and ``rest`` all other species (their continuous values and the draw's
  liabilities). The engine's leave-one-species-out conditional of species i's
  vector is conditioned on ``x_i``; the state's probability is the normal
  probability of its interval (Bürkner, Gabry & Vehtari 2021 for the Gaussian part).
  Species i's own liability is integrated out, as PSIS-LOO requires. The discrete
  part of the term is the probability the model gives the observed state before it
  sees that state: a conditional predictive probability, not a density.
- **Predicted states** (:func:`state_probabilities`): for a species without a state,
  the probability of each state given all data, averaged over draws.
- **Ancestral states** (:func:`node_state_probabilities`): the engine's posterior of
  each node's liability turned into state probabilities, averaged over draws.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy.special import log_ndtr, ndtr
from scipy.stats import multivariate_normal

from cladewise.errors import InputError

__all__ = [
    "interval_logprob",
    "draw_cuts",
    "pointwise_loglik_discrete",
    "state_probabilities",
    "node_state_probabilities",
    "states_from_liabilities",
    "geometry_advice",
    "LOO_MEANING",
]

LOO_MEANING = (
    "LOO with discrete traits: each species' term is the log density of its continuous values times the "
    "probability of its observed state(s), both predicted from all other species (the threshold model's "
    "conditional predictive probability); a state predicted with probability 0.9 scores log 0.9. "
    "These terms compare models fitted to the same traits only."
)


def interval_logprob(m: np.ndarray, s: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``log P(lo < L < hi)`` for ``L ~ Normal(m, s^2)``, stable in both tails."""
    m, s, lo, hi = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (m, s, lo, hi)))
    a, b = (lo - m) / s, (hi - m) / s
    out = np.empty(m.shape)
    low_tail = b <= 0  # both bounds below the mean's side: work with the lower tail
    with np.errstate(divide="ignore", invalid="ignore"):
        lb, la = log_ndtr(b), log_ndtr(a)
        up_b, up_a = log_ndtr(-a), log_ndtr(-b)  # upper-tail mirror: P = Phi(-a) - Phi(-b)
        out = np.where(low_tail, lb + np.log1p(-np.exp(la - lb)), up_b + np.log1p(-np.exp(up_a - up_b)))
    return out


def _bounds(setup: Any, a: int, codes: np.ndarray, cuts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Interval of each state code of discrete trait ``a`` under one draw's cut vector."""
    t, off = setup.traits[a], setup.cut_offsets[a]
    c = np.concatenate([[-np.inf], cuts[off: off + t.n_states - 1], [np.inf]])
    s = codes.astype(int)
    return c[s], c[s + 1]


def draw_cuts(built: Any, idata: Any) -> np.ndarray:
    """Every draw's full cut vector ``(draws, n_cuts)`` (first cuts 0; chains stacked)."""
    setup = built.discrete
    post = idata.posterior
    nc, nd = int(post.sizes["chain"]), int(post.sizes["draw"])
    if "threshold" in post:
        free = post["threshold"].values.reshape(nc * nd, -1)
    else:
        free = np.zeros((nc * nd, 0))
    return setup.cuts_from_free(free)


def _gauss_condition(mean, cov, x, given):
    """Condition N(mean, cov) (batched over the first axis) on the cells ``given`` = x."""
    rest = np.setdiff1d(np.arange(mean.shape[-1]), given)
    if given.size == 0:
        return mean[:, rest], cov[:, rest][:, :, rest], np.zeros(mean.shape[0]), rest
    Sgg = cov[:, given][:, :, given]
    Srg = cov[:, rest][:, :, given]
    L = np.linalg.cholesky(Sgg)
    d = x - mean[:, given]
    w = np.linalg.solve(L, d[..., None])[..., 0]
    logdens = -0.5 * np.sum(w**2, axis=1) - np.log(np.diagonal(L, axis1=1, axis2=2)).sum(axis=1) \
        - 0.5 * given.size * np.log(2 * np.pi)
    K = np.linalg.solve(Sgg, np.swapaxes(Srg, 1, 2))  # Sgg^-1 Sgr
    m = mean[:, rest] + np.einsum("gri,gi->gr", Srg, np.linalg.solve(Sgg, d[..., None])[..., 0])
    S = cov[:, rest][:, :, rest] - np.einsum("gri,gis->grs", Srg, K)
    return m, S, logdens, rest


def pointwise_loglik_discrete(built: Any, d: dict[str, np.ndarray], cuts: np.ndarray) -> np.ndarray:
    """Leave-one-species-out log predictive terms ``(draws, N)`` (module docstring).

    ``d`` holds the per-draw engine inputs (:func:`cladewise.inference.draws.engine_draws`),
    ``cuts`` the per-draw cut vectors (:func:`draw_cuts`).
    """
    from cladewise.engine import loo_conditionals

    setup = built.discrete
    obs = built.observed
    is_disc = np.zeros(obs.shape[1], dtype=bool)
    is_disc[setup.columns] = True
    codes = np.asarray(built.y, dtype=float)
    S = d["R"].shape[0]
    fitted = d.get("fitted")
    parent = built.data.tree.parent
    out = np.zeros((S, obs.shape[0]))
    patterns: dict[bytes, list[int]] = {}
    for i in range(obs.shape[0]):
        patterns.setdefault(obs[i].tobytes(), []).append(i)
    for s in range(S):
        lengths = d["lengths"][s] if d["lengths"].ndim == 2 else d["lengths"]
        err = d["err_var"][s] if d["err_var"].ndim >= 3 else d["err_var"]
        mean, cov = loo_conditionals(parent, lengths, d["y"][s], obs, d["R"][s], d["E"][s], err, d["mu"][s])
        for key, members in patterns.items():
            idx = np.array(members)
            o = obs[idx[0]]
            cont = np.flatnonzero(o & ~is_disc)
            disc = np.flatnonzero(o & is_disc)
            if cont.size == 0 and disc.size == 0:
                continue
            cells = np.concatenate([cont, disc])
            mm, cc = mean[idx][:, cells], cov[idx][:, cells][:, :, cells]
            x = d["y"][s][idx][:, cont]
            m, V, logdens, _ = _gauss_condition(mm, cc, x, np.arange(cont.size))
            total = logdens
            if disc.size:
                los, his = [], []
                for col in disc:
                    a = setup.columns.index(int(col))
                    lo, hi = _bounds(setup, a, codes[idx, col], cuts[s])
                    if fitted is not None:  # probit regression: the engine sees liability - X beta
                        lo, hi = lo - fitted[s][idx, col], hi - fitted[s][idx, col]
                    los.append(lo)
                    his.append(hi)
                lo, hi = np.stack(los, 1), np.stack(his, 1)
                if disc.size == 1:
                    total = total + interval_logprob(m[:, 0], np.sqrt(V[:, 0, 0]), lo[:, 0], hi[:, 0])
                else:
                    total = total + np.log([
                        max(multivariate_normal(m[g], V[g], allow_singular=True).cdf(hi[g], lower_limit=lo[g]),
                            1e-300) for g in range(idx.size)])
            out[s, idx] = total
    # OU on a non-ultrametric tree: the engine saw rescaled values (continuous cells only
    # carry the density's Jacobian; a state's probability is scale-free)
    n_cont = (obs & ~is_disc[None, :]).sum(axis=1)
    return out - n_cont[None, :] * d["log_scale"]


def _conditionals(built: Any, d: dict[str, np.ndarray], rows: np.ndarray | None = None):
    """One draw's liabilities: every node's conditional on the trait scale, or, for the
    species ``rows``, their true values' conditionals (species-level deviation included;
    a probit regression's ``X beta`` added)."""
    from cladewise.inference.ancestral import node_conditionals, species_conditionals

    observed = built.observed
    mean, cov = node_conditionals(built.data.tree.parent, d, observed)
    if rows is None:
        return mean, cov
    n = observed.shape[0]
    D = np.asarray(d["node_scale"], dtype=float)[:n]
    mu = np.asarray(d["mu"], dtype=float)
    tm, tc = mu + (mean[:n] - mu) / D[:, None], cov[:n] / (D**2)[:, None, None]  # back to the engine scale
    m, c = species_conditionals(d, observed, tm, tc, rows)
    if "fitted" in d:
        m = m + np.asarray(d["fitted"], dtype=float)[rows]
    return m, c


def _state_probs(setup: Any, a: int, m: np.ndarray, v: np.ndarray, cuts: np.ndarray) -> np.ndarray:
    t, off = setup.traits[a], setup.cut_offsets[a]
    c = np.concatenate([[-np.inf], cuts[off: off + t.n_states - 1], [np.inf]])
    sd = np.sqrt(np.maximum(v, 1e-300))
    cdf = ndtr((c[None, :] - m[:, None]) / sd[:, None])
    return np.diff(cdf, axis=1)


def _draw_subset(S: int, max_draws: int | None, seed: int) -> np.ndarray:
    if max_draws is None or max_draws >= S:
        return np.arange(S)
    return np.sort(np.random.default_rng(seed).choice(S, size=max_draws, replace=False))


def _fit_parts(fit: Any, max_draws: int | None, seed: int):
    """The fit's model, its per-draw engine inputs for a subset of draws, and their cut vectors."""
    built = getattr(fit, "built", None)
    if built is None or getattr(built, "discrete", None) is None:
        raise InputError("state probabilities need a fit of a model with discrete traits, with its model "
                         "(a FitResult from fit(); a saved folder does not carry the compiled model)")
    if "tip_mean" in built.engine_inputs:
        raise InputError("state probabilities are not available for multi-optimum OU models yet")
    post = fit.idata.posterior
    total = int(post.sizes["chain"]) * int(post.sizes["draw"])
    cuts = draw_cuts(built, fit.idata)
    pick = _draw_subset(total, max_draws, seed)
    names = [rv.name for rv in built.model.free_RVs]
    arrays = {v: post[v].values.reshape((total,) + post[v].shape[2:]) for v in names}
    fn = built.engine_function(extra=("node_scale", "E_species"))
    draws = ({**fn({v: arrays[v][s] for v in names})} for s in pick)
    return built, draws, cuts[pick], pick.size


def state_probabilities(fit: Any, max_draws: int | None = 1000, seed: int = 0) -> pd.DataFrame:
    """Predicted state probabilities for species without a state, given all data.

    For each draw the engine gives the posterior of the species' liability given every
    observed value (other species' states through their liabilities, its own
    continuous values); the probability of each state is the normal probability of its
    interval. Averaged over (at most ``max_draws``) draws.

    Returns
    -------
    DataFrame
        One row per (species, trait) with a missing state: columns ``species``,
        ``trait``, and ``P(<state>)`` for every state of that trait.
    """
    built, draws, cuts, S = _fit_parts(fit, max_draws, seed)
    setup = built.discrete
    ok = np.ones(len(built.species), dtype=bool) if built.design_ok is None else built.design_ok
    miss = [np.flatnonzero(~np.isfinite(t.codes) & ok) for t in setup.traits]
    rows = np.unique(np.concatenate(miss)).astype(int)
    if rows.size == 0:
        return pd.DataFrame(rows)
    acc = [np.zeros((m.size, t.n_states)) for m, t in zip(miss, setup.traits)]
    for s, d in enumerate(draws):
        mean, cov = _conditionals(built, d, rows)
        for a, (t, col) in enumerate(zip(setup.traits, setup.columns)):
            at = np.searchsorted(rows, miss[a])
            acc[a] += _state_probs(setup, a, mean[at, col], cov[at, col, col], cuts[s])
    out = []
    for a, t in enumerate(setup.traits):
        acc[a] /= S
        for i, sp in enumerate(miss[a]):
            out.append({"species": built.species[sp], "trait": t.name,
                        **{f"P({st})": float(acc[a][i, q]) for q, st in enumerate(t.states)}})
    return pd.DataFrame(out)


def node_state_probabilities(fit: Any, trait: str, max_draws: int | None = 1000, seed: int = 0) -> pd.DataFrame:
    """Posterior probability of each state of ``trait`` at every internal node.

    The engine's ancestral posterior of the node's liability given all data, per draw,
    turned into interval probabilities and averaged over draws. Rows are the internal
    nodes in the tree's node order (``node`` = FlatTree index; the root last), with the
    number of species below each node.
    """
    built, draws, cuts, S = _fit_parts(fit, max_draws, seed)
    setup = built.discrete
    if built.spec.kind == "regression":
        raise InputError("node state probabilities need the predictors' values at the nodes, which a regression "
                         "does not model; the fit's ancestral values hold the response's residual liability")
    if trait not in setup.names:
        raise InputError(f"{trait!r} is not a discrete trait of this fit; discrete traits: {', '.join(setup.names)}")
    a = setup.names.index(trait)
    col, t = setup.columns[a], setup.traits[a]
    tree = built.data.tree
    nodes = np.arange(tree.n_tips, tree.n_nodes)
    acc = np.zeros((nodes.size, t.n_states))
    for s, d in enumerate(draws):
        mean, cov = _conditionals(built, d)
        acc += _state_probs(setup, a, mean[nodes, col], cov[nodes, col, col], cuts[s])
    acc /= S
    n_below = np.array([len(b) for b in tree.tips_below()])[nodes] if hasattr(tree, "tips_below") else None
    df = pd.DataFrame(acc, columns=[f"P({st})" for st in t.states])
    df.insert(0, "node", nodes)
    if n_below is not None:
        df.insert(1, "n_species_below", n_below)
    return df


def states_from_liabilities(built: Any, values: np.ndarray, cuts: np.ndarray) -> np.ndarray:
    """Replace the liability columns of replicated values ``(draws, N, k)`` by state codes."""
    setup = built.discrete
    out = np.array(values, dtype=float, copy=True)
    for a, (t, col) in enumerate(zip(setup.traits, setup.columns)):
        off = setup.cut_offsets[a]
        for r in range(out.shape[0]):
            out[r, :, col] = np.searchsorted(cuts[r, off: off + t.n_states - 1], out[r, :, col])
    return out


def geometry_advice(built: Any, divergences: int) -> str | None:
    """Words for divergences in a model with discrete traits (None when there are none)."""
    if not divergences or getattr(built, "discrete", None) is None:
        return None
    n_liab = int(sum(np.isfinite(t.codes).sum() for t in built.discrete.traits))
    return (
        f"{divergences} divergent transitions in a model with {len(built.discrete.traits)} discrete trait(s) "
        f"({n_liab} sampled liabilities): the posterior has regions the sampler cannot follow, often where a "
        "liability is pressed against a threshold or the liability-continuous correlation nears +-1. Try, in "
        "this order: a higher target_accept (0.95 or 0.99 in [sampling]); an LKJ prior that keeps away from "
        "+-1 ([model.priors] lkj_eta = 2); fewer discrete traits in one model, or merging rare states of an "
        "ordered trait. Do not report these results until the divergences are gone."
    )
