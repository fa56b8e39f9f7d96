"""Tree reading, flattening, operations and covariance.

Reference: dendropy (Sukumaran & Holder 2010, Bioinformatics 26:1569-1571), an
independent tree library, for patristic distances and NEXUS parsing. The shared
path identity C_ij = (d(root,i) + d(root,j) - d(i,j)) / 2 is the Brownian-motion
covariance of tips i, j (Felsenstein 1985, Am. Nat. 125:1-15).
"""

from __future__ import annotations

import dendropy
import numpy as np
import pytest

from cladewise.errors import InputError
from cladewise.data.trees import FlatTree, covariance, describe_tree, order_tips, prune_to
from cladewise.data.treefiles import (
    format_newick,
    format_nexus,
    parse_newick,
    read_tree,
    read_trees,
)

TREES = [
    "((A:1,B:2):0.5,(C:0.3,D:0.7):1.2);",  # non-ultrametric, bifurcating
    "((A:1,B:1,C:1):2,(D:2.5,E:0.5):0.5,F:3);",  # polytomies incl. a basal one
    "(((A:0.1,B:0.1):0.4,C:0.5):0.5,(D:0.25,(E:0.2,F:0.2):0.05):0.75);",  # ultrametric
    "((A:0,B:1):0,(C:2,D:1,E:0.3):1);",  # zero-length branches
]


def _random_newick(rng: np.random.Generator, n: int) -> str:
    nodes = [f"t{i}:{rng.uniform(0.01, 1):.6f}" for i in range(n)]
    while len(nodes) > 1:
        k = 3 if len(nodes) > 3 and rng.random() < 0.1 else 2
        pick = sorted(rng.choice(len(nodes), k, replace=False), reverse=True)
        grp = [nodes[i] for i in pick]
        for i in pick:
            nodes[i] = nodes[-1]
            nodes.pop()
        nodes.append(f"({','.join(grp)}):{rng.uniform(0.01, 1):.6f}")
    return nodes[0][: nodes[0].rindex(":")] + ";"


def _dendropy_cov(newick: str, names) -> np.ndarray:
    dt = dendropy.Tree.get(data=newick, schema="newick", preserve_underscores=True)
    pdm = dt.phylogenetic_distance_matrix()
    taxa = {t.label: t for t in dt.taxon_namespace}
    root_d = {lf.taxon.label: lf.distance_from_root() for lf in dt.leaf_node_iter()}
    n = len(names)
    out = np.empty((n, n))
    for i, a in enumerate(names):
        for j, b in enumerate(names):
            d = 0.0 if a == b else pdm.patristic_distance(taxa[a], taxa[b])
            out[i, j] = (root_d[a] + root_d[b] - d) / 2
    return out


@pytest.mark.parametrize("newick", TREES + [_random_newick(np.random.default_rng(s), 40) for s in range(3)])
def test_covariance_matches_dendropy_patristic(newick):
    # Shared path = (d_root,i + d_root,j - d_ij)/2 (Felsenstein 1985, Am. Nat.),
    # distances from dendropy (Sukumaran & Holder 2010).
    tree = parse_newick(newick)
    np.testing.assert_allclose(covariance(tree), _dendropy_cov(newick, tree.tip_names), atol=1e-12)


def test_covariance_root_edge_adds_to_every_entry():
    # A root edge of length r adds r to every shared path (module convention).
    t0 = parse_newick(TREES[0])
    t1 = parse_newick(TREES[0][:-1] + ":0.75;")
    np.testing.assert_allclose(covariance(t1), covariance(t0) + 0.75)


def test_flat_order_and_labels():
    t = parse_newick("((B:1,'A x':1)clade1:1,(C:1,D:1):1)root;")
    assert t.tip_names == ("B", "A x", "C", "D")  # file order
    assert t.node_labels == ("clade1", None, "root")
    assert np.all(t.parent[:-1] > np.arange(t.n_nodes - 1))
    assert t.length[t.root] == 0.0


def test_newick_round_trip_against_dendropy():
    text = TREES[1]
    t = parse_newick(text)
    again = parse_newick(format_newick(t))
    assert again.tip_names == t.tip_names
    np.testing.assert_array_equal(again.parent, t.parent)
    np.testing.assert_allclose(again.length, t.length)
    # dendropy reads what we wrote and agrees on every shared path
    np.testing.assert_allclose(_dendropy_cov(format_newick(t), t.tip_names), covariance(t), atol=1e-12)


def test_nexus_translate_round_trip(tmp_path):
    trees = [parse_newick(TREES[2]), parse_newick(TREES[2].replace("0.4", "0.3").replace("0.5,(D", "0.6,(D"))]
    path = tmp_path / "s.nex"
    path.write_text(format_nexus(trees))
    back = read_trees(path)
    assert len(back) == 2
    for a, b in zip(trees, back):
        b = order_tips(b, a.tip_names)
        np.testing.assert_allclose(covariance(b), covariance(a), atol=1e-12)
    # independent reading by dendropy, translate table resolved by it
    tl = dendropy.TreeList.get(path=str(path), schema="nexus", preserve_underscores=True)
    assert sorted(t.label for t in tl.taxon_namespace) == sorted(trees[0].tip_names)


def test_hand_written_nexus_with_translate(tmp_path):
    path = tmp_path / "t.nex"
    path.write_text(
        "#NEXUS\nbegin trees;\n translate 1 Aus_bus, 2 'Bus cus', 3 C;\n"
        " tree one = [&R] ((1:1,2:1)x:1,3:2);\n tree two = ((2:1.5,1:1.5):0.5,3:2);\nend;\n"
    )
    ts = read_trees(path)
    assert [t.n_tips for t in ts] == [3, 3]
    assert ts[0].tip_names == ("Aus_bus", "Bus cus", "C")
    assert ts[0].node_labels[0] == "x"
    assert read_tree(path, 1).tip_names == ("Bus cus", "Aus_bus", "C")


def test_multi_newick(tmp_path):
    path = tmp_path / "m.nwk"
    path.write_text(TREES[0] + "\n" + TREES[0].replace("A:1", "A:1.5") + "\n")
    ts = read_trees(path)
    assert len(ts) == 2 and ts[1].length[0] == 1.5


@pytest.mark.parametrize(
    "text, words",
    [
        ("((A:1,B:1):1,C:2;", ["'(' never closed", "line 1, column 1"]),
        ("(A:1,B:1));", ["')' outside", "column 10"]),
        ("(A:1,\n B:-1);", ["negative branch length", "'B'", "line 2"]),
        ("(A:1,B);", ["'B' has no branch length"]),
        ("((A:1,B:1),C:1);", ["no branch length", "column 10"]),
        ("(A:1,A:2);", ["duplicate tip name 'A'"]),
        ("(A:1,B:x);", ["'x'", "not a number"]),
        ("(A:1,B:1)", ["without ';'"]),
        ("(A:1,,B:1);", ["without a name"]),
    ],
)
def test_newick_rejections(tmp_path, text, words):
    path = tmp_path / "bad.nwk"
    path.write_text(text)
    with pytest.raises(InputError) as err:
        read_trees(path)
    for w in words:
        assert w in str(err.value)
    assert "bad.nwk" in str(err.value)


def test_nexus_rejections(tmp_path):
    head = "#NEXUS\nbegin trees;\n"
    cases = {
        "tree a = ((A:1,B:1):1,C:2;\nend;\n": "line",
        "tree a = ((A:1,B):1,C:2);\nend;\n": "tip 'B' has no branch length",
        "tree a = ((A:1,B:-1):1,C:2);\nend;\n": "negative branch length",
        "tree a = ((A:1,B:1):1,C:2);\ntree b = ((A:1,B:1):1,D:2);\nend;\n": "tree 2 does not have the same tips",
    }
    for body, word in cases.items():
        path = tmp_path / "bad.nex"
        path.write_text(head + body)
        with pytest.raises(InputError, match=word):
            read_trees(path)


def test_sample_tip_sets_disagree_newick(tmp_path):
    path = tmp_path / "m.nwk"
    path.write_text("(A:1,B:1);\n(A:1,C:1);\n")
    with pytest.raises(InputError, match=r"tree 2 .*lacks 'B'.*'C' not in tree 1"):
        read_trees(path)


def test_missing_file_is_input_error(tmp_path):
    with pytest.raises(InputError, match="not found"):
        read_trees(tmp_path / "nope.nwk")


@pytest.mark.parametrize("seed", [0, 1])
def test_prune_keeps_covariance_submatrix(seed):
    # Pruning must not change the shared path of the kept tips (definition of the
    # BM covariance, Felsenstein 1985); checked against dendropy's own pruning.
    rng = np.random.default_rng(seed)
    newick = _random_newick(rng, 30)
    tree = parse_newick(newick)
    keep = sorted(rng.choice(tree.n_tips, 11, replace=False))
    names = [tree.tip_names[i] for i in keep]
    pruned = prune_to(tree, names)
    assert pruned.tip_names == tuple(names)
    assert np.all(pruned.n_children()[pruned.n_tips :] >= 2)
    np.testing.assert_allclose(covariance(pruned), covariance(tree)[np.ix_(keep, keep)], atol=1e-12)
    dt = dendropy.Tree.get(data=newick, schema="newick")
    dt.retain_taxa_with_labels(names)
    pdm = dt.phylogenetic_distance_matrix()
    taxa = {t.label: t for t in dt.taxon_namespace if t.label in names}
    c = covariance(pruned)
    for i, a in enumerate(names):
        for j, b in enumerate(names):
            if i < j:  # d_ij = C_ii + C_jj - 2 C_ij
                d = c[i, i] + c[j, j] - 2 * c[i, j]
                assert d == pytest.approx(pdm.patristic_distance(taxa[a], taxa[b]), abs=1e-9)


def test_prune_root_edge_semantics():
    t = parse_newick("((A:1,B:1):2,C:3):0.5;")
    p = prune_to(t, ["A", "B"])
    assert p.n_tips == 2 and p.n_nodes == 3
    assert p.length[p.root] == pytest.approx(2.5)  # old root edge + collapsed branch


def test_order_tips():
    t = parse_newick(TREES[1])
    names = ["F", "C", "A", "E", "B", "D"]
    o = order_tips(t, names)
    assert o.tip_names == tuple(names)
    idx = [t.tip_names.index(n) for n in names]
    np.testing.assert_allclose(covariance(o), covariance(t)[np.ix_(idx, idx)])
    with pytest.raises(InputError, match="missing"):
        order_tips(t, names[:-1])


def test_describe_tree():
    f = describe_tree(parse_newick(TREES[1]))
    assert (f.n_tips, f.rooted, f.ultrametric, f.n_polytomies) == (6, False, False, 2)
    g = describe_tree(parse_newick(TREES[3]))
    assert g.n_zero_length == 2 and g.n_zero_length_tips == 1 and not g.ultrametric
    h = describe_tree(parse_newick("((A:1,B:1.0000001):1,C:2);"), rtol=1e-6)
    assert h.ultrametric and h.rooted and h.height == pytest.approx(2.0000001)
    assert not describe_tree(parse_newick("((A:1,B:1.001):1,C:2);"), rtol=1e-6).ultrametric


def test_single_child_nodes_collapsed():
    t = parse_newick("((A:1):1,(B:1,C:1):1);")
    np.testing.assert_allclose(covariance(t), _dendropy_cov("((A:1):1,(B:1,C:1):1);", t.tip_names))
    assert np.all(t.n_children()[t.n_tips :] >= 2)


def test_large_tree_reads_fast():
    # 5,000 tips, deep caterpillar part included: must not hit the recursion limit.
    import time

    rng = np.random.default_rng(3)
    text = "(" * 3000 + "c0:1" + "".join(f",c{i}:1):1" for i in range(1, 3000)) + ","
    text = text + _random_newick(rng, 2000)[:-1] + ":1);"
    t0 = time.perf_counter()
    t = parse_newick(text)
    assert t.n_tips == 5000
    assert time.perf_counter() - t0 < 10
    assert isinstance(t, FlatTree)
