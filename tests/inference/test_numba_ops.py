"""numba version of PyMC's positive-definiteness check (so compiled models can be cached)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

pytensor = pytest.importorskip("pytensor")
import pytensor.tensor as pt  # noqa: E402
from pymc.distributions.multivariate import matrix_pos_def  # noqa: E402

import cladewise.inference.numba_ops  # noqa: E402,F401


def _scipy_posdef(a):
    # Reference: scipy.linalg.cholesky succeeds exactly for positive definite input
    try:
        scipy.linalg.cholesky(a)
        return True
    except scipy.linalg.LinAlgError:
        return False


def test_posdef_numba_matches_scipy_cholesky():
    x = pt.dmatrix("x")
    f = pytensor.function([x], matrix_pos_def(x), mode="NUMBA")
    rng = np.random.default_rng(0)
    seen = set()
    for _ in range(40):
        k = int(rng.integers(1, 5))
        A = rng.normal(size=(k, k))
        S = A @ A.T + rng.choice([-1.0, 0.05]) * np.eye(k)  # some definite, some not
        want = _scipy_posdef(S)
        seen.add(want)
        assert bool(f(S)) == want
    assert seen == {True, False}
    assert not bool(f(np.array([[1.0, 2.0], [2.0, 1.0]])))  # eigenvalues 3 and -1


def test_posdef_has_a_cache_key():
    # without a numba version PyTensor runs the Op in object mode and returns no key,
    # which makes every model holding it uncacheable
    from pytensor.link.numba.dispatch.basic import numba_funcify_and_cache_key

    node = matrix_pos_def(pt.dmatrix("x")).owner
    _, key = numba_funcify_and_cache_key(node.op, node=node)
    assert key is not None
