"""Matching the species of a trait table to the tips of a tree.

Names are compared after a light clean-up: surrounding whitespace and quotes are
removed, underscores count as spaces (tree files often cannot hold spaces) and runs
of spaces count as one. Nothing else is changed: case differences and spelling
variants are reported as suggestions, never matched silently.
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass, field
from typing import Sequence

from cladewise.errors import InputError
from cladewise.data.traits import TraitData
from cladewise.data.trees import FlatTree, order_tips, prune_to

__all__ = ["Dropped", "MatchResult", "match_names", "name_key"]


def name_key(name: str) -> str:
    """The form in which names are compared (see the module docstring)."""
    s = name.strip().strip("'\"").strip()
    s = s.replace("_", " ")
    return re.sub(r"\s+", " ", s)


@dataclass(frozen=True)
class Dropped:
    """A name left out of the analysis and why."""

    name: str
    where: str  # "tree" or "table"
    reason: str
    suggestions: tuple[str, ...] = ()


@dataclass(frozen=True, eq=False)
class MatchResult:
    """Tree(s) and traits aligned species by species.

    ``tree.tip_names == traits.species``: tip ``i`` is row ``i``. Tips carry the
    table's spelling; ``tree_names`` maps each species to its name in the tree file.
    ``trees`` holds the tree sample, each pruned and ordered the same way (empty
    when no sample was given).
    """

    tree: FlatTree
    traits: TraitData
    trees: list[FlatTree] = field(default_factory=list)
    dropped: list[Dropped] = field(default_factory=list)
    tree_names: dict[str, str] = field(default_factory=dict)
    n_tree_tips: int = 0
    n_table_species: int = 0
    kept_without_data: list[str] = field(default_factory=list)

    @property
    def dropped_from_tree(self) -> list[Dropped]:
        """Tips pruned from the tree (no row in the table)."""
        return [d for d in self.dropped if d.where == "tree"]

    @property
    def dropped_from_table(self) -> list[Dropped]:
        """Table species left out (no tip in the tree)."""
        return [d for d in self.dropped if d.where == "table"]


def _suggest(name: str, pool: dict[str, str]) -> tuple[str, ...]:
    """Near misses of ``name`` among ``pool`` (key -> original name)."""
    key = name_key(name)
    out: list[str] = []
    low = key.lower()
    out += [orig for k, orig in pool.items() if k.lower() == low]
    out += [pool[k] for k in difflib.get_close_matches(key, list(pool), n=3, cutoff=0.8)]
    return tuple(dict.fromkeys(out))


def _keys(names: Sequence[str], what: str) -> dict[str, str]:
    keys: dict[str, str] = {}
    for nm in names:
        k = name_key(nm)
        if k in keys:
            raise InputError(
                f"{what} has two names that are the same once underscores and spaces are "
                f"treated alike: '{keys[k]}' and '{nm}'. Rename one."
            )
        keys[k] = nm
    return keys


def match_names(
    tree: FlatTree,
    traits: TraitData,
    drop_unmatched: bool = False,
    trees: Sequence[FlatTree] = (),
    keep_tree_only: bool = False,
) -> MatchResult:
    """Align a tree (and optionally a tree sample with the same tips) to a table.

    Tree tips without a table row are pruned (see :func:`cladewise.data.trees.prune_to`)
    and recorded. Table species without a tip stop the run with an InputError
    listing them and near misses, unless ``drop_unmatched`` is True, in which case
    they are left out and recorded too. With ``keep_tree_only`` tree tips without a
    row are kept instead, with every trait missing (their values can be predicted),
    and listed in ``kept_without_data``.

    Returns
    -------
    MatchResult
        Tree tips in the table's species order, renamed to the table's spelling.
    """
    tips = _keys(tree.tip_names, "the tree")
    rows = _keys(traits.species, "the trait table")
    dropped: list[Dropped] = []
    missing = [s for s in traits.species if name_key(s) not in tips]
    tip_only = [t for k, t in tips.items() if k not in rows]
    tip_only_keys = {name_key(t): t for t in tip_only}
    if missing:
        details = []
        for s in missing:
            sug = _suggest(s, tip_only_keys) or _suggest(s, tips)
            details.append((s, sug))
        if not drop_unmatched:
            listed = "; ".join(
                f"'{s}'" + (f" (did you mean {', '.join(repr(x) for x in sug)}?)" if sug else "")
                for s, sug in details[:15]
            )
            more = f" and {len(details) - 15} more" if len(details) > 15 else ""
            raise InputError(
                f"{len(missing)} species in {traits.source or 'the trait table'} are not in the "
                f"tree: {listed}{more}. Fix the spelling in one of the files, or set "
                "drop_unmatched = true in [data] to leave them out."
            )
        for s, sug in details:
            dropped.append(Dropped(s, "table", "no tip of that name in the tree", sug))
    kept = [s for s in traits.species if name_key(s) in tips]
    if len(kept) < 2:
        raise InputError(
            f"only {len(kept)} species are both in the tree and in the table; at least 2 "
            "are needed. Check that the files belong together."
        )
    row_keys = {name_key(s): s for s in missing}
    kept_empty: list[str] = []
    if keep_tree_only and tip_only:
        kept_empty = list(tip_only)
        traits = _with_empty_rows(traits, kept_empty)
        kept = kept + kept_empty
        tip_only = []
    for t in tip_only:
        dropped.append(
            Dropped(t, "tree", "no row in the trait table (pruned)", _suggest(t, row_keys) if row_keys else ())
        )
    tree_names = {s: tips[name_key(s)] for s in kept}
    aligned = _align(tree, tree_names, kept)
    sample = [_align(tr, tree_names, kept) for tr in trees]
    return MatchResult(
        tree=aligned,
        traits=traits.subset(kept),
        trees=sample,
        dropped=dropped,
        tree_names=tree_names,
        n_tree_tips=tree.n_tips,
        n_table_species=traits.n_species - len(kept_empty),
        kept_without_data=kept_empty,
    )


def _with_empty_rows(traits: TraitData, names: list[str]) -> TraitData:
    """The table with one all-missing row per name appended (tree tips kept without data)."""
    import dataclasses

    import numpy as np

    def pad(a):
        return None if a is None else np.vstack([a, np.full((len(names), a.shape[1]), np.nan)])

    extra = traits.extra
    if extra is not None:
        import pandas as pd

        extra = pd.concat([extra, pd.DataFrame(index=range(len(names)), columns=extra.columns)],
                          ignore_index=True)
    return dataclasses.replace(traits, species=list(traits.species) + list(names), mean=pad(traits.mean),
                               se=pad(traits.se), n=pad(traits.n), within_var=pad(traits.within_var),
                               extra=extra)


def _align(tree: FlatTree, tree_names: dict[str, str], kept: list[str]) -> FlatTree:
    pruned = prune_to(tree, [tree_names[s] for s in kept])
    ordered = order_tips(pruned, [tree_names[s] for s in kept])
    return FlatTree(ordered.parent, ordered.length, kept, ordered.node_labels, ordered.length_error)
