"""`cladewise signal` on a tiny invented data set: the files, the traits of the spec,
and the output-folder rules. Expected values come from the files written (pandas, json)."""

from __future__ import annotations

import contextlib
import io
import json

import pandas as pd

from cladewise.cli.main import main


def test_signal_command_writes_its_folder_and_refuses_to_overwrite(tiny, tmp_path):
    spec = tiny(tmp_path)
    out = tmp_path / "signal"
    cap = io.StringIO()
    with contextlib.redirect_stdout(cap):
        rc = main(["signal", str(spec), "--out", str(out), "--no-lambda", "--permutations", "49"])
    assert rc == 0
    for name in ("signal.csv", "signal.json", "K_permutations.csv", "figures/signal.png", "figures/signal.svg"):
        assert (out / name).is_file(), name
    table = pd.read_csv(out / "signal.csv")
    assert list(table["trait"]) == ["x", "y"]  # the traits of the spec's [model]
    perms = pd.read_csv(out / "K_permutations.csv")
    assert (perms["trait"] == "x").sum() == 49
    doc = json.loads((out / "signal.json").read_text())
    assert doc["settings"]["permutations"] == 49 and doc["settings"]["lambda"] is False
    assert "Blomberg" in cap.getvalue()
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()) as err:
        rc = main(["signal", str(spec), "--out", str(out), "--no-lambda"])
    assert rc == 2 and "--overwrite" in err.getvalue()
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["signal", str(spec), "--out", str(out), "--no-lambda", "--overwrite",
                     "--traits", "y"]) == 0
    assert list(pd.read_csv(out / "signal.csv")["trait"]) == ["y"]
