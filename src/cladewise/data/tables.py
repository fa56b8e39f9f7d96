"""Delimited text tables read cell by cell, with every way of going wrong named.

Spreadsheets export tables in many dialects: commas, semicolons or tabs between
cells, decimal points or decimal commas, thousands separators, a separator at the
end of every line. A general CSV reader guesses quietly and a wrong guess turns a
trait column into text or shifts every cell by one. Here the separator is stated
or detected from the header (and reported), every row must have as many cells as
the header, header names must be unique, and a cell of a number column that is
not a plain number stops the run with its line, column, value and a fix.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from cladewise.data.textfile import read_text
from cladewise.errors import InputError

__all__ = ["SEPARATOR_NAMES", "Table", "VALUE_RANGE", "parse_separator", "read_table", "to_numbers"]

# Cell texts read as missing (pandas' defaults are wider than users expect).
MISSING = frozenset(["", "NA", "N/A", "NaN", "nan", "na", "?", "-", "."])

SEPARATOR_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}
_SEPARATOR_WORDS = {",": ",", "comma": ",", ";": ";", "semicolon": ";", "\t": "\t", "tab": "\t", "\\t": "\t"}
_USUAL = {".csv": ",", ".tsv": "\t", ".tab": "\t"}

# Non-zero values the models can start from: squares and sums of squares of such
# values stay far inside double precision (about 1e-308 to 1e308).
VALUE_RANGE = (1e-100, 1e100)


def parse_separator(value: str | None) -> str | None:
    """A separator given by the user as a character or a word; None or "auto":
    detect it.

    Raises
    ------
    InputError
        Not one of comma, semicolon, tab.
    """
    if value is None or value == "" or value == "auto":
        return None
    sep = _SEPARATOR_WORDS.get(value) or _SEPARATOR_WORDS.get(str(value).strip().lower())
    if sep is None:
        raise InputError(
            f"separator {value!r} is not supported: use \",\" (comma), \";\" (semicolon), "
            "\"\\t\" or \"tab\", or \"auto\" to detect it."
        )
    return sep


@dataclass(frozen=True, eq=False)
class Table:
    """A table as text cells, with where each row came from.

    Attributes
    ----------
    source : str
        The file.
    columns : list of str
        Header names (stripped, unique).
    cells : dict of str to list of (str or None)
        Cell texts by column, stripped; None for a missing cell.
    lines : list of int
        File line number of every row.
    separator : str
        The separator used (``","``, ``";"`` or ``"\\t"``).
    stated : bool
        True when the user stated the separator, False when it was detected.
    notes : list of str
        What was noticed and handled (a trailing separator, an extension that does
        not match the separator), for the data summary.
    """

    source: str
    columns: list[str]
    cells: dict[str, list[str | None]]
    lines: list[int]
    separator: str
    stated: bool
    notes: list[str] = field(default_factory=list)

    @property
    def n_rows(self) -> int:
        """Number of data rows."""
        return len(self.lines)


def _split(body: str, sep: str, first_line: int) -> list[tuple[int, list[str]]]:
    """Rows of ``body`` split by ``sep`` with their file line numbers; blank lines
    are skipped. Double quotes protect separators inside a cell."""
    rows: list[tuple[int, list[str]]] = []
    reader = csv.reader(io.StringIO(body), delimiter=sep, quotechar='"', skipinitialspace=True, strict=False)
    line = first_line
    try:
        for fields in reader:
            start = line
            line = first_line + reader.line_num
            if not fields or (len(fields) == 1 and not fields[0].strip()):
                continue
            rows.append((start, fields))
    except csv.Error as exc:
        raise InputError(f"line {line}: {exc}. Check the quotes on that line.") from None
    return rows


def _trailing(header: list[str], data: list[tuple[int, list[str]]]) -> str | None:
    """Whether every line ends with one separator too many: "column" when the
    header does too (an empty column without a name), "cell" when only the data
    rows do, None otherwise."""
    n = len(header)
    if not data:
        return None
    if not header[-1].strip() and all(len(f) == n and not f[-1].strip() for _, f in data):
        return "column"
    if all(len(f) == n + 1 and not f[-1].strip() for _, f in data):
        return "cell"
    return None


def _consistent(split: list[tuple[int, list[str]]]) -> bool:
    header, data = split[0][1], split[1:]
    return _trailing(header, data) is not None or all(len(f) == len(header) for _, f in data)


def read_table(path: str | Path, separator: str | None = None) -> Table:
    """Read a delimited text table as cells.

    Parameters
    ----------
    path : str or Path
        A UTF-8 text file (a byte-order mark is accepted). Leading lines starting
        with ``#`` and blank lines are skipped.
    separator : str or None
        ``","``, ``";"``, ``"\\t"`` (or the words comma, semicolon, tab). None or
        "auto": detected from the header: the one separator that splits the header
        and gives every row as many cells as the header.

    Raises
    ------
    InputError
        Encoding, separator, header or row-length problems, each with the line and
        a fix.
    """
    path = Path(path)
    source = str(path)
    sep = parse_separator(separator)
    stated = sep is not None
    text = read_text(path, "trait table")
    lines = text.splitlines(keepends=True)
    skip = 0
    while skip < len(lines) and (lines[skip].startswith("#") or not lines[skip].strip()):
        skip += 1
    notes: list[str] = []
    # Spreadsheets may write their separator on a first line of its own: "sep=;"
    declared = re.fullmatch(r"sep=(.)\s*", lines[skip]) if skip < len(lines) else None
    if declared is not None and declared.group(1) in SEPARATOR_NAMES:
        if sep is not None and sep != declared.group(1):
            raise InputError(
                f"{source}, line {skip + 1}: the file declares its separator as "
                f"{SEPARATOR_NAMES[declared.group(1)]} (sep=...) but separator says "
                f"{SEPARATOR_NAMES[sep]}. Remove one of the two."
            )
        sep = declared.group(1)
        skip += 1
    body = "".join(lines[skip:])
    if not body.strip():
        raise InputError(f"{source}: the trait table is empty (no header line). Add a header and rows.")
    first = skip + 1
    try:
        if sep is None:
            sep = _detect(body, first, path)
        rows = _split(body, sep, first)
    except InputError as exc:
        raise InputError(f"{source}, {exc}") from None
    header_line, header = rows[0]
    data = rows[1:]
    name = SEPARATOR_NAMES[sep]
    if len(header) < 2:
        others = [SEPARATOR_NAMES[s] for s in SEPARATOR_NAMES if s != sep and s in header[0]]
        if stated and others:
            hint = f" The header holds {others[0]}s: set separator = \"{others[0]}\" (or \"auto\")."
        else:
            hint = " Separate the columns with commas, semicolons or tabs."
        raise InputError(
            f"{source}, line {header_line}: the header has a single column ({header[0].strip()[:40]!r}) "
            f"when split by {name}s; a trait table needs a species column and trait columns.{hint}"
        )
    trailing = _trailing(header, data)
    if trailing == "column":
        notes.append(
            f"every line ends with a {name} (an empty last column without a name); that column was ignored."
        )
        header = header[:-1]
    elif trailing == "cell":
        notes.append(f"every row ends with a {name} (an empty last cell); it was ignored.")
    if trailing is not None:
        data = [(ln, f[:-1]) for ln, f in data]
    columns = _check_header(header, header_line, source)
    for ln, f in data:
        if len(f) != len(columns):
            raise InputError(_row_length_message(source, ln, f, len(columns), sep))
    by_column = zip(*(f for _, f in data)) if data else [[] for _ in columns]
    cells: dict[str, list[str | None]] = {}
    for c, raw in zip(columns, by_column):
        stripped = [v.strip() for v in raw]
        cells[c] = [None if v in MISSING else v for v in stripped]
    if not data:
        raise InputError(f"{source}: the trait table has a header but no rows.")
    usual = _USUAL.get(path.suffix.lower())
    if usual is not None and usual != sep:
        notes.append(
            f"the file is named {path.suffix} but its columns are separated by {name}s; "
            f"it was read as {name}-separated."
        )
    return Table(source, columns, cells, [ln for ln, _ in data], sep, stated, notes)


def _detect(body: str, first: int, path: Path, n_lines: int = 500) -> str:
    """The separator, judged on the first lines (rows of the wrong length further
    down are reported by read_table)."""
    head = "".join(body.splitlines(keepends=True)[:n_lines])
    splits = {s: _split(head, s, first) for s in SEPARATOR_NAMES}
    candidates = [s for s, rows in splits.items() if rows and len(rows[0][1]) >= 2]
    if not candidates:
        return ","  # a single column: read_table explains
    if len(candidates) == 1:
        return candidates[0]
    good = [s for s in candidates if _consistent(splits[s])]
    if len(good) == 1:
        return good[0]
    usual = _USUAL.get(path.suffix.lower())
    if usual in good:
        return usual
    names = " and ".join(f"{SEPARATOR_NAMES[s]}s" for s in (good or candidates))
    raise InputError(
        f"line {splits[candidates[0]][0][0]}: the header can be split by {names}, and the "
        "separator cannot be told apart. State it with separator = \",\", \";\" or \"tab\" "
        "in [data]."
    )


def _check_header(header: list[str], line: int, source: str) -> list[str]:
    columns = [h.strip() for h in header]
    for j, c in enumerate(columns):
        if not c:
            raise InputError(
                f"{source}, line {line}: column {j + 1} of the header has no name. Name it, or "
                "remove the column (and check for a separator too many in the header)."
            )
    seen: dict[str, int] = {}
    for j, c in enumerate(columns):
        if c in seen:
            raise InputError(
                f"{source}, line {line}: the column name '{c}' appears more than once in the "
                f"header (columns {seen[c] + 1} and {j + 1}). Column names must be unique: "
                "rename or remove one."
            )
        seen[c] = j
    return columns


def _row_length_message(source: str, line: int, fields: list[str], n: int, sep: str) -> str:
    name = SEPARATOR_NAMES[sep]
    msg = f"{source}, line {line}: {len(fields)} cells where the header has {n} (columns separated by {name}s)."
    if len(fields) == n + 1 and not fields[-1].strip():
        return msg + f" The line ends with an extra {name}: remove it."
    if sep == "," and len(fields) > n:
        joined = ",".join(f.strip() for f in fields)
        if re.search(r"\d,\d{3}\.\d", joined):
            return msg + (
                " Numbers with thousands separators (like 1,037.5) split a cell in two: "
                "write them without the separators (1037.5)."
            )
        if re.search(r"\d,\d", joined):
            return msg + (
                " Numbers with decimal commas (like 2,5) split a cell in two in a "
                "comma-separated file: write them with decimal points (2.5), or save the table "
                "with semicolons or tabs between columns and set decimal = \",\" in [data]."
            )
    return msg + (
        " Check that line: each row needs one cell per column, and a cell holding the "
        "separator must be in double quotes."
    )


# --------------------------------------------------------------------- numbers
_NUM = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_NUM_COMMA = re.compile(r"[+-]?(?:\d+,?\d*|,\d+)(?:[eE][+-]?\d+)?")
_INF = re.compile(r"[+-]?inf(?:inity)?", re.IGNORECASE)
_THOUSANDS_POINT = re.compile(r"[+-]?\d{1,3}(?:,\d{3})+\.\d*")  # 1,037.5
_THOUSANDS_COMMA = re.compile(r"[+-]?\d{1,3}(?:\.\d{3})+,\d*")  # 1.037,5
_THOUSANDS_SPACE = re.compile(r"[+-]?\d{1,3}(?:[ '\u00a0\u202f]\d{3})+(?:[.,]\d*)?")  # 1 037.5
_COMMA_3 = re.compile(r"[+-]?\d{1,3}(?:,\d{3})+")  # 1,037: thousands or decimals?
_DECIMAL_COMMA = re.compile(r"[+-]?\d*,\d+(?:[eE][+-]?\d+)?")  # 2,5
_MULTI_POINT = re.compile(r"[+-]?\d{1,3}(?:\.\d{3}){2,}")  # 1.037.500
# a number with a unit, a bound or an "about": 12 mm, <0.5, ~3, ca. 40
_DECORATED = re.compile(
    r"(?:[<>~\u2248\u2264\u2265]|ca\.?|c\.)\s*[+-]?\d[\d.,]*"
    r"|[+-]?\d[\d.,]*\s*(?:mm|cm|m|km|\u00b5m|um|nm|mg|g|kg|ml|l|s|ms|min|h|yrs?|years|\u00b0c?|k|%)",
    re.IGNORECASE,
)


# cells that may be numbers written another way start like this (quick filter)
_NUMBERISH = re.compile(r"[<>~\u2248\u2264\u2265\u2212\u2013]|ca?\.|[+-]?[\d.,]", re.IGNORECASE)


def _problem(cell: str, decimal: str) -> str | None:
    """Why a cell that is not a plain number looks like one written another way
    (None: it does not look like a number at all)."""
    if not _NUMBERISH.match(cell) or not any(ch.isdigit() for ch in cell):
        return None
    if _THOUSANDS_POINT.fullmatch(cell) or _THOUSANDS_COMMA.fullmatch(cell) or _THOUSANDS_SPACE.fullmatch(cell):
        return "thousands"
    if _MULTI_POINT.fullmatch(cell):
        return "thousands"
    if decimal == "." and _COMMA_3.fullmatch(cell):
        return "comma3"
    if decimal == "." and _DECIMAL_COMMA.fullmatch(cell):
        return "decimal_comma"
    if decimal == "," and _NUM.fullmatch(cell):
        return "decimal_point"
    if _DECORATED.fullmatch(cell):
        return "decorated"
    if cell[0] in "\u2212\u2013" and _problem(cell[1:], decimal) in (None, "decimal_comma"):
        if (_NUM if decimal == "." else _NUM_COMMA).fullmatch(cell[1:]):
            return "minus"
    return None


def to_numbers(
    table: Table,
    column: str,
    decimal: str = ".",
    row_name: Callable[[int], str] = lambda r: "",
    must_be_numeric: str = "",
    check_range: bool = True,
) -> np.ndarray | None:
    """The cells of one column as floats (NaN where missing), or None for a text
    column (no cell looks like a number, and ``must_be_numeric`` is empty).

    Parameters
    ----------
    decimal : {".", ","}
        The decimal mark of the numbers.
    row_name : callable
        Row index -> a few words naming the row in messages (its species).
    must_be_numeric : str
        Why the column has to hold numbers (e.g. another column refers to it as
        a trait); a text column then stops the run with this reason.
    check_range : bool
        Refuse non-zero values outside :data:`VALUE_RANGE` (skip for columns that
        are log-transformed before use).

    Raises
    ------
    InputError
        A cell that is not a plain number in a number column, an infinite value,
        or a value outside the range the models can start from.
    """
    cells = table.cells[column]
    vals = _plain_floats(cells) if decimal == "." else None
    if vals is None:
        vals = _classify(table, column, cells, decimal, must_be_numeric, row_name)
        if vals is None:
            return None
    inf = np.isinf(vals)
    if inf.any():
        r = int(np.flatnonzero(inf)[0])
        raise InputError(
            f"{table.source}: column '{column}' has an infinite value at "
            f"{_where(table, row_name, r)}. Use a finite number or leave the cell empty."
        )
    if check_range:
        lo, hi = VALUE_RANGE
        mag = np.abs(vals)
        out = (mag > hi) | ((mag > 0) & (mag < lo))
        if out.any():
            r = int(np.flatnonzero(out)[0])
            size = "large" if mag[r] > hi else "small"
            raise InputError(
                f"{table.source}: column '{column}' holds {vals[r]:.3g} at "
                f"{_where(table, row_name, r)}, too {size} for the models to start from (they "
                f"compute with values from {lo:g} to {hi:g}). Rescale the column (convert its "
                "units, e.g. grams to kilograms) or log-transform it."
            )
    return vals


def _plain_floats(cells: list[str | None]) -> np.ndarray | None:
    """Fast path: every given cell is a plain number with a decimal point (None
    when any is not, and the cells go through :func:`_classify`)."""
    vals = np.full(len(cells), np.nan)
    for r, c in enumerate(cells):
        if c is None:
            continue
        if "_" in c:  # float() would read 1_000
            return None
        try:
            vals[r] = float(c)
        except ValueError:
            return None
    if np.isnan(vals).sum() != sum(c is None for c in cells):
        return None  # a cell such as 'NAN' that float() reads as not-a-number
    return vals


def _where(table: Table, row_name: Callable[[int], str], r: int) -> str:
    who = row_name(r)
    return f"line {table.lines[r]}" + (f" ({who})" if who else "")


def _classify(
    table: Table,
    column: str,
    cells: list[str | None],
    decimal: str,
    must_be_numeric: str,
    row_name: Callable[[int], str],
) -> np.ndarray | None:
    """Cell by cell: the numbers, or None for a text column. A number column with
    any other cell stops with the first one, preferring cells that look like
    numbers written another way (they explain the whole column)."""
    numbers = _NUM if decimal == "." else _NUM_COMMA
    vals = np.full(len(cells), np.nan)
    first_bad: tuple[int, str, str | None] | None = None
    n_bad = 0
    n_num = 0
    for r, c in enumerate(cells):
        if c is None:
            continue
        if numbers.fullmatch(c):
            vals[r] = float(c.replace(",", "."))
            n_num += 1
            continue
        if _INF.fullmatch(c):
            vals[r] = np.inf
            n_num += 1
            continue
        why = _problem(c, decimal)
        if why is not None:
            n_num += 1
        n_bad += 1
        if first_bad is None or (first_bad[2] is None and why is not None):
            first_bad = (r, c, why)
    if first_bad is None:
        return vals
    if n_num == 0 and not must_be_numeric:
        return None  # a text column: names, codes
    r, c, why = first_bad
    head = f"{table.source}: column '{column}' at {_where(table, row_name, r)} holds '{c}'"
    more = f" ({n_bad} cells of this column are not plain numbers.)" if n_bad > 1 else ""
    if why == "thousands":
        fix = ": a number with thousands separators. Write numbers without them (1037.5, not 1,037.5)."
    elif why == "comma3":
        fix = (
            ": the comma is either a thousands separator (1037) or a decimal comma (1.037). "
            "Write the number without thousands separators and with a decimal point, or set "
            "decimal = \",\" in [data] if the table uses decimal commas."
        )
    elif why == "decimal_comma":
        fix = (
            ": a number with a decimal comma. Set decimal = \",\" in [data] to read decimal "
            "commas, or write the numbers with decimal points (2.5, not 2,5)."
        )
    elif why == "decorated":
        fix = (
            ", not a plain number: units, bounds (<, >) and 'about' signs belong in the column "
            "name or a notes column. Write the number alone, or leave the cell empty (or NA) "
            "when the value is missing."
        )
    elif why == "minus":
        fix = (
            ": a typographic minus or dash sign instead of the ASCII hyphen-minus. Write the "
            f"number with '-' ({'-' + c[1:]})."
        )
    elif why == "decimal_point":
        fix = (
            ": a decimal point in a table read with decimal commas (decimal = \",\"). Use one "
            "decimal mark throughout the table."
        )
    else:
        reason = f" It must hold numbers: {must_be_numeric}." if must_be_numeric and n_num == 0 else ""
        fix = (
            f", a non-numeric value.{reason} Use a number, or leave the cell empty (or NA) "
            "when the value is missing."
        )
    raise InputError(head + fix + more)
