"""Shared random cases for the engine tests (invented data)."""

from __future__ import annotations

import numpy as np
from hypothesis import strategies as st

from cladewise.engine.testing import random_rate_matrix, random_tree


def make_case(seed, n_tips, k, max_children=3, zero_internal=0.2, root_edge=False,
              with_E=False, with_err=True, p_missing=0.2, n_species_missing=0,
              err_full=False):
    rng = np.random.default_rng(seed)
    parent, lengths = random_tree(
        n_tips, rng, max_children=max_children, zero_internal=zero_internal,
        root_edge=float(rng.uniform(0.2, 1.0)) if root_edge else 0.0,
    )
    R = random_rate_matrix(k, rng)
    E = random_rate_matrix(k, rng, scale=0.5) if with_E else np.zeros((k, k))
    err_var = rng.uniform(0.01, 0.5, (n_tips, k)) if with_err else np.zeros((n_tips, k))
    if with_err and err_full:
        # per-species error covariance with correlated traits (same specimens)
        A = rng.normal(size=(n_tips, k, k))
        err_var = 0.2 * A @ np.swapaxes(A, 1, 2) / k + 0.02 * np.eye(k)
    elif err_full:
        err_var = np.zeros((n_tips, k, k))
    observed = rng.random((n_tips, k)) >= p_missing
    if n_species_missing:
        observed[rng.choice(n_tips, min(n_species_missing, n_tips), replace=False)] = False
    y = rng.normal(size=(n_tips, k)) * 2.0
    mu = rng.normal(size=k)
    return dict(parent=parent, lengths=lengths, y=y, observed=observed, R=R, E=E,
                err_var=err_var, mu=mu)


@st.composite
def cases(draw, max_tips=60, max_k=3):  # k = 4..6: slow tests in test_kernels_small.py
    return make_case(
        seed=draw(st.integers(0, 2**32 - 1)),
        n_tips=draw(st.integers(3, max_tips)),
        k=draw(st.integers(1, max_k)),
        max_children=draw(st.integers(2, 4)),
        zero_internal=draw(st.sampled_from([0.0, 0.3])),
        root_edge=draw(st.booleans()),
        with_E=draw(st.booleans()),
        with_err=draw(st.booleans()),
        p_missing=draw(st.sampled_from([0.0, 0.2, 0.5])),
        n_species_missing=draw(st.integers(0, 2)),
        err_full=draw(st.booleans()),
    )


def nan_unobserved(case):
    """The same case with NaN in the unobserved cells (the numpy API accepts them)."""
    c = dict(case)
    y = case["y"].copy()
    y[~case["observed"]] = np.nan
    c["y"] = y
    return c
