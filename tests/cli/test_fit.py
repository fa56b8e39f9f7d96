"""`cladewise fit` end to end on a tiny invented data set, ``--strict``, and refusals.

Expected counts come from the files the test wrote (read back with pandas and
xarray), not from cladewise output. Each fit compiles one small nutpie model
(about 20 s).
"""

from __future__ import annotations

import contextlib
import io
import json
import shutil

import arviz as az
import pandas as pd
import pytest

from cladewise.cli.main import main


@pytest.fixture(scope="module")
def fitted(tiny, tmp_path_factory):
    """One fit through the command line: (folder holding the inputs, out folder, exit status, stdout)."""
    folder = tmp_path_factory.mktemp("tiny")
    spec = tiny(folder, sampling="draws = 150\ntune = 150\n")
    out = folder / "fit"
    cap = io.StringIO()
    with contextlib.redirect_stdout(cap):
        rc = main(["fit", str(spec), "--out", str(out), "--draws", "120"])
    return folder, out, rc, cap.getvalue()


def test_fit_command_end_to_end(fitted):
    folder, out, rc, stdout = fitted
    assert rc == 0
    for name in ("posterior.nc", "summary.csv", "summary.json", "report.html"):
        assert (out / name).is_file(), name
    idata = az.from_netcdf(out / "posterior.nc")
    # the command-line override wins over the spec's [sampling] draws
    assert idata.posterior.sizes["chain"] == 2 and idata.posterior.sizes["draw"] == 120
    species = pd.read_csv(folder / "traits.csv")["species"]
    assert sorted(map(str, idata.observed_data["species"].values)) == sorted(species)
    info = json.loads((out / "summary.json").read_text())
    assert "--draws 120" in json.dumps(info)  # the command is recorded with the fit
    assert "evo_corr" in stdout and f"Saved: {out}/posterior.nc" in stdout
    assert "Report: " in stdout


def test_strict_exits_3_when_diagnostics_fail(tiny, tmp_path, capsys):
    # 2 chains x 10 draws cannot reach a bulk ESS of 400 (threshold of Vehtari et al.
    # 2021, Bayesian Analysis 16:667), so the diagnostics must fail
    spec = tiny(tmp_path)
    out = tmp_path / "fit"
    rc = main(["fit", str(spec), "--out", str(out), "--draws", "10", "--tune", "10", "--strict", "--no-report"])
    captured = capsys.readouterr()
    assert rc == 3
    assert "Strict mode" in captured.err and "Traceback" not in captured.err
    assert "ESS" in captured.out
    assert (out / "posterior.nc").is_file() and not (out / "report.html").exists()


def test_fit_refuses_missing_tree_sample(tiny, tmp_path, capsys):
    spec = tiny(tmp_path)
    out = tmp_path / "fit"
    assert main(["fit", str(spec), "--out", str(out), "--trees", str(tmp_path / "missing.nex")]) == 2
    err = capsys.readouterr().err
    assert "missing.nex" in err and "Traceback" not in err
    assert not out.exists()


# ------------------------------------------------------------------ formula messages
# ECMA-48 control sequences start with ESC [ ; a message meant for a log or a file must
# carry none of them.
ESC = "\x1b["


def test_formula_with_unknown_column(tiny, tmp_path, capsys):
    spec = tiny(tmp_path, model='kind = "regression"\nformula = "y ~ z"\n')
    out = tmp_path / "fit"
    assert main(["fit", str(spec), "--out", str(out)]) == 2
    err = " ".join(capsys.readouterr().err.split())  # the message is wrapped to the terminal
    assert ESC not in err and "Traceback" not in err
    assert "'z'" in err and "not columns of the trait table" in err
    assert not out.exists()


def test_formula_with_unquoted_space_gets_backtick_hint(tiny, tmp_path, capsys):
    spec = tiny(tmp_path, model='kind = "regression"\nformula = "y ~ body mass"\n', columns=("body mass", "y"))
    assert main(["fit", str(spec), "--out", str(tmp_path / "fit")]) == 2
    err = " ".join(capsys.readouterr().err.split())
    assert ESC not in err and "Traceback" not in err
    assert "backticks" in err and "`body mass`" in err


def test_formula_with_backticks_is_read(tiny, tmp_path, capsys):
    spec = tiny(tmp_path, model='kind = "regression"\nformula = "y ~ `body mass`"\n', columns=("body mass", "y"))
    assert main(["check", str(spec)]) == 0
    assert "The data can be analysed." in capsys.readouterr().out


# ------------------------------------------------------------------ compare
def test_compare_refuses_the_same_folder_twice(tmp_path, capsys):
    d = tmp_path / "fit_a"
    d.mkdir()
    assert main(["compare", str(d), str(d)]) == 2
    err = capsys.readouterr().err
    assert "given twice" in err and "Traceback" not in err
    # the same folder by two spellings of its path
    assert main(["compare", str(d), str(tmp_path / "." / "fit_a")]) == 2
    assert "given twice" in capsys.readouterr().err


def test_compare_refuses_a_copy_of_the_same_fit(fitted, tmp_path, capsys):
    _, out, rc, _ = fitted
    assert rc == 0
    copy = shutil.copytree(out, tmp_path / "copy")
    before = sorted(p.name for p in tmp_path.iterdir())
    assert main(["compare", str(out), str(copy), "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "identical posterior draws" in err and "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # nothing written
