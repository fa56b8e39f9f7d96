"""`cladewise check` end to end on the invented demo data, and bad input.

The expected counts are read from the demo files with pandas and dendropy
(Sukumaran & Holder 2010), not from cladewise output.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import dendropy
import pandas as pd

from cladewise import __version__
from cladewise.cli.main import main

DEMO = Path(__file__).resolve().parents[2] / "demo_data"
# The installed package of the running interpreter, not a path of one machine.
SCRIPT = [sys.executable, "-m", "cladewise"]


def _spec(tmp_path, traits="vadicola_specimens.csv", extra="specimens = true\n") -> Path:
    p = tmp_path / "demo.toml"
    p.write_text(
        f'[data]\ntree = "{DEMO / "vadicola_tree.nwk"}"\ntraits = "{DEMO / traits}"\n{extra}'
        'log = ["head_width_mm", "prey_size_mm"]\n'
    )
    return p


def test_check_demo_exits_0_and_summarises(tmp_path, capsys):
    rc = main(["check", str(_spec(tmp_path))])
    out = capsys.readouterr().out
    assert rc == 0
    n_tips = len(dendropy.Tree.get(path=str(DEMO / "vadicola_tree.nwk"), schema="newick").leaf_nodes())
    raw = pd.read_csv(DEMO / "vadicola_specimens.csv", comment="#")
    n_sp = raw.species.nunique()
    assert f"{n_tips} tips in the file, {n_sp} analysed" in out
    assert "ultrametric: yes" in out and "polytomies: 2" in out
    n_prey = raw.dropna(subset=["prey_size_mm"]).species.nunique()
    assert f"{n_prey}/{n_sp}" in out
    assert f"dropped from the tree ({n_tips - n_sp}, no data)" in out
    assert "The data can be analysed." in out


def test_check_json(tmp_path, capsys):
    import json

    assert main(["check", "--json", str(_spec(tmp_path, "vadicola_species.csv", ""))]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["n_species"] == len(pd.read_csv(DEMO / "vadicola_species.csv", comment="#"))


def test_bad_spec_exits_2_without_traceback(tmp_path, capsys):
    p = tmp_path / "bad.toml"
    p.write_text('[data]\ntree = "nowhere.nwk"\ntraits = "x.csv"\n')
    rc = main(["check", str(p)])
    err = capsys.readouterr().err
    assert rc == 2
    assert "x.csv" in err and "does not exist" in err and "Traceback" not in err


def test_bad_data_console_script(tmp_path):
    (tmp_path / "t.nwk").write_text("((A:1,B:1):1,C:-2);")
    (tmp_path / "x.csv").write_text("species,v\nA,1\nB,2\nC,3\n")
    (tmp_path / "s.toml").write_text('[data]\ntree = "t.nwk"\ntraits = "x.csv"\n')
    res = subprocess.run([*SCRIPT, "check", str(tmp_path / "s.toml")], capture_output=True, text=True, timeout=120)
    assert res.returncode == 2
    assert "negative branch length" in res.stderr and "Traceback" not in res.stderr
    assert res.stdout == ""


def test_version_and_no_command(capsys):
    assert main(["--version"]) == 0
    assert __version__ in capsys.readouterr().out
    assert main([]) == 2


def test_check_reports_a_model_fit_would_refuse(tmp_path, capsys):
    # [model] names a trait the table does not have: fit would stop, so check must too
    (tmp_path / "t.nwk").write_text("((A:1,B:1):1,(C:1,D:1):1);")
    (tmp_path / "x.csv").write_text("species,v,w\nA,1,2\nB,2,1\nC,3,5\nD,4,3\n")
    (tmp_path / "s.toml").write_text(
        '[data]\ntree = "t.nwk"\ntraits = "x.csv"\n[model]\nkind = "correlated"\ntraits = ["v", "nope"]\n'
    )
    rc = main(["check", str(tmp_path / "s.toml")])
    captured = capsys.readouterr()
    assert rc == 2
    assert "The data can be analysed." not in captured.out
    assert "nope" in captured.err and "Traceback" not in captured.err
