"""Convergence diagnostics of a fit, put in words.

One function, :func:`diagnose`, judges a single fit and a fit pooled over a tree
sample alike. Thresholds are those of Vehtari et al. 2021 (Bayesian Analysis
16:667-718): R-hat above 1.01, bulk or tail ESS below 400, any divergent transition;
E-BFMI below 0.3 is common practice (Betancourt 2016).

A pooled fit carries a ``tree`` coordinate on ``chain``. Its chains are judged within
each tree: R-hat across trees is inflated on purpose (different trees give different
posteriors), so R-hat is the worst within-tree value, ESS is summed over trees
(independent runs), divergences are summed and E-BFMI is the lowest of any chain.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import arviz as az
import numpy as np
import pandas as pd

__all__ = ["Diagnostics", "diagnose", "RHAT_MAX", "ESS_MIN", "BFMI_MIN"]

RHAT_MAX = 1.01
ESS_MIN = 400
BFMI_MIN = 0.3


@dataclass
class Diagnostics:
    """Convergence diagnostics of one fit, with the verdict in words."""

    max_rhat: float
    min_ess_bulk: float
    min_ess_tail: float
    divergences: int
    min_bfmi: float
    n_draws: int
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def to_text(self) -> str:
        head = (
            f"R-hat max {self.max_rhat:.3f}, bulk ESS min {self.min_ess_bulk:.0f}, "
            f"tail ESS min {self.min_ess_tail:.0f}, divergences {self.divergences}, "
            f"E-BFMI min {self.min_bfmi:.2f} ({self.n_draws} draws)"
        )
        if self.ok:
            return head + "\nDiagnostics: no problems found (thresholds of Vehtari et al. 2021)."
        return head + "\nDiagnostics found problems:\n" + "\n".join(f"  - {p}" for p in self.problems)

    def to_dict(self) -> dict[str, Any]:
        return {
            "max_rhat": self.max_rhat, "min_ess_bulk": self.min_ess_bulk,
            "min_ess_tail": self.min_ess_tail, "divergences": self.divergences,
            "min_bfmi": self.min_bfmi, "n_draws": self.n_draws, "ok": self.ok,
            "problems": list(self.problems),
        }


def _finite_max(a: np.ndarray) -> float:
    a = np.asarray(a, dtype=float)
    return float(np.max(a[np.isfinite(a)])) if np.isfinite(a).any() else float("nan")


def _finite_min(a: np.ndarray) -> float:
    a = np.asarray(a, dtype=float)
    return float(np.min(a[np.isfinite(a)])) if np.isfinite(a).any() else float("nan")


def _chain_groups(post: Any) -> list[tuple[int | None, np.ndarray]]:
    """(tree index or None, chain positions) for every group of chains judged together."""
    n = int(post.sizes["chain"])
    if "tree" not in post.coords:
        return [(None, np.arange(n))]
    tree_of_chain = np.asarray(post.coords["tree"].values)
    return [(int(t), np.flatnonzero(tree_of_chain == t)) for t in dict.fromkeys(tree_of_chain.tolist())]


def _group_stats(idata: az.InferenceData, names: list[str], chains: np.ndarray) -> tuple[pd.DataFrame | None, int, float]:
    post = idata.posterior.isel(chain=chains)
    # correlation matrices have a constant diagonal: R-hat/ESS are NaN there, dropped later;
    # unrounded (az.summary rounds to 2 decimals by default, which hides an R-hat of 1.014)
    summ = az.summary(post, var_names=names, kind="diagnostics", round_to="none") if names else None
    stats = idata.sample_stats.isel(chain=chains) if "sample_stats" in idata.groups() else None
    div = int(np.asarray(stats["diverging"]).sum()) if stats is not None and "diverging" in stats else 0
    bfmi = float("nan")
    if stats is not None and "energy" in stats:
        energy = np.asarray(stats["energy"].transpose("chain", "draw").values, dtype=float)
        if energy.shape[1] > 1:
            bfmi = _finite_min(az.bfmi(energy))
    return summ, div, bfmi


def diagnose(idata: az.InferenceData, var_names: Sequence[str]) -> Diagnostics:
    """R-hat, ESS, divergences and E-BFMI of a fit, and every problem in words.

    Parameters
    ----------
    idata : arviz.InferenceData
        Posterior and sample_stats; chains pooled over a tree sample carry a
        ``tree`` coordinate on ``chain`` and are judged within each tree.
    var_names : sequence of str
        The reported quantities (others, e.g. raw sampler variables, are ignored).

    Returns
    -------
    Diagnostics
    """
    post = idata.posterior
    names = [v for v in var_names if v in post]
    groups = _chain_groups(post)
    pooled = groups[0][0] is not None
    rhats: list[float] = []
    ess_b: list[pd.Series] = []
    ess_t: list[pd.Series] = []
    divs: list[int] = []
    bfmis: list[float] = []
    for _, chains in groups:
        summ, div, bfmi = _group_stats(idata, names, chains)
        if summ is not None:
            rhats.append(_finite_max(summ["r_hat"].to_numpy()) if len(chains) > 1 else float("nan"))
            ess_b.append(summ["ess_bulk"].astype(float))
            ess_t.append(summ["ess_tail"].astype(float))
        divs.append(div)
        bfmis.append(bfmi)
    rh = np.array(rhats, dtype=float)
    max_rhat = _finite_max(rh)
    min_eb = _finite_min(pd.concat(ess_b, axis=1).sum(axis=1, min_count=1)) if ess_b else float("nan")
    min_et = _finite_min(pd.concat(ess_t, axis=1).sum(axis=1, min_count=1)) if ess_t else float("nan")
    div = int(sum(divs))
    bfmi = _finite_min(np.array(bfmis))
    n_draws = int(post.sizes["chain"] * post.sizes["draw"])
    chains_per_group = min(len(c) for _, c in groups)

    summed = " (summed over trees)" if pooled else ""
    problems = []
    if pooled:
        bad = [(t, r) for (t, _), r in zip(groups, rh) if r > RHAT_MAX]
        if bad:
            listed = ", ".join(f"tree {t} ({r:.3f})" for t, r in bad[:5]) + (" ..." if len(bad) > 5 else "")
            problems.append(f"R-hat > {RHAT_MAX} within {len(bad)} of {len(groups)} trees: {listed}; "
                            "chains disagree; run longer or check the model")
    elif chains_per_group > 1 and max_rhat > RHAT_MAX:
        problems.append(f"R-hat {max_rhat:.3f} > {RHAT_MAX}: chains disagree; run longer or check the model")
    if min_eb < ESS_MIN:
        problems.append(f"bulk ESS {min_eb:.0f}{summed} < {ESS_MIN}: too few effective draws for stable means; draw more")
    if min_et < ESS_MIN:
        problems.append(f"tail ESS {min_et:.0f}{summed} < {ESS_MIN}: interval ends are unstable; draw more")
    if div:
        where = f" on {sum(1 for d in divs if d)} trees" if pooled else ""
        problems.append(f"{div} divergent transitions{where}: the posterior may be biased; "
                        "raise target_accept or reparametrise")
    if np.isfinite(bfmi) and bfmi < BFMI_MIN:
        problems.append(f"E-BFMI {bfmi:.2f} < {BFMI_MIN}: the sampler explores energy poorly (common practice threshold)")
    if chains_per_group == 1:
        per = " per tree" if pooled else ""
        problems.append(f"only one chain{per}: R-hat cannot check convergence; use 4 chains for results you report")
    return Diagnostics(max_rhat, min_eb, min_et, div, bfmi, n_draws, problems)
