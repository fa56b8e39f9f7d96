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
specimen code) is kept aside in :attr:`TraitData.extra`. Missing cells are NaN.
All checks happen here, once; later code trusts the arrays.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from cladewise.errors import InputError

__all__ = ["TraitData", "read_species_table", "read_specimen_table", "read_traits"]

# tokens read as missing cells (pandas' defaults are wider than users expect, e.g.
# they include "NA" but also "null"; these are the ones people type in tables)
_MISSING = ["", "NA", "N/A", "NaN", "nan", "na", "?", "-", "."]


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

    @property
    def n_species(self) -> int:
        """Number of species (rows)."""
        return len(self.species)

    def index(self, trait: str) -> int:
        """Column index of ``trait``; InputError with suggestions if unknown."""
        try:
            return self.traits.index(trait)
        except ValueError:
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


def _read_table(path: Path) -> tuple[pd.DataFrame, int]:
    """Read a CSV or TSV as text cells. Returns the table and the file line of its
    header (leading lines starting with '#' are comments)."""
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError(f"trait table not found: {path}. Check the path.") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read trait table {path}: {exc}") from None
    lines = text.splitlines(keepends=True)
    skip = 0
    while skip < len(lines) and (lines[skip].startswith("#") or not lines[skip].strip()):
        skip += 1
    body = "".join(lines[skip:])
    if not body.strip():
        raise InputError(f"{path}: the trait table is empty.")
    ext = path.suffix.lower()
    if ext in (".tsv", ".tab"):
        sep = "\t"
    elif ext == ".csv":
        sep = ","
    else:
        try:
            sep = csv.Sniffer().sniff(body[:4096], delimiters=",\t;").delimiter
        except csv.Error:
            sep = ","
    try:
        df = pd.read_csv(
            io.StringIO(body),
            sep=sep,
            dtype=str,
            keep_default_na=False,
            na_values=_MISSING,
            skipinitialspace=True,
        )
    except (pd.errors.ParserError, ValueError) as exc:
        raise InputError(f"{path}: not a readable {'TSV' if sep == chr(9) else 'CSV'} table: {exc}") from None
    df.columns = [str(c).strip() for c in df.columns]
    return df, skip + 1


def _line(header_line: int, row: int) -> int:
    return header_line + 1 + row


def _numeric_columns(
    df: pd.DataFrame, skip: set[str], source: str, header_line: int, species_col: str
) -> tuple[dict[str, np.ndarray], list[str]]:
    """Convert columns to float. A column with any number must be all numbers."""
    numeric: dict[str, np.ndarray] = {}
    text_cols: list[str] = []
    for col in df.columns:
        if col in skip:
            continue
        raw = df[col]
        vals = pd.to_numeric(raw.str.strip(), errors="coerce").to_numpy(dtype=float)
        given = raw.notna().to_numpy()
        bad = given & np.isnan(vals)
        if given.any() and bad.all():
            text_cols.append(col)
            continue
        if bad.any():
            r = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"{source}: column '{col}' has a non-numeric value '{raw.iloc[r]}' at line "
                f"{_line(header_line, r)} (species '{df[species_col].iloc[r]}'). Use a number, "
                f"or leave the cell empty (or NA) when the value is missing."
            )
        inf = np.isinf(vals)
        if inf.any():
            r = int(np.flatnonzero(inf)[0])
            raise InputError(
                f"{source}: column '{col}' has an infinite value at line {_line(header_line, r)} "
                f"(species '{df[species_col].iloc[r]}'). Use a finite number or leave the cell empty."
            )
        if not given.any():
            raise InputError(
                f"{source}: column '{col}' has no values. Fill it or remove the column."
            )
        numeric[col] = vals
    return numeric, text_cols


def _species_column(df: pd.DataFrame, species_col: str, source: str, header_line: int) -> pd.Series:
    if species_col not in df.columns:
        raise InputError(
            f"{source}: no species column '{species_col}'. Columns are: "
            f"{', '.join(df.columns)}.{_did_you_mean(species_col, list(df.columns))} "
            "Name the species column with `species` in the [data] section of the spec."
        )
    sp = df[species_col].fillna("").astype(str).str.strip().str.strip("'\"").str.strip()
    empty = np.flatnonzero(sp.to_numpy() == "")
    if empty.size:
        raise InputError(
            f"{source}: empty species name at line {_line(header_line, int(empty[0]))}. "
            "Every row needs a species name."
        )
    return sp


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
    path: str | Path,
    species: str = "species",
    log: Sequence[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
) -> TraitData:
    """Read a table with one row per species.

    Parameters
    ----------
    path : str or Path
        CSV or TSV (by extension ``.csv``/``.tsv``, otherwise sniffed). Leading
        lines starting with ``#`` are comments.
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

    Raises
    ------
    InputError
        Missing species column, duplicate species, non-numeric or infinite cells,
        zero or negative se, negative sd, n below 1, log of a non-positive value,
        a column without values.
    """
    path = Path(path)
    source = str(path)
    df, hdr = _read_table(path)
    sp = _species_column(df, species, source, hdr)
    dup = sp[sp.duplicated(keep=False)]
    if len(dup):
        names = sorted(set(dup))
        where = "; ".join(
            f"'{nm}' at lines {', '.join(str(_line(hdr, r)) for r in np.flatnonzero(sp.to_numpy() == nm))}"
            for nm in names[:5]
        )
        raise InputError(
            f"{source}: species listed more than once: {where}. A species table has one "
            "row per species; merge the rows, or read the file as a specimen table "
            "(specimens = true)."
        )
    numeric, text_cols = _numeric_columns(df, {species}, source, hdr, species)
    suffixes = [s for s in (se_suffix, n_suffix, sd_suffix) if s]
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
        raise InputError(f"{source}: no numeric trait columns found.")
    mean = np.column_stack([numeric[t] for t in traits])
    se = np.full((N, k), np.nan)
    n = np.full((N, k), np.nan)
    any_se = any_n = False

    def where(r: int) -> str:
        return f"line {_line(hdr, r)} (species '{sp.iloc[r]}')"

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
    extra = df[text_cols].reset_index(drop=True) if text_cols else None
    return TraitData(
        species=list(sp),
        traits=traits,
        mean=mean,
        se=se if any_se else None,
        n=n if any_n else None,
        within_var=None,
        specimens=None,
        log_traits=list(log),
        source=source,
        extra=extra,
    )


def read_specimen_table(
    path: str | Path,
    species: str = "species",
    log: Sequence[str] = (),
) -> TraitData:
    """Read a table with one row per specimen and reduce it to species.

    For each species and trait: the mean of the observed specimens, their number
    ``n``, the within-species variance (``ddof=1``) and the standard error
    ``sqrt(var / n)``. A species with a single specimen has no variance estimate
    (NaN, not an error). Traits in ``log`` are logged specimen by specimen before
    reducing, so the means are means of logs. Species keep their order of first
    appearance; the (logged) specimen rows are kept in :attr:`TraitData.specimens`.

    Raises
    ------
    InputError
        Missing species column, non-numeric or infinite cells, log of a
        non-positive value, a column without values.
    """
    path = Path(path)
    source = str(path)
    df, hdr = _read_table(path)
    sp = _species_column(df, species, source, hdr)
    numeric, text_cols = _numeric_columns(df, {species}, source, hdr, species)
    traits = list(numeric)
    if not traits:
        raise InputError(f"{source}: no numeric trait columns found.")
    _check_log_names(log, numeric, source)

    def where(r: int) -> str:
        return f"line {_line(hdr, r)} (species '{sp.iloc[r]}')"

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
            pd.DataFrame({"species": sp.to_numpy(), **{c: df[c].to_numpy() for c in text_cols}})
            .groupby("species", sort=False)
            .first()
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
        source=source,
        extra=extra,
    )


def read_traits(
    path: str | Path,
    species: str = "species",
    specimens: bool = False,
    log: Sequence[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
) -> TraitData:
    """Read a species table, or a specimen table when ``specimens`` is True."""
    if specimens:
        return read_specimen_table(path, species=species, log=log)
    return read_species_table(
        path, species=species, log=log, se_suffix=se_suffix, n_suffix=n_suffix, sd_suffix=sd_suffix
    )
