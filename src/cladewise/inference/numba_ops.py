"""numba implementations, with cache keys, of PyMC Ops PyTensor would run in object mode.

PyTensor runs an Op without a numba implementation through its Python ``perform``
("object mode"), and a graph holding one cannot be cached, so the whole compiled
model misses the on-disk cache of :mod:`cladewise.inference.compile_cache` in every
new process. PyMC's positive-definiteness check (``MatrixIsPositiveDefinite``, used by
correlation-matrix priors) is such an Op; it gets a plain numba version here, the
same test as PyMC's (a Cholesky factorisation of the upper triangle succeeds).
"""

from __future__ import annotations

import numpy as np
from pymc.distributions.multivariate import PosDefMatrix
from pytensor.link.numba.dispatch import basic as numba_basic
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

__all__: list[str] = []


@register_funcify_default_op_cache_key(PosDefMatrix)
def _numba_posdef(op, node, **kwargs):
    @numba_basic.numba_njit
    def posdef(x):
        # Cholesky of the upper triangle, as scipy.linalg.cholesky(x) reads it; a
        # non-positive (or NaN) pivot means not positive definite
        n = x.shape[0]
        L = np.zeros((n, n))
        for j in range(n):
            s = x[j, j]
            for m in range(j):
                s -= L[j, m] * L[j, m]
            if not s > 0.0:
                return np.array(False)
            d = np.sqrt(s)
            L[j, j] = d
            for i in range(j + 1, n):
                s = x[j, i]
                for m in range(j):
                    s -= L[i, m] * L[j, m]
                L[i, j] = s / d
        return np.array(True)

    return posdef, 1
