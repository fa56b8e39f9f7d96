"""The C callbacks handed to nutpie carry no data: large arrays stay cacheable.

nutpie freezes the shared arrays it is given into the compiled code (as typed
placeholders; the real arrays arrive through ``user_data`` at each call). numba
cannot serialise code that refers to an array above 1 MB, so before
``nutpie_callbacks`` passed tiny placeholders, a model of more than about 60,000
species compiled afresh in every process. Reference: the callback's value is checked
against the plain numpy sum of the array it must read at run time.
"""

from __future__ import annotations

import ctypes

import numba
import numpy as np
import pytensor
import pytest

from cladewise.inference.cache_store import make_cfunc, nutpie_callbacks


@numba.njit
def _inner(x, lengths, parent, values):
    s = np.sum(lengths) + np.sum(parent) + np.sum(values)
    return s * x[0], np.full(1, s)


def _arrays(n: int) -> dict[str, np.ndarray]:
    # mixed dtypes and ranks, as a real model's tree and trait data (numba lowers such
    # a tuple's arrays as constants)
    return {"lengths": np.linspace(0.0, 1.0, 2 * n), "parent": np.arange(2 * n, dtype=np.int32),
            "values": np.ones((n, 2))}


@pytest.mark.parametrize("n", [10, 100_000])  # 2 x 100,000 float64 = 1.6 MB, above numba's 1 MB
def test_callback_is_cacheable_and_reads_the_data_at_run_time(n):
    shared = {k: pytensor.shared(v, name=k) for k, v in _arrays(n).items()}
    cb = nutpie_callbacks(1, 0, _inner, _inner, shared, list(shared), [])
    raw, sig = cb["raw"]["logp"]
    cfunc, cache = make_cfunc(raw, sig)
    assert cache.saved is not None  # serialisable: goes into the on-disk cache

    x, grad, logp = np.array([2.0]), np.zeros(1), np.zeros(1)
    dptr = ctypes.POINTER(ctypes.c_double)
    rc = cfunc.ctypes(1, x.ctypes.data_as(dptr), grad.ctypes.data_as(dptr), logp.ctypes.data_as(dptr),
                      ctypes.c_void_p(cb["user_data"].ctypes.data))
    assert rc == 0
    total = sum(float(v.sum()) for v in _arrays(n).values())
    assert logp[0] == pytest.approx(2.0 * total, rel=1e-12)
    assert grad[0] == pytest.approx(total, rel=1e-12)
