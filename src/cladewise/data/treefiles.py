"""Reading and writing tree files: Newick and NEXUS.

Files become :class:`cladewise.data.trees.FlatTree` objects. Newick is checked by a
small tokenizer of our own (positions of every problem) before ete3 builds the
tree; NEXUS is read with dendropy.
"""

from __future__ import annotations

import bisect
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from cladewise.data.trees import FlatTree, few_names, prune_to
from cladewise.errors import InputError

__all__ = ["format_newick", "format_nexus", "parse_newick", "read_tree", "read_trees"]


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
                parts.append(f"lacks {few_names(missing)}")
            if extra:
                parts.append(f"has {few_names(extra)} not in tree 1")
            raise InputError(
                f"{source}: tree {k} does not have the same tips as tree 1: it "
                + " and ".join(parts)
                + ". All trees of a sample must hold the same species."
            )


def read_tree(path: str | Path, which: int = 0) -> FlatTree:
    """Read one tree from a Newick or NEXUS file (by default the first).

    Use :func:`read_trees` to know whether the file holds more than one.
    """
    trees = read_trees(path)
    if not -len(trees) <= which < len(trees):
        raise InputError(f"{path}: holds {len(trees)} tree(s); tree {which} does not exist.")
    return trees[which]


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
