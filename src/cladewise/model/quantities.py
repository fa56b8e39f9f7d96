"""The one catalogue of posterior quantities a fit reports.

Every reported posterior variable has one :class:`Quantity` entry in :data:`QUANTITIES`,
in display order. The summary table, the tree-sample statistics, the report's words,
densities and rank plots all read this catalogue, so a new quantity needs one entry
here (and the model code that creates the variable) and nothing else.

How elements of a variable with dimensions are labelled (``labels``):

``"each"``
    one label per element: ``root_mean[a]``; two dimensions give ``name[a, b]``.
``"pair"``
    a symmetric matrix (correlations): the upper triangle only, ``evo_corr[a, b]``.
``"ordered_pair"``
    a matrix whose entry (row a, column b) is "a on b" (slopes): every off-diagonal
    entry, ``evo_slope[a ~ b]``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, Iterable, Iterator, Sequence

__all__ = [
    "iter_elements",
    "Quantity",
    "QUANTITIES",
    "LABEL_STYLES",
    "quantity",
    "signed_names",
    "summary_names",
    "element_labels",
    "quantity_elements",
    "plain_words",
]

LABEL_STYLES = ("each", "pair", "ordered_pair")


@dataclass(frozen=True)
class Quantity:
    """One reported posterior variable.

    Attributes
    ----------
    name : str
        Variable name in the posterior.
    plain : str
        What it is, in words (report tables and sentences).
    signed : bool
        Its sign is the question: P(>0) is reported and trees of a sample are checked
        for agreement on the sign.
    labels : {"each", "pair", "ordered_pair"}
        How its elements are labelled (module docstring).
    role : str
        ``"effect"`` (correlations, slopes, coefficients), ``"evolution"`` (parameters
        of the evolution model), ``"rate"``, ``"location"``, ``"share"`` or
        ``"derived"`` (a function of another reported quantity, e.g. the half-life).
        Rank plots check effects first, then evolution parameters.
    headline : bool
        Stated in words at the top of the report's results.
    summary : bool
        In the summary table whenever the model has it (``False``: described only).
    """

    name: str
    plain: str
    signed: bool = False
    labels: str = "each"
    role: str = "other"
    headline: bool = False
    summary: bool = True

    def __post_init__(self) -> None:
        if self.labels not in LABEL_STYLES:
            raise ValueError(f"labels must be one of {LABEL_STYLES}; got {self.labels!r}")


#: every reported quantity, in display order (the order of the summary table)
QUANTITIES: tuple[Quantity, ...] = (
    Quantity("evo_corr", "evolutionary correlation", signed=True, labels="pair", role="effect", headline=True),
    Quantity("evo_slope", "evolutionary slope", signed=True, labels="ordered_pair", role="effect", headline=True),
    Quantity("probit_coef", "liability regression coefficient (probit scale: per residual liability sd)",
             signed=True, role="effect", headline=True),
    Quantity("threshold", "threshold between ordered states (liability tip sds; the first is 0)",
             role="location"),
    Quantity("evo_rate", "evolutionary rate (variance per unit branch length)", role="rate"),
    Quantity("evo_sd", "evolutionary standard deviation", role="rate", summary=False),
    Quantity("coef", "regression coefficient", signed=True, role="effect", headline=True),
    Quantity("intercept_at_mean", "intercept at the predictors' means", role="location"),
    Quantity("species_corr", "species-level (non-phylogenetic) correlation", signed=True, labels="pair",
             role="effect", headline=True),
    Quantity("phylo_share", "phylogenetic share of variance", role="share", headline=True),
    Quantity("lambda", "Pagel's lambda", role="evolution", headline=True),
    Quantity("alpha", "Ornstein-Uhlenbeck pull (alpha)", role="evolution", headline=True),
    Quantity("half_life", "phylogenetic half-life, ln 2 / alpha", role="derived"),
    Quantity("kappa", "kappa (branch lengths raised to this power)", role="evolution"),
    Quantity("delta", "delta (node heights rescaled by this power)", role="evolution"),
    Quantity("rate_change", "rate change per unit time (early burst)", role="evolution"),
    Quantity("rate_ratio", "rate ratio of a regime to the reference regime", role="rate", headline=True),
    Quantity("log_rate_ratio", "log rate ratio of a regime to the reference regime (P(>0) is P(ratio > 1))",
             signed=True, role="effect"),
    Quantity("regime_rate", "evolutionary rate in each regime", role="rate"),
    Quantity("regime_corr", "evolutionary correlation in each regime", signed=True, role="effect"),
    Quantity("regime_corr_diff", "difference of a regime's evolutionary correlation from the reference regime's",
             signed=True, role="effect", headline=True),
    Quantity("regime_optimum", "Ornstein-Uhlenbeck optimum of each regime", role="location"),
    Quantity("optimum_diff", "difference of a regime's optimum from the reference regime's", signed=True,
             role="effect", headline=True),
    Quantity("root_mean", "mean at the root", role="location"),
    Quantity("within_sd", "within-species standard deviation", role="rate"),
    Quantity("within_corr", "within-species correlation between traits", signed=True, labels="pair",
             role="effect"),
)

_BY_NAME = {q.name: q for q in QUANTITIES}
if len(_BY_NAME) != len(QUANTITIES):  # pragma: no cover - guards edits of the table
    raise RuntimeError("two catalogue entries share a name")


def quantity(name: str) -> Quantity | None:
    """The catalogue entry of ``name``, or None for a variable the catalogue does not know."""
    return _BY_NAME.get(str(name))


def signed_names() -> frozenset[str]:
    """Names of the quantities whose P(>0) is reported."""
    return frozenset(q.name for q in QUANTITIES if q.signed)


def summary_names(available: Iterable[str]) -> list[str]:
    """The summary-table variables among ``available``, in display order."""
    have = set(available)
    return [q.name for q in QUANTITIES if q.summary and q.name in have]


def element_labels(name: str, coords: Sequence[Sequence[Any]]) -> Iterator[tuple[tuple[int, ...], str]]:
    """(index, label) of every reported element of variable ``name``.

    Parameters
    ----------
    name : str
        Variable name.
    coords : sequence of sequences
        Coordinate values of each non-sample dimension (empty for a scalar).
    """
    if not coords:
        yield (), name
        return
    if len(coords) == 1:
        for i, v in enumerate(coords[0]):
            yield (i,), f"{name}[{v}]"
        return
    entry = quantity(name)
    style = entry.labels if entry is not None else "each"
    la, lb = list(coords[0]), list(coords[1])
    for i, va in enumerate(la):
        for j, vb in enumerate(lb):
            if style == "pair" and not i < j:
                continue
            if style == "ordered_pair":
                if i == j:
                    continue
                yield (i, j), f"{name}[{va} ~ {vb}]"
                continue
            yield (i, j), f"{name}[{va}, {vb}]"


def quantity_elements(da: Any, extra: Sequence[str], name: str) -> Iterator[tuple[dict[str, int], str]]:
    """``(isel selection, label)`` of every reported element of an xarray variable.

    ``extra`` names its non-sample dimensions (at most the first two are used).
    """
    dims = list(extra)[:2]
    coords = [list(da[d].values) for d in dims]
    for idx, label in element_labels(name, coords):
        yield dict(zip(dims, idx)), label


_INNER = re.compile(r"^[^\[]+\[(.*)\]$")


def plain_words(label: str, name: str) -> str:
    """A label in words: ``evo_slope[a ~ b]`` -> ``evolutionary slope of a on b``."""
    m = _INNER.match(str(label))
    inner = m.group(1) if m else ""
    entry = quantity(name)
    base = entry.plain if entry is not None else str(name)
    if not inner:
        return base
    style = entry.labels if entry is not None else "each"
    if style == "ordered_pair" and " ~ " in inner:
        a, b = inner.split(" ~ ", 1)
        return f"{base} of {a} on {b}"
    if style == "pair" and ", " in inner:
        a, b = inner.split(", ", 1)
        return f"{base}, {a} & {b}"
    return f"{base}, {inner}"


def iter_elements(posterior: Any, names: Iterable[str]) -> Iterator[tuple[str, str, Any]]:
    """(variable, label, draws as a chain x draw array) of every reported element.

    ``posterior`` is an xarray Dataset with ``chain`` and ``draw`` dimensions; names
    it lacks are skipped. Correlation matrices give their upper triangle, slope
    matrices their off-diagonal (see :func:`quantity_elements`).
    """
    import numpy as np

    for name in names:
        if name not in posterior:
            continue
        da = posterior[name]
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        for sel, label in quantity_elements(da, extra, name):
            x = da.isel(sel) if sel else da
            yield name, label, np.asarray(x.transpose("chain", "draw").values, dtype=float)
