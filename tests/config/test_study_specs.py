"""Grid files, ``[simulation]`` and ``[power]`` tables read through the one table reader.

Value types follow the TOML v1.0.0 specification (https://toml.io/en/v1.0.0). The
Pagel's lambda transform checked at the end is the published one (Pagel 1999,
Nature 401:877-884): internal branches times lambda, tip branches stretched so
that every root-to-tip distance is kept; worked by hand on a three-tip tree.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from cladewise.config.grid import load_grid
from cladewise.config.power import load_power_spec
from cladewise.config.simulation import load_simulation_spec
from cladewise.errors import InputError

TREE = "((A:1,B:1):1,C:2);\n"  # invented; ultrametric, height 2


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    (tmp_path / "t.nwk").write_text(TREE)
    (tmp_path / "x.csv").write_text("species,v,w\nA,1,2\nB,2,3.5\nC,3,1\n")
    (tmp_path / "a.toml").write_text('[data]\ntree = "t.nwk"\ntraits = "x.csv"\n')
    return tmp_path


def _message(fn, path: Path) -> str:
    with pytest.raises(InputError) as err:
        fn(path)
    msg = " ".join(str(err.value).split())
    assert path.name in msg
    return msg


# ------------------------------------------------------------------ grid files
GRID_BAD = [
    ("sampling-bool", "[sampling]\nchains = true\n[[fit]]\nspec = \"a.toml\"\n",
     ["[sampling] chains = true", "whole number"]),
    ("fit-sampling-seed", "[[fit]]\nspec = \"a.toml\"\nsampling = { seed = -1 }\n",
     ["[[fit]] number 1 sampling seed = -1", ">= 0"]),
    ("fit-sampling-value", "[[fit]]\nspec = \"a.toml\"\nsampling = 5\n",
     ["[[fit]] number 1 sampling = 5", "must be a table"]),
    ("progress-not-here", "[[fit]]\nspec = \"a.toml\"\nsampling = { progress = true }\n",
     ["unknown key 'progress'"]),
    ("n-trees-string", "[[fit]]\nspec = \"a.toml\"\nn_trees = \"5\"\n",
     ['n_trees = "5"', "without quotes: n_trees = 5"]),
    ("fit-typo", "[[fit]]\nspce = \"a.toml\"\n", ["unknown key 'spce' in [[fit]] number 1", "did you mean 'spec'"]),
    ("fit-no-spec", "[[fit]]\nname = \"x\"\n", ["[[fit]] number 1 needs spec ="]),
    ("cross-specs-string", "[[cross]]\nspecs = \"a.toml\"\n", ['specs = "a.toml"', 'specs = ["a.toml"]']),
    ("cross-missing", "[[cross]]\nspecs = [\"a.toml\", \"b.toml\"]\n",
     ['specs = "b.toml" does not exist', "relative to the folder of that file"]),
    ("section-typo", "[sampeling]\ndraws = 5\n[[fit]]\nspec = \"a.toml\"\n",
     ["unknown section [sampeling]", "did you mean [sampling]"]),
    ("single-bracket-fit", "[fit]\nspec = \"a.toml\"\n", ["[[fit]] table (double brackets)"]),
    ("bad-name", "[[fit]]\nname = \"../up\"\nspec = \"a.toml\"\n", ["name = \"../up\"", "folder name"]),
    ("empty-name", "[[fit]]\nname = \"\"\nspec = \"a.toml\"\n", ['name = ""', "empty text"]),
]


@pytest.mark.parametrize("text, words", [g[1:] for g in GRID_BAD], ids=[g[0] for g in GRID_BAD])
def test_grid_file_bad_values(folder, text, words):
    (folder / "grid.toml").write_text(text)
    msg = _message(load_grid, folder / "grid.toml")
    for w in words:
        assert w in msg, (w, msg)


def test_grid_sampling_overrides_are_checked_and_merged(folder):
    (folder / "grid.toml").write_text(
        "[sampling]\ndraws = 50\ntarget_accept = 0.95\n[[fit]]\nspec = \"a.toml\"\nsampling = { draws = 60 }\n"
    )
    (job,) = load_grid(folder / "grid.toml")
    assert job.sampling == {"draws": 60, "target_accept": 0.95}
    assert job.name == "a" and job.spec == str((folder / "a.toml").resolve())


# ------------------------------------------------------------------ [simulation]
SIM_OK = 'traits = ["x", "y"]\nrates = [0.5, 1.0]\n'

SIM_BAD = [
    ("seed-negative", SIM_OK + "seed = -1\n", ["[simulation] seed = -1", ">= 0"]),
    ("seed-string", SIM_OK + 'seed = "1"\n', ['seed = "1"', "without quotes"]),
    ("rates-string", 'traits = ["x", "y"]\nrates = "fast"\n', ['rates = "fast"', "a number or a list of numbers"]),
    ("rates-negative", 'traits = ["x", "y"]\nrates = [1, -1]\n', ["rates = [1, -1]", "every number", ">= 0"]),
    ("rates-length", 'traits = ["x", "y"]\nrates = [1, 1, 1]\n', ["rates = [1, 1, 1]", "one number or 2"]),
    ("correlation-range", SIM_OK + "correlation = 1.5\n", ["correlation = 1.5", "between -1"]),
    ("correlation-ragged", SIM_OK + "correlation = [[1, 0.5], [0.5]]\n", ["rows of a matrix", "same length"]),
    ("correlation-asymmetric", SIM_OK + "correlation = [[1, 0.5], [0.4, 1]]\n", ["symmetric 2 x 2"]),
    ("missing-share", SIM_OK + "missing_share = 1\n", ["missing_share = 1", "1 (excluded)"]),
    ("replicates-zero", SIM_OK + "replicates = 0\n", ["replicates = 0", ">= 1"]),
    ("replicates-bool", SIM_OK + "replicates = true\n", ["replicates = true", "not a boolean"]),
    ("model-typo", SIM_OK + 'model = "lamda"\n', ['model = "lamda"', "unknown evolution model"]),
    ("param-out-of-range", SIM_OK + 'model = "lambda"\nmodel_parameters = { lambda = 2 }\n',
     ["[simulation.model_parameters] lambda = 2", "between 0 (included) and 1 (included)"]),
    ("param-wrong-model", SIM_OK + 'model = "ou"\nmodel_parameters = { lambda = 0.5 }\n',
     ["lambda is not a parameter of model = \"ou\"", "which takes alpha"]),
    ("param-missing", SIM_OK + 'model = "kappa"\n', ['model = "kappa" needs kappa = <value>']),
    ("param-both-names", SIM_OK + 'model = "lambda"\nmodel_parameters = { lambda = 0.5, lam = 0.5 }\n',
     ["give lambda or lam, not both"]),
    ("params-value", SIM_OK + "model_parameters = 3\n", ["model_parameters = 3", "must be a table"]),
    ("unknown-key", SIM_OK + "rate = 1\n", ["unknown key 'rate' in [simulation]", "did you mean 'rates'"]),
    ("specimens-and-se", SIM_OK + "specimens_per_species = 3\nwithin_variance = 0.1\nstandard_errors = 0.1\n",
     ["not both"]),
    ("specimens-range", SIM_OK + "specimens_per_species = [5, 2]\nwithin_variance = 0.1\n", ["low <= high"]),
    ("no-traits", "rates = 1\n", ["[simulation] needs traits ="]),
    ("traits-species", 'traits = ["species", "y"]\nrates = 1\n', ["'species' names the species column"]),
    ("no-table", None, ["no [simulation] section"]),
]


@pytest.mark.parametrize("table, words", [s[1:] for s in SIM_BAD], ids=[s[0] for s in SIM_BAD])
def test_simulation_spec_bad_values(folder, table, words):
    body = '[data]\ntree = "t.nwk"\n' + ("" if table is None else "[simulation]\n" + table)
    (folder / "sim.toml").write_text(body)
    msg = _message(load_simulation_spec, folder / "sim.toml")
    for w in words:
        assert w in msg, (w, msg)


def test_simulation_spec_ignores_other_data_keys_but_checks_the_tree(folder):
    (folder / "sim.toml").write_text('[data]\ntree = "t.nwk"\ntraits = "gone.csv"\nspecies = "sp"\n'
                                     "[simulation]\n" + SIM_OK)
    assert load_simulation_spec(folder / "sim.toml").tree.n_tips == 3
    (folder / "sim.toml").write_text('[data]\ntree = "gone.nwk"\n[simulation]\n' + SIM_OK)
    assert 'tree = "gone.nwk" does not exist' in _message(load_simulation_spec, folder / "sim.toml")


@pytest.mark.parametrize("key", ["lambda", "lam"])
def test_simulation_accepts_the_user_key_lambda(folder, key):
    from cladewise.studies.simulate import simulate_dataset

    (folder / "sim.toml").write_text(
        '[data]\ntree = "t.nwk"\n[simulation]\n' + SIM_OK + f'seed = 4\nmodel = "lambda"\nmodel_parameters = {{ {key} = 0.5 }}\n'
    )
    spec = load_simulation_spec(folder / "sim.toml")
    assert spec.seed == 4 and spec.replicates == 1
    sim = simulate_dataset(spec.tree, seed=spec.seed, **spec.settings)
    # Pagel's lambda = 0.5 on ((A:1,B:1):1,C:2): the internal branch 1 -> 0.5, tips A and B
    # stretched to 1.5 so root-to-tip stays 2, C (a tip on the root) stays 2, no root edge.
    order = list(spec.tree.tip_names)
    lengths = dict(zip(order, sim.truth["lengths"][: spec.tree.n_tips]))
    assert lengths == pytest.approx({"A": 1.5, "B": 1.5, "C": 2.0})
    internal = np.delete(sim.truth["lengths"], list(range(spec.tree.n_tips)) + [spec.tree.n_nodes - 1])
    np.testing.assert_allclose(internal, [0.5])


def test_simulation_seed_override_and_defaults(folder):
    (folder / "sim.toml").write_text('[data]\ntree = "t.nwk"\n[simulation]\n' + SIM_OK + "seed = 4\n")
    spec = load_simulation_spec(folder / "sim.toml", seed=9)
    assert spec.seed == 9
    with pytest.raises(InputError, match="--seed = -2: must be >= 0"):
        load_simulation_spec(folder / "sim.toml", seed=-2)
    assert spec.settings["model"] == "bm" and spec.settings["model_params"] == {}
    # R from rates and the default correlation 0: diag(rates)
    np.testing.assert_allclose(spec.settings["R"], np.diag([0.5, 1.0]))


# ------------------------------------------------------------------ [power]
POWER_BAD = [
    ("seed-negative", "rates = 1\nseed = -2\n", ["[power] seed = -2", ">= 0"]),
    ("n-datasets-float", "rates = 1\nn_datasets = 10.0\n", ["n_datasets = 10.0", "n_datasets = 10"]),
    ("n-datasets-bool", "rates = 1\nn_datasets = true\n", ["n_datasets = true", "not a boolean"]),
    ("hdi-string", 'rates = 1\nhdi_prob = "0.9"\n', ['hdi_prob = "0.9"', "without quotes"]),
    ("traits-three", 'rates = 1\ntraits = ["a", "b", "c"]\n', ["2 entries"]),
    ("rates-zero", "rates = [1, 0]\n", ["rates = [1, 0]", "> 0"]),
    ("specimens-table-bad", "rates = 1\nwithin_variance = 0.1\nspecimens_per_species = { A = 0 }\n",
     ["[power.specimens_per_species] A = 0", ">= 1"]),
    ("specimens-table-incomplete", "rates = 1\nwithin_variance = 0.1\nspecimens_per_species = { A = 2 }\n",
     ["[power]", "every tip"]),
    ("unknown-key", "rates = 1\nn_dataset = 5\n", ["unknown key 'n_dataset' in [power]", "did you mean 'n_datasets'"]),
    ("sampling-bad", "rates = 1\n[sampling]\nchains = 0\n", ["[sampling] chains = 0", ">= 1"]),
]


@pytest.mark.parametrize("table, words", [p[1:] for p in POWER_BAD], ids=[p[0] for p in POWER_BAD])
def test_power_spec_bad_values(folder, table, words):
    (folder / "power.toml").write_text('[data]\ntree = "t.nwk"\n[power]\n' + table)
    msg = _message(load_power_spec, folder / "power.toml")
    for w in words:
        assert w in msg, (w, msg)


def test_power_spec_defaults_and_specimen_table(folder):
    (folder / "power.toml").write_text('[data]\ntree = "t.nwk"\ntraits = "x.csv"\n[power]\nrates = 0.5\n'
                                       "within_variance = 0.1\nspecimens_per_species = { A = 2, B = 3, C = 4 }\n")
    spec = load_power_spec(folder / "power.toml")
    assert spec.kwargs["rates"] == [0.5, 0.5] and spec.kwargs["root_means"] == [0.0, 0.0]
    assert spec.kwargs["correlations"] == [0.0, 0.2, 0.4, 0.6] and spec.kwargs["n_datasets"] == 100
    assert spec.kwargs["specimens"] == {"A": 2, "B": 3, "C": 4}
    assert (spec.options.chains, spec.options.draws, spec.options.tune) == (2, 500, 500)
