"""Bad and unusual trait tables: each is read correctly or stops with a message
that names the cause, the place and the fix.

References: tables that are read are compared with pandas.read_csv given the
dialect explicitly (separator, decimal mark, encoding), an independent reader;
the messages are the project's own contract (issue "never analyse wrong data
silently"). Encodings are produced with Python's codecs (UTF-16 with byte-order
mark, Latin-1), as a spreadsheet or an old editor would save them.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest

from cladewise.data.matching import match_names
from cladewise.data.summary import summarise_data
from cladewise.data.tables import parse_separator
from cladewise.data.traits import read_species_table, read_specimen_table, read_traits
from cladewise.data.treefiles import parse_newick
from cladewise.errors import InputError

SEMICOLON_DECIMAL_COMMA = "species;mass;mass_se;length\nA;2,5;0,1;10\nB;3,75;0,2;12,5\nC;1,25;;9\n"


def _write(tmp_path, name: str, content: str | bytes):
    path = tmp_path / name
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content, encoding="utf-8")
    return path


def _error(path, **kwargs) -> str:
    with pytest.raises(InputError) as err:
        read_traits(path, **kwargs)
    return str(err.value)


def _assert_words(message: str, words) -> None:
    for w in words:
        assert w in message, f"{w!r} not in: {message}"


# ------------------------------------------------------------- rejected tables
@pytest.mark.parametrize(
    "name, text, words",
    [
        # decimal commas inside quotes in a comma file: the cell is read whole
        (
            "quoted_decimal_comma.csv",
            'species,mass,mass_se\nA,"2,5",0.1\nB,"3,5",0.2\n',
            ["column 'mass'", "line 2", "'2,5'", "decimal comma", 'decimal = ","'],
        ),
        # decimal commas in a semicolon file (the usual European export)
        (
            "semicolon_decimal_comma.csv",
            SEMICOLON_DECIMAL_COMMA,
            ["column 'mass'", "line 2", "species 'A'", "'2,5'", "decimal comma", 'decimal = ","'],
        ),
        # unquoted decimal commas in a comma file: rows have too many cells
        (
            "unquoted_decimal_comma.csv",
            "species,mass\nA,2,5\nB,3,5\n",
            ["line 2", "3 cells where the header has 2", "decimal comma", "decimal points"],
        ),
        # thousands separators, quoted and unquoted
        (
            "thousands.csv",
            'species,mass\nA,12.5\nB,"1,037.5"\n',
            ["column 'mass'", "line 3", "'1,037.5'", "thousands separators", "1037.5"],
        ),
        (
            "thousands_unquoted.csv",
            "species,mass\nA,12.5\nB,1,037.5\n",
            ["line 3", "3 cells where the header has 2", "thousands separators"],
        ),
        # a comma that may be either
        (
            "ambiguous_comma.csv",
            'species,mass\nA,"1,037"\nB,2\n',
            ["'1,037'", "thousands separator", "decimal comma"],
        ),
        # a text cell in a number column
        (
            "text_cell.csv",
            "species,mass\nA,1.5\nB,2\nC,heavy\n",
            ["column 'mass'", "line 4", "species 'C'", "'heavy'", "non-numeric", "leave the cell empty"],
        ),
        # units written in the cells
        (
            "units.csv",
            "species,mass\nA,12 g\nB,13 g\n",
            ["column 'mass'", "line 2", "'12 g'", "not a plain number", "units"],
        ),
        # a trait column of text only, whose _se column would otherwise become the trait
        (
            "text_trait_with_se.csv",
            "species,mass,mass_se\nA,heavy,0.1\nB,light,0.2\n",
            ["column 'mass'", "'heavy'", "'mass_se' refers to it as a trait"],
        ),
        # duplicate column names (pandas would rename the second 'mass.1')
        (
            "duplicate.csv",
            "species,mass,length,mass\nA,1,2,3\nB,4,5,6\n",
            ["line 1", "'mass' appears more than once", "columns 2 and 4", "rename or remove"],
        ),
        # a header name missing in the middle
        ("unnamed.csv", "species,,mass\nA,1,2\nB,3,4\n", ["column 2 of the header has no name"]),
        # one row short
        (
            "short_row.csv",
            "species,mass,length\nA,1,2\nB,3\n",
            ["line 3", "2 cells where the header has 3", "double quotes"],
        ),
        # a trailing comma on one row only
        ("one_trailing.csv", "species,mass\nA,1\nB,3,\n", ["line 3", "ends with an extra comma"]),
        # one column only
        ("one_column.csv", "species mass\nA 1\nB 3\n", ["single column", "commas, semicolons or tabs"]),
        # infinite value
        ("infinite.csv", "species,mass\nA,1\nB,inf\n", ["infinite", "line 3"]),
    ],
)
def test_bad_table_stops_with_place_and_fix(tmp_path, name, text, words):
    message = _error(_write(tmp_path, name, text))
    _assert_words(message, [name, *words])


def test_text_trait_does_not_promote_its_se_column(tmp_path):
    # Before: 'mass' was set aside as text and 'mass_se' analysed as a trait.
    path = _write(tmp_path, "t.csv", "species,mass,mass_se\nA,2.5 g,0.1\nB,3 g,0.2\n")
    assert "column 'mass'" in _error(path)


def test_decimal_comma_needs_non_comma_separator(tmp_path):
    path = _write(tmp_path, "c.csv", 'species,mass\nA,"2,5"\nB,"3,5"\n')
    _assert_words(_error(path, decimal=","), ['decimal = ","', "semicolons or tabs", "comma-separated"])


def test_decimal_point_in_decimal_comma_table(tmp_path):
    path = _write(tmp_path, "m.csv", "species;mass\nA;2,5\nB;3.5\n")
    _assert_words(_error(path, decimal=","), ["line 3", "'3.5'", "one decimal mark"])


def test_stated_separator_that_does_not_split_the_header(tmp_path):
    path = _write(tmp_path, "s.csv", "species;mass\nA;1\nB;2\n")
    _assert_words(_error(path, separator=","), ["single column", 'separator = "semicolon"'])


def test_unknown_separator_word():
    with pytest.raises(InputError, match="not supported"):
        parse_separator("pipe")
    assert parse_separator("tab") == "\t" and parse_separator("auto") is None


@pytest.mark.parametrize(
    "name, content, words",
    [
        ("utf16.csv", "species,mass\nAé,1\nB,2\n".encode("utf-16"), ["UTF-16", "Save it as UTF-8"]),
        ("utf16le.csv", "species,mass\nA,1\nB,2\n".encode("utf-16-le"), ["UTF-16", "Save it as UTF-8"]),
        (
            "latin1.csv",
            "species,mass\nAbc,1\nBéa,2\n".encode("latin-1"),
            ["not UTF-8", "byte 0xE9", "line 3", "Latin-1", "Save it as UTF-8"],
        ),
        ("binary.csv", bytes(range(256)) * 8, ["binary data", "UTF-8"]),
        ("book.csv", b"PK\x03\x04" + bytes(64), ["zip archive", ".xlsx", "Export it as text"]),
    ],
)
def test_other_encodings_and_binary(tmp_path, name, content, words):
    message = _error(_write(tmp_path, name, content))
    _assert_words(message, [name, *words])
    assert "codec" not in message


@pytest.mark.parametrize(
    "text, kwargs, words",
    [
        ("species,mass\nA,1e200\nB,3\n", {}, ["1e+200", "line 2", "too large", "Rescale"]),
        ("species,mass\nA,1e-300\nB,3\n", {}, ["1e-300", "too small", "Rescale"]),
        ("species,mass,mass_se\nA,1,1e150\nB,3,1\n", {}, ["'mass_se'", "too large"]),
    ],
)
def test_values_out_of_computable_range(tmp_path, text, kwargs, words):
    _assert_words(_error(_write(tmp_path, "v.csv", text), **kwargs), words)


def test_huge_values_accepted_when_logged(tmp_path):
    path = _write(tmp_path, "v.csv", "species,mass\nA,1e200\nB,3\n")
    td = read_traits(path, log=["mass"])
    np.testing.assert_allclose(td.column("mass"), np.log([1e200, 3.0]))  # numpy log as reference


# ----------------------------------------------------------- tables read right
def _pandas(text: str, **kw) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text), **kw)


def test_semicolon_decimal_comma_read_with_option(tmp_path):
    path = _write(tmp_path, "eu.csv", SEMICOLON_DECIMAL_COMMA)
    td = read_species_table(path, decimal=",")
    ref = _pandas(SEMICOLON_DECIMAL_COMMA, sep=";", decimal=",")  # pandas, dialect stated
    assert td.traits == ["mass", "length"]
    np.testing.assert_allclose(td.mean, ref[["mass", "length"]].to_numpy())
    np.testing.assert_allclose(td.se[:, 0], ref["mass_se"].to_numpy())
    assert (td.separator, td.separator_stated, td.decimal, td.n_rows) == (";", False, ",", 3)
    assert any("separated by semicolons" in n for n in td.notes)


@pytest.mark.parametrize(
    "name, text, sep, note",
    [
        ("tabs.csv", "species\tmass\tlength\nA\t1.5\t2\nB\t2.5\t3\n", "\t", "separated by tabs"),
        ("semi.csv", "species;mass;length\nA;1.5;2\nB;2.5;3\n", ";", "separated by semicolons"),
        ("semi.txt", "species;mass;length\nA;1.5;2\nB;2.5;3\n", ";", None),
        ("commas.tsv", "species,mass,length\nA,1.5,2\nB,2.5,3\n", ",", "separated by commas"),
    ],
)
def test_separator_detected_and_reported(tmp_path, name, text, sep, note):
    td = read_traits(_write(tmp_path, name, text))
    ref = _pandas(text, sep=sep)
    np.testing.assert_allclose(td.mean, ref[["mass", "length"]].to_numpy())
    assert td.separator == sep and not td.separator_stated
    assert (any(note in n for n in td.notes)) if note else td.notes == ()


def test_separator_stated(tmp_path):
    text = "species;mass\nA;1.5\nB;2.5\n"
    td = read_traits(_write(tmp_path, "s.txt", text), separator="semicolon")
    assert td.separator == ";" and td.separator_stated
    np.testing.assert_allclose(td.column("mass"), _pandas(text, sep=";")["mass"])


def test_trailing_comma_on_every_row(tmp_path):
    text = "species,mass,length,\nA,1.5,2,\nB,2.5,3,\n"
    td = read_traits(_write(tmp_path, "t.csv", text))
    ref = _pandas(text, usecols=[0, 1, 2])
    assert td.traits == ["mass", "length"]
    np.testing.assert_allclose(td.mean, ref[["mass", "length"]].to_numpy())
    assert any("ends with a comma" in n for n in td.notes)
    # without the comma on the header line
    td2 = read_traits(_write(tmp_path, "t2.csv", "species,mass\nA,1.5,\nB,2.5,\n"))
    assert td2.column("mass").tolist() == [1.5, 2.5] and td2.notes


def test_utf8_bom_accepted(tmp_path):
    text = "species,mass\nÅa,1.5\nB,2.5\n"
    path = tmp_path / "bom.csv"
    path.write_bytes(text.encode("utf-8-sig"))
    td = read_traits(path)
    ref = pd.read_csv(path, encoding="utf-8-sig")
    assert td.species == list(ref["species"]) and td.traits == ["mass"]


def test_quoted_cells_and_line_numbers_with_comments_and_blank_lines(tmp_path):
    text = '# invented\n\nspecies,mass,note\n"Aus bus",1.5,"big, dark"\n\nB,x,\n'
    message = _error(_write(tmp_path, "q.csv", text))
    _assert_words(message, ["line 6", "'x'"])  # blank line 5 counted
    td = read_traits(_write(tmp_path, "ok.csv", text.replace(",x,", ",2,")))
    assert td.species == ["Aus bus", "B"] and td.extra["note"].tolist() == ["big, dark", None]


def test_text_column_named_as_trait_is_explained(tmp_path):
    td = read_traits(_write(tmp_path, "f.csv", "species,family,mass\nA,Muridae,1\nB,Soricidae,2\n"))
    with pytest.raises(InputError, match="'family'.*holds text.*'Muridae'"):
        td.index("family")


def test_specimen_table_decimal_comma(tmp_path):
    text = "species\tmass\nA\t1,5\nA\t2,5\nB\t3\n"
    td = read_specimen_table(_write(tmp_path, "s.tsv", text), decimal=",")
    ref = _pandas(text, sep="\t", decimal=",").groupby("species")["mass"].mean()
    np.testing.assert_allclose(td.column("mass"), ref.loc[td.species].to_numpy())
    assert td.n_rows == 3
    with pytest.raises(InputError, match="decimal comma"):
        read_specimen_table(_write(tmp_path, "s2.tsv", text))


def test_summary_reports_separator_and_rows(tmp_path):
    td = read_traits(_write(tmp_path, "s.csv", "species\tmass\nA\t1\nB\t2\nC\t4\n"))
    tree = parse_newick("((A:1,B:1):1,C:2);")
    summary = summarise_data(match_names(tree, td))
    text = summary.to_text()
    _assert_words(text, ["3 rows read", "separated by tabs (detected)", "decimal point"])
    assert "named .csv but its columns are separated by tabs" in text
    assert summary.to_dict()["separator"] == "tab" and summary.to_dict()["n_rows"] == 3


def test_spreadsheet_separator_line(tmp_path):
    text = "sep=;\nspecies;mass\nA;1,5\nB;2\n"
    td = read_traits(_write(tmp_path, "x.csv", text), decimal=",")
    ref = _pandas(text, sep=";", decimal=",", skiprows=1)
    np.testing.assert_allclose(td.column("mass"), ref["mass"])
    assert td.separator == ";"
    _assert_words(_error(_write(tmp_path, "y.csv", text), separator="tab"), ["line 1", "sep=", "Remove one"])


def test_typographic_minus(tmp_path):
    message = _error(_write(tmp_path, "m.csv", "species,x\nA,1.5\nB,\u22122.5\n"))
    _assert_words(message, ["line 3", "'\u22122.5'", "typographic minus", "(-2.5)"])


def test_no_numeric_column_names_the_text_columns(tmp_path):
    message = _error(_write(tmp_path, "n.csv", "species,a\nA,one\nB,two\n"))
    _assert_words(message, ["no numeric trait columns", "'a'", "'one'", "line 2"])
