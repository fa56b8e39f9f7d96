"""The command table, ``--help`` of every command, and how ``main`` ends.

Exit statuses checked here follow the shell's convention of 128 + signal number
(POSIX, "Exit Status for Commands"): 130 for SIGINT (Ctrl-C), 141 for SIGPIPE.
"""

from __future__ import annotations

import argparse
import ast
import os
import subprocess
import sys
from pathlib import Path

import pytest

import cladewise.pipeline
import cladewise.cli
from cladewise.cli.main import COMMANDS, main

CLI_DIR = Path(cladewise.cli.__file__).parent
REPO = Path(__file__).resolve().parents[2]
SCRIPT = [sys.executable, "-m", "cladewise"]


def test_table_lists_every_command_module():
    # every module of cladewise/cli that defines a COMMAND is in the explicit table
    defined = set()
    for path in CLI_DIR.glob("*.py"):
        for node in ast.parse(path.read_text()).body:
            if isinstance(node, ast.Assign) and any(getattr(t, "id", None) == "COMMAND" for t in node.targets):
                defined.add(path.stem)
    assert defined == {c.run.__module__.rsplit(".", 1)[1] for c in COMMANDS}
    assert [c.name for c in COMMANDS] == ["check", "fit", "signal", "simulate", "report", "compare", "grid", "power", "cache"]


@pytest.mark.parametrize("command", [c for c in COMMANDS], ids=lambda c: c.name)
def test_help_of_every_command(command, capsys):
    assert main([command.name, "--help"]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"usage: cladewise {command.name}")
    assert command.help.split()[0] in out
    # every option the command declares is listed
    p = argparse.ArgumentParser()
    command.add_arguments(p)
    for action in p._actions:
        for flag in action.option_strings:
            assert flag in out


def test_top_level_help_lists_commands(capsys):
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    for c in COMMANDS:
        assert c.name in out


def test_usage_error_exits_2(capsys):
    assert main(["fit"]) == 2  # SPEC and --out missing
    assert "required" in capsys.readouterr().err


# ------------------------------------------------------------------ interrupts
def _raise_interrupt(*args, **kwargs):
    raise KeyboardInterrupt


def test_ctrl_c_during_fit_exits_130_with_one_line(tiny, tmp_path, monkeypatch, capsys):
    spec = tiny(tmp_path)
    monkeypatch.setattr(cladewise.pipeline, "fit_from_spec", _raise_interrupt)
    out = tmp_path / "fit"
    assert main(["fit", str(spec), "--out", str(out)]) == 130
    err = capsys.readouterr().err
    assert err.strip().splitlines() == ["cladewise: interrupted; nothing saved"]
    assert "Traceback" not in err
    assert not out.exists()


def test_ctrl_c_names_what_was_kept(tiny, tmp_path, monkeypatch, capsys):
    spec = tiny(tmp_path)
    out = tmp_path / "fit"

    def stop(*args, **kwargs):
        exc = KeyboardInterrupt()
        exc.saved = out  # the pipeline names where the partial draws went (--keep-partial)
        raise exc

    monkeypatch.setattr(cladewise.pipeline, "fit_from_spec", stop)
    assert main(["fit", str(spec), "--out", str(out), "--keep-partial"]) == 130
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and str(out) in lines[0] and "partial" in lines[0]


def test_ctrl_c_during_check_exits_130(tiny, tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(cladewise.pipeline, "check_spec", _raise_interrupt)
    assert main(["check", str(tiny(tmp_path))]) == 130
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_ctrl_c_in_a_real_process(tiny, tmp_path):
    # SIGINT to a running `cladewise check` (Python turns it into KeyboardInterrupt)
    import signal
    import time

    spec = tiny(tmp_path)
    # a child started from a background job inherits an ignored SIGINT; a terminal's default is wanted
    code = ("import signal; signal.signal(signal.SIGINT, signal.default_int_handler)\n"
            "import time, cladewise.pipeline as p\n"
            "def slow(*a, **k):\n    print('ready', flush=True); time.sleep(60)\n"
            "p.check_spec = slow\n"
            "from cladewise.cli.main import main\nimport sys\nsys.exit(main(['check', sys.argv[1]]))\n")
    proc = subprocess.Popen([sys.executable, "-c", code, str(spec)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "ready"
        time.sleep(0.2)
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        proc.kill()
    assert proc.returncode == 130
    # the last line is ours; a line before it may come from another process's lock on the
    # PyTensor compile folder (shared by parallel runs), never a traceback
    assert err.strip().splitlines()[-1] == "cladewise: interrupted; nothing saved"
    assert "Traceback" not in err


# ------------------------------------------------------------------ closed pipe
def test_reader_closing_the_pipe_early_gives_no_traceback():
    # `cladewise check spec | head -1` where head has already gone: the read end of
    # the pipe is closed before cladewise writes anything
    r, w = os.pipe()
    os.close(r)
    try:
        res = subprocess.run([*SCRIPT, "check", str(REPO / "models" / "demo_correlated.toml")],
                             stdout=w, stderr=subprocess.PIPE, text=True, timeout=300)
    finally:
        os.close(w)
    assert "Traceback" not in res.stderr and "BrokenPipe" not in res.stderr
    assert res.stderr == ""
    assert res.returncode in (0, 141)


def test_head_1_through_a_shell():
    if sys.platform == "win32":  # pragma: no cover
        pytest.skip("POSIX shell pipeline")
    spec = REPO / "models" / "demo_correlated.toml"
    cmd = " ".join([*map(str, SCRIPT), "check", str(spec), "|", "head", "-1"])
    res = subprocess.run(["sh", "-c", cmd], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0
    assert res.stdout.startswith("Tree: ") and res.stdout.count("\n") == 1
    assert "Traceback" not in res.stderr
