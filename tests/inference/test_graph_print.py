"""The quick key of the compile cache: equal exactly when the compiled code may be shared.

A quick key must never be equal for models that compute different functions (the
cache would then hand one model another's code; the comparison with PyMC in
test_compile_cache.py is the second line of defence). Reference: PyTensor's own
structural equality of graphs, ``pytensor.graph.basic.equal_computations``, which
compares ops by their declared properties and constants by value.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytensor.tensor as pt
import pytest
from pytensor.graph.basic import Apply, equal_computations
from pytensor.graph.op import Op

from cladewise.inference.compile_cache import quick_key
from cladewise.inference.graph_print import structure_text
from cladewise.model.build import ModelData, ModelSpec, build_model
from treegen import random_tree


def model(seed: int, n: int = 8, **spec):
    rng = np.random.default_rng(seed)
    tree = random_tree(n, rng, ultrametric=True)
    y = rng.normal(size=(n, 2)) * [1.0, 3.0] + [0.5, -2.0]
    data = ModelData(tree=tree, values=pd.DataFrame(y, index=list(tree.tip_names), columns=["a", "b"]))
    return build_model(data, ModelSpec.from_dict({"kind": "correlated", "traits": ["a", "b"], **spec})).model


def test_same_structure_other_data_same_key():
    assert quick_key(model(1)) == quick_key(model(2)) is not None


@pytest.mark.parametrize("change", [
    {"evolution": "lambda"},           # another parameter and another density
    {"priors": {"lkj_eta": 4.0}},      # same parameters, a scalar constant differs
    {"priors": {"root_sd": 2.0}},
    {"n": 9},                          # other sizes: other shapes of data and parameters
])
def test_other_structure_other_key(change):
    n = change.pop("n", 8)
    assert quick_key(model(1, n=n, **change)) != quick_key(model(1))


def test_text_agrees_with_pytensor_structural_equality():
    x, y = pt.vector("x"), pt.vector("y")
    graphs = {
        "a": pt.exp(x) + 2.0 * y,
        "a again": pt.exp(x) + 2.0 * y,
        "constant": pt.exp(x) + 3.0 * y,
        "op": pt.log(x) + 2.0 * y,
        "wiring": pt.exp(y) + 2.0 * x,
        "axis": pt.sum(pt.outer(x, y), axis=0),
        "other axis": pt.sum(pt.outer(x, y), axis=1),
    }
    for name1, g1 in graphs.items():
        for name2, g2 in graphs.items():
            same = equal_computations([g1], [g2], [x, y], [x, y])
            assert (structure_text([g1]) == structure_text([g2])) == same, (name1, name2)


class _Holder(Op):
    __props__ = ("fn",)

    def __init__(self, fn):
        self.fn = fn

    def make_node(self, x):
        return Apply(self, [x], [x.type()])

    def perform(self, node, inputs, outputs):  # pragma: no cover - never run
        outputs[0][0] = self.fn(inputs[0])


def test_a_parameter_without_an_exact_printout_gives_no_text():
    x = pt.vector("x")
    assert structure_text([_Holder(lambda v: v + 1)(x)]) is None
    assert structure_text([_Holder(np.add)(x)]) is None
