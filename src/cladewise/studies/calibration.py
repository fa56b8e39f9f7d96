"""Simulation-based calibration of the correlated Brownian-motion fit with known se.

Talts, Betancourt, Simpson, Vehtari & Gelman 2018 (arXiv:1804.06788): true
parameters are drawn from the compiled model's own prior, data are simulated from
them, the same model is refitted, and the rank of each true value among ``L``
thinned posterior draws is recorded. Ranks are uniform on ``0..L`` and central
posterior intervals cover at their nominal rate when the fit is right.

The model is built once on a reference data set simulated on the tree (spread about
1 per trait) and its prior, scaled to that reference, is the prior the truths are
drawn from, as the method requires (see :mod:`cladewise.studies.refit`).
"""

from __future__ import annotations

import dataclasses
import math
import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from cladewise.data.trees import FlatTree
from cladewise.errors import InputError
from cladewise.model.quantities import element_labels
from cladewise.studies.power import measurement_se
from cladewise.studies.refit import (
    Progress,
    check_study_tree,
    default_study_options,
    fit_problems,
    make_refit_study,
    say,
    simulate_datasets,
)

__all__ = ["CalibrationResult", "run_calibration", "rank_of_truth", "summarise_ranks"]


@dataclass
class CalibrationResult:
    """Outcome of :func:`run_calibration`.

    Attributes
    ----------
    ranks : DataFrame
        One row per data set and parameter: ``dataset``, ``parameter`` (labelled as in
        the summary table, e.g. ``evo_corr[trait_1, trait_2]``), ``divergences`` and
        ``divergent_share`` (divergent transitions of that data set's fit, and their
        share of its draws), ``true``,
        ``rank`` (0..n_rank_draws) and ``in_50``/``in_90``/``in_95`` (true value
        inside the central posterior interval).
    coverage : DataFrame
        Per parameter (and ``all`` pooled) and interval: ``nominal``, ``coverage``,
        ``mcse`` (binomial se at the nominal rate), ``within_2se``.
    uniformity : DataFrame
        Per parameter: chi-square test of the binned ranks against the uniform
        (``chi2``, ``df``, ``p_value``, ``n_bins``).
    settings : dict
    """

    ranks: pd.DataFrame
    coverage: pd.DataFrame
    uniformity: pd.DataFrame
    settings: dict[str, Any] = field(default_factory=dict)

    @property
    def fits(self) -> pd.DataFrame:
        """One row per fit: ``dataset``, ``divergences``, ``divergent_share``."""
        cols = [c for c in ("divergences", "divergent_share") if c in self.ranks.columns]
        return self.ranks.groupby("dataset", sort=False)[cols].first().reset_index()

    def to_text(self) -> str:
        s = self.settings
        lines = [
            f"Simulation-based calibration: {s['n_datasets']} data sets from the prior, {s['n_species']} species, "
            f"correlated BM with known standard errors; ranks among {s['n_rank_draws']} thinned draws "
            f"({s['draws_per_fit']} per fit); {s['divergences']} divergent transitions in all, "
            f"in {s['fits_with_divergences']} of {s['n_datasets']} fits.",
            "",
            "Coverage of central posterior intervals (Monte Carlo se = binomial at the nominal rate):",
        ]
        cov = self.coverage.pivot(index="parameter", columns="nominal", values="coverage")
        se = self.coverage.pivot(index="parameter", columns="nominal", values="mcse")
        ok = self.coverage.pivot(index="parameter", columns="nominal", values="within_2se")
        order = list(dict.fromkeys(self.coverage["parameter"]))
        head = f"{'parameter':<28}" + "".join(f"{f'{100 * q:.0f}%':>20}" for q in cov.columns)
        lines.append(head)
        for p in order:
            cells = "".join(
                f"{cov.loc[p, q]:>9.3f} +- {se.loc[p, q]:.3f}{'' if ok.loc[p, q] else ' *':<2}"
                for q in cov.columns
            )
            lines.append(f"{p:<28}{cells}")
        lines.append("(* more than 2 Monte Carlo se from nominal)")
        lines.append("")
        lines.append("Uniformity of ranks (chi-square on binned ranks, scipy.stats.chisquare):")
        for _, r in self.uniformity.iterrows():
            lines.append(f"{r.parameter:<28} chi2 = {r.chi2:7.2f}  df = {int(r.df)}  p = {r.p_value:.3f}")
        return "\n".join(lines)


#: the calibrated parameters: evolutionary correlation, rates and root means
CALIBRATED = ("evo_corr", "evo_rate", "root_mean")


def _labelled(name: str, value: np.ndarray, traits: list[str], sample_ndim: int) -> dict[str, np.ndarray]:
    """Catalogue label -> ``value[..., element]`` for one parameter (``sample_ndim`` leading sample axes)."""
    coords = [traits] * (value.ndim - sample_ndim)
    return {label: value[(Ellipsis,) + idx] for idx, label in element_labels(name, coords)}


def _named_draws(post: Any, traits: list[str]) -> dict[str, np.ndarray]:
    """Draws of every calibrated element (chains concatenated), by catalogue label."""
    out: dict[str, np.ndarray] = {}
    for name in CALIBRATED:
        v = post[name].to_numpy()
        out.update(_labelled(name, v.reshape((-1,) + v.shape[2:]), traits, 1))
    return out


def run_calibration(
    tree: FlatTree,
    n_datasets: int = 200,
    *,
    se: Any = None,
    n_rank_draws: int = 99,
    n_bins: int = 10,
    intervals: Sequence[float] = (0.5, 0.9, 0.95),
    options: Any = None,
    seed: int = 1,
    progress: Progress = None,
) -> CalibrationResult:
    """Simulation-based calibration of the bivariate correlated BM model with known se.

    Parameters
    ----------
    tree : FlatTree
        Fixed tree of the study.
    n_datasets : int
        Number of (truth, data set) pairs drawn from the prior.
    se : array_like, optional
        Known standard errors (one number, one per trait or ``(n_tips, 2)``), in units
        of the reference data's spread (about 1). Default: drawn once per species and
        trait uniformly in [0.25, 0.75].
    n_rank_draws : int
        ``L``: posterior draws kept, evenly thinned from all draws, to rank each true
        value among (ranks are 0..L). Choose ``L + 1`` divisible by ``n_bins``.
    n_bins : int
        Bins of the chi-square uniformity test.
    intervals : sequence of float
        Central interval probabilities whose coverage is reported.
    options : SamplingOptions, optional
        Default: nutpie, 2 chains, 500 draws, 500 tuning steps.
    seed : int
    progress : callable, optional

    Returns
    -------
    CalibrationResult
    """
    import pymc as pm

    check_study_tree(tree)
    if not isinstance(n_datasets, (int, np.integer)) or n_datasets < 2:
        raise InputError(f"n_datasets must be a whole number >= 2; got {n_datasets!r}")
    if (n_rank_draws + 1) % n_bins:
        raise InputError(f"n_rank_draws + 1 ({n_rank_draws + 1}) must be divisible by n_bins ({n_bins})")
    options = default_study_options(options)
    if options.chains * options.draws < n_rank_draws:
        raise InputError(f"chains x draws must be at least n_rank_draws ({n_rank_draws})")
    traits = ["trait_1", "trait_2"]
    gen = np.random.default_rng(seed)
    n = tree.n_tips
    if se is None:
        se_arr = gen.uniform(0.25, 0.75, size=(n, 2))
    else:
        se_arr = measurement_se(tree, se=se)
        if se_arr is None:
            raise InputError("calibration of the measurement-error model needs standard errors > 0")

    t0 = time.perf_counter()
    # Reference data with a spread of about 1 per trait, so se is on a known scale:
    # BM with rate 1 / (mean root-to-tip length) gives tip variance near 1.
    heights = tree.tip_heights()
    y_ref = simulate_datasets(tree, np.eye(2) / float(np.mean(heights)), np.zeros(2), se_arr, gen, 1)[0]
    say(progress, "compiling the model (once) ...")
    study = make_refit_study(tree, traits, y_ref, se_arr, options)
    say(progress, f"compiled in {time.perf_counter() - t0:.0f} s")

    # Truths from the compiled model's own prior (the Potential likelihood is not drawn).
    m = study.built.model
    corr, rate, root = pm.draw([m["evo_corr"], m["evo_rate"], m["root_mean"]], draws=int(n_datasets),
                               random_seed=gen)
    fit_seeds = gen.integers(1, 2**31 - 1, size=int(n_datasets))
    rows, divergences = [], 0
    t1 = time.perf_counter()
    for d in range(int(n_datasets)):
        R = corr[d] * np.sqrt(np.outer(rate[d], rate[d]))
        y = simulate_datasets(tree, R, root[d], se_arr, gen, 1)[0]
        idata = study.fit(y, int(fit_seeds[d]))
        n_div = fit_problems(idata)[0]
        divergences += n_div
        truth: dict[str, np.ndarray] = {}
        for name, value in zip(CALIBRATED, (corr[d], rate[d], root[d])):
            truth.update(_labelled(name, np.asarray(value), traits, 0))
        for name, draws in _named_draws(idata.posterior, traits).items():
            rows.append({"dataset": d + 1, "parameter": name, "divergences": n_div,
                         "divergent_share": n_div / study.draws_per_fit,
                         **rank_of_truth(float(truth[name]), draws, n_rank_draws, intervals)})
        if progress is not None and ((d + 1) % 10 == 0 or d + 1 == n_datasets):
            say(progress, f"{d + 1}/{n_datasets} fits ({(time.perf_counter() - t1) / (d + 1):.1f} s per fit)")
    ranks = pd.DataFrame(rows)
    coverage, uniformity = summarise_ranks(ranks, n_rank_draws, n_bins, intervals)
    settings = {
        "n_species": n, "n_datasets": int(n_datasets), "n_rank_draws": int(n_rank_draws),
        "n_bins": int(n_bins), "draws_per_fit": options.chains * options.draws,
        "sampling": dataclasses.asdict(options), "seed": int(seed), "divergences": int(divergences),
        "fits_with_divergences": int((ranks.groupby("dataset")["divergences"].first() > 0).sum()),
        "priors": [dataclasses.asdict(p) for p in study.built.priors],
        "seconds": round(time.perf_counter() - t0, 1),
    }
    return CalibrationResult(ranks, coverage, uniformity, settings)


def rank_of_truth(
    truth: float, draws: np.ndarray, n_rank_draws: int = 99, intervals: Sequence[float] = (0.5, 0.9, 0.95)
) -> dict[str, Any]:
    """Rank of a true value among thinned draws, and whether central intervals hold it.

    Parameters
    ----------
    truth : float
    draws : ndarray
        All posterior draws of the parameter (chains concatenated).
    n_rank_draws : int
        ``L``: draws kept, evenly spaced over ``draws`` (thinning brings them close to
        independent, as Talts et al. 2018 require); the rank is in ``0..L``.
    intervals : sequence of float
        Central interval probabilities, computed from all draws.

    Returns
    -------
    dict
        ``true``, ``rank`` and ``in_<100 q>`` per interval.
    """
    draws = np.asarray(draws, dtype=float).ravel()
    thin = draws[np.round(np.linspace(0, draws.size - 1, n_rank_draws)).astype(int)]
    row: dict[str, Any] = {"true": float(truth), "rank": int(np.sum(thin < truth))}
    for q in intervals:
        lo, hi = np.quantile(draws, [(1 - q) / 2, (1 + q) / 2])
        row[f"in_{100 * q:g}"] = bool(lo <= truth <= hi)
    return row


def summarise_ranks(
    ranks: pd.DataFrame, n_rank_draws: int = 99, n_bins: int = 10,
    intervals: Sequence[float] = (0.5, 0.9, 0.95),
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Coverage and rank-uniformity tables from rows of :func:`rank_of_truth`.

    ``ranks`` needs columns ``parameter``, ``rank`` and ``in_<100 q>``. Returns
    ``(coverage, uniformity)`` as described in :class:`CalibrationResult`.
    """
    if (n_rank_draws + 1) % n_bins:
        raise InputError(f"n_rank_draws + 1 ({n_rank_draws + 1}) must be divisible by n_bins ({n_bins})")
    return _coverage_table(ranks, intervals), _uniformity_table(ranks, n_rank_draws, n_bins)


def _coverage_table(ranks: pd.DataFrame, intervals: Sequence[float]) -> pd.DataFrame:
    out = []
    groups = list(ranks.groupby("parameter", sort=False)) + [("all", ranks)]
    for name, g in groups:
        for q in intervals:
            cov = float(g[f"in_{100 * q:g}"].mean())
            # binomial Monte Carlo se at the nominal rate: the spread expected if calibrated
            mcse = math.sqrt(q * (1 - q) / len(g))
            out.append({"parameter": name, "nominal": q, "coverage": cov, "mcse": mcse,
                        "n": len(g), "within_2se": bool(abs(cov - q) <= 2 * mcse)})
    return pd.DataFrame(out)


def _uniformity_table(ranks: pd.DataFrame, n_rank_draws: int, n_bins: int) -> pd.DataFrame:
    out = []
    width = (n_rank_draws + 1) // n_bins
    for name, g in ranks.groupby("parameter", sort=False):
        counts = np.bincount(g["rank"].to_numpy() // width, minlength=n_bins)
        res = stats.chisquare(counts)
        out.append({"parameter": name, "chi2": float(res.statistic), "df": n_bins - 1,
                    "p_value": float(res.pvalue), "n_bins": n_bins})
    return pd.DataFrame(out)
