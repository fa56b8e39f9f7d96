"""The binned kernel density used by the report's predictive check for many species."""

from __future__ import annotations

import numpy as np
from scipy import stats

from cladewise.report.figures import _EXACT_KDE_MAX, _density


def test_binned_density_matches_scipy_gaussian_kde():
    # Reference: scipy.stats.gaussian_kde with Scott's bandwidth, evaluated exactly;
    # the binned estimate (Silverman 1982, Appl. Stat. 31:93) must draw the same curve.
    rng = np.random.default_rng(3)
    x = np.r_[rng.normal(size=6000), rng.normal(3.0, 0.5, size=2000)]
    assert x.size > _EXACT_KDE_MAX
    grid = np.linspace(-4.0, 6.0, 200)
    ref = stats.gaussian_kde(x)(grid)
    got = _density(x, grid)
    assert np.max(np.abs(got - ref)) < 0.01 * ref.max()
    # same mass over the grid as the exact density
    assert abs(np.trapezoid(got, grid) - np.trapezoid(ref, grid)) < 0.01
