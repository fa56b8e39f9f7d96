"""Grid of fits through dask.distributed: file format, atomic folders, resume.

Fits are tiny (10 species, PyMC's own NUTS with one chain of 100 draws: its compiled
C code is cached on disk, so a fit takes seconds where a nutpie compile takes a
minute on this machine).
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from cladewise.errors import InputError
from cladewise.config.grid import load_grid
from cladewise.studies.grid import STATUS_NAME, is_finished, run_grid
from cladewise.studies.simulate import simulate_traits
from cladewise.data.treefiles import format_newick

from treegen import random_tree

SAMPLING = 'sampler = "pymc"\nchains = 1\ndraws = 100\ntune = 100\nseed = 1\n'


def _write_project(root: Path, n_species: int = 10) -> None:
    """A tiny invented data set: tree, 3-tree sample, species table, one spec."""
    rng = np.random.default_rng(11)
    trees = [random_tree(n_species, np.random.default_rng(100 + i), True) for i in range(3)]
    (root / "tree.nwk").write_text(format_newick(trees[0]) + "\n")
    (root / "sample.nwk").write_text("".join(format_newick(t) + "\n" for t in trees))
    y = simulate_traits(trees[0], np.array([[1.0, 0.5], [0.5, 1.0]]), np.zeros(2), rng=rng)
    df = pd.DataFrame(y, columns=["a", "b"])
    df.insert(0, "species", list(trees[0].tip_names))
    df.to_csv(root / "species.csv", index=False)
    for name, extra in (("corr", ""), ("indep", "")):
        kind = "correlated" if name == "corr" else "independent"
        (root / f"{name}.toml").write_text(
            "# invented test data\n[data]\ntree = \"tree.nwk\"\ntrees = \"sample.nwk\"\ntraits = \"species.csv\"\n\n"
            f"[model]\nkind = \"{kind}\"\ntraits = [\"a\", \"b\"]\n{extra}\n[sampling]\n{SAMPLING}"
        )


def _checksums(out: Path, names) -> dict[str, tuple[str, float]]:
    res = {}
    for n in names:
        js = out / n / "summary.json"
        res[n] = (hashlib.sha256(js.read_bytes()).hexdigest(), js.stat().st_mtime_ns)
    return res


def _leftovers(out: Path) -> list[str]:
    return [p.name for p in out.iterdir() if ".partial-" in p.name]


# ------------------------------------------------------------------ grid file
def test_grid_file_fits_and_cross(tmp_path):
    _write_project(tmp_path)
    (tmp_path / "grid.toml").write_text(
        "[sampling]\ndraws = 50\n"
        "[[fit]]\nname = \"one\"\nspec = \"corr.toml\"\n"
        "[[fit]]\nspec = \"corr.toml\"\nn_trees = 2\nsampling = { seed = 5 }\n"
        "[[cross]]\nspecs = [\"corr.toml\", \"indep.toml\"]\ntrees = [\"sample.nwk\"]\n"
    )
    jobs = load_grid(tmp_path / "grid.toml")
    names = [j.name for j in jobs]
    assert names == ["one", "corr__2trees", "corr__sample", "indep__sample"]
    assert jobs[0].trees is None and not jobs[0].pooled
    assert jobs[1].pooled and jobs[1].n_trees == 2 and jobs[1].sampling == {"draws": 50, "seed": 5}
    assert jobs[2].trees == str((tmp_path / "sample.nwk").resolve())


@pytest.mark.parametrize(
    "text, words",
    [
        ("[[fit]]\nspec = \"nope.toml\"\n", "does not exist"),
        ("[[fit]]\nspec = \"corr.toml\"\nsteps = 3\n", "unknown key"),
        ("[[fit]]\nname = \"x\"\nspec = \"corr.toml\"\n[[fit]]\nname = \"x\"\nspec = \"indep.toml\"\n", "more than once"),
        ("[[fit]]\nname = \"../up\"\nspec = \"corr.toml\"\n", "folder name"),
        ("[[fit]]\nspec = \"corr.toml\"\nn_trees = 0\n", "n_trees = 0: must be >= 1"),
        ("[sampling]\nwarmup = 3\n[[fit]]\nspec = \"corr.toml\"\n", "unknown key"),
        ("", "no fits"),
        ("[[fit]\n", "not valid TOML"),
    ],
)
def test_grid_file_mistakes(tmp_path, text, words):
    _write_project(tmp_path)
    (tmp_path / "grid.toml").write_text(text)
    with pytest.raises(InputError, match=words):
        load_grid(tmp_path / "grid.toml")


def test_is_finished_needs_valid_summary(tmp_path):
    f = tmp_path / "fit"
    f.mkdir()
    assert not is_finished(f)
    (f / "posterior.nc").write_bytes(b"x")
    (f / "summary.json").write_text("{\"diagnostics\": ")  # cut short
    assert not is_finished(f)
    (f / "summary.json").write_text(json.dumps({"diagnostics": {}}))
    assert is_finished(f)


# ------------------------------------------------------------------ two-worker local cluster
def test_grid_on_two_worker_local_cluster(tmp_path):
    _write_project(tmp_path)
    (tmp_path / "grid.toml").write_text(
        "[[fit]]\nname = \"single\"\nspec = \"corr.toml\"\n"
        "[[fit]]\nname = \"pooled\"\nspec = \"corr.toml\"\nn_trees = 2\n"
        "[[fit]]\nname = \"broken\"\nspec = \"broken.toml\"\n"
    )
    # a valid grid file whose fit fails on the worker: its spec names an absent trait
    (tmp_path / "broken.toml").write_text(
        (tmp_path / "corr.toml").read_text().replace('traits = ["a", "b"]', 'traits = ["a", "zz"]'))
    out = tmp_path / "out"
    # a stale half-written folder from an earlier (stopped) run
    (out / ".single.partial-abc123").mkdir(parents=True)
    (out / ".single.partial-abc123" / "posterior.nc").write_bytes(b"half")
    lines: list[str] = []
    table = run_grid(tmp_path / "grid.toml", out, n_workers=2, echo=lines.append)
    status = dict(zip(table["name"], table["status"]))
    assert status == {"single": "done", "pooled": "done", "broken": "failed"}, table.to_string()
    assert "zz" in table.set_index("name").loc["broken", "message"]
    assert any("2 worker process" in s for s in lines)
    assert _leftovers(out) == []
    assert is_finished(out / "single") and is_finished(out / "pooled")
    js = json.loads((out / "pooled" / "summary.json").read_text())
    assert js["tree_sample"]["n_trees"] == 2 and js["n_species"] == 10
    assert (out / "pooled" / "per_tree.csv").is_file()
    assert pd.read_csv(out / STATUS_NAME)["name"].tolist() == ["single", "pooled", "broken"]

    # second run (without the broken fit, so no cluster is needed): finished fits
    # are skipped and left untouched
    (tmp_path / "grid2.toml").write_text(
        "[[fit]]\nname = \"single\"\nspec = \"corr.toml\"\n"
        "[[fit]]\nname = \"pooled\"\nspec = \"corr.toml\"\nn_trees = 2\n"
    )
    before = _checksums(out, ["single", "pooled"])
    table2 = run_grid(tmp_path / "grid2.toml", out, n_workers=1, echo=lines.append)
    assert dict(zip(table2["name"], table2["status"])) == {"single": "skipped", "pooled": "skipped"}
    assert _checksums(out, ["single", "pooled"]) == before


# ------------------------------------------------------------------ resume after a hard stop
@pytest.mark.slow
def test_grid_killed_and_restarted_resumes(tmp_path):
    _write_project(tmp_path)
    names = [f"fit{i}" for i in range(5)]
    (tmp_path / "grid.toml").write_text("".join(
        f"[[fit]]\nname = \"{n}\"\nspec = \"corr.toml\"\nsampling = {{ seed = {i + 1} }}\n"
        for i, n in enumerate(names)
    ))
    out = tmp_path / "out"
    cmd = [sys.executable, "-c", "import sys; from cladewise.cli.main import main; sys.exit(main(sys.argv[1:]))", "grid", str(tmp_path / "grid.toml"), "--out", str(out), "--workers", "2"]
    # own session: the kill reaches the grid process and its dask worker processes
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        deadline = time.time() + 240
        while time.time() < deadline:
            if out.is_dir() and any(is_finished(out / n) for n in names):
                break
            if proc.poll() is not None:
                pytest.fail("the grid ended before it could be stopped:\n" + proc.stdout.read().decode())
            time.sleep(0.2)
        else:
            pytest.fail("no fit finished in time")
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    finished = [n for n in names if is_finished(out / n)]
    assert 0 < len(finished) < len(names), "the grid must be stopped part-way for this test"
    before = _checksums(out, finished)

    done = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stdout + done.stderr
    status = pd.read_csv(out / STATUS_NAME).set_index("name")["status"]
    for n in names:
        assert status[n] == ("skipped" if n in finished else "done")
        assert is_finished(out / n)
    assert _checksums(out, finished) == before  # finished folders untouched
    assert _leftovers(out) == []
    assert sorted(p.name for p in out.iterdir() if p.is_dir()) == names  # each fit once, nothing else
