"""The colour ramp of values painted on the tree reads in greyscale: lightness rises monotonically."""

from __future__ import annotations

import numpy as np
from matplotlib.colors import to_rgb

from cladewise.report.style import VALUE_RAMP, value_colormap


def cie_lightness(rgb: np.ndarray) -> np.ndarray:
    """CIE 1976 L* of sRGB colours (sRGB transfer curve: IEC 61966-2-1; L*: CIE 15:2004)."""
    c = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    Y = c @ np.array([0.2126, 0.7152, 0.0722])
    f = np.where(Y > (6 / 29) ** 3, np.cbrt(Y), Y / (3 * (6 / 29) ** 2) + 4 / 29)
    return 116 * f - 16


def test_ramp_lightness_is_monotone_and_spans_the_range():
    stops = cie_lightness(np.array([to_rgb(h) for h in VALUE_RAMP]))
    assert np.all(np.diff(stops) > 8)  # distinct grey levels at every stop
    sampled = cie_lightness(value_colormap()(np.linspace(0, 1, 256))[:, :3])
    assert np.all(np.diff(sampled) > 0)  # also between the stops, as interpolated
    assert sampled[0] < 15 and sampled[-1] > 85


def test_values_on_tree_figure_draws_every_branch():
    from treegen import random_tree

    from cladewise.report.ancestral_report import plot_values_on_tree

    rng = np.random.default_rng(1)
    tree = random_tree(12, rng)
    nodes = rng.normal(size=tree.n_nodes - tree.n_tips)
    tips = rng.normal(size=tree.n_tips)
    pred = np.zeros(tree.n_tips, bool)
    pred[3] = True
    fig = plot_values_on_tree(tree, nodes, tips, pred, "trait")
    ax = fig.axes[0]
    branches = ax.collections[0]
    assert len(branches.get_paths()) == 8 * (tree.n_nodes - 1)
    lo, hi = branches.get_clim()
    assert lo == min(nodes.min(), tips.min()) and hi == max(nodes.max(), tips.max())
