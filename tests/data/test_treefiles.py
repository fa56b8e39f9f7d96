"""Tree files: quoted names, NEXUS taxa and translate tables, printed precision,
scales no model can start from.

Reference: dendropy (Sukumaran & Holder 2010, Bioinformatics 26:1569-1571), an
independent reader of Newick and NEXUS, for names and root-to-tip distances.
The doubled apostrophe inside a quoted label is the Newick escape for one
apostrophe (Newick format description, J. Felsenstein's PHYLIP documentation, from
memory). Rounding to d decimals moves a number by at most half a unit of the last
place, so a sum of m rounded lengths is within m * 0.5 * 10^-d of the exact sum.
"""

from __future__ import annotations

import re
from pathlib import Path

import dendropy
import numpy as np
import pytest

from cladewise.data.matching import match_names
from cladewise.data.summary import summarise_data
from cladewise.data.traits import read_traits
from cladewise.data.treefiles import format_newick, read_tree, read_trees
from cladewise.data.trees import describe_tree, prune_to
from cladewise.errors import InputError
from treegen import random_tree


def _dendropy_tips(path: Path, schema: str) -> list[str]:
    t = dendropy.Tree.get(path=str(path), schema=schema, preserve_underscores=True)
    return [lf.taxon.label for lf in t.leaf_node_iter()]


def _dendropy_heights(text: str) -> dict[str, float]:
    t = dendropy.Tree.get(data=text, schema="newick", preserve_underscores=True)
    return {lf.taxon.label: lf.distance_from_root() for lf in t.leaf_node_iter()}


# --------------------------------------------------------------- quoted names
def test_doubled_apostrophe_in_newick_against_dendropy(tmp_path):
    path = tmp_path / "q.nwk"
    path.write_text("(('O''brieni':1,'Aus bus':1)'clade ''x''':1,C_d:2);\n")
    tree = read_tree(path)
    assert list(tree.tip_names) == _dendropy_tips(path, "newick")
    assert "O'brieni" in tree.tip_names
    assert tree.node_labels[0] == "clade 'x'"


def test_doubled_apostrophe_in_nexus_translate_against_dendropy(tmp_path):
    path = tmp_path / "q.nex"
    path.write_text(
        "#NEXUS\nbegin taxa;\n dimensions ntax=3;\n taxlabels 'O''brieni' Aus_bus C;\nend;\n"
        "begin trees;\n translate 1 'O''brieni', 2 Aus_bus, 3 C;\n tree t = ((1:1,2:1):1,3:2);\nend;\n"
    )
    tree = read_tree(path)
    assert list(tree.tip_names) == _dendropy_tips(path, "nexus")
    assert tree.tip_names[0] == "O'brieni"


def test_apostrophe_name_round_trip_read_by_dendropy(tmp_path):
    tree = read_tree(_write(tmp_path, "a.nwk", "(('O''brieni':1,B:1):1,C:2);"))
    path = _write(tmp_path, "b.nwk", format_newick(tree))
    assert _dendropy_tips(path, "newick") == list(tree.tip_names) == list(read_tree(path).tip_names)


def _write(tmp_path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


# ------------------------------------------------------------ NEXUS declarations
def test_nexus_tip_missing_from_taxa_block(tmp_path):
    path = _write(
        tmp_path,
        "m.nex",
        "#NEXUS\nbegin taxa;\n dimensions ntax=3;\n taxlabels A B C;\nend;\n"
        "begin trees;\n tree t1 = ((A:1,B:1):1,(Dx:1,Ey:1):1);\nend;\n",
    )
    # dendropy itself accepts the file and adds the undeclared names as new taxa
    assert set(_dendropy_tips(path, "nexus")) == {"A", "B", "Dx", "Ey"}
    with pytest.raises(InputError) as err:
        read_trees(path)
    for w in ("m.nex", "tree 1", "'Dx'", "'Ey'", "not in the TAXA block", "TAXLABELS"):
        assert w in str(err.value)


@pytest.mark.parametrize("taxa", ["", "begin taxa;\n dimensions ntax=3;\n taxlabels A B C;\nend;\n"])
def test_nexus_unknown_translate_key(tmp_path, taxa):
    path = _write(
        tmp_path,
        "t.nex",
        f"#NEXUS\n{taxa}begin trees;\n translate 1 A, 2 B, 3 C;\n tree t1 = ((1:1,2:1):1,(3:1,7:1):1);\nend;\n",
    )
    assert "7" in _dendropy_tips(path, "nexus")  # dendropy: a new taxon named '7'
    with pytest.raises(InputError) as err:
        read_trees(path)
    for w in ("'7'", "TRANSLATE", "tree 1"):
        assert w in str(err.value)


def test_nexus_declared_names_and_numbers_accepted(tmp_path):
    # Tips given by taxon number (no translate table) are NEXUS; names match dendropy.
    path = _write(
        tmp_path,
        "ok.nex",
        "#NEXUS\nbegin taxa;\n dimensions ntax=3;\n taxlabels A B C;\nend;\n"
        "begin trees;\n tree t1 = ((1:1,2:1):1,3:2);\n tree t2 = ((A:1,C:1):1,B:2);\nend;\n",
    )
    trees = read_trees(path)
    assert list(trees[0].tip_names) == _dendropy_tips(path, "nexus") == ["A", "B", "C"]
    assert set(trees[1].tip_names) == {"A", "B", "C"}


# ---------------------------------------------------------- printed precision
def _fixed_decimals(text: str, d: int) -> str:
    return re.sub(r":([0-9.eE+-]+)", lambda m: f":{float(m.group(1)):.{d}f}", text)


def _dated_tree(n: int, seed: int, height: float):
    tree = random_tree(n, np.random.default_rng(seed), ultrametric=True)
    return tree.with_lengths(tree.length * (height / tree.tip_heights().max()))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_six_decimal_dated_tree_is_ultrametric(tmp_path, seed):
    exact = _dated_tree(300, seed, height=1.0)
    text = _fixed_decimals(format_newick(exact, digits=17), 6)
    # dendropy's root-to-tip distances of the printed tree differ by more than a
    # relative 1e-6: a check without the printed precision would flag the tree
    h = np.array(list(_dendropy_heights(text).values()))
    assert h.max() - h.min() > 1e-6 * h.max()
    tree = read_tree(_write(tmp_path, "dated.nwk", text))
    assert tree.is_ultrametric(1e-6)
    facts = describe_tree(tree)
    assert facts.ultrametric and 0 < facts.rounding and not facts.warnings
    # the allowance is sound: the exact heights lie within it of the printed ones
    order = [exact.tip_names.index(nm) for nm in tree.tip_names]
    err = np.abs(tree.tip_heights() - exact.tip_heights()[order])
    assert np.all(err <= tree.tip_height_error() + 1e-12)
    # and still after pruning (merged branches add their rounding)
    keep = list(tree.tip_names[::3])
    assert prune_to(tree, keep).is_ultrametric(1e-6)


def test_six_decimal_tree_that_is_not_ultrametric_is_flagged(tmp_path):
    exact = _dated_tree(100, 5, height=1.0)
    length = exact.length.copy()
    length[0] += 1e-4  # one tip 100 times longer than the whole rounding allowance
    text = _fixed_decimals(format_newick(exact.with_lengths(length), digits=17), 6)
    tree = read_tree(_write(tmp_path, "off.nwk", text))
    assert tree.tip_height_error().max() < 1e-5
    facts = describe_tree(tree)
    assert not facts.ultrametric
    assert "rounding of the printed lengths" in facts.warnings[-1]


def test_six_decimal_nexus_and_summary(tmp_path):
    exact = _dated_tree(120, 7, height=0.8)
    newick = _fixed_decimals(format_newick(exact, digits=17), 6)
    path = _write(tmp_path, "d.nex", f"#NEXUS\nbegin trees;\n tree a = [&R] {newick}\nend;\n")
    tree = read_tree(path)
    assert tree.is_ultrametric(1e-6)
    table = _write(tmp_path, "x.csv", "species,x\n" + "".join(f"{n},{i}\n" for i, n in enumerate(tree.tip_names)))
    summary = summarise_data(match_names(tree, read_traits(table)))
    assert "ultrametric: yes" in summary.to_text() and "for rounded lengths" in summary.to_text()


def test_hand_written_mixed_precision_is_exact(tmp_path):
    # Few lengths carry the most decimals: not a rounding writer, lengths taken as exact.
    tree = read_tree(_write(tmp_path, "h.nwk", "((A:1,B:1.001):1,C:2);"))
    assert tree.length_error is None and not tree.is_ultrametric(1e-6)


# ------------------------------------------------------------------ scales
@pytest.mark.parametrize(
    "name, text, words",
    [
        ("huge.nwk", "((A:1e300,B:1e300):1,C:1e300);", ["1e+300", "tree height", "Rescale", "divide"]),
        ("tiny.nwk", "((A:1e-300,B:1e-300):1e-300,C:2e-300);", ["2e-300", "tree height", "Rescale"]),
        ("zero.nwk", "((A:0,B:0):0,C:0);", ["every branch length is 0"]),
        ("root.nwk", "((A:1,B:1):1,C:2):1e200;", ["root edge", "1e+200", "Rescale"]),
        (
            "huge.nex",
            "#NEXUS\nbegin trees;\n tree a = ((A:1e300,B:1e300):1,C:1e300);\nend;\n",
            ["tree 1", "1e+300", "Rescale"],
        ),
    ],
)
def test_tree_scale_refused(tmp_path, name, text, words):
    with pytest.raises(InputError) as err:
        read_trees(_write(tmp_path, name, text))
    for w in [name, *words]:
        assert w in str(err.value)


def test_single_tiny_branch_is_fine(tmp_path):
    tree = read_tree(_write(tmp_path, "ok.nwk", "((A:1e-300,B:1):1,C:2);"))
    heights = _dendropy_heights("((A:1e-300,B:1):1,C:2);")
    np.testing.assert_allclose(tree.tip_heights(), [heights[n] for n in tree.tip_names])


@pytest.mark.parametrize(
    "content, words",
    [
        ("((A:1,B:1):1,C:2);".encode("utf-16"), ["tree file", "UTF-16", "Save it as UTF-8"]),
        ("(('Aé':1,B:1):1,C:2);".encode("latin-1"), ["tree file", "Latin-1", "line 1"]),
    ],
)
def test_tree_file_encodings(tmp_path, content, words):
    path = tmp_path / "enc.nwk"
    path.write_bytes(content)
    with pytest.raises(InputError) as err:
        read_trees(path)
    for w in words:
        assert w in str(err.value)


def test_nexus_translate_label_not_in_taxa_block(tmp_path):
    path = _write(
        tmp_path,
        "z.nex",
        "#NEXUS\nbegin taxa;\n dimensions ntax=3;\n taxlabels A B C;\nend;\n"
        "begin trees;\n translate 1 A, 2 B, 3 Zed;\n tree t1 = ((1:1,2:1):1,3:2);\nend;\n",
    )
    with pytest.raises(dendropy.utility.error.DataParseError):  # dendropy refuses it too
        dendropy.Tree.get(path=str(path), schema="nexus")
    with pytest.raises(InputError) as err:
        read_trees(path)
    for w in ("z.nex", "line 7", "'Zed'", "translate table"):
        assert w in str(err.value)
