"""One reader for the TOML tables of every cladewise input file.

A table is declared once as a :class:`Table` of :class:`Key` objects: each key
says its type, range, choices, whether it is required, its default and whether it
names a file. :func:`read_table` checks a parsed TOML table against the
declaration and returns the checked values; every message names the file, the
section, the key and the bad value, and says how to fix it. Unknown keys and
unknown sections are named with one suggestion (:func:`did_you_mean`) and the
list of known names.

Types (``Key.kind``; a tuple accepts any of them, tried in order):

==================== ===================================================
``"str"``            a text in quotes; empty text refused unless ``empty``
``"bool"``           ``true`` or ``false`` (never the text "no", never 0/1)
``"int"``            a whole number (a boolean is not a number)
``"float"``          a number (a whole number is accepted); finite
``"list[str]"``      a list of texts (likewise ``list[int]``, ``list[float]``)
``"list[list[float]]"`` a matrix: a list of lists of numbers
``"table"``          a table, checked by ``Key.table`` when given
==================== ===================================================
"""

from __future__ import annotations

import difflib
import json
import math
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping

from cladewise.errors import InputError

__all__ = [
    "Key",
    "Table",
    "Where",
    "NO_DEFAULT",
    "did_you_mean",
    "toml_value",
    "read_toml",
    "check_sections",
    "read_table",
    "check_value",
    "section",
]


class _NoDefault:
    def __repr__(self) -> str:
        return "NO_DEFAULT"


#: marks a key without a default (the consumer's own default applies)
NO_DEFAULT: Any = _NoDefault()


@dataclass(frozen=True)
class Key:
    """The declaration of one key of a table.

    Parameters
    ----------
    kind : str or tuple of str
        Accepted TOML type(s), see the module docstring.
    help : str
        What the key means, in a few words (shown in messages).
    required : bool
        The key must be given.
    default : any
        Filled in by ``read_table(..., defaults=True)`` when the key is absent.
    min, max : float, optional
        Range of every number in the value; ``min_open``/``max_open`` exclude the bound.
    choices : tuple of str
        Allowed texts.
    path : bool
        The text(s) name a file, resolved relative to the file's folder and checked
        to exist; the value returned is the resolved :class:`~pathlib.Path`.
    empty : bool
        Allow an empty text or an empty list.
    sizes : tuple of int
        Allowed lengths of a list.
    unique : bool
        A list may not hold the same entry twice.
    table : Table, optional
        Declaration of a sub-table (kind ``"table"``).
    convert : callable, optional
        Last step: takes the checked value and returns the value to keep; it may
        raise :class:`InputError`, whose message is prefixed with the location.
    example : str
        A TOML value shown in messages, e.g. ``'4'`` or ``'"nutpie"'``.
    """

    kind: str | tuple[str, ...]
    help: str = ""
    required: bool = False
    default: Any = NO_DEFAULT
    min: float | None = None
    max: float | None = None
    min_open: bool = False
    max_open: bool = False
    choices: tuple[str, ...] = ()
    path: bool = False
    empty: bool = False
    sizes: tuple[int, ...] = ()
    unique: bool = False
    table: "Table | None" = None
    convert: Callable[[Any], Any] | None = None
    example: str = ""

    @property
    def kinds(self) -> tuple[str, ...]:
        return (self.kind,) if isinstance(self.kind, str) else tuple(self.kind)


@dataclass(frozen=True)
class Table:
    """The declaration of one table: its name, keys and what it is for.

    ``ignored`` names keys that another command reads: they are accepted and not
    checked. ``any_key`` declares the value of every key of a table whose key names
    are the user's (e.g. species names).
    """

    name: str
    keys: Mapping[str, Key] = field(default_factory=dict)
    help: str = ""
    ignored: frozenset[str] = frozenset()
    any_key: Key | None = None

    def only(self, *names: str, required: Iterable[str] = ()) -> "Table":
        """This table reading only ``names`` (other keys accepted unchecked)."""
        req = set(required)
        keys = {k: (replace(v, required=True) if k in req else v) for k, v in self.keys.items() if k in names}
        return replace(self, keys=keys, ignored=self.ignored | (set(self.keys) - set(names)))

    def without(self, *names: str) -> "Table":
        """This table without the keys ``names`` (they become unknown)."""
        return replace(self, keys={k: v for k, v in self.keys.items() if k not in names})

    def defaults(self) -> dict[str, Any]:
        """The declared defaults."""
        return {k: v.default for k, v in self.keys.items() if v.default is not NO_DEFAULT}


@dataclass(frozen=True)
class Where:
    """Where a table sits: the file (for messages and relative paths) and its label.

    ``label`` is how the table is written in the file, e.g. ``"[sampling]"`` or
    ``"[[fit]] number 2"``.
    """

    file: str | Path | None = None
    label: str = ""

    @property
    def base(self) -> Path:
        return Path(self.file).resolve().parent if self.file is not None else Path.cwd()

    def prefix(self) -> str:
        return f"{self.file}: " if self.file is not None else ""

    def at(self, key: str) -> str:
        return f"{self.prefix()}{self.label} {key}".strip()

    def sub(self, key: str) -> "Where":
        lab = self.label
        if lab.startswith("[") and lab.endswith("]") and not lab.startswith("[["):
            return Where(self.file, f"[{lab[1:-1]}.{key}]")
        return Where(self.file, f"{lab} {key}".strip())


# ------------------------------------------------------------------- words
def did_you_mean(word: str, options: Iterable[str], fmt: str = "'{}'") -> str:
    """``" (did you mean 'x'?)"`` for the closest of ``options``, or ``""``.

    A match that differs only in case, dashes or spaces wins; otherwise difflib's
    closest match with a ratio of at least 0.6.
    """
    opts = [str(o) for o in options]

    def norm(s: str) -> str:
        return s.lower().replace("-", "_").replace(" ", "_")

    same = [o for o in opts if norm(o) == norm(str(word))]
    close = same or difflib.get_close_matches(str(word), opts, n=1, cutoff=0.6)
    if not close:
        close = difflib.get_close_matches(norm(str(word)), [norm(o) for o in opts], n=1, cutoff=0.6)
        close = [opts[[norm(o) for o in opts].index(close[0])]] if close else []
    return f" (did you mean {fmt.format(close[0])}?)" if close else ""


def toml_value(v: Any, limit: int = 80) -> str:
    """A value written as in a TOML file (``true``, ``"text"``, ``[1, 2]``, ``{ a = 1 }``)."""
    if isinstance(v, bool):
        out = "true" if v else "false"
    elif isinstance(v, str):
        out = json.dumps(v, ensure_ascii=False)
    elif isinstance(v, float):
        out = "nan" if math.isnan(v) else ("inf" if v == math.inf else "-inf" if v == -math.inf else repr(v))
    elif isinstance(v, Path):
        out = json.dumps(str(v), ensure_ascii=False)
    elif isinstance(v, (list, tuple)):
        out = "[" + ", ".join(toml_value(x, limit) for x in v) + "]"
    elif isinstance(v, dict):
        out = "{ " + ", ".join(f"{k} = {toml_value(x, limit)}" for k, x in v.items()) + " }" if v else "{}"
    else:
        out = str(v)
    return out if len(out) <= limit else out[: limit - 3] + "..."


_NOUN = {
    "str": "a text in quotes",
    "bool": "true or false (without quotes)",
    "int": "a whole number",
    "float": "a number",
    "list[str]": "a list of texts, e.g. [\"a\", \"b\"]",
    "list[int]": "a list of whole numbers",
    "list[float]": "a list of numbers",
    "list[list[float]]": "a matrix (a list of lists of numbers)",
    "table": "a table",
}


def _what(v: Any) -> str:
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, str):
        return "a text"
    if isinstance(v, int):
        return "a whole number"
    if isinstance(v, float):
        return "a number"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, dict):
        return "a table"
    return f"a {type(v).__name__}"


def _matches(kind: str, v: Any) -> bool:
    if kind == "str":
        return isinstance(v, str)
    if kind == "bool":
        return isinstance(v, bool)
    if kind == "int":
        return isinstance(v, int) and not isinstance(v, bool)
    if kind == "float":
        return isinstance(v, (int, float)) and not isinstance(v, bool)
    if kind == "table":
        return isinstance(v, dict)
    if kind.startswith("list[") and kind.endswith("]"):
        return isinstance(v, list) and all(_matches(kind[5:-1], x) for x in v)
    raise ValueError(f"unknown key kind {kind!r}")  # a bug in a declaration


def _type_hint(name: str, key: Key, v: Any, where: "Where") -> str:
    kinds = key.kinds
    if "bool" in kinds and isinstance(v, (str, int)) and not isinstance(v, bool):
        word = str(v).strip().lower()
        truth = {"true": "true", "yes": "true", "on": "true", "1": "true",
                 "false": "false", "no": "false", "off": "false", "0": "false"}.get(word)
        if truth:
            return f"Write {name} = {truth} (a TOML boolean, without quotes)."
        return f"Write {name} = true or {name} = false."
    if isinstance(v, str) and any(k in kinds for k in ("int", "float")):
        try:
            num = float(v)
        except ValueError:
            num = None
        if num is not None and (("float" in kinds) or num == int(num)):
            return f"Write the number without quotes: {name} = {v.strip()}."
    if isinstance(v, float) and "int" in kinds and v == int(v) and not any(k in kinds for k in ("float",)):
        return f"Write a whole number: {name} = {int(v)}."
    if any(k.startswith("list[") for k in kinds) and not isinstance(v, list) and not isinstance(v, dict):
        return f"Write it as a list, e.g. {name} = [{toml_value(v)}]."
    if "table" in kinds:
        return (f"Write it as a table: a section {where.sub(name).label} with one key per line, or "
                f"{name} = {{ key = value }}.")
    if key.example:
        return f"For example: {name} = {key.example}."
    return ""


def _range_text(key: Key) -> str:
    lo, hi = key.min, key.max
    if lo is not None and hi is not None:
        return (f"between {lo:g} ({'excluded' if key.min_open else 'included'}) and "
                f"{hi:g} ({'excluded' if key.max_open else 'included'})")
    if lo is not None:
        return f"{'>' if key.min_open else '>='} {lo:g}"
    if hi is not None:
        return f"{'<' if key.max_open else '<='} {hi:g}"
    return ""


def _numbers(v: Any) -> list[float]:
    if isinstance(v, list):
        return [x for item in v for x in _numbers(item)]
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        return [v]
    return []


def _help(key: Key, name: str = "") -> str:
    if not key.help:
        return ""
    return f" ({name}: {key.help})" if name else f" ({key.help})"


# ------------------------------------------------------------------- reading
def read_toml(path: str | Path, what: str = "spec file") -> tuple[dict[str, Any], str]:
    """Parse a TOML file; returns the document and its text.

    Raises
    ------
    InputError
        The file is missing, a folder, unreadable, not UTF-8 or not valid TOML.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{what} not found: {p} (looked for {p.resolve()}). Check the path.") from None
    except IsADirectoryError:
        raise InputError(f"{what} {p} is a folder; give the TOML file inside it.") from None
    except UnicodeDecodeError:
        raise InputError(f"{what} {p} is not UTF-8 text; save it as UTF-8 (plain text).") from None
    except OSError as exc:
        raise InputError(f"cannot read {what} {p}: {exc.strerror or exc}. Check its permissions.") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{p}: not valid TOML: {exc}. Fix the syntax at that place.") from None
    return doc, text


def check_sections(doc: Mapping[str, Any], known: Mapping[str, str], file: str | Path | None = None) -> None:
    """Refuse top-level names of ``doc`` that are not in ``known`` (name -> purpose)."""
    pre = f"{file}: " if file is not None else ""
    listing = "; ".join(f"[{k}] {v}" if v else f"[{k}]" for k, v in known.items())
    for name, value in doc.items():
        if name in known:
            continue
        kind = "section" if isinstance(value, dict) else "top-level key"
        raise InputError(
            f"{pre}unknown {kind} [{name}]{did_you_mean(name, known, '[{}]')}. Sections read here: "
            f"{listing}. Fix the spelling or remove it."
        )


def section(doc: Mapping[str, Any], name: str, file: str | Path | None = None, *, required: str = "") -> dict[str, Any] | None:
    """The top-level table ``name`` of ``doc`` (None when absent).

    ``required``, when given, is the advice shown when the table is absent.
    """
    pre = f"{file}: " if file is not None else ""
    if name not in doc:
        if required:
            raise InputError(f"{pre}no [{name}] section. {required}")
        return None
    value = doc[name]
    if not isinstance(value, dict):
        raise InputError(
            f"{pre}[{name}] must be a table (a section: a line [{name}] with one key per line below it), "
            f"not {_what(value)} ({name} = {toml_value(value)}). Move its keys under a line [{name}]."
        )
    return value


def read_table(
    value: Any,
    table: Table,
    where: Where | None = None,
    *,
    defaults: bool = False,
) -> dict[str, Any]:
    """Check a parsed TOML table against its declaration.

    Parameters
    ----------
    value : dict
        The table as parsed by :mod:`tomllib` (or given from Python).
    table : Table
        The declaration.
    where : Where, optional
        File and label for messages and relative paths; default: the table's name.
    defaults : bool
        Fill declared defaults for absent keys.

    Returns
    -------
    dict
        The checked (and converted) values of the declared keys that were given,
        plus defaults when asked; ignored keys and ``None`` values (possible only
        from Python) are left out.
    """
    where = where or Where(None, f"[{table.name}]")
    if not isinstance(value, dict):
        raise InputError(
            f"{where.prefix()}{where.label} must be a table, not {_what(value)} ({toml_value(value)}). "
            "Write it as a section with one key per line, or inline as { key = value, ... }."
        )
    out: dict[str, Any] = {}
    missing: list[_MissingFile] = []
    for name, v in value.items():
        if v is None:  # only from Python (TOML has no null): the same as not given
            continue
        key = table.keys.get(name)
        if key is None and name in table.ignored:
            continue
        if key is None and table.any_key is not None:
            key = table.any_key
        if key is None:
            known = list(table.keys)
            raise InputError(
                f"{where.prefix()}unknown key '{name}' in {where.label}{did_you_mean(name, known)}. "
                f"Known keys: {', '.join(known) or '(none)'}. Fix the spelling or remove the key."
            )
        try:
            out[name] = check_value(name, v, key, where)
        except _MissingFile as exc:
            missing.append(exc)  # named together with any other missing file
    if missing:
        raise InputError(_missing_message(missing))
    for name, key in table.keys.items():
        if name in out:
            continue
        if key.required:
            ex = f" = {key.example}" if key.example else " = ..."
            raise InputError(
                f"{where.prefix()}{where.label} needs {name}{ex}: add that line with your value.{_help(key, name)}"
            )
        if defaults and key.default is not NO_DEFAULT:
            out[name] = key.default
    return out


def check_value(name: str, v: Any, key: Key, where: Where) -> Any:
    """Check one value against its declaration; returns the value to keep."""
    loc = f"{where.at(name)} = {toml_value(v)}"
    kind = next((k for k in key.kinds if _matches(k, v)), None)
    if kind is None:
        want = " or ".join(_NOUN[k] for k in key.kinds)
        hint = _type_hint(name, key, v, where)
        raise InputError(f"{loc}: must be {want}, not {_what(v)}.{' ' + hint if hint else ''}{_help(key, name)}")
    nums = _numbers(v)
    if any(isinstance(x, float) and not math.isfinite(x) for x in nums):
        raise InputError(f"{loc}: must be a finite number, not nan or inf.{_help(key, name)}")
    rng = _range_text(key)
    if rng:
        for x in nums:
            bad = ((key.min is not None and (x < key.min or (key.min_open and x == key.min)))
                   or (key.max is not None and (x > key.max or (key.max_open and x == key.max))))
            if bad:
                each = "every number " if isinstance(v, list) else ""
                raise InputError(f"{loc}: {each}must be {rng}. Give a value in that range.{_help(key, name)}")
    if kind == "str":
        if not key.empty and not v.strip():
            ex = f" e.g. {name} = {key.example}," if key.example else ""
            raise InputError(f"{loc}: an empty text makes no sense here. Give a value,{ex} or remove the line."
                             f"{_help(key, name)}")
        if key.choices and v not in key.choices:
            raise InputError(
                f"{loc}: not a known choice{did_you_mean(v, key.choices, chr(34) + '{}' + chr(34))}. "
                f"Choose one of: {', '.join(key.choices)}."
            )
    if kind.startswith("list["):
        if not v and not key.empty:
            raise InputError(f"{loc}: the list is empty. Give at least one entry.{_help(key, name)}")
        if key.sizes and len(v) not in key.sizes:
            n = " or ".join(str(s) for s in key.sizes)
            raise InputError(f"{loc}: must hold {n} entr{'y' if key.sizes == (1,) else 'ies'}, not {len(v)}."
                             f"{_help(key, name)}")
        if kind == "list[str]":
            if not key.empty and any(not s.strip() for s in v):
                raise InputError(f"{loc}: holds an empty text; remove it or give the name.")
            if key.choices:
                for s in v:
                    if s not in key.choices:
                        raise InputError(f"{loc}: '{s}' is not a known choice{did_you_mean(s, key.choices)}. "
                                         f"Choose from: {', '.join(key.choices)}.")
        if kind == "list[list[float]]" and len({len(row) for row in v}) > 1:
            raise InputError(f"{loc}: the rows of a matrix must all have the same length.{_help(key, name)}")
        if key.unique:
            seen = [x for i, x in enumerate(v) if x in v[:i]]
            if seen:
                raise InputError(f"{loc}: lists {toml_value(seen[0])} twice; give each entry once.")
    if kind == "table" and key.table is not None:
        v = read_table(v, key.table, where.sub(name))
    if key.path:
        v = _resolve(name, v, key, where)
    if key.convert is not None:
        try:
            v = key.convert(v)
        except InputError as exc:
            raise InputError(f"{loc}: {exc}") from None
    return v


class _MissingFile(InputError):
    """One named file that does not exist (read_table reports all of them at once)."""

    def __init__(self, name: str, value: Any, looked: Path, where: Where) -> None:
        self.name, self.value, self.looked, self.where = name, value, looked, where
        super().__init__(_missing_message([self]))


def _missing_message(missing: list[_MissingFile]) -> str:
    where = missing[0].where
    each = ", and ".join(f"{m.name} = {toml_value(m.value)} does not exist (looked for {m.looked})"
                         for m in missing)
    many = len(missing) > 1
    return (
        f"{where.prefix()}{where.label} {each}. Paths in "
        f"{Path(where.file).name if where.file else 'the file'} are relative to the folder of that file "
        f"({where.base}), not to the current folder. Fix the path{'s' if many else ''} or move the "
        f"file{'s' if many else ''}."
    )


def _resolve(name: str, v: Any, key: Key, where: Where) -> Any:
    if isinstance(v, list):
        return [_resolve(name, x, key, where) for x in v]
    p = (where.base / v).resolve()
    if not p.exists():
        raise _MissingFile(name, v, p, where)
    if not p.is_file():
        raise InputError(f"{where.at(name)} = {toml_value(v)}: {p} is a folder, not a file. Name the file inside it.")
    return p
