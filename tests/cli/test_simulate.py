"""`cladewise simulate` through the command line: files, reproducibility, replicates, refusals.

The expected rate matrix is built by hand from the spec's rates and correlation
(R_ij = r_ij * sqrt(R_ii R_jj)); counts are read back with pandas.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd

from cladewise.cli.main import main

SPEC = (
    '[data]\ntree = "tree.nwk"\n\n[simulation]\n'
    'traits = ["mass", "speed"]\nrates = [0.04, 0.09]\ncorrelation = 0.6\n'
    "root_means = [2.0, 1.0]\nwithin_variance = [0.02, 0.05]\n"
    "specimens_per_species = [3, 6]\nmissing_share = 0.1\nseed = 7\n"
    'model = "lambda"\nmodel_parameters = { lam = 0.5 }\n'
)


def test_simulate_command(tmp_path, capsys):
    # Invented example tree and settings.
    (tmp_path / "tree.nwk").write_text("(((a:1,b:1):0.5,c:1.5):1,(d:2,(e:0.5,f:0.5):1.5):0.5);\n")
    spec = tmp_path / "spec.toml"
    spec.write_text(SPEC)
    assert main(["simulate", str(spec), "--out", str(tmp_path / "a")]) == 0
    assert main(["simulate", str(spec), "--out", str(tmp_path / "b")]) == 0
    assert "simulated 6 species x 2 traits" in capsys.readouterr().out
    a = pd.read_csv(tmp_path / "a" / "species.csv")
    pd.testing.assert_frame_equal(a, pd.read_csv(tmp_path / "b" / "species.csv"))
    assert sorted(a["species"]) == list("abcdef")
    assert int(a[["mass", "speed"]].isna().sum().sum()) == 1  # round(0.1 * 12)
    truth = json.loads((tmp_path / "a" / "truth.json").read_text())
    np.testing.assert_allclose(truth["rate_matrix"], [[0.04, 0.6 * 0.2 * 0.3], [0.6 * 0.2 * 0.3, 0.09]])
    assert truth["model"] == "lambda"
    # a used folder is refused and left as it was
    before = (tmp_path / "a" / "species.csv").read_text()
    assert main(["simulate", str(spec), "--out", str(tmp_path / "a")]) == 2
    assert "--overwrite" in capsys.readouterr().err  # the message says how to go on
    assert (tmp_path / "a" / "species.csv").read_text() == before
    # --seed overrides the spec's seed
    assert main(["simulate", str(spec), "--out", str(tmp_path / "s"), "--seed", "8"]) == 0
    assert not pd.read_csv(tmp_path / "s" / "species.csv")["mass"].equals(a["mass"])
    # replicates go to numbered folders and differ from each other
    spec.write_text(SPEC.replace("seed = 7", "seed = 7\nreplicates = 2"))
    assert main(["simulate", str(spec), "--out", str(tmp_path / "r")]) == 0
    r1 = pd.read_csv(tmp_path / "r" / "replicate_0001" / "species.csv")
    r2 = pd.read_csv(tmp_path / "r" / "replicate_0002" / "species.csv")
    assert not r1["mass"].equals(r2["mass"])
    spec.write_text(SPEC + "rate = 1\n")
    assert main(["simulate", str(spec), "--out", str(tmp_path / "c")]) == 2
    assert "unknown" in capsys.readouterr().err
    assert not (tmp_path / "c").exists()


def test_documented_spec_example_runs(tmp_path):
    # The TOML example in the docstring of cladewise.config.simulation must stay valid.
    import cladewise.config.simulation as mod

    block = mod.__doc__.split("SPEC is a TOML file::\n\n")[1].split("\nOutput folder")[0]
    (tmp_path / "spec.toml").write_text("\n".join(line[4:] for line in block.splitlines()))
    (tmp_path / "tree.nwk").write_text("((a:1,b:1):1,(c:0.5,d:0.5):1.5,e:2);\n")
    assert main(["simulate", str(tmp_path / "spec.toml"), "--out", str(tmp_path / "out")]) == 0
    spec = pd.read_csv(tmp_path / "out" / "specimens.csv")
    assert spec.groupby("species").size().between(3, 12).all()
