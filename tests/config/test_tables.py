"""The one TOML table reader: a battery of bad spec values, each with its message.

The outside reference for what a value *is* is the TOML v1.0.0 specification
(https://toml.io/en/v1.0.0): booleans are the bare words ``true``/``false``, integers
and floats are unquoted, quoted values are strings, ``[name]`` opens a table; the
files are parsed by Python's own ``tomllib``. Every message must name the file,
the section, the key and the bad value, and say how to fix it.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from cladewise.config.analysis import MODEL, SAMPLING, load_spec
from cladewise.config.tables import Key, Table, Where, did_you_mean, read_table, toml_value
from cladewise.errors import InputError

DATA_OK = '[data]\ntree = "t.nwk"\ntraits = "x.csv"\n'


@pytest.fixture
def folder(tmp_path: Path) -> Path:
    """An invented three-species tree and trait table next to the spec."""
    (tmp_path / "t.nwk").write_text("((A:1,B:1):1,C:2);\n")
    (tmp_path / "x.csv").write_text("species,v,w\nA,1,2\nB,2,3.5\nC,3,1\n")
    return tmp_path


def _refused(folder: Path, body: str) -> str:
    spec = folder / "spec.toml"
    spec.write_text(body)
    with pytest.raises(InputError) as err:
        load_spec(spec)
    msg = str(err.value)
    assert "spec.toml" in msg  # every message names the file
    return msg


# ------------------------------------------------------------------ the battery
BAD_VALUES = [
    # (id, body after a valid [data], words the message must hold)
    ("bool-as-string", '[model]\nspecies_covariance = "no"\n',
     ["[model] species_covariance", '"no"', "true or false", "species_covariance = false"]),
    ("bool-as-string-yes", '[model]\nspecies_covariance = "yes"\n', ["species_covariance = true"]),
    ("chains-true", "[sampling]\nchains = true\n",
     ["[sampling] chains = true", "whole number", "not a boolean", "chains = 4"]),
    ("negative-seed", "[sampling]\nseed = -3\n", ["[sampling] seed = -3", ">= 0"]),
    ("string-seed", '[sampling]\nseed = "42"\n',
     ['[sampling] seed = "42"', "whole number", "not a text", "without quotes: seed = 42"]),
    ("float-seed", "[sampling]\nseed = 1.5\n", ["[sampling] seed = 1.5", "whole number"]),
    ("target-accept-string", '[sampling]\ntarget_accept = "high"\n',
     ['target_accept = "high"', "must be a number", "not a text"]),
    ("target-accept-number-as-string", '[sampling]\ntarget_accept = "0.95"\n',
     ["target_accept = 0.95", "without quotes"]),
    ("target-accept-too-big", "[sampling]\ntarget_accept = 1.2\n",
     ["[sampling] target_accept = 1.2", "between 0.5 (included) and 1 (excluded)"]),
    ("target-accept-one", "[sampling]\ntarget_accept = 1.0\n", ["target_accept = 1.0", "1 (excluded)"]),
    ("draws-zero", "[sampling]\ndraws = 0\n", ["draws = 0", ">= 1"]),
    ("tune-negative", "[sampling]\ntune = -1\n", ["tune = -1", ">= 0"]),
    ("nan-draws", "[sampling]\ntarget_accept = nan\n", ["target_accept = nan", "finite"]),
    ("sampler-choice", '[sampling]\nsampler = "nutpi"\n',
     ['sampler = "nutpi"', 'did you mean "nutpie"', "nutpie, pymc"]),
    ("model-as-value", 'model = "correlated"\n',
     ["[model] must be a table", 'model = "correlated"', "under a line [model]"]),
    ("sampling-as-value", "sampling = 3\n", ["[sampling] must be a table"]),
    ("model-kind-typo", '[model]\nkind = "corelated"\n', ['kind = "corelated"', 'did you mean "correlated"']),
    ("model-traits-string", '[model]\ntraits = "v"\n',
     ['[model] traits = "v"', "must be a list", 'traits = ["v"]']),
    ("model-traits-twice", '[model]\ntraits = ["v", "v"]\n', ['traits = ["v", "v"]', "twice"]),
    ("model-fixed-value", "[model]\nfixed = 0.5\n", ["[model] fixed = 0.5", "must be a table", "[model.fixed]"]),
    ("model-fixed-lambda-range", "[model]\nfixed = { lambda = 1.5 }\n",
     ["[model.fixed] lambda = 1.5", "between 0 (included) and 1 (included)"]),
    ("model-prior-negative", "[model.priors]\nlkj_eta = -2\n", ["[model.priors] lkj_eta = -2", "> 0"]),
    ("model-prior-unknown", "[model.priors]\nlkj = 2\n", ["unknown key 'lkj' in [model.priors]", "lkj_eta"]),
    ("model-prior-beta-length", "[model.priors]\nlambda_beta = [1, 2, 3]\n", ["lambda_beta", "2 entries"]),
    ("model-evolution-unknown", '[model]\nevolution = "brownish"\n',
     ['[model] evolution = "brownish"', "unknown evolution model"]),
    ("model-measurement-error", '[model]\nmeasurement_error = "sd"\n',
     ['measurement_error = "sd"', "none, se, specimens"]),
    ("model-unknown-key", '[model]\nspecies_covarianse = true\n',
     ["unknown key 'species_covarianse' in [model]", "did you mean 'species_covariance'", "Known keys: kind"]),
    ("sampling-unknown-key", "[sampling]\nwarmup = 500\n", ["unknown key 'warmup' in [sampling]", "Known keys"]),
    ("sampling-case-key", "[sampling]\nSeed = 1\n", ["unknown key 'Seed'", "did you mean 'seed'"]),
    ("unknown-section-misspelt", "[sampeling]\ndraws = 100\n",
     ["unknown section [sampeling]", "did you mean [sampling]", "[data]", "[model]"]),
    ("unknown-section-suffixed", "[sampling_opts]\ndraws = 100\n",
     ["unknown section [sampling_opts]", "did you mean [sampling]"]),
    ("unknown-top-level-key", "seed = 3\n", ["unknown top-level key [seed]"]),
]
BAD_DATA = [
    ("log-not-list", 'log = "v"\n', ['[data] log = "v"', "must be a list", 'log = ["v"]']),
    ("log-numbers", "log = [1, 2]\n", ["[data] log = [1, 2]", "list of texts"]),
    ("empty-se-suffix", 'se_suffix = ""\n', ['[data] se_suffix = ""', "empty text", 'se_suffix = "_se"']),
    ("empty-species", 'species = " "\n', ["[data] species", "empty text"]),
    ("same-suffixes", 'n_suffix = "_se"\n', ["must differ"]),
    ("specimens-string", 'specimens = "true"\n', ['specimens = "true"', "specimens = true"]),
    ("drop-unmatched-int", "drop_unmatched = 1\n", ["drop_unmatched = 1", "true or false", "drop_unmatched = true"]),
    ("rtol-range", "ultrametric_rtol = 2\n", ["ultrametric_rtol = 2", "between 0"]),
    ("unknown-key", "specimen = true\n", ["unknown key 'specimen' in [data]", "did you mean 'specimens'"]),
    ("tree-number", "trees = 3\n", ["[data] trees = 3", "must be a text"]),
]


@pytest.mark.parametrize("body, words", [b[1:] for b in BAD_VALUES], ids=[b[0] for b in BAD_VALUES])
def test_bad_spec_value_is_refused_with_its_place_and_fix(folder, body, words):
    msg = _refused(folder, DATA_OK + body if not body.startswith(("model =", "sampling =", "seed =")) else body + DATA_OK)
    for w in words:
        assert w in msg, (w, msg)


@pytest.mark.parametrize("line, words", [b[1:] for b in BAD_DATA], ids=[b[0] for b in BAD_DATA])
def test_bad_data_value_is_refused(folder, line, words):
    msg = _refused(folder, DATA_OK + line)
    for w in words:
        assert w in msg, (w, msg)


def test_data_missing_files_are_named_together_with_the_relative_path_rule(folder):
    (folder / "sub").mkdir()
    spec = folder / "sub" / "spec.toml"
    spec.write_text('[data]\ntree = "t.nwk"\ntraits = "x.csv"\n')
    with pytest.raises(InputError) as err:
        load_spec(spec)
    msg = str(err.value)
    for w in ('tree = "t.nwk" does not exist', 'traits = "x.csv" does not exist',
              str(folder / "sub" / "t.nwk"), "relative to the folder of that file", "not to the current folder"):
        assert w in msg, (w, msg)
    # the same spec with paths relative to its own folder is accepted
    spec.write_text('[data]\ntree = "../t.nwk"\ntraits = "../x.csv"\n')
    assert load_spec(spec).data.tree == (folder / "t.nwk").resolve()


def test_a_folder_is_not_a_file(folder):
    (folder / "d").mkdir()
    msg = _refused(folder, '[data]\ntree = "d"\ntraits = "x.csv"\n')
    assert 'tree = "d"' in msg and "is a folder, not a file" in msg


def test_valid_spec_keeps_the_given_model_and_sampling_values(folder):
    spec = folder / "spec.toml"
    spec.write_text(DATA_OK + '[model]\nkind = "correlated"\ntraits = ["v", "w"]\nevolution = "Pagel-lambda"\n'
                    "species_covariance = false\nfixed = { lambda = 0.5 }\npriors = { lambda_beta = [2, 2] }\n"
                    '[sampling]\nchains = 2\nseed = 0\ntarget_accept = 0.95\nprogress = false\n'
                    "[simulation]\ntraits = []\n[power]\nrates = 1\n")
    s = load_spec(spec)
    # the alias is resolved to the registry name (cladewise.model.evolution.MODELS)
    assert s.model == {"kind": "correlated", "traits": ["v", "w"], "evolution": "lambda",
                       "species_covariance": False, "fixed": {"lambda": 0.5}, "priors": {"lambda_beta": [2, 2]}}
    assert s.sampling == {"chains": 2, "seed": 0, "target_accept": 0.95, "progress": False}


def test_model_and_sampling_objects_validate_through_the_same_declarations():
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.model.build import ModelSpec, PRIOR_KEYS

    assert set(PRIOR_KEYS) == set(MODEL.keys["priors"].table.keys)
    assert set(MODEL.keys) <= set(ModelSpec.__dataclass_fields__)
    assert set(SAMPLING.keys) == set(SamplingOptions.__dataclass_fields__)
    with pytest.raises(InputError, match=r"\[sampling\] chains = true: must be a whole number"):
        SamplingOptions.from_dict({"chains": True})
    with pytest.raises(InputError, match=r'\[model\] species_covariance = "no"'):
        ModelSpec.from_dict({"kind": "correlated", "traits": ["a", "b"], "species_covariance": "no"})
    # None (only possible from Python) means "not given"
    assert SamplingOptions.from_dict({"progress": None, "seed": 3}).seed == 3


# ------------------------------------------------------------------ the reader itself
def test_did_you_mean_prefers_case_and_dash_differences():
    assert did_you_mean("Seed", ["seed", "send"]) == " (did you mean 'seed'?)"
    assert did_you_mean("se-suffix", ["se_suffix", "n_suffix"]) == " (did you mean 'se_suffix'?)"
    assert did_you_mean("zzz", ["seed"]) == ""
    assert did_you_mean("sampeling", ["data", "sampling"], "[{}]") == " (did you mean [sampling]?)"


def test_toml_value_writes_values_as_in_a_file():
    # as the TOML specification writes them
    assert toml_value(True) == "true" and toml_value("no") == '"no"'
    assert toml_value([1, "a"]) == '[1, "a"]' and toml_value({"a": 1}) == "{ a = 1 }"


def test_table_only_accepts_the_other_keys_unchecked():
    t = Table("t", {"a": Key("int"), "b": Key("bool")})
    assert read_table({"a": 1, "b": "not checked"}, t.only("a")) == {"a": 1}
    with pytest.raises(InputError, match=r"\[t\] needs a = \.\.\."):
        read_table({"b": True}, t.only("a", required=("a",)), Where(None, "[t]"))


def test_defaults_are_filled_only_when_asked():
    t = Table("t", {"n": Key("int", default=2), "m": Key("int")})
    assert read_table({}, t) == {}
    assert read_table({}, t, defaults=True) == {"n": 2}


def test_any_key_tables_check_every_value():
    t = Table("counts", any_key=Key("int", min=1))
    assert read_table({"sp_a": 3}, t) == {"sp_a": 3}
    with pytest.raises(InputError, match=r"\[counts\] sp_b = 0: must be >= 1"):
        read_table({"sp_a": 3, "sp_b": 0}, t)


# ------------------------------------------------------------------ command line
def test_check_command_reports_a_bad_value_with_exit_2_and_no_traceback(folder, capsys):
    from cladewise.cli.main import main

    spec = folder / "spec.toml"
    spec.write_text(DATA_OK + '[model]\nspecies_covariance = "no"\n')
    before = {p.name: p.read_bytes() for p in folder.iterdir()}
    assert main(["check", str(spec)]) == 2
    cap = capsys.readouterr()
    err = " ".join(cap.err.split())
    assert 'species_covariance = "no"' in err and "species_covariance = false" in err
    assert "Traceback" not in err and "The data can be analysed" not in cap.out
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before


def test_check_command_names_an_unknown_section_in_a_subprocess(folder):
    import subprocess
    import sys

    spec = folder / "spec.toml"
    spec.write_text(DATA_OK + "[sampeling]\ndraws = 10\n")
    res = subprocess.run([sys.executable, "-m", "cladewise", "check", str(spec)],
                         capture_output=True, text=True, timeout=300)
    err = " ".join(res.stderr.split())
    assert res.returncode == 2
    assert "unknown section [sampeling] (did you mean [sampling]?)" in err and "Traceback" not in err
