"""Phylogenetic independent contrasts (Felsenstein 1985, Am. Nat. 125:1-15).

Working from the tips to the root, each bifurcating node ``v`` with children ``a``
and ``b`` (values ``x_a, x_b``, branch lengths ``v_a, v_b``, already extended below)
gives

* the raw contrast ``x_a - x_b`` with variance ``v_a + v_b`` (in units of the
  Brownian rate);
* the standardized contrast ``(x_a - x_b) / sqrt(v_a + v_b)``;
* the node's estimated value ``(v_b x_a + v_a x_b) / (v_a + v_b)``;
* the extended length of the branch above ``v``: ``v_v + v_a v_b / (v_a + v_b)``.

Under Brownian motion the ``n - 1`` standardized contrasts are independent with
variance equal to the rate, so their mean square is the REML rate estimate and a
regression through the origin on them equals the GLS (PGLS with lambda = 1) slope.
Contrasts need complete data and a bifurcating tree; the likelihood engine has
neither restriction.

The sign of a contrast follows the order of the children in the tree (lower node
index first); regressions through the origin do not depend on it.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from cladewise.errors import InputError
from cladewise.data.trees import FlatTree

__all__ = [
    "ContrastResult",
    "independent_contrasts",
    "standardized_contrasts",
    "resolve_polytomies",
]


# ------------------------------------------------------------------ polytomies
def _polytomies(tree: FlatTree) -> np.ndarray:
    nc = tree.n_children()
    return np.flatnonzero(nc[tree.n_tips :] > 2) + tree.n_tips


def resolve_polytomies(tree: FlatTree, seed: int | np.random.Generator | None = None) -> tuple[FlatTree, str]:
    """Resolve every polytomy at random with zero-length branches.

    At a node with ``m > 2`` children, two of the current groups are picked at random
    and joined under a new node on a zero-length branch until two groups remain.
    Because the new branches have zero length, the Brownian covariance of the tips
    is unchanged; only the contrasts (which need bifurcations) depend on the draw.

    Parameters
    ----------
    tree : FlatTree
    seed : int or numpy Generator, optional
        Same seed, same resolution.

    Returns
    -------
    (FlatTree, str)
        The bifurcating tree (tips in the same order) and a note saying how many
        polytomies were resolved.
    """
    poly = _polytomies(tree)
    if poly.size == 0:
        return tree, "the tree is already bifurcating; no polytomy resolved"
    gen = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    ptr, kids = tree.children()
    children: list[list[int]] = [list(kids[ptr[v] : ptr[v + 1]]) for v in range(tree.n_nodes)]
    length = list(tree.length)
    n_old = tree.n_nodes
    added = 0
    for v in poly:
        groups = children[v]
        while len(groups) > 2:
            i, j = sorted(gen.choice(len(groups), size=2, replace=False))
            new = len(children)
            children.append([groups[i], groups[j]])
            length.append(0.0)
            added += 1
            groups = [g for q, g in enumerate(groups) if q not in (i, j)] + [new]
        children[v] = groups

    # Renumber: tips keep 0..n-1, internal nodes in post-order (parent > child).
    n = tree.n_tips
    order: list[int] = []
    stack = [(tree.root, False)]
    while stack:
        v, done = stack.pop()
        if v < n:
            continue
        if done:
            order.append(v)
        else:
            stack.append((v, True))
            stack.extend((c, False) for c in reversed(children[v]))
    new_index = np.arange(len(children))
    new_index[order] = n + np.arange(len(order))
    m = len(children)
    parent = np.full(m, -1, dtype=np.int64)
    for v in range(m):
        for c in children[v]:
            parent[new_index[c]] = new_index[v]
    new_length = np.empty(m)
    new_length[new_index] = length
    old_labels = list(tree.node_labels) + [None] * (m - n_old)
    labels = [None] * (m - n)
    for v in order:
        labels[new_index[v] - n] = old_labels[v - n]
    note = (
        f"resolved {poly.size} polytom{'y' if poly.size == 1 else 'ies'} at random "
        f"with {added} zero-length branch{'' if added == 1 else 'es'}"
        + (f" (seed {seed})" if isinstance(seed, (int, np.integer)) else "")
    )
    return FlatTree(parent, new_length, tree.tip_names, tuple(labels)), note


def _polytomy_error(tree: FlatTree, poly: np.ndarray) -> InputError:
    nc = tree.n_children()
    below = tree.tips_below()
    v = int(poly[0])
    names = [tree.tip_names[i] for i in below[v][:3]]
    return InputError(
        f"independent contrasts need a bifurcating tree, but this tree has "
        f"{poly.size} polytom{'y' if poly.size == 1 else 'ies'} (e.g. a node with "
        f"{nc[v]} children, ancestor of {', '.join(names)}, ...). Resolve them at random with "
        "zero-length branches: resolve_polytomies(tree, seed), or pass resolve=True "
        "and a seed. The likelihood-based models need no resolving."
    )


# ------------------------------------------------------------------- the pass
def _contrast_pass(tree: FlatTree, ln: np.ndarray, values: np.ndarray) -> dict[str, np.ndarray]:
    """Felsenstein's pruning pass on ``values`` (n_tips x m, any number of columns)."""
    n, N = tree.n_tips, tree.n_nodes
    ptr, kids = tree.children()
    v = ln.astype(float).copy()
    x = np.empty((N, values.shape[1]))
    x[:n] = values
    nodes, raw, var = [], [], []
    for node in range(n, N):
        ch = kids[ptr[node] : ptr[node + 1]]
        if ch.size == 1:  # a node on a branch: lengths add in series
            x[node] = x[ch[0]]
            v[node] += v[ch[0]]
            continue
        a, b = ch
        s = v[a] + v[b]
        if not s > 0:
            raise InputError(
                f"two sister branches (nodes {a} and {b}) both have zero length, so their "
                "contrast is undefined; give them a small positive length or keep one "
                "of the two lineages."
            )
        nodes.append(node)
        raw.append(x[a] - x[b])
        var.append(s)
        x[node] = (v[b] * x[a] + v[a] * x[b]) / s
        v[node] += v[a] * v[b] / s
    var_arr = np.asarray(var)
    raw_arr = np.asarray(raw).reshape(len(nodes), values.shape[1])
    return {
        "nodes": np.asarray(nodes, dtype=np.int64),
        "raw": raw_arr,
        "var": var_arr,
        "standardized": raw_arr / np.sqrt(var_arr)[:, None],
        "ancestral": x[n:],
        "extended": v,
    }


def _prepare(
    tree: FlatTree, values: Any, traits: Sequence[str] | None, lengths: Any
) -> tuple[np.ndarray, list[str], np.ndarray]:
    n = tree.n_tips
    if isinstance(values, pd.DataFrame):
        df = values.set_index("species") if "species" in values.columns else values
        df.index = df.index.astype(str)
        if df.index.duplicated().any():
            dup = sorted(set(df.index[df.index.duplicated()]))[:5]
            raise InputError(f"species listed more than once in the table: {dup}.")
        if traits is None:
            cols = [c for c in df.columns if pd.api.types.is_numeric_dtype(df[c])]
            traits = [c for c in cols
                      if not any(c == f"{t}_se" or c == f"{t}_n" for t in cols)]
        missing_cols = [t for t in traits if t not in df.columns]
        if missing_cols:
            raise InputError(f"trait columns not in the table: {missing_cols}.")
        absent = [s for s in tree.tip_names if s not in df.index]
        if absent:
            raise InputError(
                f"{len(absent)} species of the tree are not in the table "
                f"(e.g. {absent[:5]}); prune them from the tree or add their values."
            )
        arr = df.loc[list(tree.tip_names), list(traits)].to_numpy(dtype=float)
        traits = [str(t) for t in traits]
    else:
        arr = np.asarray(values, dtype=float)
        if arr.ndim == 1:
            arr = arr[:, None]
        if arr.ndim != 2 or arr.shape[0] != n:
            raise InputError(
                f"values must have one row per tip ({n}, in tree.tip_names order); "
                f"got shape {arr.shape}."
            )
        traits = [str(t) for t in traits] if traits is not None else [
            f"trait_{j + 1}" for j in range(arr.shape[1])]
        if len(traits) != arr.shape[1]:
            raise InputError(f"{len(traits)} trait names given for {arr.shape[1]} columns.")
    if arr.shape[1] == 0:
        raise InputError("no trait columns to contrast.")
    bad = ~np.isfinite(arr)
    if bad.any():
        i, j = np.argwhere(bad)[0]
        raise InputError(
            f"independent contrasts need complete data, but {int(bad.sum())} value(s) are "
            f"missing or not finite (e.g. {traits[j]} of {tree.tip_names[i]}). Drop those "
            "species (prune the tree) or use the likelihood-based models, which handle "
            "missing values."
        )
    ln = tree.length if lengths is None else np.asarray(lengths, dtype=float)
    if ln.shape != (tree.n_nodes,) or not np.all(np.isfinite(ln)) or np.any(ln < 0):
        raise InputError(
            f"branch lengths must be {tree.n_nodes} finite values >= 0 for contrasts."
        )
    return arr, traits, ln


def standardized_contrasts(tree: FlatTree, values: Any, *, lengths: Any = None) -> np.ndarray:
    """Standardized contrasts only: ``(n_contrasts, m)`` for ``(n_tips, m)`` values.

    Any number of columns (e.g. many simulated replicates side by side). The tree
    must be bifurcating and the values complete.
    """
    arr, _, ln = _prepare(tree, values, None, lengths)
    poly = _polytomies(tree)
    if poly.size:
        raise _polytomy_error(tree, poly)
    return _contrast_pass(tree, ln, arr)["standardized"]


# -------------------------------------------------------------------- results
@dataclass
class ContrastResult:
    """Independent contrasts and their summaries.

    Attributes
    ----------
    nodes : DataFrame
        One row per contrast (bifurcating internal node): ``node``, ``label``,
        ``height`` (distance from the root), ``sd`` (``sqrt(v_a + v_b)``) and per
        trait ``<trait>_contrast`` (raw), ``<trait>_standardized`` and
        ``<trait>_ancestor`` (estimated value at the node).
    rates : Series
        Mean squared standardized contrast per trait: the REML Brownian rate.
    rate_matrix : DataFrame
        ``U'U / n_contrasts``: REML estimate of the rate matrix R.
    pairs : DataFrame
        For every ordered pair: regression through the origin of the response's
        standardized contrasts on the predictor's (``slope``, ``slope_se``, ``t``,
        ``df`` = n_contrasts - 1, ``p_value``) and the correlation through the origin.
    adequacy : DataFrame
        Per trait: Pearson correlation of |standardized contrast| with ``sd`` and
        with node ``height``, with p-values (Garland, Harvey & Ives 1992).
    root_values : Series
        Estimated value at the root per trait (the GLS root mean).
    notes : list of str
    """

    nodes: pd.DataFrame
    rates: pd.Series
    rate_matrix: pd.DataFrame
    pairs: pd.DataFrame
    adequacy: pd.DataFrame
    root_values: pd.Series
    n_species: int
    notes: list[str] = field(default_factory=list)

    @property
    def n_contrasts(self) -> int:
        """Number of contrasts (n_species - 1 on a bifurcating tree)."""
        return int(len(self.nodes))

    def to_text(self) -> str:
        """A plain-language summary."""
        lines = [
            "Independent contrasts (Felsenstein 1985)",
            f"  {self.n_species} species, {self.n_contrasts} contrasts",
        ]
        lines += [f"  note: {n}" for n in self.notes]
        lines.append("Brownian rate per trait (mean squared standardized contrast, REML):")
        for t, r in self.rates.items():
            lines.append(f"  {t}: {r:.6g}   root value {self.root_values[t]:.6g}")
        if len(self.pairs):
            lines.append("Regression and correlation through the origin:")
            for row in self.pairs.itertuples(index=False):
                lines.append(
                    f"  {row.response} on {row.predictor}: slope {row.slope:.4g} "
                    f"(se {row.slope_se:.3g}, t = {row.t:.3g}, df = {row.df}, "
                    f"p = {row.p_value:.3g}); r = {row.correlation:.3f}"
                )
        lines.append("Adequacy of branch lengths (Garland, Harvey & Ives 1992):")
        flagged = False
        for row in self.adequacy.itertuples(index=False):
            lines.append(
                f"  {row.trait}: |contrast| vs sd r = {row.r_sd:.3f} (p = {row.p_sd:.3g}); "
                f"vs node height r = {row.r_height:.3f} (p = {row.p_height:.3g})"
            )
            flagged |= bool(np.nan_to_num(row.p_sd, nan=1) < 0.05
                            or np.nan_to_num(row.p_height, nan=1) < 0.05)
        if flagged:
            lines.append(
                "  A correlation with p < 0.05 suggests the branch lengths do not "
                "standardize the contrasts well; consider a branch-length transform "
                "or a different evolution model."
            )
        return "\n".join(lines)


def _pearson(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    if a.size < 3 or np.ptp(a) == 0 or np.ptp(b) == 0:
        return float("nan"), float("nan")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = stats.pearsonr(a, b)
    return float(res.statistic), float(res.pvalue)


def independent_contrasts(
    tree: FlatTree,
    values: Any,
    *,
    traits: Sequence[str] | None = None,
    lengths: Any = None,
    resolve: bool = False,
    seed: int | None = None,
) -> ContrastResult:
    """Independent contrasts, their regressions and adequacy checks.

    Parameters
    ----------
    tree : FlatTree
        A bifurcating tree (nodes with one child are allowed and merged).
    values : DataFrame or array_like
        A table with species names (a ``species`` column or the index) and trait
        columns, or an ``(n_tips, k)`` array in ``tree.tip_names`` order. No
        missing values.
    traits : sequence of str, optional
        Trait columns to use (default: every numeric column that is not a
        ``<trait>_se`` or ``<trait>_n`` column); names for an array.
    lengths : array_like, optional
        Branch lengths to use instead of ``tree.length`` (e.g. transformed).
    resolve : bool
        Resolve polytomies at random with zero-length branches
        (:func:`resolve_polytomies`) instead of refusing them.
    seed : int, optional
        Seed of the random resolution.

    Returns
    -------
    ContrastResult
    """
    arr, traits, ln = _prepare(tree, values, traits, lengths)
    notes: list[str] = []
    poly = _polytomies(tree)
    if poly.size:
        if not resolve:
            raise _polytomy_error(tree, poly)
        tree, note = resolve_polytomies(tree.with_lengths(ln), seed)
        ln = tree.length
        notes.append(note + "; results depend on this random resolution")
    if tree.n_tips < 3:
        raise InputError("independent contrasts need at least 3 species.")

    res = _contrast_pass(tree, ln, arr)
    nodes_idx = res["nodes"]
    n_tips = tree.n_tips
    height = np.zeros(tree.n_nodes)
    for i in range(tree.n_nodes - 2, -1, -1):
        height[i] = height[tree.parent[i]] + ln[i]
    sd = np.sqrt(res["var"])
    U = res["standardized"]
    m = U.shape[0]

    df = pd.DataFrame({
        "node": nodes_idx,
        "label": [tree.node_labels[v - n_tips] for v in nodes_idx],
        "height": height[nodes_idx],
        "sd": sd,
    })
    for j, t in enumerate(traits):
        df[f"{t}_contrast"] = res["raw"][:, j]
        df[f"{t}_standardized"] = U[:, j]
        df[f"{t}_ancestor"] = res["ancestral"][nodes_idx - n_tips, j]

    rate_matrix = pd.DataFrame(U.T @ U / m, index=traits, columns=traits)
    rates = pd.Series(np.diag(rate_matrix.to_numpy()).copy(), index=traits, name="rate")

    rows = []
    dof = m - 1
    for iy, ty in enumerate(traits):
        for ix, tx in enumerate(traits):
            if ix == iy:
                continue
            uy, ux = U[:, iy], U[:, ix]
            sxx, syy, sxy = ux @ ux, uy @ uy, ux @ uy
            slope = sxy / sxx if sxx > 0 else np.nan
            resid = uy - slope * ux
            se = np.sqrt(resid @ resid / dof / sxx) if dof > 0 and sxx > 0 else np.nan
            t_val = slope / se if se > 0 else np.nan
            p = 2 * stats.t.sf(abs(t_val), dof) if np.isfinite(t_val) else np.nan
            r = sxy / np.sqrt(sxx * syy) if sxx > 0 and syy > 0 else np.nan
            rows.append(dict(response=ty, predictor=tx, slope=slope, slope_se=se,
                             t=t_val, df=dof, p_value=p, correlation=r))
    pairs = pd.DataFrame(rows, columns=["response", "predictor", "slope", "slope_se",
                                        "t", "df", "p_value", "correlation"])

    adequacy = []
    for j, t in enumerate(traits):
        a = np.abs(U[:, j])
        r_sd, p_sd = _pearson(a, sd)
        r_h, p_h = _pearson(a, height[nodes_idx])
        adequacy.append(dict(trait=t, r_sd=r_sd, p_sd=p_sd, r_height=r_h, p_height=p_h))

    return ContrastResult(
        nodes=df,
        rates=rates,
        rate_matrix=rate_matrix,
        pairs=pairs,
        adequacy=pd.DataFrame(adequacy),
        root_values=pd.Series(res["ancestral"][-1], index=traits, name="root"),
        n_species=n_tips,
        notes=notes,
    )
