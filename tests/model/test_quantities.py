"""The catalogue of reported quantities and the model descriptions.

Labels are checked against the numbers they name: an element labelled
``evo_slope[a ~ b]`` must hold R_ab / R_bb, the least-squares slope of a on b
(cov(a, b) / var(b), textbook regression; the structural slope of Ives, Midford &
Garland 2007), and a correlation label must name the upper triangle of the matrix
(k (k - 1) / 2 pairs, scipy.special.comb).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import xarray as xr
from scipy.special import comb

from cladewise.model.build import KINDS, MEASUREMENT_ERROR, ModelSpec
from cladewise.model.describe import (
    MEASUREMENT_ERROR_DESCRIPTIONS,
    describe_model,
    measurement_error_description,
)
from cladewise.model.evolution import DESCRIPTIONS, MODELS
from cladewise.model.quantities import (
    QUANTITIES,
    Quantity,
    element_labels,
    plain_words,
    quantity,
    quantity_elements,
    signed_names,
    summary_names,
)

TRAITS = ["size", "shape", "colour"]


def _matrix_da(name: str, M: np.ndarray) -> xr.DataArray:
    # one chain, one draw: the layout of a posterior variable
    return xr.DataArray(M[None, None], dims=("chain", "draw", "trait", "trait_"),
                        coords={"trait": TRAITS, "trait_": TRAITS}, name=name)


def test_slope_labels_name_the_regression_slope_of_row_on_column():
    rng = np.random.default_rng(0)
    x = rng.normal(size=(500, 3)) @ rng.normal(size=(3, 3))
    R = np.cov(x, rowvar=False)
    da = _matrix_da("evo_slope", R / np.diag(R)[None, :])
    got = {label: float(da.isel(sel).values.ravel()[0])
           for sel, label in quantity_elements(da, ["trait", "trait_"], "evo_slope")}
    assert len(got) == 3 * 2  # every ordered pair, no diagonal
    for i, j in itertools.permutations(range(3), 2):
        a, b = TRAITS[i], TRAITS[j]
        # least-squares slope of a on b (numpy polyfit of centred data): cov(a, b) / var(b)
        ref = np.polyfit(x[:, j], x[:, i], 1)[0]
        assert got[f"evo_slope[{a} ~ {b}]"] == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("name", ["evo_corr", "species_corr", "within_corr"])
def test_correlation_labels_are_the_upper_triangle(name):
    rng = np.random.default_rng(1)
    C = np.corrcoef(rng.normal(size=(3, 40)))
    da = _matrix_da(name, C)
    pairs = list(quantity_elements(da, ["trait", "trait_"], name))
    assert len(pairs) == comb(3, 2, exact=True)
    for sel, label in pairs:
        i, j = sel["trait"], sel["trait_"]
        assert i < j and label == f"{name}[{TRAITS[i]}, {TRAITS[j]}]"
        assert float(da.isel(sel).values.ravel()[0]) == pytest.approx(C[i, j])


def test_one_dimensional_and_scalar_labels():
    assert list(element_labels("root_mean", [["a", "b"]])) == [((0,), "root_mean[a]"), ((1,), "root_mean[b]")]
    assert list(element_labels("lambda", [])) == [((), "lambda")]
    # a variable the catalogue does not know still gets a label for every element
    assert len(list(element_labels("unknown", [["a", "b"], ["c", "d"]]))) == 4


def test_signed_quantities_and_new_entries():
    assert {"evo_corr", "evo_slope", "coef", "species_corr", "within_corr"} <= signed_names()
    assert not {"evo_rate", "lambda", "phylo_share", "intercept_at_mean"} & signed_names()
    assert quantity("within_corr").labels == "pair"
    assert "mean" in quantity("intercept_at_mean").plain


def test_summary_order_follows_the_catalogue_and_skips_described_only():
    order = [q.name for q in QUANTITIES]
    got = summary_names(["root_mean", "evo_sd", "lambda", "evo_corr", "not_a_quantity"])
    assert got == sorted(got, key=order.index) == ["evo_corr", "lambda", "root_mean"]


def test_plain_words():
    assert plain_words("evo_slope[a ~ b]", "evo_slope") == "evolutionary slope of a on b"
    assert plain_words("evo_corr[a, b]", "evo_corr") == "evolutionary correlation, a & b"
    assert plain_words("within_corr[a, b]", "within_corr").startswith("within-species correlation")
    assert plain_words("root_mean[a]", "root_mean") == "mean at the root, a"
    assert plain_words("lambda", "lambda") == "Pagel's lambda"


def test_bad_label_style_is_refused():
    with pytest.raises(ValueError, match="labels"):
        Quantity("x", "x", labels="diagonal")


@pytest.mark.parametrize("evolution", sorted(MODELS))
def test_every_model_variable_is_catalogued(evolution):
    """Each model the builder makes reports only catalogued quantities."""
    import pandas as pd

    from cladewise.model.build import ModelData, build_model
    from treegen import random_tree

    rng = np.random.default_rng(2)
    tree = random_tree(8, rng, ultrametric=True)
    values = pd.DataFrame(rng.normal(size=(8, 2)), index=list(tree.tip_names), columns=["a", "b"])
    spec = ModelSpec.from_dict({"kind": "correlated", "traits": ["a", "b"], "evolution": evolution,
                                "species_covariance": True})
    built = build_model(ModelData(tree=tree, values=values), spec)
    assert built.summary_vars, evolution
    for v in built.summary_vars:
        assert quantity(v) is not None, v
    # an evolution model's parameter is reported under its public name
    assert len([v for v in built.summary_vars if quantity(v).role == "evolution"]) == len(MODELS[evolution])


def test_one_description_per_model_and_mode():
    assert set(DESCRIPTIONS) == set(MODELS)
    assert set(MEASUREMENT_ERROR_DESCRIPTIONS) == set(MEASUREMENT_ERROR)
    for kind in KINDS:
        traits = ["y"] if kind == "regression" else ["a", "b"]
        spec = ModelSpec.from_dict({"kind": kind, "traits": traits, "evolution": "ou",
                                    **({"formula": "y ~ x"} if kind == "regression" else {})})
        text = describe_model(spec)
        assert DESCRIPTIONS["ou"].name in text
        assert text.endswith(measurement_error_description("none").summary)
    assert DESCRIPTIONS["lambda"].title == "Pagel's lambda (Pagel 1999)"
    assert DESCRIPTIONS["bm"].title == "Brownian motion"
