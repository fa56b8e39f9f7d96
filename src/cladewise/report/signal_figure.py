"""The phylogenetic-signal figure: lambda posterior and K permutation null per trait."""

from __future__ import annotations

from typing import Any

import numpy as np

from cladewise.report.style import OKABE_ITO, SERIES, new_figure

__all__ = ["signal_figure"]


def signal_figure(result: Any):
    """One row per trait: left, the posterior of Pagel's lambda (histogram on [0, 1],
    95% HDI shaded, mean marked); right, Blomberg's K of the shuffled values with the
    observed K as a line. Without lambda fits only the right column is drawn."""
    import arviz as az

    rows = result.traits
    has_lambda = any(t.lambda_draws is not None for t in rows)
    ncol = 2 if has_lambda else 1
    fig, axes = new_figure(3.4 * ncol, 2.0 * len(rows) + 0.4, nrows=len(rows), ncols=ncol, squeeze=False)
    for r, t in enumerate(rows):
        if has_lambda:
            ax = axes[r, 0]
            if t.lambda_draws is not None:
                flat = t.lambda_draws.reshape(-1)
                lo, hi = az.hdi(flat, hdi_prob=0.95)
                ax.axvspan(lo, hi, color=SERIES[0], alpha=0.15, lw=0, label="95% HDI")
                ax.hist(flat, bins=np.linspace(0, 1, 81), color=SERIES[0], histtype="stepfilled", alpha=0.7,
                        density=True)
                ax.axvline(flat.mean(), color=OKABE_ITO["black"], ls="--", lw=1, label=f"mean {flat.mean():.2f}")
                ax.legend(frameon=False, fontsize=7, loc="upper left")
            else:
                ax.text(0.5, 0.5, "not fitted", ha="center", va="center", transform=ax.transAxes)
            ax.set_xlim(0, 1)
            ax.set_yticks([])
            ax.set_xlabel("Pagel's lambda")
            ax.set_title(t.trait, loc="left")
        ax = axes[r, ncol - 1]
        k = t.k
        if k.null.size:
            hi = max(float(np.max(k.null)), k.k)
            ax.hist(k.null, bins=40, range=(0, hi * 1.05), color="#999999", histtype="stepfilled",
                    label="shuffled values")
        ax.axvline(k.k, color=SERIES[1], lw=2, label=f"observed K = {k.k:.2f}")
        ax.axvline(1.0, color=OKABE_ITO["black"], ls=":", lw=1, label="K = 1 (Brownian motion)")
        p = "" if np.isnan(k.p_value) else f", p = {k.p_value:.3g}"
        ax.set_title(f"{t.trait}: Blomberg's K{p}" if not has_lambda else f"Blomberg's K{p}", loc="left")
        ax.set_xlabel("K")
        ax.set_yticks([])
        ax.legend(frameon=False, fontsize=7, loc="upper right")
    fig.tight_layout()
    return fig
