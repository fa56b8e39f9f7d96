"""Matching table species to tree tips.

Underscores in tree files standing for spaces is the Newick convention for unquoted
labels (Felsenstein's Newick description, from memory); near-miss suggestions are
checked against difflib's ratio directly.
"""

from __future__ import annotations

import difflib

import numpy as np
import pytest

from cladewise.errors import InputError
from cladewise.data.matching import match_names, name_key
from cladewise.data.traits import read_species_table
from cladewise.data.trees import covariance
from cladewise.data.treefiles import parse_newick

TREE = "(((Aus_bus:1,Aus_cus:1):1,Bus_dus:2):1,(Cus_eus:2.5,Dus_fus:2.5):0.5);"


def _table(tmp_path, rows):
    p = tmp_path / "t.csv"
    p.write_text("species,x\n" + "".join(f"{r},{i}\n" for i, r in enumerate(rows)))
    return read_species_table(p)


def test_name_key():
    assert name_key("  'Aus_bus' ") == name_key("Aus  bus") == "Aus bus"


def test_match_prunes_and_orders(tmp_path):
    tree = parse_newick(TREE)
    td = _table(tmp_path, ["Dus fus", "Aus bus", "Bus_dus", "Cus eus"])
    m = match_names(tree, td)
    assert m.tree.tip_names == ("Dus fus", "Aus bus", "Bus_dus", "Cus eus")
    assert [d.name for d in m.dropped_from_tree] == ["Aus_cus"]
    assert m.tree_names["Aus bus"] == "Aus_bus"
    idx = [tree.tip_names.index(m.tree_names[s]) for s in m.traits.species]
    # pruning keeps the shared paths of the kept tips (BM covariance definition)
    np.testing.assert_allclose(covariance(m.tree), covariance(tree)[np.ix_(idx, idx)])
    np.testing.assert_allclose(m.traits.column("x"), [0, 1, 2, 3])


def test_unmatched_species_stop_with_suggestions(tmp_path):
    tree = parse_newick(TREE)
    td = _table(tmp_path, ["aus bus", "Bus dus", "Cus eeus"])
    with pytest.raises(InputError) as err:
        match_names(tree, td)
    msg = str(err.value)
    assert "'aus bus' (did you mean 'Aus_bus'?)" in msg  # case difference
    # difflib close match (ratio >= 0.8)
    assert difflib.SequenceMatcher(None, "Cus eeus", "Cus eus").ratio() >= 0.8
    assert "'Cus eeus' (did you mean 'Cus_eus'?)" in msg
    assert "drop_unmatched" in msg


def test_drop_unmatched_records_reasons(tmp_path):
    tree = parse_newick(TREE)
    td = _table(tmp_path, ["Aus bus", "Bus dus", "Nope nope"])
    m = match_names(tree, td, drop_unmatched=True)
    assert m.traits.species == ["Aus bus", "Bus dus"]
    assert [d.name for d in m.dropped_from_table] == ["Nope nope"]
    assert "not in the tree" in m.dropped_from_table[0].reason or "no tip" in m.dropped_from_table[0].reason
    assert {d.name for d in m.dropped_from_tree} == {"Aus_cus", "Cus_eus", "Dus_fus"}


def test_underscore_space_collision_rejected(tmp_path):
    tree = parse_newick("(Aus_bus:1,'Aus bus':1);")
    td = _table(tmp_path, ["Aus bus", "X"])
    with pytest.raises(InputError, match="same once underscores"):
        match_names(tree, td)


def test_too_few_matched(tmp_path):
    tree = parse_newick(TREE)
    td = _table(tmp_path, ["Aus bus", "Zz"])
    with pytest.raises(InputError, match="at least 2"):
        match_names(tree, td, drop_unmatched=True)


def test_sample_aligned_like_the_tree(tmp_path):
    tree = parse_newick(TREE)
    other = parse_newick("((Aus_bus:2,Bus_dus:2):1,(Aus_cus:1.5,(Cus_eus:1,Dus_fus:1):0.5):1.5);")
    td = _table(tmp_path, ["Cus eus", "Aus bus", "Bus dus"])
    m = match_names(tree, td, trees=[tree, other])
    assert all(t.tip_names == ("Cus eus", "Aus bus", "Bus dus") for t in m.trees)
    idx = [other.tip_names.index(m.tree_names[s]) for s in m.traits.species]
    np.testing.assert_allclose(covariance(m.trees[1]), covariance(other)[np.ix_(idx, idx)])
