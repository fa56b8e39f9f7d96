"""How much the tree matters: statistics over the trees of a pooled fit.

A fit pooled over a tree sample (:mod:`cladewise.inference.pooled`) carries a
``tree`` coordinate on ``chain``. The functions here split its draws by tree: the
share of posterior variance due to the tree (law of total variance), per-tree
summaries, and warnings where trees disagree on a sign or on whether an interval
excludes zero.

The fitting and pooling API moved: :class:`~cladewise.inference.pooled.TreeSampleFit`,
:func:`~cladewise.inference.pooled.fit_tree_sample` and
:func:`~cladewise.inference.pooled.pool_tree_fits` live in
:mod:`cladewise.inference.pooled`; padding and alignment in
:mod:`cladewise.inference.tree_align`.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import arviz as az
import numpy as np
import pandas as pd

from cladewise.errors import InputError
from cladewise.inference.fit import HDI_PROB, iter_quantities
from cladewise.model.quantities import signed_names, summary_names

__all__ = [
    "SIGNED_VARS",
    "tree_variance_share",
    "per_tree_summary",
    "tree_disagreement",
]

#: quantities whose sign and "HDI excludes zero" verdict are checked across trees
SIGNED_VARS = signed_names()



def _as_idata(pooled: Any) -> az.InferenceData:
    return pooled.idata if hasattr(pooled, "idata") else pooled


def _default_vars(pooled: Any, idata: az.InferenceData) -> list[str]:
    built = getattr(pooled, "built", None)
    if built is not None:
        return list(built.summary_vars)
    names = summary_names(idata.posterior.data_vars)
    return names or list(idata.posterior.data_vars)


def _tree_groups(idata: az.InferenceData) -> tuple[np.ndarray, np.ndarray]:
    post = idata.posterior
    if "tree" not in post.coords:
        raise InputError("this InferenceData has no 'tree' coordinate; pool it with fit_tree_sample first")
    tree_of_chain = np.asarray(post.coords["tree"].values)
    return tree_of_chain, np.unique(tree_of_chain)


def tree_variance_share(pooled: Any, var_names: Sequence[str] | None = None) -> pd.DataFrame:
    """Share of posterior variance due to tree uncertainty, per reported quantity.

    By the law of total variance, Var(theta) = E_tree[Var(theta | tree)] +
    Var_tree(E[theta | tree]); the share is the second term over the total, with
    every tree weighted equally (as in the pooled mixture). Zero when all trees give
    the same posterior, one when the tree alone decides the value.

    Parameters
    ----------
    pooled : TreeSampleFit or arviz.InferenceData
        A pooled fit (its posterior carries the ``tree`` coordinate on ``chain``).
    var_names : sequence of str, optional
        Posterior variables (default: the summary's variables).

    Returns
    -------
    DataFrame
        Columns quantity, variable, total_sd, within_tree_sd (root mean within-tree
        variance), between_sd (sd of the tree means), tree_share.
    """
    idata = _as_idata(pooled)
    names = list(var_names) if var_names else _default_vars(pooled, idata)
    tree_of_chain, trees = _tree_groups(idata)
    rows = []
    for name, label, vals in iter_quantities(idata, names):
        groups = [vals[tree_of_chain == t].ravel() for t in trees]
        means = np.array([g.mean() for g in groups])
        within = np.array([g.var() for g in groups])
        between = float(means.var())  # equal weights, population variance
        within_mean = float(within.mean())
        total = between + within_mean
        rows.append({
            "quantity": label, "variable": name,
            "total_sd": math.sqrt(total), "within_tree_sd": math.sqrt(within_mean),
            "between_sd": math.sqrt(between),
            "tree_share": between / total if total > 0 else float("nan"),
        })
    return pd.DataFrame(rows, columns=["quantity", "variable", "total_sd", "within_tree_sd", "between_sd", "tree_share"])


def per_tree_summary(pooled: Any, var_names: Sequence[str] | None = None) -> pd.DataFrame:
    """Mean, sd, HDI and P(>0) of every quantity on every tree (long format).

    Columns: tree (sample index), quantity, variable, mean, sd, hdi_low, hdi_high,
    prob_positive (correlations, slopes, coefficients only).
    """
    idata = _as_idata(pooled)
    names = list(var_names) if var_names else _default_vars(pooled, idata)
    tree_of_chain, trees = _tree_groups(idata)
    rows = []
    for name, label, vals in iter_quantities(idata, names):
        for t in trees:
            flat = vals[tree_of_chain == t].ravel()
            hdi = az.hdi(flat, hdi_prob=HDI_PROB)
            rows.append({
                "tree": int(t), "quantity": label, "variable": name,
                "mean": float(flat.mean()), "sd": float(flat.std(ddof=1)) if flat.size > 1 else float("nan"),
                "hdi_low": float(hdi[0]), "hdi_high": float(hdi[1]),
                "prob_positive": float((flat > 0).mean()) if name in SIGNED_VARS else float("nan"),
            })
    return pd.DataFrame(rows, columns=["tree", "quantity", "variable", "mean", "sd", "hdi_low",
                                       "hdi_high", "prob_positive"])


def tree_disagreement(per_tree: pd.DataFrame) -> list[str]:
    """Warnings where trees disagree on the sign of a correlation, slope or coefficient,
    or on whether its 95% HDI excludes zero."""
    out = []
    sub = per_tree[per_tree["variable"].isin(SIGNED_VARS)]
    for q, g in sub.groupby("quantity", sort=False):
        m = len(g)
        pos = int((g["mean"] > 0).sum())
        neg = int((g["mean"] < 0).sum())
        if pos and neg:
            out.append(f"{q}: the posterior mean is positive on {pos} and negative on {neg} of {m} trees")
        excl = ((g["hdi_low"] > 0) | (g["hdi_high"] < 0)).to_numpy()
        if excl.any() and not excl.all():
            out.append(
                f"{q}: the {int(HDI_PROB * 100)}% HDI excludes zero on {int(excl.sum())} of {m} trees "
                "but not on the others; the conclusion depends on the tree"
            )
    return out
