"""The fit report rendered by a real headless browser (Debian's chromium).

A synthetic saved fit (posterior draws written directly, no sampling) is turned
into a report; chromium then loads the page from disk with the network disabled,
and the test checks that every image decoded, that the results table is in the
DOM, that no script error was logged, and saves a screenshot under
test-artifacts/ at the repository root.

Skipped when chromium is not installed, unless the environment variable CI is
set: then a missing browser is a failure.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

EVIL = "<script>alert(1)</script>"
REPO = Path(__file__).resolve().parents[2]
ARTIFACTS = REPO / "test-artifacts"


def find_chromium() -> str | None:
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name) if not os.path.isabs(name) else (name if os.path.exists(name) else None)
        if path:
            return path
    return None


def make_synthetic_fit(folder: Path, n_species: int = 40, seed: int = 0, chains: int = 2,
                       draws: int = 250) -> Path:
    """Write a fit folder with posterior draws generated directly (no sampler).

    Shapes, names and groups follow a saved ``cladewise fit`` folder of a bivariate
    correlated model; the numbers are random, so only the rendering is meaningful.
    """
    import arviz as az

    from cladewise.inference.fit import summarise
    from cladewise.studies.simulate import simulate_traits
    from cladewise.data.trees import FlatTree

    from treegen import random_tree

    rng = np.random.default_rng(seed)
    base = random_tree(n_species, rng, ultrametric=True)
    names = [f"Synthetica species_{i}" for i in range(n_species)]
    names[1] = EVIL
    tree = FlatTree(base.parent, base.length / base.tip_heights().max(), tuple(names))
    traits = ["size", "shape"]
    R = np.array([[1.0, 0.5], [0.5, 1.0]])
    y = simulate_traits(tree, R, np.zeros(2), rng=rng)
    observed = np.ones_like(y, dtype=bool)
    observed[2, 1] = False
    y[~observed] = np.nan
    corr = np.clip(rng.normal(0.5, 0.12, (chains, draws)), -0.99, 0.99)
    rate = np.abs(rng.normal([1.0, 1.0], 0.1, (chains, draws, 2)))
    C = np.ones((chains, draws, 2, 2))
    C[..., 0, 1] = C[..., 1, 0] = corr
    Rd = C * np.sqrt(rate[..., :, None] * rate[..., None, :])
    slope = Rd / np.diagonal(Rd, axis1=2, axis2=3)[..., None, :]
    cd = {"chain": np.arange(chains), "draw": np.arange(draws)}
    post = xr.Dataset({
        "evo_corr": xr.DataArray(C, dims=("chain", "draw", "trait", "trait_"),
                                 coords={**cd, "trait": traits, "trait_": traits}),
        "evo_slope": xr.DataArray(slope, dims=("chain", "draw", "trait", "trait_"),
                                  coords={**cd, "trait": traits, "trait_": traits}),
        "evo_rate": xr.DataArray(rate, dims=("chain", "draw", "trait"), coords={**cd, "trait": traits}),
        "root_mean": xr.DataArray(rng.normal(0, 0.2, (chains, draws, 2)), dims=("chain", "draw", "trait"),
                                  coords={**cd, "trait": traits}),
    })
    ll = rng.normal(-1.5, 0.3, (chains, draws, n_species))
    ll[:, :, 0] += rng.standard_t(1.5, (chains, draws)) * 3  # one influential species
    idata = az.InferenceData(
        posterior=post,
        sample_stats=xr.Dataset({"diverging": xr.DataArray(np.zeros((chains, draws), bool),
                                                           dims=("chain", "draw"), coords=cd)}),
        log_likelihood=xr.Dataset({"loglik": xr.DataArray(ll, dims=("chain", "draw", "species"),
                                                          coords={**cd, "species": names})}),
        observed_data=xr.Dataset({"y": xr.DataArray(y, dims=("species", "trait"),
                                                    coords={"species": names, "trait": traits})}),
        constant_data=xr.Dataset({
            "observed": xr.DataArray(observed, dims=("species", "trait"),
                                     coords={"species": names, "trait": traits}),
            "tree_parent": xr.DataArray(tree.parent, dims=("node",)),
            "tree_length": xr.DataArray(tree.length, dims=("node",)),
        }),
        posterior_predictive=xr.Dataset({"y_rep": xr.DataArray(
            rng.normal(0, 1, (1, 100, n_species, 2)),
            dims=("chain", "draw", "species", "trait"),
            coords={"chain": [0], "draw": np.arange(100), "species": names, "trait": traits})}),
    )
    table = summarise(idata, var_names=["evo_corr", "evo_slope", "evo_rate", "root_mean"])
    folder.mkdir(parents=True, exist_ok=True)
    idata.to_netcdf(folder / "posterior.nc")
    table.to_csv(folder / "summary.csv", index=False)
    info = {
        "description": f"synthetic posterior for {n_species} invented species (no sampling)",
        "model": {"kind": "correlated", "traits": traits, "evolution": "bm", "measurement_error": "none",
                  "species_covariance": False},
        "n_species": n_species, "species": names, "traits": traits, "predictors": [],
        "hdi_prob": 0.95, "quantities": json.loads(table.to_json(orient="records")),
        "diagnostics": {"max_rhat": 1.03, "min_ess_bulk": 250.0, "min_ess_tail": 200.0, "divergences": 3,
                        "min_bfmi": 0.7, "n_draws": chains * draws, "ok": False,
                        "problems": ["R-hat 1.030 > 1.01: chains disagree", f"species {EVIL} is odd"]},
        "priors": [{"parameter": "evolutionary correlation matrix", "distribution": "LKJ(eta=1)",
                    "reason": "uniform over correlation matrices"}],
        "sampling": {"sampler": "none", "chains": chains, "draws": draws, "seed": seed},
        "command": f"python make_synthetic_fit {EVIL}",
        "spec_text": f'[model]\nkind = "correlated"\n# {EVIL}\n',
        "environment": {"numpy": np.__version__},
    }
    (folder / "summary.json").write_text(json.dumps(info, indent=1))
    return folder


def _chromium_or_skip() -> str:
    path = find_chromium()
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("CI is set but chromium is not installed (apt-get install -y chromium)")
        pytest.skip("chromium is not installed (apt-get install -y chromium chromium-driver); "
                    "set CI=1 to make this a failure")
    return path


def _flags(profile: Path) -> list[str]:
    return [
        "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        "--disable-extensions", "--hide-scrollbars", "--mute-audio",
        # any network request would fail loudly instead of reaching out
        "--host-resolver-rules=MAP * ~NOTFOUND",
        f"--user-data-dir={profile}",
    ]


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    chromium = _chromium_or_skip()
    from cladewise.report import write_fit_report

    root = tmp_path_factory.mktemp("browser")
    path = write_fit_report(make_synthetic_fit(root / "fit"))
    url = path.resolve().as_uri()
    dom = subprocess.run(
        [chromium, *_flags(root / "p1"), "--enable-logging=stderr", "--v=0",
         "--virtual-time-budget=10000", "--dump-dom", url],
        capture_output=True, text=True, timeout=120,
    )
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "fit_report.png"
    shot.unlink(missing_ok=True)
    shoot = subprocess.run(
        [chromium, *_flags(root / "p2"), "--window-size=1280,4000", "--virtual-time-budget=10000",
         f"--screenshot={shot}", url],
        capture_output=True, text=True, timeout=120,
    )
    return path, dom, shoot, shot


def test_all_images_load(rendered):
    path, dom, _, _ = rendered
    assert dom.returncode == 0, dom.stderr[-2000:]
    m = re.search(r'data-images-loaded="(\d+)/(\d+)"', dom.stdout)
    assert m, "the page's load handler did not run"
    loaded, total = int(m.group(1)), int(m.group(2))
    assert total == path.read_text(encoding="utf-8").count("<img ") and total >= 6
    assert loaded == total


def test_results_table_and_escaped_names_in_dom(rendered):
    _, dom, _, _ = rendered
    html = dom.stdout
    assert 'id="results-table"' in html and "evolutionary correlation" in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<script>alert(1)" not in html
    assert 'class="banner bad"' in html  # the failed diagnostics are flagged


def test_no_console_errors_or_network(rendered):
    _, dom, _, _ = rendered
    log = dom.stderr
    console = [ln for ln in log.splitlines() if "CONSOLE" in ln]
    assert not [ln for ln in console if re.search(r"error|uncaught", ln, re.I)], console
    assert "ERR_NAME_NOT_RESOLVED" not in log and "net::ERR" not in log


def test_screenshot_saved(rendered):
    _, _, shoot, shot = rendered
    assert shoot.returncode == 0, shoot.stderr[-2000:]
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1280, 4000)
        # not a blank page: many distinct grey levels
        assert len(np.unique(np.asarray(im.convert("L").resize((128, 400))))) > 20
