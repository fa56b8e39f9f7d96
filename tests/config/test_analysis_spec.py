"""Spec files: validation of [data] and loading the demo data in one call.

The demo checks compare the loaded arrays with pandas' own reading of the same
files (pandas as the outside reference).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from cladewise.errors import InputError
from cladewise.config.analysis import load_data, load_spec

DEMO = Path(__file__).resolve().parents[2] / "demo_data"


def _write(tmp_path, body: str) -> Path:
    p = tmp_path / "spec.toml"
    p.write_text(body)
    return p


def test_demo_specimens_spec(tmp_path):
    p = _write(
        tmp_path,
        f'[data]\ntree = "{DEMO / "vadicola_tree.nwk"}"\ntraits = "{DEMO / "vadicola_specimens.csv"}"\n'
        'specimens = true\nlog = ["head_width_mm"]\n[model]\nkind = "independent"\ntraits = ["head_width_mm"]\n',
    )
    spec = load_spec(p)
    assert spec.model == {"kind": "independent", "traits": ["head_width_mm"]} and spec.sampling == {}
    match, summary = load_data(spec)
    assert match.tree.tip_names == tuple(match.traits.species)
    raw = pd.read_csv(DEMO / "vadicola_specimens.csv", comment="#")
    assert summary.n_specimens == len(raw)
    means = raw.assign(lhw=np.log(raw.head_width_mm)).groupby("species")["lhw"].mean()
    np.testing.assert_allclose(match.traits.column("head_width_mm"), means.loc[match.traits.species].to_numpy())
    assert summary.tree.n_tips == match.tree.n_tips == raw.species.nunique()


def test_demo_species_table_with_sample(tmp_path):
    (tmp_path / "d").mkdir()
    for f in ("vadicola_tree.nwk", "vadicola_trees.nex", "vadicola_species.csv"):
        (tmp_path / "d" / f).write_text((DEMO / f).read_text())
    p = _write(
        tmp_path,
        '[data]\ntree = "d/vadicola_tree.nwk"\ntrees = "d/vadicola_trees.nex"\n'
        'traits = "d/vadicola_species.csv"\n',
    )
    match, summary = load_data(load_spec(p))
    assert len(match.trees) == 100
    assert all(t.tip_names == match.tree.tip_names for t in match.trees)
    assert summary.n_trees == 100
    assert any("no data and were pruned" in w for w in summary.warnings)


@pytest.mark.parametrize(
    "body, words",
    [
        ('[data]\ntree = "t.nwk"\ntraits = "x.csv"\nspecimen = true\n', ["unknown key 'specimen'", "did you mean 'specimens'"]),
        ('[data]\ntree = "t.nwk"\n', ["needs `traits"]),
        ('[data]\ntree = "missing.nwk"\ntraits = "x.csv"\n', ["missing.nwk", "does not exist"]),
        ('[data]\ntree = "t.nwk"\ntraits = "x.csv"\nlog = "a"\n', ["[data] log", "must be a list"]),
        ('[data]\ntree = "t.nwk"\ntraits = "x.csv"\ndrop_unmatched = 1\n', ["drop_unmatched = 1", "must be true or false"]),
        ('[model]\nx = 1\n', ["no [data] section"]),
        ('[data\ntree = 1\n', ["not valid TOML", "line 1"]),
    ],
)
def test_spec_rejections(tmp_path, body, words):
    (tmp_path / "t.nwk").write_text("(A:1,B:1);")
    (tmp_path / "x.csv").write_text("species,v\nA,1\nB,2\n")
    with pytest.raises(InputError) as err:
        load_spec(_write(tmp_path, body))
    for w in words:
        assert w in str(err.value)


def test_tree_file_with_several_trees_warns(tmp_path):
    (tmp_path / "t.nwk").write_text("(A:1,B:1);\n(A:2,B:2);\n")
    (tmp_path / "x.csv").write_text("species,v\nA,1\nB,2\n")
    _, summary = load_data(load_spec(_write(tmp_path, '[data]\ntree = "t.nwk"\ntraits = "x.csv"\n')))
    assert any("holds 2 trees; the first is used" in w for w in summary.warnings)
