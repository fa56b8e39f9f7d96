"""Fits on a dask cluster started outside cladewise: a scheduler and two workers run as
separate processes from dask's own command-line programs, as a cluster admin starts them.

The reference for every check is the same computation in one process with the same
seeds (PyMC's NUTS and nutpie are deterministic given the seed): results through the
cluster must be equal, value for value. Data are invented (random trees from
``treegen``, traits drawn with the package's forward model). Fits are tiny (PyMC's own
NUTS, one chain of few draws; its compiled C code is cached on disk).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from cladewise.data.treefiles import format_newick
from cladewise.inference.results import load_fit
from cladewise.studies.grid import STATUS_JSON, STATUS_NAME, is_finished, run_grid
from cladewise.studies.simulate import simulate_traits

from treegen import random_tree

REPO = Path(__file__).resolve().parents[2]
SAMPLING = 'sampler = "pymc"\nchains = 1\ndraws = 60\ntune = 60\nseed = 1\n'


def _dask_program() -> list[str]:
    exe = Path(sys.executable).parent / "dask"
    return [str(exe)] if exe.is_file() else [sys.executable, "-m", "dask"]


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()


@pytest.fixture(scope="module")
def external_cluster():
    """``dask scheduler`` and two ``dask worker`` processes in folders of their own.

    The workers' working folder is not the test's; they share only the compile cache
    (``CLADEWISE_CACHE_DIR``), as workers on one machine would.
    """
    from dask.distributed import Client

    home = Path(tempfile.mkdtemp(prefix="cladewise-cluster-"))
    env = {**os.environ, "PYTHONPATH": str(REPO / "src"), "CLADEWISE_CACHE_DIR": str(home / "cache")}
    sched_file = home / "scheduler.json"
    procs = []
    try:
        procs.append(subprocess.Popen(
            _dask_program() + ["scheduler", "--port", "0", "--no-dashboard", "--scheduler-file", str(sched_file)],
            cwd=home, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True))
        deadline = time.time() + 60
        while not sched_file.is_file() and time.time() < deadline:
            time.sleep(0.2)
        address = json.loads(sched_file.read_text())["address"]
        for i in range(2):
            wdir = home / f"worker{i}"
            wdir.mkdir()
            procs.append(subprocess.Popen(
                _dask_program() + ["worker", address, "--nworkers", "1", "--nthreads", "1", "--no-dashboard",
                                   "--name", f"w{i}", "--local-directory", str(wdir)],
                cwd=wdir, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True))
        with Client(address, timeout="30s") as c:
            c.wait_for_workers(2, timeout=120)
        yield {"address": address, "scheduler_file": sched_file}
    finally:
        for p in reversed(procs):
            _stop(p)


def _write_project(root: Path, n_species: int = 8) -> None:
    """Invented data: tree, 3-tree sample, species table, two specs."""
    rng = np.random.default_rng(7)
    root.mkdir(parents=True, exist_ok=True)
    trees = [random_tree(n_species, np.random.default_rng(200 + i), True) for i in range(3)]
    (root / "tree.nwk").write_text(format_newick(trees[0], digits=17) + "\n")
    (root / "sample.nwk").write_text("".join(format_newick(t, digits=17) + "\n" for t in trees))
    y = simulate_traits(trees[0], np.array([[1.0, 0.4], [0.4, 1.0]]), np.zeros(2), rng=rng)
    df = pd.DataFrame(y, columns=["a", "b"])
    df.insert(0, "species", list(trees[0].tip_names))
    df.to_csv(root / "species.csv", index=False)
    for name, kind in (("corr", "correlated"), ("indep", "independent")):
        (root / f"{name}.toml").write_text(
            "# invented test data\n[data]\ntree = \"tree.nwk\"\ntrees = \"sample.nwk\"\ntraits = \"species.csv\"\n\n"
            f"[model]\nkind = \"{kind}\"\ntraits = [\"a\", \"b\"]\n\n[sampling]\n{SAMPLING}"
        )


def _posterior(folder: Path) -> dict[str, np.ndarray]:
    idata, _ = load_fit(folder)
    return {k: np.asarray(v.values) for k, v in idata.posterior.data_vars.items()}


def _same_posteriors(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> None:
    assert a.keys() == b.keys()
    for k in a:
        np.testing.assert_array_equal(a[k], b[k], err_msg=k)


# ------------------------------------------------------------------ per-worker model store
def test_worker_models_built_once_per_model_and_data(tmp_path):
    from cladewise.pipeline import prepare_analysis
    from cladewise.studies.cluster import memo_stats
    from cladewise.studies.remote_fit import worker_models

    proj = tmp_path / "project"
    _write_project(proj)
    before = memo_stats()
    a = worker_models(prepare_analysis(proj / "corr.toml", seed=1))
    b = worker_models(prepare_analysis(proj / "corr.toml", seed=7, draws=30))  # other seed and draws: same model
    c = worker_models(prepare_analysis(proj / "indep.toml"))  # another model
    after = memo_stats()
    assert a[0] is b[0] and c[0] is not a[0]
    assert after["misses"] - before["misses"] == 2 and after["hits"] - before["hits"] == 1
    # a changed data file is another model, never the stored one
    table = pd.read_csv(proj / "species.csv")
    table.loc[0, "a"] += 0.5
    table.to_csv(proj / "species.csv", index=False)
    d = worker_models(prepare_analysis(proj / "corr.toml", seed=1))
    assert d[0] is not a[0]


# ------------------------------------------------------------------ grid, end to end
def test_grid_on_external_cluster_equals_one_process(external_cluster, tmp_path):
    from cladewise.pipeline import fit_from_spec

    proj = tmp_path / "project"
    _write_project(proj)
    (proj / "grid.toml").write_text(
        "[[fit]]\nname = \"corr_s1\"\nspec = \"corr.toml\"\n"
        "[[fit]]\nname = \"indep_s2\"\nspec = \"indep.toml\"\nsampling = { seed = 2 }\n"
    )
    out = tmp_path / "out"
    seen = []
    lines: list[str] = []
    # the scheduler file written by `dask scheduler --scheduler-file` is an address too
    table = run_grid(proj / "grid.toml", out, scheduler=str(external_cluster["scheduler_file"]),
                     echo=lines.append, on_progress=lambda c: seen.append(c.as_dict()))
    assert dict(zip(table["name"], table["status"])) == {"corr_s1": "done", "indep_s2": "done"}, table.to_string()
    assert sorted(p.name for p in out.iterdir() if not p.name.startswith(".")) == \
        ["corr_s1", "grid_status.csv", "grid_status.json", "indep_s2"]
    status = json.loads((out / STATUS_JSON).read_text())
    assert status["state"] == "finished" and status["done"] == 2 and status["remaining"] == 0
    assert status["fits"] == {"corr_s1": "done", "indep_s2": "done"}
    assert seen[-1]["done"] == 2 and seen[0]["remaining"] == 2
    # recorded paths are the client's, not the worker's temporary copies
    js = json.loads((out / "corr_s1" / "summary.json").read_text())
    assert js["spec_path"] == str((proj / "corr.toml").resolve())
    assert js["spec_text"] == (proj / "corr.toml").read_text()
    assert js["data_summary"]["traits_source"] == str((proj / "species.csv").resolve())
    assert "cladewise-job-" not in (out / "corr_s1" / "summary.json").read_text()

    # the same fits in this process, same seeds: equal draws
    for name, spec, seed in (("corr_s1", "corr.toml", 1), ("indep_s2", "indep.toml", 2)):
        fit_from_spec(proj / spec, out=tmp_path / "local" / name, progress=False, seed=seed)
        _same_posteriors(_posterior(out / name), _posterior(tmp_path / "local" / name))


# ------------------------------------------------------------------ a worker killed mid-fit
def _worker_pid_running_a_fit(address: str, timeout: float = 180) -> int:
    from dask.distributed import Client

    with Client(address, timeout="30s") as c:
        deadline = time.time() + timeout
        while time.time() < deadline:
            events = c.get_events()
            busy = [w for w, keys in c.processing().items() if keys]
            started = [msg for topic, evs in events.items() if topic.startswith("cladewise-") for _, msg in evs]
            if busy and started:
                pids = c.run(os.getpid, workers=busy[:1])
                return int(next(iter(pids.values())))
            time.sleep(0.2)
    raise AssertionError("no fit started on the cluster in time")


@pytest.mark.slow
def test_worker_killed_mid_fit_grid_completes_once(external_cluster, tmp_path):
    proj = tmp_path / "project"
    _write_project(proj)
    names = [f"fit{i}" for i in range(4)]
    (proj / "grid.toml").write_text("".join(
        f"[[fit]]\nname = \"{n}\"\nspec = \"corr.toml\"\nsampling = {{ seed = {i + 1}, draws = 150 }}\n"
        for i, n in enumerate(names)))
    out = tmp_path / "out"
    box: dict = {}

    def run() -> None:
        try:
            box["table"] = run_grid(proj / "grid.toml", out, scheduler=external_cluster["address"], echo=lambda s: None)
        except BaseException as exc:  # reported by the assertion below
            box["error"] = exc

    th = threading.Thread(target=run)
    th.start()
    pid = _worker_pid_running_a_fit(external_cluster["address"])
    os.kill(pid, signal.SIGKILL)  # the worker dies in the middle of a fit; its nanny starts a new one
    assert th.is_alive(), "the grid must still be running when the worker is killed"
    th.join(timeout=600)
    with pytest.raises(ProcessLookupError):
        os.kill(pid, 0)  # that worker is really gone
    assert not th.is_alive() and "error" not in box, box.get("error")
    table = box["table"]
    assert list(table["name"]) == names and set(table["status"]) == {"done"}, table.to_string()
    status = pd.read_csv(out / STATUS_NAME)
    assert sorted(status["name"]) == names  # each fit once
    assert sorted(p.name for p in out.iterdir() if p.is_dir()) == names  # no partial or duplicate folder
    assert all(is_finished(out / n) for n in names)
    assert json.loads((out / STATUS_JSON).read_text())["done"] == 4


# ------------------------------------------------------------------ studies through the cluster
@pytest.mark.slow
def test_tree_sample_fit_on_cluster_equals_one_process(external_cluster, tmp_path):
    from cladewise.inference.pooled import fit_tree_sample
    from cladewise.pipeline import prepare_analysis
    from cladewise.studies.cluster_trees import fit_tree_sample_on_cluster

    proj = tmp_path / "project"
    _write_project(proj)
    prep = prepare_analysis(proj / "corr.toml", progress=False)
    trees = prep.match.trees
    one = fit_tree_sample(prep.model_data, prep.model_spec, trees, prep.options, n_trees=2, seed=5,
                          predictive_draws=20, progress=False)
    many = fit_tree_sample_on_cluster(prep.model_data, prep.model_spec, trees, prep.options, n_trees=2, seed=5,
                                      predictive_draws=20, scheduler=external_cluster["address"])
    assert many.tree_indices == one.tree_indices and many.seeds == one.seeds
    for group in ("posterior", "log_likelihood", "posterior_predictive"):
        a, b = getattr(one.idata, group), getattr(many.idata, group)
        for k in a.data_vars:
            np.testing.assert_array_equal(a[k].values, b[k].values, err_msg=f"{group}/{k}")
    pd.testing.assert_frame_equal(one.summary, many.summary)
    pd.testing.assert_frame_equal(one.variance_share, many.variance_share)


@pytest.mark.slow
def test_power_study_on_cluster_equals_one_process(external_cluster):
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.studies.power import run_power_study

    tree = random_tree(8, np.random.default_rng(3), True)
    opts = SamplingOptions(sampler="pymc", chains=1, draws=60, tune=60, progress=False)
    kw = dict(correlations=(0.0, 0.5), n_datasets=2, seed=9, options=opts)
    one = run_power_study(tree, **kw)
    many = run_power_study(tree, scheduler=external_cluster["address"], **kw)
    pd.testing.assert_frame_equal(one.fits, many.fits)
    pd.testing.assert_frame_equal(one.table, many.table)


@pytest.mark.slow
def test_calibration_on_cluster_equals_one_process(external_cluster):
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.studies.calibration import run_calibration

    tree = random_tree(8, np.random.default_rng(4), True)
    opts = SamplingOptions(sampler="pymc", chains=1, draws=60, tune=60, progress=False)
    kw = dict(n_datasets=3, n_rank_draws=19, n_bins=10, options=opts, seed=12)
    one = run_calibration(tree, **kw)
    many = run_calibration(tree, scheduler=external_cluster["address"], **kw)
    pd.testing.assert_frame_equal(one.ranks, many.ranks)
    pd.testing.assert_frame_equal(one.coverage, many.coverage)
