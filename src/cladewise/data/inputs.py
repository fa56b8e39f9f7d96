"""Python objects as inputs: a pandas DataFrame as a trait table, a Newick string or a
read tree as the tree.

A DataFrame is turned into the same text-cell :class:`~cladewise.data.tables.Table`
a file gives, so it passes through the one trait reader
(:func:`cladewise.data.traits.read_traits`) with every check of a file: numbers
are written with ``repr`` (which reads back to the same float), missing values
become empty cells. Messages then name the DataFrame's rows (position, from 0)
instead of file lines.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from cladewise.data.tables import MISSING, Table
from cladewise.data.trees import FlatTree
from cladewise.errors import InputError

__all__ = ["FRAME_SOURCE", "table_from_frame", "trees_from", "frame_messages"]

#: how a DataFrame is named in messages and in the data summary
FRAME_SOURCE = "the trait DataFrame"


def _cell(v: Any) -> str | None:
    if v is None or (not isinstance(v, str) and pd.isna(v)):
        return None
    if isinstance(v, (bool, np.bool_)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return repr(float(v))
    s = str(v).strip()
    return None if s in MISSING else s


def table_from_frame(df: Any, species: str = "species") -> Table:
    """A DataFrame as a table of text cells (see the module docstring).

    The species may be a column or the index (named ``species`` or unnamed).

    Raises
    ------
    InputError
        Not a DataFrame, no rows, duplicate or non-text column names.
    """
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"the trait table must be a pandas DataFrame or a file path; got {type(df).__name__}.")
    if species not in df.columns and (df.index.name == species or
                                      (df.index.name is None and not isinstance(df.index, pd.RangeIndex))):
        df = df.rename_axis(species).reset_index()
    cols = [str(c).strip() for c in df.columns]
    dup = sorted({c for c in cols if cols.count(c) > 1})
    if dup:
        raise InputError(f"{FRAME_SOURCE} has the column name(s) {', '.join(map(repr, dup))} more than once; "
                         "column names must be unique.")
    if len(df) == 0:
        raise InputError(f"{FRAME_SOURCE} has no rows.")
    cells = {c: [_cell(v) for v in df.iloc[:, j].tolist()] for j, c in enumerate(cols)}
    return Table(FRAME_SOURCE, cols, cells, list(range(len(df))), ",", True, [])


def frame_messages(exc: InputError) -> InputError:
    """The reader's message with file lines named as DataFrame rows."""
    text = re.sub(r"\blines (\d+(?:, \d+)*)", r"rows \1", str(exc))
    text = re.sub(r"\bline (\d+)", r"row \1", text)
    text = text.replace("with `species` in the [data] section of the spec", "with the species argument")
    return InputError(text)


def _looks_like_newick(text: str) -> bool:
    t = text.strip()
    return t.endswith(";") or t.startswith("(")


def trees_from(tree: Any) -> tuple[list[FlatTree], str]:
    """Trees from a file path, a Newick string, a :class:`FlatTree` or a list of them.

    Returns
    -------
    (trees, source)
        The trees and how to name them in messages.

    Raises
    ------
    InputError
        A path that does not exist and is not Newick text, Newick that does not parse,
        an object that is not a tree.
    """
    from cladewise.data.treefiles import parse_newick, read_trees

    if isinstance(tree, FlatTree):
        return [tree], "the tree given"
    if isinstance(tree, (list, tuple)) and tree and all(isinstance(t, FlatTree) for t in tree):
        return list(tree), "the trees given"
    if isinstance(tree, Path):  # a spec's file: the file reader's own messages
        return read_trees(tree), str(tree)
    if isinstance(tree, str) and not _looks_like_newick(tree):
        p = Path(tree).expanduser()
        if not p.is_file():
            raise InputError(
                f"tree {str(tree)[:80]!r} is neither a file that exists nor Newick text (Newick starts with "
                "'(' and ends with ';'). Give a path to a Newick or NEXUS file, a Newick string, or a tree "
                "read with cladewise.data.treefiles.read_tree."
            )
        return read_trees(p), str(tree)
    if isinstance(tree, str):
        return [parse_newick(tree, "the Newick string")], "the Newick string"
    raise InputError(
        f"tree must be a file path, a Newick string or a FlatTree; got {type(tree).__name__}."
    )
