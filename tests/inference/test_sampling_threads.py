"""BLAS runs on one thread while chains sample in parallel (issue: speed).

Parallel chains each take a core; OpenBLAS's own worker threads would compete with
them (measured by benchmarks/bench_speed.py). The check reads the thread counts
through threadpoolctl, the library that sets them.
"""

import numpy as np
from threadpoolctl import threadpool_info

from cladewise.inference.sampling import one_blas_thread


def _blas_threads() -> list[int]:
    np.dot(np.ones((4, 4)), np.ones((4, 4)))  # make sure numpy's BLAS is loaded
    return [p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"]


def test_one_blas_thread_inside_and_restored_after():
    before = _blas_threads()
    assert before, "numpy should report its BLAS library"
    with one_blas_thread():
        assert _blas_threads() == [1] * len(before)
    assert _blas_threads() == before
