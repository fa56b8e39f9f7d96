"""Reading the user's text files (tables, trees) as UTF-8, or saying why not.

A codec error names a byte offset and an encoding most users have never heard of;
what they need is the kind of file they gave and how to save it so that it reads.
"""

from __future__ import annotations

from pathlib import Path

from cladewise.errors import InputError

__all__ = ["read_text"]

_SAVE_UTF8 = (
    "Save it as UTF-8 text (in a spreadsheet: 'CSV UTF-8'; in a text editor: "
    "encoding UTF-8) and try again."
)

# Byte-order marks of encodings other than UTF-8 (UTF-32 before UTF-16: they share a prefix).
_BOMS = (
    (b"\xff\xfe\x00\x00", "UTF-32"),
    (b"\x00\x00\xfe\xff", "UTF-32"),
    (b"\xff\xfe", "UTF-16"),
    (b"\xfe\xff", "UTF-16"),
)

# Signatures of binary formats users hand over instead of text.
_BINARY = (
    (b"PK\x03\x04", "a zip archive (an .xlsx or .ods spreadsheet?)"),
    (b"\xd0\xcf\x11\xe0", "an old Excel (.xls) or Word file"),
    (b"%PDF", "a PDF document"),
    (b"\x1f\x8b", "a gzip-compressed file"),
)


def read_text(path: str | Path, what: str) -> str:
    """The text of a UTF-8 file (a UTF-8 byte-order mark is accepted and removed).

    Parameters
    ----------
    path : str or Path
        The file.
    what : str
        What the file is, for messages ("trait table", "tree file").

    Raises
    ------
    InputError
        Missing or unreadable file, a file in another encoding (UTF-16, Latin-1,
        ...) or a binary file, each with what to do.
    """
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise InputError(f"{what} not found: {path}. Check the path.") from None
    except IsADirectoryError:
        raise InputError(f"{what} {path} is a folder, not a file. Give the file's path.") from None
    except OSError as exc:
        raise InputError(f"cannot read {what} {path}: {exc.strerror or exc}. Check the file's permissions.") from None
    for bom, name in _BOMS:
        if data.startswith(bom):
            raise InputError(f"{path}: the {what} is saved as {name} text, not UTF-8. {_SAVE_UTF8}")
    for magic, name in _BINARY:
        if data.startswith(magic):
            raise InputError(
                f"{path}: the {what} is {name}, not a text file. Export it as text "
                f"(CSV/TSV for a table, Newick/NEXUS for a tree) in UTF-8."
            )
    head = data[:4096]
    if b"\x00" in head:
        # UTF-16 without a byte-order mark puts a zero byte beside every ASCII letter
        if head[1::2].count(0) > 0.4 * len(head[1::2]) or head[0::2].count(0) > 0.4 * len(head[0::2]):
            raise InputError(f"{path}: the {what} looks like UTF-16 text, not UTF-8. {_SAVE_UTF8}")
        raise InputError(f"{path}: the {what} holds binary data, not text. Give a text file saved as UTF-8.")
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        before = data[: exc.start]
        line = before.count(b"\n") + 1
        col = exc.start - (before.rfind(b"\n") + 1) + 1
        ctrl = sum(1 for b in head if b < 32 and b not in (9, 10, 12, 13))
        if ctrl > 0.05 * max(len(head), 1):
            raise InputError(
                f"{path}: the {what} holds binary data, not text. Give a text file saved as UTF-8."
            ) from None
        raise InputError(
            f"{path}: the {what} is not UTF-8 text: byte 0x{data[exc.start]:02X} at line {line}, "
            f"column {col} (a file saved in another encoding, such as Latin-1 or Windows-1252). "
            f"{_SAVE_UTF8}"
        ) from None
