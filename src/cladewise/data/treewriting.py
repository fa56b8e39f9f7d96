"""Writing trees as Newick and NEXUS text (names quoted where the formats need it)."""

from __future__ import annotations

import re
from typing import Sequence

import numpy as np

from cladewise.data.trees import FlatTree

__all__ = ["format_newick", "format_nexus"]


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
