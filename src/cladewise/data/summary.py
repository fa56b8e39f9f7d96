"""A readable summary of the data going into an analysis.

:class:`DataSummary` gathers what a user should know before fitting: the tree's
shape, which species were matched or dropped and why, how complete each trait is
and how many species carry a measurement-error estimate. ``to_text()`` is what
``cladewise check`` prints; ``to_dict()`` is the same as plain data for reports.
"""

from __future__ import annotations

import textwrap
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from cladewise.data.matching import Dropped, MatchResult
from cladewise.data.trees import TreeFacts, describe_tree

__all__ = ["DataSummary", "TraitCoverage", "summarise_data"]


@dataclass(frozen=True)
class TraitCoverage:
    """Completeness of one trait over the analysed species."""

    name: str
    n_observed: int
    n_species: int
    n_with_se: int  # species with a standard error from the table
    n_with_specimens: int  # species with two or more specimens
    logged: bool
    minimum: float
    maximum: float

    @property
    def n_error_known(self) -> int:
        """Species whose measurement error is known or estimable."""
        return max(self.n_with_se, self.n_with_specimens)


@dataclass(frozen=True)
class DataSummary:
    """What was read, matched and checked (see the module docstring)."""

    tree_source: str
    traits_source: str
    tree: TreeFacts  # the analysed (pruned) tree
    n_tree_tips: int  # tips in the file
    n_table_species: int
    n_species: int  # analysed
    dropped: list[Dropped]
    renamed: int  # species whose tree spelling differs (underscores, spaces)
    traits: list[TraitCoverage]
    specimens: bool
    n_specimens: int | None
    n_trees: int = 1
    n_trees_ultrametric: int | None = None
    trees_source: str | None = None
    warnings: list[str] = field(default_factory=list)
    separator: str = "comma"  # the table's column separator, as a word
    separator_stated: bool = False  # stated by the user (else detected)
    decimal: str = "."
    n_rows: int = 0  # data rows read from the table

    def to_dict(self) -> dict[str, Any]:
        """Plain data (for JSON)."""
        return asdict(self)

    def to_text(self, width: int = 88) -> str:
        """The summary as a few short paragraphs and a table."""
        t = self.tree
        out: list[str] = []
        out.append(f"Tree: {self.tree_source}")
        ultra = "yes" if t.ultrametric else "no"
        rounding = f", plus {t.rounding:.3g} for rounded lengths" if t.rounding else ""
        out.append(
            f"  {self.n_tree_tips} tips in the file, {t.n_tips} analysed; "
            f"{'rooted' if t.rooted else 'unrooted (basal polytomy)'}; ultrametric: {ultra} "
            f"(relative tolerance {t.rtol:g}{rounding}); height {t.height:.6g}"
            + (f" (tips from {t.min_tip_height:.6g})" if not t.ultrametric else "")
            + (f"; root edge {t.root_edge:.6g}" if t.root_edge else "")
        )
        out.append(f"  polytomies: {t.n_polytomies}; zero-length branches: {t.n_zero_length}")
        if self.trees_source:
            out.append(
                f"Tree sample: {self.trees_source}: {self.n_trees} trees"
                + (
                    f", {self.n_trees_ultrametric} ultrametric"
                    if self.n_trees_ultrametric is not None
                    else ""
                )
            )
        out.append(f"Traits: {self.traits_source}")
        out.append(
            f"  {self.n_rows} rows read; columns separated by {self.separator}s "
            f"({'as stated' if self.separator_stated else 'detected'}); decimal "
            f"{'comma' if self.decimal == ',' else 'point'}"
        )
        kind = (
            f"specimen table, {self.n_specimens} specimens" if self.specimens else "species table"
        )
        out.append(
            f"  {kind}; {self.n_table_species} species in the table, {self.n_species} matched"
            + (f" ({self.renamed} after treating '_' as a space)" if self.renamed else "")
        )
        from_tree = [d for d in self.dropped if d.where == "tree"]
        from_table = [d for d in self.dropped if d.where == "table"]
        if from_tree:
            out.append(f"  dropped from the tree ({len(from_tree)}, no data): " + _names(from_tree))
        if from_table:
            out.append(f"  dropped from the table ({len(from_table)}, not in the tree): " + _names(from_table))
        sug = [d for d in self.dropped if d.suggestions]
        for d in sug[:10]:
            out.append(f"    '{d.name}' might be {', '.join(repr(s) for s in d.suggestions)}")
        out.append("")
        head = f"  {'trait':<24} {'observed':>10} {'with se':>8} {'>=2 spec.':>9} {'min':>10} {'max':>10}  scale"
        out.append(head)
        for c in self.traits:
            out.append(
                f"  {c.name[:24]:<24} {f'{c.n_observed}/{c.n_species}':>10} {c.n_with_se:>8} "
                f"{c.n_with_specimens:>9} {c.minimum:>10.4g} {c.maximum:>10.4g}  "
                f"{'log' if c.logged else 'as given'}"
            )
        if self.warnings:
            out.append("")
            out.append("Warnings:")
            for w in self.warnings:
                out.append(textwrap.fill(w, width=width, initial_indent="  - ", subsequent_indent="    "))
        return "\n".join(out)


def _names(items: list[Dropped], k: int = 12) -> str:
    shown = ", ".join(d.name for d in items[:k])
    return shown + (f", ... ({len(items) - k} more)" if len(items) > k else "")


def summarise_data(
    match: MatchResult,
    tree_source: str = "",
    rtol: float = 1e-6,
    trees_source: str | None = None,
    extra_warnings: list[str] | None = None,
) -> DataSummary:
    """Build the :class:`DataSummary` of matched data."""
    facts = describe_tree(match.tree, rtol=rtol)
    td = match.traits
    cover: list[TraitCoverage] = []
    warns: list[str] = list(extra_warnings or [])
    warns += [f"table: {n}" for n in match.traits.notes]
    warns += [f"tree: {w}" for w in facts.warnings]
    N = td.n_species
    for j, name in enumerate(td.traits):
        col = td.mean[:, j]
        obs = ~np.isnan(col)
        n_se = int(np.sum(obs & ~np.isnan(td.se[:, j]))) if td.se is not None else 0
        n_spec = int(np.sum(obs & (td.n[:, j] >= 2))) if (td.n is not None and td.specimens is not None) else 0
        cover.append(
            TraitCoverage(
                name=name,
                n_observed=int(obs.sum()),
                n_species=N,
                n_with_se=n_se,
                n_with_specimens=n_spec,
                logged=name in td.log_traits,
                minimum=float(np.nanmin(col)) if obs.any() else float("nan"),
                maximum=float(np.nanmax(col)) if obs.any() else float("nan"),
            )
        )
        if not obs.any():
            warns.append(f"trait '{name}' has no value for any analysed species.")
        elif obs.sum() < N:
            warns.append(f"trait '{name}' is missing for {N - int(obs.sum())} of {N} species.")
    n_drop_tree = len(match.dropped_from_tree)
    if n_drop_tree:
        warns.append(f"{n_drop_tree} tips have no data and were pruned from the tree.")
    if match.dropped_from_table:
        warns.append(
            f"{len(match.dropped_from_table)} table species are not in the tree and were left out "
            "(drop_unmatched = true)."
        )
    n_ultra = None
    if match.trees:
        n_ultra = sum(tr.is_ultrametric(rtol) for tr in match.trees)
    renamed = sum(1 for s, t in match.tree_names.items() if s != t)
    return DataSummary(
        tree_source=tree_source,
        traits_source=td.source,
        tree=facts,
        n_tree_tips=match.n_tree_tips,
        n_table_species=match.n_table_species,
        n_species=N,
        dropped=list(match.dropped),
        renamed=renamed,
        traits=cover,
        specimens=td.specimens is not None,
        n_specimens=None if td.specimens is None else int(len(td.specimens)),
        n_trees=len(match.trees) if match.trees else 1,
        n_trees_ultrametric=n_ultra,
        trees_source=trees_source,
        warnings=warns,
        separator=td.separator_name,
        separator_stated=td.separator_stated,
        decimal=td.decimal,
        n_rows=td.n_rows,
    )
