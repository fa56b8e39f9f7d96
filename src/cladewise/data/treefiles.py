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

from cladewise.data.textfile import read_text
from cladewise.data.trees import FlatTree, check_scale, few_names, prune_to
# writing lives in treewriting; offered here too so one module names every tree-file function
from cladewise.data.treewriting import format_newick, format_nexus
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


# A branch length as printed: digits, decimals, exponent (for its precision).
_NUMBER = re.compile(r"[+-]?\d*(?:\.(\d*))?(?:[eE]([+-]?\d+))?")


def _decimals(token: str) -> int | None:
    """Decimal places of a printed number (``'1.5e-3'`` -> 4); None for a plain
    integer, which is taken as exact."""
    m = _NUMBER.fullmatch(token.strip())
    if m is None or (m.group(1) is None and m.group(2) is None):
        return None
    return len(m.group(1) or "") - int(m.group(2) or 0)


def _printed_decimals(counts: dict[int | None, int]) -> int | None:
    """The precision the lengths were printed with, from how many lengths have each
    number of decimal places (None: integers). A writer that rounds to ``d``
    places prints most lengths with exactly ``d`` (only a trailing zero drops a
    place), so ``d`` is trusted when at least half the lengths have it; otherwise
    (hand-written trees, significant-digit formats) the lengths are taken as exact."""
    places = [d for d in counts if d is not None]
    if not places:
        return None
    d = max(places)
    return d if counts[d] >= 0.5 * sum(counts.values()) else None


def _rounding_errors(n_nodes: int, decimals: int | None) -> np.ndarray | None:
    """Per-branch rounding error of lengths printed with ``decimals`` places: half
    a unit of the last place (None when the lengths are taken as exact)."""
    if decimals is None:
        return None
    return np.full(n_nodes, 0.5 * 10.0 ** (-decimals))


@dataclass
class _NewickChunk:
    text: str  # the tree with comments removed and quoted labels replaced, ending in ';'
    tips: list[str]
    start: str  # where the tree starts in the file
    root_has_length: bool
    decimals: int | None  # printed decimal places of the lengths (None: exact)
    quoted: dict[str, str]  # placeholder -> label, for quoted labels


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
    places: dict[int | None, int] = {}
    # ete3 cannot read quoted labels holding a doubled apostrophe (the Newick
    # escape of '), so every quoted label reaches it as a plain placeholder word.
    quoted: dict[str, str] = {}
    stem = "cladewiseq"
    while stem in text:
        stem += "q"

    def bare(tok: str) -> str:
        if tok[0] != "'":
            return tok
        key = f"{stem}{len(quoted)}"
        quoted[key] = _unquote(tok)
        return key

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
            places, quoted = {}, {}
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
            toks.append(bare(tok))
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
            d = _decimals(tok)
            places[d] = places.get(d, 0) + 1
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
            chunks.append(
                _NewickChunk(
                    "".join(toks), tips, where(tree_start), has_len, _printed_decimals(places), quoted
                )
            )
            state = "between"
            continue
        if state == "node" and kind == "clade" and not name and tok not in "(:":
            name = _unquote(tok)
            toks.append(bare(tok))
            continue
        fail(pos, f"unexpected '{tok[:30]}'", "Check the Newick syntax near this place.")
    if state != "between":
        fail(len(text), "the tree text ends without ';'", "End every tree with ';'.")
    if not chunks:
        raise InputError(f"{source}: no tree found. The file must hold a Newick or NEXUS tree.")
    return chunks


def _from_ete(root, chunk: _NewickChunk) -> FlatTree:
    """Flatten an ete3 tree: tips in file order, internal nodes in post-order."""
    n_tips = len(chunk.tips)
    quoted = chunk.quoted
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
            tip_names.append(quoted.get(node.name, node.name))
        else:
            ids[j] = k_int
            k_int += 1
            labels.append(quoted.get(node.name, node.name) or None)
        index[id(node)] = j
    par = np.full(n_nodes, -1, dtype=np.int64)
    for j, node in enumerate(order):
        lengths[ids[j]] = node.dist
        if node.up is not None:
            par[ids[j]] = ids[index[id(node.up)]]
    if not chunk.root_has_length:
        lengths[-1] = 0.0
    return _finish(par, lengths, tip_names, labels, _rounding_errors(n_nodes, chunk.decimals))


def _finish(
    par: np.ndarray,
    lengths: np.ndarray,
    tip_names: list[str],
    labels: list[str | None],
    length_error: np.ndarray | None,
) -> FlatTree:
    tree = FlatTree(par, lengths, tuple(tip_names), tuple(labels), length_error)
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
        tree = _from_ete(et, chunk)
    finally:
        if was_enabled:
            gc.enable()
    check_scale(tree, f"{source}, the tree at {chunk.start}")
    return tree


# NEXUS tokens, enough to find the TAXA labels, the TRANSLATE table and the
# printed branch lengths (dendropy adds unknown tip names as new taxa silently).
_NEXUS_TOKEN = re.compile(r"\[[^\]]*\]|'(?:[^']|'')*'|[;,=():]|[^\s;,=():\[\]']+")


@dataclass
class _NexusFacts:
    taxlabels: list[str] | None  # None: no TAXLABELS statement
    translate: dict[str, str] | None  # key -> label; None: no TRANSLATE statement
    decimals: int | None  # printed decimal places of the lengths (None: exact)


def _nexus_facts(text: str) -> _NexusFacts:
    taxlabels: list[str] | None = None
    translate: dict[str, str] | None = None
    places: dict[int | None, int] = {}
    toks = [t for t in _NEXUS_TOKEN.findall(text) if t[0] != "["]
    i, n = 0, len(toks)
    while i < n:
        word = toks[i].lower()
        if word == "taxlabels":
            taxlabels = taxlabels or []
            i += 1
            while i < n and toks[i] != ";":
                taxlabels.append(_unquote(toks[i]))
                i += 1
        elif word == "translate":
            translate = translate or {}
            i += 1
            while i + 1 < n and toks[i] != ";":
                translate[_unquote(toks[i])] = _unquote(toks[i + 1])
                i += 2
                if i < n and toks[i] == ",":
                    i += 1
        elif word == ":" and i + 1 < n:
            d = _decimals(toks[i + 1])
            places[d] = places.get(d, 0) + 1
        i += 1
    return _NexusFacts(taxlabels, translate, _printed_decimals(places))


def _check_nexus_tips(tree: FlatTree, facts: _NexusFacts, where: str) -> None:
    """Tips must be declared: in TAXLABELS when the file has a TAXA block, and as
    TRANSLATE labels (or taxon names) when it has a translate table."""
    known: set[str] = set()
    if facts.taxlabels is not None:
        known |= set(facts.taxlabels)
    if facts.translate is not None:
        known |= set(facts.translate.values())
    if not known:
        return
    # dendropy matches taxon names regardless of case
    lower = {k.lower() for k in known}
    unknown = [nm for nm in tree.tip_names if nm.lower() not in lower]
    if not unknown:
        return
    if facts.translate is not None:
        raise InputError(
            f"{where}: tip(s) {few_names(unknown)} are neither keys of the TRANSLATE table "
            "nor declared taxon names. Add them to the TRANSLATE table (and TAXLABELS), "
            "or fix the tree."
        )
    raise InputError(
        f"{where}: tip(s) {few_names(unknown)} are not in the TAXA block (TAXLABELS). "
        "Add them to TAXLABELS (and NTAX), or fix the names in the tree."
    )


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
    facts = _nexus_facts(text)
    trees = []
    for k, dt in enumerate(tlist, start=1):
        where = f"{path}, tree {k}" + (f" ('{dt.label}')" if dt.label else "")
        tree = _from_dendropy(dt, where, facts.decimals)
        _check_nexus_tips(tree, facts, where)
        trees.append(tree)
    return trees


def _from_dendropy(dt, where: str, decimals: int | None) -> FlatTree:
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
    tree = _finish(par, lengths, tip_names, labels, _rounding_errors(n_nodes, decimals))
    check_scale(tree, where)
    return tree


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
    text = read_text(path, "tree file")
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
