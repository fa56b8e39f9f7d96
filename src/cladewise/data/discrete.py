"""Discrete traits: state labels in a trait table checked against their declaration.

A discrete trait is declared with its states in order, e.g. ``nocturnal =
["diurnal", "nocturnal"]`` (binary) or ``habitat = ["open", "edge", "forest"]``
(ordered). The column may hold the labels as text, or whole numbers that are the
labels (``[0, 1]`` declared as numbers or as texts ``["0", "1"]``). Every check
happens here, once: an undeclared label, a binary trait with one state only and an
ordered state that no species has are errors that say what to fix; later code gets
integer state codes ``0 .. K-1`` (NaN where missing).
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from cladewise.errors import InputError

__all__ = ["DiscreteTrait", "check_declaration", "encode_states", "discrete_column", "one_state_per_species",
           "MIXED_SEPARATOR"]

#: joins the different texts of one species' specimens (data/traits.py), so a
#: polymorphic species is caught here rather than given its first specimen's state
MIXED_SEPARATOR = " | "


@dataclass(frozen=True)
class DiscreteTrait:
    """One discrete trait after its column was checked.

    Attributes
    ----------
    name : str
        Trait (column) name.
    states : tuple of str
        State labels in order (position = state code).
    codes : ndarray (N,)
        State code of every species (float, NaN where missing).
    """

    name: str
    states: tuple[str, ...]
    codes: np.ndarray

    @property
    def n_states(self) -> int:
        return len(self.states)

    @property
    def kind(self) -> str:
        """``"binary"`` (two states) or ``"ordered"`` (three or more)."""
        return "binary" if self.n_states == 2 else "ordered"

    def counts(self) -> dict[str, int]:
        """Number of species in each state."""
        c = self.codes[np.isfinite(self.codes)].astype(int)
        return {s: int((c == i).sum()) for i, s in enumerate(self.states)}

    def summary_line(self) -> str:
        """``nocturnal (binary): 12 diurnal, 8 nocturnal, 2 without a value``."""
        parts = [f"{n} {s}" for s, n in self.counts().items()]
        miss = int((~np.isfinite(self.codes)).sum())
        if miss:
            parts.append(f"{miss} without a value")
        return f"{self.name} ({self.kind}, states in order {' < '.join(self.states)}): " + ", ".join(parts)


def _label(v: Any) -> str:
    """A declared state or a table cell as text (a whole number without '.0')."""
    if isinstance(v, (bool, np.bool_)):
        return str(int(v))
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        f = float(v)
        return str(int(f)) if f.is_integer() else repr(f)
    return str(v).strip().strip("'\"").strip()


def check_declaration(discrete: Mapping[str, Sequence[Any]]) -> dict[str, tuple[str, ...]]:
    """Validate a ``discrete`` declaration (trait -> states in order); labels become texts."""
    if not isinstance(discrete, Mapping):
        raise InputError("discrete must map each discrete trait to its states in order, e.g. "
                         '{ nocturnal = ["diurnal", "nocturnal"] }')
    out: dict[str, tuple[str, ...]] = {}
    for name, states in discrete.items():
        if isinstance(states, (str, bytes)) or not isinstance(states, Sequence):
            raise InputError(f"discrete trait {name!r}: give its states as a list in order, e.g. "
                             f'{name} = ["absent", "present"]')
        labels = tuple(_label(s) for s in states)
        if len(labels) < 2:
            raise InputError(f"discrete trait {name!r} declares {len(labels)} state(s); a discrete trait "
                             "needs at least two (binary) or three or more in order (ordered)")
        dup = [s for i, s in enumerate(labels) if s in labels[:i]]
        if dup:
            raise InputError(f"discrete trait {name!r} lists the state {dup[0]!r} twice; give each state once")
        if any(not s for s in labels):
            raise InputError(f"discrete trait {name!r} has an empty state label")
        out[str(name)] = labels
    return out


def encode_states(values: Sequence[Any], species: Sequence[str], name: str,
                  states: Sequence[Any], source: str = "the trait table") -> DiscreteTrait:
    """Turn one column of a trait table into state codes, with every check.

    Parameters
    ----------
    values : sequence
        The cells of the column, one per species (None, NaN or "" where missing).
    species : sequence of str
        Species names (for messages).
    name : str
        Trait name.
    states : sequence
        The declared states in order.
    source : str
        The file, for messages.

    Raises
    ------
    InputError
        A cell holds an undeclared state; a binary trait shows one state only; an
        ordered trait has a declared state that no species is in; fewer than two
        species have a value.
    """
    labels = check_declaration({name: list(states)})[name]
    pos = {s: i for i, s in enumerate(labels)}
    low = {s.lower(): s for s in labels}
    codes = np.full(len(values), np.nan)
    for i, v in enumerate(values):
        if v is None or (isinstance(v, (float, np.floating)) and np.isnan(v)):
            continue
        lab = _label(v)
        if lab == "":
            continue
        if lab not in pos and MIXED_SEPARATOR in lab:
            raise InputError(
                f"{source}: the specimens of species {species[i]!r} are in more than one state of {name!r} "
                f"({lab}). A discrete trait takes one state per species: give the species one state in every "
                "specimen row, or leave its cells empty"
            )
        if lab not in pos:
            hint = ""
            if lab.lower() in low:
                hint = f" Did you mean {low[lab.lower()]!r}? (labels are case-sensitive)"
            else:
                close = difflib.get_close_matches(lab, list(labels), n=1, cutoff=0.6)
                hint = f" Did you mean {close[0]!r}?" if close else ""
            raise InputError(
                f"{source}: species {species[i]!r} has {name} = {lab!r}, which is not a declared state of "
                f"{name!r} (declared, in order: {', '.join(labels)}).{hint} Fix the cell, or add the state to "
                f"the declaration in its place in the order."
            )
        codes[i] = pos[lab]
    trait = DiscreteTrait(name, labels, codes)
    counts = trait.counts()
    n_obs = sum(counts.values())
    if n_obs < 2:
        raise InputError(f"discrete trait {name!r}: only {n_obs} species have a value; at least two are needed")
    absent = [s for s, n in counts.items() if n == 0]
    if absent and len(labels) == 2:
        only = next(s for s, n in counts.items() if n > 0)
        raise InputError(
            f"binary trait {name!r}: all {n_obs} species with a value are {only!r}; no species is "
            f"{absent[0]!r}. A trait that does not vary says nothing about correlated evolution: "
            "leave it out of the model."
        )
    if absent:
        raise InputError(
            f"ordered trait {name!r}: no species is in the declared state(s) {', '.join(map(repr, absent))}, "
            "so the thresholds around them cannot be estimated. Remove the state(s) from the declaration "
            f"(the order of the others is kept), or merge them with a neighbour. Counts: "
            + ", ".join(f"{s} {n}" for s, n in counts.items())
        )
    return trait


def discrete_column(values: pd.DataFrame, text: pd.DataFrame | None, name: str) -> list[Any]:
    """The cells of trait ``name``: from the numeric columns or the text columns of the table."""
    if name in values.columns:
        return list(values[name].to_numpy())
    if text is not None and name in text.columns:
        return list(text[name].to_numpy())
    have = list(values.columns) + (list(text.columns) if text is not None else [])
    close = difflib.get_close_matches(name, have, n=1, cutoff=0.6)
    raise InputError(
        f"discrete trait {name!r} is not a column of the trait table"
        + (f"; did you mean {close[0]!r}?" if close else "")
        + f" Columns: {', '.join(map(str, have))}."
    )


def one_state_per_species(specimens: pd.DataFrame | None, name: str) -> None:
    """Refuse a numeric state column whose specimens of one species disagree.

    A discrete trait takes one state per species; averaging 0/1 codes over specimens
    would turn a polymorphic species into a state nobody declared.
    """
    if specimens is None or name not in specimens.columns or "species" not in specimens.columns:
        return
    per = specimens.groupby("species", sort=False)[name].nunique()
    mixed = list(per.index[per > 1])
    if mixed:
        raise InputError(
            f"discrete trait {name!r}: the specimens of {len(mixed)} species are in more than one state "
            f"(e.g. {', '.join(map(repr, mixed[:3]))}). A discrete trait takes one state per species: give each "
            "species its state (or the majority state) in every specimen row, or leave the cells of "
            "polymorphic species empty"
        )
