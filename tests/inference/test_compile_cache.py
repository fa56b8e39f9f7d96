"""On-disk cache of compiled nutpie models.

The reference for every value is PyMC's own log density and gradient
(``model.compile_logp`` / ``model.compile_dlogp``, interpreted by PyTensor without
numba), evaluated in the same process as the cached callback. One cold compile of a
small model is shared by the module; the warm checks run in new processes, as a
user's second ``cladewise fit`` would.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

TESTS = Path(__file__).resolve().parents[1]

# Builds a small model from a seed (tree and data both depend on it), compiles it
# through the cache and compares the callback nutpie calls with PyMC's functions.
SCRIPT = r"""
import json, sys, ctypes
import numpy as np, pandas as pd
sys.path.insert(0, sys.argv[1])
from treegen import random_tree
from cladewise.model.build import ModelData, ModelSpec, build_model
from cladewise.inference.compile_cache import compile_cached

seed, spec = int(sys.argv[2]), json.loads(sys.argv[3])
rng = np.random.default_rng(seed)
tree = random_tree(8, rng, ultrametric=True)
k = len(spec["traits"])
y = rng.normal(size=(8, k)) * rng.uniform(0.5, 3.0, k) + rng.normal(size=k)
data = ModelData(tree=tree, values=pd.DataFrame(y, index=list(tree.tip_names), columns=spec["traits"]))
model = build_model(data, ModelSpec.from_dict(spec)).model
info, said = {}, []
compiled = compile_cached(model, info=info, on_compile=said.append)

names, slices, shapes = compiled.shape_info
layout = {n: (s, tuple(sh)) for n, s, sh in zip(names, slices, shapes)}
order = [model.rvs_to_values[rv].name for rv in model.free_RVs]
logp_ref = model.compile_logp(mode="FAST_COMPILE")
dlogp_ref = model.compile_dlogp(vars=list(model.free_RVs), mode="FAST_COMPILE")
dptr = ctypes.POINTER(ctypes.c_double)
rows = []
for i in range(4):
    x = np.ascontiguousarray(compiled.initial_point_func(i) + rng.normal(0, 0.3, compiled.n_dim))
    grad, logp = np.zeros(compiled.n_dim), np.zeros(1)
    rc = compiled.compiled_logp_func.ctypes(
        compiled.n_dim, x.ctypes.data_as(dptr), grad.ctypes.data_as(dptr),
        logp.ctypes.data_as(dptr), ctypes.c_void_p(compiled.user_data.ctypes.data))
    point = {n: x[layout[n][0]].reshape(layout[n][1]) for n in order}
    rows.append({
        "rc": int(rc), "logp": float(logp[0]), "grad": np.concatenate([grad[layout[n][0]] for n in order]).tolist(),
        "ref_logp": float(logp_ref(point)), "ref_grad": np.asarray(dlogp_ref(point)).tolist(),
    })
print("RESULT" + json.dumps({"status": info["status"], "key": info.get("key"), "quick": info.get("quick"),
                            "rows": rows, "said": said}))
"""

SPEC = {"kind": "correlated", "traits": ["a", "b"]}


def run(cache: Path, seed: int, spec: dict = SPEC) -> dict:
    env = dict(os.environ, CLADEWISE_CACHE_DIR=str(cache), PYTHONWARNINGS="ignore")
    out = subprocess.run(
        [sys.executable, "-c", SCRIPT, str(TESTS), str(seed), json.dumps(spec)],
        env=env, capture_output=True, text=True, timeout=900,
    )
    assert out.returncode == 0, out.stderr[-3000:]
    line = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT")][-1]
    return json.loads(line[len("RESULT"):])


def assert_matches_pymc(result: dict) -> None:
    for row in result["rows"]:
        assert row["rc"] == 0
        assert row["logp"] == pytest.approx(row["ref_logp"], rel=1e-9, abs=1e-9)
        np.testing.assert_allclose(row["grad"], row["ref_grad"], rtol=1e-8, atol=1e-8)


@pytest.fixture(scope="module")
def cold(tmp_path_factory):
    """One cold compile into a fresh cache (seed 1)."""
    cache = tmp_path_factory.mktemp("cache")
    result = run(cache, seed=1)
    return cache, result


def test_cold_compile_matches_pymc_and_is_stored(cold):
    cache, result = cold
    assert result["status"] == "miss"
    assert len(result["said"]) == 1 and "compiling the model" in result["said"][0]
    assert_matches_pymc(result)
    entry = cache / "compiled" / result["key"]
    meta = json.loads((entry / "meta.json").read_text())
    assert set(meta["sha256"]) == {"logp", "expand"}
    # the layout the quick path rebuilds from is recorded with the entry
    assert len(meta["quick"]["key"]) == 64 and meta["quick"]["n_dim"] == meta["n_dim"]


def test_new_process_other_data_and_tree_reuses_entry(cold):
    cache, first = cold
    result = run(cache, seed=2)  # another tree, other trait values, same structure
    assert result["status"] == "hit" and result["said"] == []
    assert result["key"] == first["key"]
    assert result["quick"] is True  # found by its quick key: no PyTensor compile at all
    assert_matches_pymc(result)


def test_corrupt_entry_is_detected_and_rebuilt(cold, tmp_path):
    cache, first = cold
    copy = tmp_path / "cache"
    shutil.copytree(cache, copy)
    blob = copy / "compiled" / first["key"] / "logp.nbc"
    data = bytearray(blob.read_bytes())
    data[len(data) // 2] ^= 0xFF
    blob.write_bytes(bytes(data))
    result = run(copy, seed=3)
    assert result["status"] == "rebuilt"
    assert_matches_pymc(result)
    meta = json.loads((copy / "compiled" / first["key"] / "meta.json").read_text())
    import hashlib

    assert hashlib.sha256(blob.read_bytes()).hexdigest() == meta["sha256"]["logp"]


@pytest.mark.slow
def test_stale_entry_with_valid_checksums_is_rejected(cold, tmp_path):
    # the code of one structure filed under another structure's key, checksums intact:
    # only the comparison with PyMC can notice, and it must
    cache, first = cold
    other = dict(SPEC, evolution="lambda")
    copy = tmp_path / "cache"
    shutil.copytree(cache, copy)
    key = _key_in_subprocess(copy, other)
    shutil.copytree(copy / "compiled" / first["key"], copy / "compiled" / key)
    result = run(copy, seed=4, spec=other)
    assert result["key"] == key and result["status"] == "rebuilt"
    assert_matches_pymc(result)


@pytest.mark.slow
def test_wrong_code_under_a_quick_key_is_rejected(cold, tmp_path):
    # a model with the same parameters but another density (LKJ shape 4), whose quick
    # key is planted on the first model's entry: the layout fits, the code loads, and
    # only the comparison with PyMC can notice
    cache, first = cold
    other = dict(SPEC, priors={"lkj_eta": 4.0})
    copy = tmp_path / "cache"
    shutil.copytree(cache, copy)
    meta_file = copy / "compiled" / first["key"] / "meta.json"
    meta = json.loads(meta_file.read_text())
    meta["quick"]["key"] = _key_in_subprocess(copy, other, "quick_key")
    meta_file.write_text(json.dumps(meta))
    result = run(copy, seed=6, spec=other)
    assert result["status"] == "rebuilt" and result["quick"] is False
    assert result["key"] != first["key"]
    assert_matches_pymc(result)
    assert not (copy / "compiled" / first["key"]).exists()


def _key_in_subprocess(cache: Path, spec: dict, which: str = "structure_key") -> str:
    code = SCRIPT.split("info, said = ")[0] + (
        f"from cladewise.inference.compile_cache import {which}\n"
        f"print('RESULT' + json.dumps({{'key': {which}(model)}}))\n"
    )
    env = dict(os.environ, CLADEWISE_CACHE_DIR=str(cache), PYTHONWARNINGS="ignore")
    out = subprocess.run([sys.executable, "-c", code, str(TESTS), "5", json.dumps(spec)],
                         env=env, capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-3000:]
    return json.loads([ln for ln in out.stdout.splitlines() if ln.startswith("RESULT")][-1][6:])["key"]


def test_other_structures_get_other_keys(tmp_path):
    keys = {name: _key_in_subprocess(tmp_path, spec) for name, spec in {
        "base": SPEC,
        "lambda": dict(SPEC, evolution="lambda"),
        "independent": dict(SPEC, kind="independent"),
        "three traits": {"kind": "correlated", "traits": ["a", "b", "c"]},
    }.items()}
    assert len(set(keys.values())) == len(keys), keys
    assert all(k is not None and len(k) == 64 for k in keys.values())


def _fake_entry(root: Path, name: str, size: int, mtime: float) -> None:
    d = root / name
    d.mkdir(parents=True)
    (d / "logp.nbc").write_bytes(b"x" * size)
    (d / "meta.json").write_text("{}")
    os.utime(d / "meta.json", (mtime, mtime))


def test_prune_removes_least_recently_used_and_clear_empties(tmp_path, monkeypatch):
    from cladewise.inference.compile_cache import (
        clear_compile_cache,
        compile_cache_dir,
        compile_cache_info,
        prune_compile_cache,
    )

    monkeypatch.setenv("CLADEWISE_CACHE_DIR", str(tmp_path))
    root = compile_cache_dir()
    assert root == tmp_path / "compiled"
    for i, name in enumerate(["old", "mid", "new"]):
        _fake_entry(root, name, 1000, 1_000_000 + i)
    info = compile_cache_info()
    assert info["entries"] == 3 and info["bytes"] == 3 * (1000 + 2)
    assert prune_compile_cache(max_bytes=2100, keep="old") == 1  # "old" is kept, "mid" goes
    assert sorted(p.name for p in root.iterdir()) == ["new", "old"]
    assert prune_compile_cache(max_bytes=10_000) == 0
    assert clear_compile_cache() == 2
    assert compile_cache_info()["entries"] == 0
