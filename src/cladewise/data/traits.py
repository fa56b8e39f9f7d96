"""Species trait tables: means with standard errors, or one row per specimen.

Two kinds of table are read:

* a **species table**: one row per species, a species column, trait columns and,
  optionally, for a trait ``x``, a standard-error column ``x_se`` or sample-size and
  standard-deviation columns ``x_n`` and ``x_sd`` (then ``se = sd / sqrt(n)``);
* a **specimen table**: one row per individual, a species column and trait
  columns; it is reduced to per-species mean, standard error, sample size and
  within-species variance, and the rows are kept for models that estimate the
  within-species variance themselves.

Every numeric column is kept as a candidate trait (a model may use any of them as
response or predictor); a column whose every value is text (a family name, a
specimen code) is kept aside in :attr:`TraitData.extra`. A column with any number
in it, or that another column refers to (``x`` of ``x_se``), must hold only plain
numbers: decimal commas, thousands separators or units stop the run with the cell
(see :mod:`cladewise.data.tables`). Missing cells are NaN. All checks happen here,
once; later code trusts the arrays.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from cladewise.data.tables import SEPARATOR_NAMES, Table, read_table, to_numbers
from cladewise.errors import InputError

__all__ = ["TraitData", "read_species_table", "read_specimen_table", "read_traits"]


@dataclass(frozen=True, eq=False)
class TraitData:
    """Trait values per species, aligned row by row with ``species``.

    Attributes
    ----------
    species : list of str
        Species names as written in the table (stripped), in table order.
    traits : list of str
        All numeric columns, each a candidate trait or predictor.
    mean : ndarray, shape (N, k)
        Species means (log scale for ``log_traits``), NaN where missing.
    se : ndarray (N, k) or None
        Standard error of each mean, NaN where unknown; None when the table gives
        no standard errors at all.
    n : ndarray (N, k) or None
        Number of specimens behind each mean, NaN where unknown.
    within_var : ndarray (N, k) or None
        Within-species variance (specimen tables; NaN with fewer than 2 specimens).
    specimens : DataFrame or None
        Specimen rows (column ``species`` then the trait columns, logged where
        asked), for models that estimate within-species variance.
    log_traits : list of str
        Traits that were natural-log transformed.
    source : str
        The file the data came from.
    extra : DataFrame or None
        Non-numeric columns, one row per species (first value per species for
        specimen tables).
    separator : str
        The column separator of the file (``","``, ``";"`` or ``"\t"``).
    separator_stated : bool
        True when the user stated it, False when it was detected.
    decimal : str
        The decimal mark the numbers were read with.
    n_rows : int
        Data rows read from the file (specimens for a specimen table).
    notes : tuple of str
        What was noticed in the file and handled (for the data summary).
    """

    species: list[str]
    traits: list[str]
    mean: np.ndarray
    se: np.ndarray | None = None
    n: np.ndarray | None = None
    within_var: np.ndarray | None = None
    specimens: pd.DataFrame | None = None
    log_traits: list[str] = field(default_factory=list)
    source: str = ""
    extra: pd.DataFrame | None = None
    separator: str = ","
    separator_stated: bool = False
    decimal: str = "."
    n_rows: int = 0
    notes: tuple[str, ...] = ()

    @property
    def separator_name(self) -> str:
        """The separator as a word: comma, semicolon or tab."""
        return SEPARATOR_NAMES.get(self.separator, repr(self.separator))

    @property
    def n_species(self) -> int:
        """Number of species (rows)."""
        return len(self.species)

    def index(self, trait: str) -> int:
        """Column index of ``trait``; InputError with suggestions if unknown."""
        try:
            return self.traits.index(trait)
        except ValueError:
            if self.extra is not None and trait in self.extra.columns:
                first = self.extra[trait].dropna()
                shown = f" (e.g. '{first.iloc[0]}')" if len(first) else ""
                raise InputError(
                    f"column '{trait}' of {self.source or 'the table'} holds text{shown}, not "
                    f"numbers, so it cannot be a trait. Numeric columns are: {', '.join(self.traits)}."
                ) from None
            raise InputError(
                f"no trait column '{trait}' in {self.source or 'the table'}. "
                f"Numeric columns are: {', '.join(self.traits)}.{_did_you_mean(trait, self.traits)}"
            ) from None

    def column(self, trait: str) -> np.ndarray:
        """Species means of one trait (NaN where missing)."""
        return self.mean[:, self.index(trait)]

    def select(self, traits: Sequence[str]) -> "TraitData":
        """The same species with only ``traits``, in that order."""
        idx = [self.index(t) for t in traits]
        return replace(
            self,
            traits=list(traits),
            mean=self.mean[:, idx],
            se=None if self.se is None else self.se[:, idx],
            n=None if self.n is None else self.n[:, idx],
            within_var=None if self.within_var is None else self.within_var[:, idx],
            specimens=None
            if self.specimens is None
            else self.specimens[["species", *traits]].copy(),
            log_traits=[t for t in self.log_traits if t in traits],
        )

    def subset(self, species: Sequence[str]) -> "TraitData":
        """Only the named species, in the order given (names as in ``species``)."""
        pos = {s: i for i, s in enumerate(self.species)}
        missing = [s for s in species if s not in pos]
        if missing:
            raise InputError(f"species not in {self.source or 'the table'}: {', '.join(missing[:10])}.")
        idx = [pos[s] for s in species]
        spec = None
        if self.specimens is not None:
            keep = self.specimens["species"].isin(set(species))
            spec = self.specimens.loc[keep].reset_index(drop=True)
        return replace(
            self,
            species=list(species),
            mean=self.mean[idx],
            se=None if self.se is None else self.se[idx],
            n=None if self.n is None else self.n[idx],
            within_var=None if self.within_var is None else self.within_var[idx],
            specimens=spec,
            extra=None if self.extra is None else self.extra.iloc[idx].reset_index(drop=True),
        )

    def rename_species(self, names: Sequence[str]) -> "TraitData":
        """The same data with new species names (same order and length)."""
        if len(names) != self.n_species:
            raise ValueError("one new name per species expected")
        mapping = dict(zip(self.species, names))
        spec = None
        if self.specimens is not None:
            spec = self.specimens.copy()
            spec["species"] = spec["species"].map(mapping)
        return replace(self, species=list(names), specimens=spec)

    def to_frame(self) -> pd.DataFrame:
        """Species means (and se, n where known) as a DataFrame indexed by species."""
        df = pd.DataFrame(self.mean, index=pd.Index(self.species, name="species"), columns=self.traits)
        for arr, suffix in ((self.se, "_se"), (self.n, "_n")):
            if arr is not None:
                for j, t in enumerate(self.traits):
                    if not np.all(np.isnan(arr[:, j])):
                        df[t + suffix] = arr[:, j]
        return df


# ---------------------------------------------------------------------- helpers
def _did_you_mean(word: str, options: Sequence[str]) -> str:
    import difflib

    close = difflib.get_close_matches(word, list(options), n=3, cutoff=0.6)
    low = [o for o in options if o.lower() == word.lower() and o not in close]
    close = low + close
    return f" Did you mean {', '.join(repr(c) for c in close)}?" if close else ""


def _open_table(path: Path | Table, separator: str | None, decimal: str) -> Table:
    if isinstance(path, Table):  # already cells (a DataFrame, see cladewise.data.inputs)
        return path
    if decimal not in (".", ","):
        raise InputError(f"decimal must be \".\" or \",\", not {decimal!r}.")
    table = read_table(path, separator)
    if decimal == "," and table.separator == ",":
        raise InputError(
            f"{table.source}: decimal = \",\" needs columns separated by semicolons or tabs, "
            "but this table is comma-separated. Save it with ';' or tab separators, or use "
            "decimal points."
        )
    return table


def _numeric_columns(
    table: Table,
    species_col: str,
    decimal: str,
    suffixes: Sequence[str],
    log: Sequence[str],
    who,
) -> tuple[dict[str, np.ndarray], list[str]]:
    """Convert columns to float; text columns (no number in them) are returned by
    name. A column that another column refers to, or that is to be logged, must be
    numeric."""
    cols = [c for c in table.columns if c != species_col]
    present = set(cols)
    numeric: dict[str, np.ndarray] = {}
    text_cols: list[str] = []
    logged = set(log) | {t + s for t in log for s in suffixes}
    for col in cols:
        why = ""
        refs = [col + s for s in suffixes if col + s in present]
        base = [col[: -len(s)] for s in suffixes if col.endswith(s) and col[: -len(s)] in present]
        if refs:
            why = f"'{refs[0]}' refers to it as a trait"
        elif base:
            why = f"it belongs to the trait '{base[0]}'"
        elif col in log:
            why = "it is listed in `log`"
        vals = to_numbers(table, col, decimal, who, must_be_numeric=why, check_range=col not in logged)
        if vals is None:
            text_cols.append(col)
            continue
        if np.all(np.isnan(vals)):
            raise InputError(f"{table.source}: column '{col}' has no values. Fill it or remove the column.")
        numeric[col] = vals
    return numeric, text_cols


def _species_column(table: Table, species_col: str) -> pd.Series:
    source, columns = table.source, table.columns
    if species_col not in columns:
        raise InputError(
            f"{source}: no species column '{species_col}'. Columns are: "
            f"{', '.join(columns)}.{_did_you_mean(species_col, columns)} "
            "Name the species column with `species` in the [data] section of the spec."
        )
    sp = pd.Series([c or "" for c in table.cells[species_col]], dtype=object)
    sp = sp.str.strip().str.strip("'\"").str.strip()
    empty = np.flatnonzero(sp.to_numpy() == "")
    if empty.size:
        raise InputError(
            f"{source}: empty species name at line {table.lines[int(empty[0])]}. "
            "Every row needs a species name."
        )
    return sp


def _no_traits_message(table: Table, text_cols: Sequence[str]) -> str:
    msg = f"{table.source}: no numeric trait columns found."
    if text_cols:
        col = text_cols[0]
        r, cell = next((r, c) for r, c in enumerate(table.cells[col]) if c is not None)
        msg += (
            f" Columns {', '.join(repr(c) for c in text_cols[:8])} hold text (e.g. '{cell}' in "
            f"'{col}' at line {table.lines[r]}). Trait columns must hold plain numbers."
        )
    return msg


def _text_frame(table: Table, columns: Sequence[str]) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(table.cells[c], dtype=object) for c in columns})


def _file_facts(table: Table, decimal: str) -> dict:
    """The TraitData fields that describe how the file was read."""
    return dict(
        source=table.source,
        separator=table.separator,
        separator_stated=table.stated,
        decimal=decimal,
        n_rows=table.n_rows,
        notes=tuple(table.notes),
    )


def _log_values(values: np.ndarray, trait: str, source: str, where) -> np.ndarray:
    bad = ~np.isnan(values) & (values <= 0)
    if bad.any():
        r = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{source}: cannot take the log of '{trait}' = {values[r]:g} at {where(r)}: "
            "the log needs positive values. Remove the trait from `log`, or fix the value."
        )
    return np.log(values)


def _check_log_names(log: Sequence[str], numeric: dict, source: str) -> None:
    for t in log:
        if t not in numeric:
            raise InputError(
                f"{source}: `log` names '{t}', which is not a numeric column."
                f"{_did_you_mean(t, list(numeric))}"
            )


# ------------------------------------------------------------------ the readers
def read_species_table(
    path: str | Path | Table,
    species: str = "species",
    log: Sequence[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
    separator: str | None = None,
    decimal: str = ".",
) -> TraitData:
    """Read a table with one row per species.

    Parameters
    ----------
    path : str or Path
        A delimited UTF-8 text table (comma, semicolon or tab). Leading lines
        starting with ``#`` are comments.
    species : str
        Name of the species column.
    log : sequence of str
        Traits to natural-log transform. Their standard errors are carried by the
        delta method, ``se_log = se / mean`` (first-order; good when se is small
        against the mean). Note that the log of a mean is not the mean of logs;
        give a specimen table when the log-scale mean matters.
    se_suffix, n_suffix, sd_suffix : str
        Column name endings for standard error, sample size and standard deviation
        of a trait (``<trait><suffix>``). A given se wins over one from sd and n.
    separator : str or None
        ``","``, ``";"`` or ``"\t"`` (or comma, semicolon, tab); None or "auto":
        detected from the header (see :func:`cladewise.data.tables.read_table`).
    decimal : {".", ","}
        Decimal mark of the numbers; ``","`` needs semicolon or tab separators.

    Raises
    ------
    InputError
        Unreadable table (encoding, separator, duplicate column names, rows of the
        wrong length), missing species column, duplicate species, cells of number
        columns that are not plain numbers, infinite values or values too large or
        small to compute with, zero or negative se, negative sd, n below 1, log of
        a non-positive value, a column without values.
    """
    table = _open_table(path, separator, decimal)
    source = table.source
    sp = _species_column(table, species)
    dup = sp[sp.duplicated(keep=False)]
    if len(dup):
        names = sorted(set(dup))
        where = "; ".join(
            f"'{nm}' at lines {', '.join(str(table.lines[r]) for r in np.flatnonzero(sp.to_numpy() == nm))}"
            for nm in names[:5]
        )
        raise InputError(
            f"{source}: species listed more than once: {where}. A species table has one "
            "row per species; merge the rows, or read the file as a specimen table "
            "(specimens = true)."
        )
    suffixes = [s for s in (se_suffix, n_suffix, sd_suffix) if s]
    numeric, text_cols = _numeric_columns(
        table, species, decimal, suffixes, log, lambda r: f"species '{sp.iloc[r]}'"
    )
    # a column is a trait unless it is the se/n/sd column of another numeric column
    aux = {
        c
        for c in numeric
        for s in suffixes
        if c.endswith(s) and c[: -len(s)] in numeric
    }
    traits = [c for c in numeric if c not in aux]
    _check_log_names(log, {t: 1 for t in traits}, source)
    N, k = len(sp), len(traits)
    if k == 0:
        raise InputError(_no_traits_message(table, text_cols))
    mean = np.column_stack([numeric[t] for t in traits])
    se = np.full((N, k), np.nan)
    n = np.full((N, k), np.nan)
    any_se = any_n = False

    def where(r: int) -> str:
        return f"line {table.lines[r]} (species '{sp.iloc[r]}')"

    for j, t in enumerate(traits):
        se_col, n_col, sd_col = t + se_suffix, t + n_suffix, t + sd_suffix
        if n_col in numeric:
            nv = numeric[n_col]
            bad = ~np.isnan(nv) & ((nv < 1) | (nv != np.round(nv)))
            if bad.any():
                r = int(np.flatnonzero(bad)[0])
                raise InputError(
                    f"{source}: column '{n_col}' must hold whole numbers of at least 1; "
                    f"found {nv[r]:g} at {where(r)}."
                )
            n[:, j] = nv
            any_n = True
        if sd_col in numeric:
            sd = numeric[sd_col]
            bad = ~np.isnan(sd) & (sd < 0)
            if bad.any():
                r = int(np.flatnonzero(bad)[0])
                raise InputError(f"{source}: negative standard deviation in '{sd_col}' at {where(r)}.")
            if n_col not in numeric:
                raise InputError(
                    f"{source}: column '{sd_col}' needs a sample-size column '{n_col}' to "
                    f"give a standard error (se = sd / sqrt(n)). Add it, or give '{se_col}'."
                )
            se[:, j] = sd / np.sqrt(n[:, j])
            any_se = True
        if se_col in numeric:
            sv = numeric[se_col]
            given = ~np.isnan(sv)
            se[given, j] = sv[given]
            any_se = True
        bad = ~np.isnan(se[:, j]) & (se[:, j] <= 0)
        if bad.any():
            r = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"{source}: standard error of '{t}' is {se[r, j]:g} at {where(r)}; it must "
                "be positive. Leave the cell empty if it is unknown."
            )
    for t in log:
        j = traits.index(t)
        raw = mean[:, j].copy()
        mean[:, j] = _log_values(raw, t, source, where)
        se[:, j] = se[:, j] / raw  # delta method: d log(x) = dx / x
    extra = _text_frame(table, text_cols) if text_cols else None
    return TraitData(
        species=list(sp),
        traits=traits,
        mean=mean,
        se=se if any_se else None,
        n=n if any_n else None,
        within_var=None,
        specimens=None,
        log_traits=list(log),
        extra=extra,
        **_file_facts(table, decimal),
    )


def read_specimen_table(
    path: str | Path | Table,
    species: str = "species",
    log: Sequence[str] = (),
    separator: str | None = None,
    decimal: str = ".",
) -> TraitData:
    """Read a table with one row per specimen and reduce it to species.

    For each species and trait: the mean of the observed specimens, their number
    ``n``, the within-species variance (``ddof=1``) and the standard error
    ``sqrt(var / n)``. A species with a single specimen has no variance estimate
    (NaN, not an error). Traits in ``log`` are logged specimen by specimen before
    reducing, so the means are means of logs. Species keep their order of first
    appearance; the (logged) specimen rows are kept in :attr:`TraitData.specimens`.
    ``separator`` and ``decimal`` are as in :func:`read_species_table`.

    Raises
    ------
    InputError
        Unreadable table (as in :func:`read_species_table`), missing species
        column, cells of number columns that are not plain numbers, infinite or
        out-of-range values, log of a non-positive value, a column without values.
    """
    table = _open_table(path, separator, decimal)
    source = table.source
    sp = _species_column(table, species)
    numeric, text_cols = _numeric_columns(
        table, species, decimal, (), log, lambda r: f"species '{sp.iloc[r]}'"
    )
    traits = list(numeric)
    if not traits:
        raise InputError(_no_traits_message(table, text_cols))
    _check_log_names(log, numeric, source)

    def where(r: int) -> str:
        return f"line {table.lines[r]} (species '{sp.iloc[r]}')"

    for t in log:
        numeric[t] = _log_values(numeric[t], t, source, where)
    rows = pd.DataFrame({"species": sp.to_numpy(), **{t: numeric[t] for t in traits}})
    g = rows.groupby("species", sort=False)
    mean = g[traits].mean()
    count = g[traits].count()
    var = g[traits].var(ddof=1)
    order = list(mean.index)
    n_arr = count.to_numpy(dtype=float).copy()
    var_arr = var.to_numpy(dtype=float).copy()
    var_arr[n_arr < 2] = np.nan
    with np.errstate(invalid="ignore", divide="ignore"):
        se = np.sqrt(var_arr / n_arr)
    n_arr[n_arr == 0] = np.nan
    extra = None
    if text_cols:
        extra = (
            pd.DataFrame({"species": sp.to_numpy(), **{c: table.cells[c] for c in text_cols}})
            .groupby("species", sort=False)
            .agg(_species_text)
            .reindex(order)
            .reset_index(drop=True)
        )
    return TraitData(
        species=order,
        traits=traits,
        mean=mean.to_numpy(dtype=float),
        se=se,
        n=n_arr,
        within_var=var_arr,
        specimens=rows,
        log_traits=list(log),
        extra=extra,
        **_file_facts(table, decimal),
    )


def _species_text(cells: pd.Series) -> Any:
    """One species' text cell from its specimen rows; different texts are kept, joined."""
    from cladewise.data.discrete import MIXED_SEPARATOR

    vals = [v for v in pd.unique(cells.dropna()) if str(v).strip() != ""]
    if not vals:
        return None
    return vals[0] if len(vals) == 1 else MIXED_SEPARATOR.join(sorted(map(str, vals)))


def read_traits(
    path: str | Path | pd.DataFrame,
    species: str = "species",
    specimens: bool = False,
    log: Sequence[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
    separator: str | None = None,
    decimal: str = ".",
) -> TraitData:
    """Read a species table, or a specimen table when ``specimens`` is True
    (arguments as in :func:`read_species_table`). ``path`` may be a pandas DataFrame
    (species as a column or the index): its cells go through the same reader
    (:func:`cladewise.data.inputs.table_from_frame`)."""
    if isinstance(path, pd.DataFrame):
        from cladewise.data.inputs import frame_messages, table_from_frame

        try:
            table = table_from_frame(path, species)
            return read_traits(table, species, specimens, log, se_suffix, n_suffix, sd_suffix, None, ".")
        except InputError as exc:
            raise frame_messages(exc) from None
    if specimens:
        return read_specimen_table(path, species=species, log=log, separator=separator, decimal=decimal)
    return read_species_table(
        path,
        species=species,
        log=log,
        se_suffix=se_suffix,
        n_suffix=n_suffix,
        sd_suffix=sd_suffix,
        separator=separator,
        decimal=decimal,
    )
