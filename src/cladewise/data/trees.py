"""Trees as flat arrays.

Every tree inside cladewise is a :class:`FlatTree`: a handful of numpy arrays in a
fixed order that the likelihood engine walks with plain loops.

Conventions (the engine, simulation and contrasts code rely on them):

* nodes are numbered ``0 .. n_nodes - 1``;
* tips come first: nodes ``0 .. n_tips - 1`` are the tips, in the order of
  ``tip_names``;
* internal nodes follow in post-order, so ``parent[i] > i`` for every node but the
  root; the root is the last node and ``parent[root] == -1``;
* ``length[i]`` is the length of the branch above node ``i``; ``length[root]`` is
  the root edge (0 unless the file gives one). A root edge adds ``length[root] * R``
  of variance shared by every species.

A pruning pass is therefore ``for i in range(n_nodes - 1): combine i into
parent[i]`` and a pre-order pass is the same loop backwards.
"""

from __future__ import annotations

import bisect
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

from cladewise.errors import InputError

__all__ = [
    "FlatTree",
    "TreeFacts",
    "covariance",
    "describe_tree",
    "format_newick",
    "format_nexus",
    "order_tips",
    "parse_newick",
    "prune_to",
    "read_tree",
    "read_trees",
]


@dataclass(frozen=True, eq=False)
class FlatTree:
    """A rooted tree stored as flat arrays (see the module docstring).

    Parameters
    ----------
    parent : ndarray of int64, shape (n_nodes,)
        Parent index of every node, ``-1`` for the root.
    length : ndarray of float64, shape (n_nodes,)
        Branch length above every node.
    tip_names : tuple of str
        Names of nodes ``0 .. n_tips - 1``.
    node_labels : tuple of str or None, optional
        Labels of the internal nodes ``n_tips .. n_nodes - 1`` (clade names from the
        file), ``None`` where unlabelled.
    """

    parent: np.ndarray
    length: np.ndarray
    tip_names: tuple[str, ...]
    node_labels: tuple[str | None, ...] = field(default=())

    def __post_init__(self) -> None:
        parent = np.ascontiguousarray(self.parent, dtype=np.int64)
        length = np.ascontiguousarray(self.length, dtype=np.float64)
        object.__setattr__(self, "parent", parent)
        object.__setattr__(self, "length", length)
        object.__setattr__(self, "tip_names", tuple(self.tip_names))
        n_int = parent.shape[0] - len(self.tip_names)
        labels = tuple(self.node_labels) if self.node_labels else (None,) * n_int
        object.__setattr__(self, "node_labels", labels)
        self._check_invariants()

    def _check_invariants(self) -> None:
        n = self.parent.shape[0]
        if self.length.shape != (n,):
            raise ValueError("parent and length must have the same length")
        if len(self.node_labels) != n - self.n_tips:
            raise ValueError("one label per internal node expected")
        if n == 0 or self.parent[-1] != -1:
            raise ValueError("the root must be the last node")
        idx = np.arange(n - 1)
        if np.any(self.parent[:-1] <= idx) or np.any(self.parent[:-1] >= n):
            raise ValueError("nodes must be in post-order (parent[i] > i)")
        if self.n_tips > 0 and np.any(self.parent[: n - 1] < self.n_tips):
            raise ValueError("tips must be the first n_tips nodes")

    # ------------------------------------------------------------------ shape
    @property
    def n_tips(self) -> int:
        """Number of tips (species)."""
        return len(self.tip_names)

    @property
    def n_nodes(self) -> int:
        """Number of nodes, tips included."""
        return int(self.parent.shape[0])

    @property
    def root(self) -> int:
        """Index of the root (always the last node)."""
        return self.n_nodes - 1

    def n_children(self) -> np.ndarray:
        """Number of children of every node (0 for tips)."""
        return np.bincount(self.parent[:-1], minlength=self.n_nodes)

    def children(self) -> tuple[np.ndarray, np.ndarray]:
        """Children in compressed form: children of ``v`` are ``idx[ptr[v]:ptr[v+1]]``."""
        counts = self.n_children()
        ptr = np.zeros(self.n_nodes + 1, dtype=np.int64)
        np.cumsum(counts, out=ptr[1:])
        order = np.argsort(self.parent[:-1], kind="stable")
        return ptr, order.astype(np.int64)

    # ---------------------------------------------------------------- heights
    def heights(self) -> np.ndarray:
        """Distance from the root to every node (the root edge is not counted)."""
        h = np.zeros(self.n_nodes)
        par = self.parent
        ln = self.length
        for i in range(self.n_nodes - 2, -1, -1):
            h[i] = h[par[i]] + ln[i]
        return h

    def tip_heights(self) -> np.ndarray:
        """Root-to-tip distance of every tip."""
        return self.heights()[: self.n_tips]

    def is_ultrametric(self, rtol: float = 1e-6) -> bool:
        """True when all root-to-tip distances agree within ``rtol`` of the longest."""
        th = self.tip_heights()
        return bool(th.max() - th.min() <= rtol * max(th.max(), 1e-300))

    def with_lengths(self, length: np.ndarray) -> "FlatTree":
        """The same topology with new branch lengths."""
        return FlatTree(self.parent, length, self.tip_names, self.node_labels)

    def tips_below(self) -> list[np.ndarray]:
        """For every node, the indices of the tips below it (tips: themselves)."""
        below: list[list[int]] = [[i] for i in range(self.n_tips)] + [
            [] for _ in range(self.n_nodes - self.n_tips)
        ]
        for i in range(self.n_nodes - 1):
            below[self.parent[i]].extend(below[i])
        return [np.asarray(b, dtype=np.int64) for b in below]


def covariance(tree: FlatTree) -> np.ndarray:
    """Brownian-motion covariance of the tips: shared path length from the root.

    Includes the root edge. Dense ``n_tips x n_tips``: a reference for small and
    medium trees, never used on the large-tree path.
    """
    n = tree.n_tips
    h = tree.heights() + tree.length[tree.root]
    # Shared path of tips i, j = height of their most recent common ancestor.
    # Walk every internal node once and fill the block of tip pairs it joins.
    cov = np.zeros((n, n))
    ptr, kids = tree.children()
    below = tree.tips_below()
    for v in range(n, tree.n_nodes):
        ch = kids[ptr[v] : ptr[v + 1]]
        for a in range(len(ch)):
            ta = below[ch[a]]
            for b in range(a + 1, len(ch)):
                tb = below[ch[b]]
                cov[np.ix_(ta, tb)] = h[v]
                cov[np.ix_(tb, ta)] = h[v]
    cov[np.diag_indices(n)] = h[:n]
    return cov


# ====================================================================== reading
# Newick is scanned once by a small tokenizer of our own before ete3 builds the
# tree: ete3 silently gives missing branch lengths the value 1.0 and reports
# syntax errors without a position, and users need both caught with a place.

_TOKEN = re.compile(
    r"""\[[^\]]*\]            # comment  [ ... ]
      |'(?:[^']|'')*'         # quoted label
      |[(),:;]                # punctuation
      |\s+                    # whitespace
      |[^(),:;\[\]'\s]+       # bare word: label or number
    """,
    re.VERBOSE,
)


class _Where:
    """Turns character offsets of a text into 'line L, column C'."""

    def __init__(self, text: str, first_line: int = 1) -> None:
        self._breaks = [m.start() for m in re.finditer("\n", text)]
        self._first = first_line

    def __call__(self, offset: int) -> str:
        k = bisect.bisect_left(self._breaks, offset)
        col = offset - (self._breaks[k - 1] + 1 if k else 0) + 1
        return f"line {k + self._first}, column {col}"


def _unquote(label: str) -> str:
    label = label.strip()
    if len(label) >= 2 and label[0] == label[-1] == "'":
        return label[1:-1].replace("''", "'")
    return label


@dataclass
class _NewickChunk:
    text: str  # the tree with comments removed, ending in ';'
    tips: list[str]
    start: str  # where the tree starts in the file
    root_has_length: bool


def _scan_newick(text: str, source: str, first_line: int = 1) -> list[_NewickChunk]:
    """Check Newick text token by token and split it into trees.

    Raises InputError naming the line and column of the first problem.
    """
    where = _Where(text, first_line)
    chunks: list[_NewickChunk] = []
    toks: list[str] = []
    tips: list[str] = []
    tip_at: dict[str, int] = {}
    opens: list[int] = []
    # node being read: kind ('tip' or 'clade'), name, offset, has_length
    kind, name, at, has_len = "", "", 0, False
    state = "between"  # between | begin | node | colon | length
    tree_start = 0

    def fail(offset: int, what: str, fix: str) -> None:
        raise InputError(f"{source}, {where(offset)}: {what}. {fix}")

    def node_desc() -> str:
        if kind == "tip":
            return f"tip '{name}'"
        return f"clade '{name}'" if name else "the clade ending here"

    def close_node(offset: int) -> None:
        if not has_len:
            fail(
                at,
                f"{node_desc()} has no branch length",
                "Every branch needs a length (write ':' and a number after the "
                "node); a tree without branch lengths cannot be analysed.",
            )

    for m in _TOKEN.finditer(text):
        tok = m.group()
        pos = m.start()
        c = tok[0]
        if c.isspace() or c == "[":
            continue
        if state == "between":
            state = "begin"
            tree_start = pos
            toks, tips, tip_at, opens = [], [], {}, []
        if state == "begin":
            if tok == "(":
                opens.append(pos)
                toks.append(tok)
                continue
            if tok in ",);:":
                fail(pos, f"a tip without a name (found '{tok}')", "Give every tip a name.")
            kind, name, at, has_len = "tip", _unquote(tok), pos, False
            if name in tip_at:
                fail(
                    pos,
                    f"duplicate tip name '{name}' (also at {where(tip_at[name])})",
                    "Tip names must be unique within a tree; rename or remove one.",
                )
            tip_at[name] = pos
            tips.append(name)
            toks.append(tok)
            state = "node"
            continue
        if state == "colon":
            try:
                value = float(tok)
            except ValueError:
                fail(pos, f"branch length '{tok}' of {node_desc()} is not a number", "Fix the number.")
            if not np.isfinite(value):
                fail(pos, f"branch length '{tok}' of {node_desc()} is not finite", "Fix the number.")
            if value < 0:
                fail(
                    pos,
                    f"negative branch length {tok} for {node_desc()}",
                    "Branch lengths must be zero or positive; check how the tree was made.",
                )
            toks.append(tok)
            has_len = True
            state = "length"
            continue
        # state is 'node' or 'length'
        if tok == ":" and state == "node":
            toks.append(tok)
            state = "colon"
            continue
        if tok in ",)":
            if not opens:
                fail(pos, f"'{tok}' outside any parentheses", "Check the parentheses.")
            close_node(pos)
            toks.append(tok)
            if tok == ",":
                state = "begin"
            else:
                opens.pop()
                kind, name, at, has_len = "clade", "", pos, False
                state = "node"
            continue
        if tok == ";":
            if opens:
                fail(opens[-1], "'(' never closed", "Check the parentheses.")
            toks.append(tok)
            chunks.append(_NewickChunk("".join(toks), tips, where(tree_start), has_len))
            state = "between"
            continue
        if state == "node" and kind == "clade" and not name and tok not in "(:":
            name = _unquote(tok)
            toks.append(tok)
            continue
        fail(pos, f"unexpected '{tok[:30]}'", "Check the Newick syntax near this place.")
    if state != "between":
        fail(len(text), "the tree text ends without ';'", "End every tree with ';'.")
    if not chunks:
        raise InputError(f"{source}: no tree found. The file must hold a Newick or NEXUS tree.")
    return chunks


def _from_ete(root, tips_expected: Sequence[str]) -> FlatTree:
    """Flatten an ete3 tree: tips in file order, internal nodes in post-order."""
    n_tips = len(tips_expected)
    index: dict[int, int] = {}
    order = list(root.traverse("postorder"))
    n_nodes = len(order)
    ids = np.empty(n_nodes, dtype=np.int64)
    tip_names: list[str] = []
    lengths = np.empty(n_nodes)
    labels: list[str | None] = []
    k_tip, k_int = 0, n_tips
    for j, node in enumerate(order):
        if node.is_leaf():
            ids[j] = k_tip
            k_tip += 1
            tip_names.append(_unquote(node.name))
        else:
            ids[j] = k_int
            k_int += 1
            labels.append(_unquote(node.name) or None)
        index[id(node)] = j
    par = np.full(n_nodes, -1, dtype=np.int64)
    for j, node in enumerate(order):
        lengths[ids[j]] = node.dist
        if node.up is not None:
            par[ids[j]] = ids[index[id(node.up)]]
    return _finish(par, lengths, tip_names, labels, root_has_length=None)


def _finish(
    par: np.ndarray,
    lengths: np.ndarray,
    tip_names: list[str],
    labels: list[str | None],
    root_has_length: bool | None,
) -> FlatTree:
    n = par.shape[0]
    if root_has_length is False:
        lengths[n - 1] = 0.0
    tree = FlatTree(par, lengths, tuple(tip_names), tuple(labels))
    if tree.n_tips > 1 and np.any(tree.n_children()[tree.n_tips :] == 1):
        # Single-child nodes carry no information for the models; merge them into
        # their child (lengths add up, covariance unchanged).
        tree = prune_to(tree, tree.tip_names)
    return tree


def parse_newick(text: str, source: str = "Newick text") -> FlatTree:
    """Parse one Newick tree.

    Parameters
    ----------
    text : str
        Newick text ending in ``;``. Every branch must have a length; the root
        length, if given, becomes the root edge.
    source : str
        Name used in error messages (a file name).

    Returns
    -------
    FlatTree
        Tips in file order, internal nodes in post-order, clade labels kept.
    """
    chunks = _scan_newick(text, source)
    if len(chunks) > 1:
        raise InputError(
            f"{source}: holds {len(chunks)} trees where one was expected. "
            "Use read_trees for a tree sample."
        )
    return _chunk_to_tree(chunks[0], source)


def _chunk_to_tree(chunk: _NewickChunk, source: str) -> FlatTree:
    import ete3  # imported here: ete3 is slow to import and only needed to read

    import gc

    # ete3 nodes point to their parents (reference cycles): the cyclic garbage
    # collector would rescan them again and again while a large tree is built.
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        try:
            et = ete3.Tree(chunk.text, format=1, quoted_node_names=True)
        except Exception as exc:  # ete3 raises NewickError; the scan caught most cases
            raise InputError(f"{source}: the tree at {chunk.start} cannot be read: {exc}") from None
        tree = _from_ete(et, chunk.tips)
    finally:
        if was_enabled:
            gc.enable()
    if not chunk.root_has_length and tree.length[tree.root] != 0.0:
        tree = tree.with_lengths(np.concatenate([tree.length[:-1], [0.0]]))
    return tree


def _read_nexus(path: Path, text: str) -> list[FlatTree]:
    import dendropy

    try:
        tlist = dendropy.TreeList.get(
            data=text,
            schema="nexus",
            preserve_underscores=True,
            suppress_internal_node_taxa=True,
            suppress_leaf_node_taxa=False,
        )
    except Exception as exc:
        line = getattr(exc, "line_num", None)
        col = getattr(exc, "col_num", None)
        place = f" at line {line}, column {col}" if line else ""
        msg = str(exc).split(": ", 1)[-1] if line else str(exc)
        raise InputError(
            f"{path}: the NEXUS file cannot be read{place}: {msg}. "
            "Check the tree block syntax (and the translate table, if any)."
        ) from None
    if len(tlist) == 0:
        raise InputError(f"{path}: the NEXUS file holds no tree (no 'tree NAME = ...;' line).")
    trees = []
    for k, dt in enumerate(tlist, start=1):
        trees.append(_from_dendropy(dt, f"{path}, tree {k}" + (f" ('{dt.label}')" if dt.label else "")))
    return trees


def _from_dendropy(dt, where: str) -> FlatTree:
    nodes = list(dt.postorder_node_iter())
    n_nodes = len(nodes)
    n_tips = sum(1 for nd in nodes if nd.is_leaf())
    ids: dict[int, int] = {}
    tip_names: list[str] = []
    labels: list[str | None] = []
    k_tip, k_int = 0, n_tips
    seen: set[str] = set()
    for nd in nodes:
        if nd.is_leaf():
            name = nd.taxon.label if nd.taxon is not None else nd.label
            if not name:
                raise InputError(f"{where}: a tip has no name. Give every tip a name.")
            if name in seen:
                raise InputError(
                    f"{where}: duplicate tip name '{name}'. Tip names must be unique within a tree."
                )
            seen.add(name)
            tip_names.append(name)
            ids[id(nd)] = k_tip
            k_tip += 1
        else:
            labels.append(nd.label or None)
            ids[id(nd)] = k_int
            k_int += 1
    par = np.full(n_nodes, -1, dtype=np.int64)
    lengths = np.zeros(n_nodes)
    for nd in nodes:
        i = ids[id(nd)]
        ln = nd.edge.length
        if nd.parent_node is None:
            lengths[i] = 0.0 if ln is None else float(ln)
            continue
        par[i] = ids[id(nd.parent_node)]
        if ln is None:
            raise InputError(
                f"{where}: {_dendro_node_desc(nd)} has no branch length. Every branch "
                "needs a length; a tree without branch lengths cannot be analysed."
            )
        if ln < 0:
            raise InputError(
                f"{where}: negative branch length {ln:g} for {_dendro_node_desc(nd)}. "
                "Branch lengths must be zero or positive; check how the tree was made."
            )
        lengths[i] = float(ln)
    if lengths[-1] < 0:
        lengths[-1] = 0.0
    return _finish(par, lengths, tip_names, labels, root_has_length=None)


def _dendro_node_desc(nd) -> str:
    if nd.is_leaf():
        return f"tip '{nd.taxon.label if nd.taxon is not None else nd.label}'"
    names = [lf.taxon.label for lf in nd.leaf_iter() if lf.taxon is not None]
    shown = ", ".join(names[:3]) + (", ..." if len(names) > 3 else "")
    label = f"'{nd.label}' " if nd.label else ""
    return f"the clade {label}joining {shown}"


def read_trees(path: str | Path) -> list[FlatTree]:
    """Read every tree of a file: NEXUS (detected by ``#NEXUS``) or Newick.

    A Newick file may hold one tree or several (one after another, usually one per
    line). A NEXUS file may use a translate table. All trees must share the same
    tip names; each keeps its own tip order (use :func:`order_tips` to align).

    Raises
    ------
    InputError
        Unreadable or malformed file, duplicate tip names, missing or negative
        branch lengths, or trees that disagree on their tips.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError(f"tree file not found: {path}. Check the path.") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read tree file {path}: {exc}") from None
    if text.lstrip().upper().startswith("#NEXUS"):
        trees = _read_nexus(path, text)
    else:
        chunks = _scan_newick(text, str(path))
        trees = [_chunk_to_tree(ch, str(path)) for ch in chunks]
    _check_same_tips(trees, str(path))
    return trees


def _check_same_tips(trees: Sequence[FlatTree], source: str) -> None:
    if len(trees) < 2:
        return
    first = set(trees[0].tip_names)
    for k, tr in enumerate(trees[1:], start=2):
        names = set(tr.tip_names)
        if names != first:
            missing = sorted(first - names)
            extra = sorted(names - first)
            parts = []
            if missing:
                parts.append(f"lacks {_few(missing)}")
            if extra:
                parts.append(f"has {_few(extra)} not in tree 1")
            raise InputError(
                f"{source}: tree {k} does not have the same tips as tree 1: it "
                + " and ".join(parts)
                + ". All trees of a sample must hold the same species."
            )


def _few(names: Sequence[str], k: int = 5) -> str:
    shown = ", ".join(f"'{n}'" for n in names[:k])
    return shown + (f" and {len(names) - k} more" if len(names) > k else "")


def read_tree(path: str | Path, which: int = 0) -> FlatTree:
    """Read one tree from a Newick or NEXUS file (by default the first).

    Use :func:`read_trees` to know whether the file holds more than one.
    """
    trees = read_trees(path)
    if not -len(trees) <= which < len(trees):
        raise InputError(f"{path}: holds {len(trees)} tree(s); tree {which} does not exist.")
    return trees[which]


# =================================================================== operations
def prune_to(tree: FlatTree, keep_names: Iterable[str]) -> FlatTree:
    """Keep only the named tips.

    Internal nodes left with one child are removed and their branch added to the
    child's, so the shared path lengths, hence :func:`covariance`, of the kept tips
    are unchanged. If the old root is left with one child, the path down to the new
    root is added to the root edge for the same reason. Tips keep their order.

    Raises
    ------
    InputError
        A name is not a tip of the tree, or no tip would be kept.
    """
    keep = list(dict.fromkeys(keep_names))
    pos = {nm: i for i, nm in enumerate(tree.tip_names)}
    unknown = [nm for nm in keep if nm not in pos]
    if unknown:
        raise InputError(f"cannot keep {_few(unknown)}: not tips of the tree.")
    if not keep:
        raise InputError("pruning would leave no tip.")
    n, nt = tree.n_nodes, tree.n_tips
    par, ln = tree.parent, tree.length
    alive_below = np.zeros(n, dtype=np.int64)  # kept tips below each node
    alive_below[[pos[nm] for nm in keep]] = 1
    n_live_kids = np.zeros(n, dtype=np.int64)
    for i in range(n - 1):
        if alive_below[i]:
            alive_below[par[i]] += alive_below[i]
            n_live_kids[par[i]] += 1
    survive = np.zeros(n, dtype=bool)
    survive[:nt] = alive_below[:nt] > 0
    survive[nt:] = n_live_kids[nt:] >= 2
    if len(keep) == 1:
        survive[pos[keep[0]]] = True
    # nearest surviving ancestor and the path length to it, root to tips
    up = np.full(n, -1, dtype=np.int64)
    acc = np.zeros(n)
    acc[n - 1] = ln[n - 1]
    for i in range(n - 2, -1, -1):
        p = par[i]
        if survive[p]:
            up[i], acc[i] = p, ln[i]
        else:
            up[i], acc[i] = up[p], ln[i] + acc[p]
    old = np.flatnonzero(survive)
    new_id = np.full(n, -1, dtype=np.int64)
    new_id[old] = np.arange(old.size)
    new_par = np.where(up[old] >= 0, new_id[np.maximum(up[old], 0)], -1)
    tip_names = [tree.tip_names[i] for i in old if i < nt]
    labels = [tree.node_labels[i - nt] for i in old if i >= nt]
    if len(keep) == 1:
        return FlatTree(np.array([-1]), np.array([acc[old[0]]]), tip_names, ())
    return FlatTree(new_par, acc[old], tip_names, labels)


def order_tips(tree: FlatTree, names: Sequence[str]) -> FlatTree:
    """Renumber the tips so that ``tip_names == names``; internal nodes unchanged.

    Raises
    ------
    InputError
        ``names`` is not exactly the tree's set of tip names.
    """
    names = list(names)
    if len(names) != tree.n_tips or set(names) != set(tree.tip_names) or len(set(names)) != len(names):
        missing = sorted(set(tree.tip_names) - set(names))
        extra = sorted(set(names) - set(tree.tip_names))
        raise InputError(
            "the names given do not match the tree's tips"
            + (f"; missing {_few(missing)}" if missing else "")
            + (f"; not in the tree {_few(extra)}" if extra else "")
            + ("; duplicates given" if len(set(names)) != len(names) else "")
            + "."
        )
    nt = tree.n_tips
    where = {nm: i for i, nm in enumerate(names)}
    perm = np.array([where[nm] for nm in tree.tip_names], dtype=np.int64)  # old -> new
    new_par = tree.parent.copy()
    new_len = tree.length.copy()
    new_par[perm] = tree.parent[:nt]
    new_len[perm] = tree.length[:nt]
    return FlatTree(new_par, new_len, names, tree.node_labels)


# ======================================================================== facts
@dataclass(frozen=True)
class TreeFacts:
    """Plain facts about a tree, for the data summary.

    ``rooted`` is False when the root has three or more children: a basal
    trifurcation is the usual mark of an unrooted tree written as Newick
    (common practice). ``n_polytomies`` counts internal nodes with more than two
    children, the root included.
    """

    n_tips: int
    n_nodes: int
    rooted: bool
    ultrametric: bool
    rtol: float
    n_polytomies: int
    n_zero_length: int
    n_zero_length_tips: int
    height: float
    min_tip_height: float
    root_edge: float
    warnings: tuple[str, ...] = ()


def describe_tree(tree: FlatTree, rtol: float = 1e-6) -> TreeFacts:
    """Facts about a tree: size, rooting, ultrametricity (within ``rtol``),
    polytomies, zero-length branches and height (longest root-to-tip path, root
    edge not counted)."""
    kids = tree.n_children()
    nt = tree.n_tips
    n_root_kids = int(kids[tree.root]) if tree.n_nodes > 1 else 0
    rooted = n_root_kids <= 2
    n_poly = int(np.sum(kids[nt:] > 2))
    zero = tree.length[:-1] == 0.0
    n_zero = int(zero.sum())
    n_zero_tips = int(zero[:nt].sum()) if tree.n_nodes > 1 else 0
    th = tree.tip_heights() if tree.n_nodes > 1 else np.zeros(1)
    ultra = tree.is_ultrametric(rtol) if tree.n_nodes > 1 else True
    warns: list[str] = []
    if not rooted:
        warns.append(
            f"the root has {n_root_kids} children: the tree looks unrooted; it is used "
            "as rooted at this node. Root it on purpose if that matters."
        )
    if n_poly:
        warns.append(f"{n_poly} polytom{'y' if n_poly == 1 else 'ies'} (nodes with more than two children).")
    if n_zero:
        warns.append(f"{n_zero} zero-length branch{'es' if n_zero != 1 else ''}.")
    if n_zero_tips:
        warns.append(
            f"{n_zero_tips} tip branch{'es' if n_zero_tips != 1 else ''} of length zero: "
            "such species are identical to their relatives under Brownian motion unless "
            "measurement error or a species-level term is modelled."
        )
    if not ultra:
        warns.append(
            f"not ultrametric (root-to-tip distances range {th.min():.6g} to {th.max():.6g}, "
            f"relative tolerance {rtol:g})."
        )
    return TreeFacts(
        n_tips=nt,
        n_nodes=tree.n_nodes,
        rooted=rooted,
        ultrametric=ultra,
        rtol=rtol,
        n_polytomies=n_poly,
        n_zero_length=n_zero,
        n_zero_length_tips=n_zero_tips,
        height=float(th.max()),
        min_tip_height=float(th.min()),
        root_edge=float(tree.length[tree.root]),
        warnings=tuple(warns),
    )


# ======================================================================= writing
def _quote(name: str) -> str:
    if re.search(r"[\s(),:;\[\]']", name):
        return "'" + name.replace("'", "''") + "'"
    return name


def format_newick(tree: FlatTree, digits: int = 10) -> str:
    """The tree as a Newick string (no recursion; lengths with ``digits``
    significant digits; the root edge is written when non-zero)."""
    ptr, kids = tree.children()
    nt = tree.n_tips
    # children in file order: by the first tip below them (tips are in file order)
    first_tip = np.arange(tree.n_nodes)
    for i in range(tree.n_nodes - 1):
        p = tree.parent[i]
        first_tip[p] = min(first_tip[p], first_tip[i])
    for v in range(nt, tree.n_nodes):
        seg = kids[ptr[v] : ptr[v + 1]]
        kids[ptr[v] : ptr[v + 1]] = seg[np.argsort(first_tip[seg], kind="stable")]
    out: list[str] = []
    # explicit stack of (node, state): state 0 = open, 1 = close
    stack: list[tuple[int, int]] = [(tree.root, 0)]
    fmt = f"{{:.{digits}g}}"
    while stack:
        v, st = stack.pop()
        if st == 0 and v >= nt:
            out.append("(")
            stack.append((v, 1))
            ch = kids[ptr[v] : ptr[v + 1]]
            for j, c in enumerate(ch[::-1]):
                stack.append((int(c), 0))
                if j < len(ch) - 1:
                    stack.append((-1, 2))  # comma marker
            continue
        if st == 2:
            out.append(",")
            continue
        if v >= nt:
            out.append(")")
            lab = tree.node_labels[v - nt]
            if lab:
                out.append(_quote(lab))
        else:
            out.append(_quote(tree.tip_names[v]))
        if v != tree.root or tree.length[v] != 0.0:
            out.append(":" + fmt.format(tree.length[v]))
    return "".join(out) + ";"


def format_nexus(trees: Sequence[FlatTree], names: Sequence[str] | None = None, comment: str = "") -> str:
    """Trees as a NEXUS text with a TAXA block and a translate table.

    ``names`` gives the labels of the trees (default ``tree_1`` ...); ``comment``
    is written as a NEXUS comment after ``#NEXUS``.
    """
    taxa = list(trees[0].tip_names)
    num = {nm: str(i + 1) for i, nm in enumerate(taxa)}
    lines = ["#NEXUS"]
    if comment:
        lines.append("[" + comment.replace("[", "(").replace("]", ")") + "]")
    lines += ["", "BEGIN TAXA;", f"    DIMENSIONS NTAX={len(taxa)};", "    TAXLABELS"]
    lines += [f"        {_quote(nm)}" for nm in taxa]
    lines += ["    ;", "END;", "", "BEGIN TREES;", "    TRANSLATE"]
    lines += [
        f"        {num[nm]} {_quote(nm)}{',' if i < len(taxa) - 1 else ''}" for i, nm in enumerate(taxa)
    ]
    lines.append("    ;")
    for k, tr in enumerate(trees):
        renamed = FlatTree(tr.parent, tr.length, [num[nm] for nm in tr.tip_names], tr.node_labels)
        label = names[k] if names is not None else f"tree_{k + 1}"
        lines.append(f"    TREE {label} = [&R] {format_newick(renamed)}")
    lines += ["END;", ""]
    return "\n".join(lines)
