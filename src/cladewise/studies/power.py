"""Power and false-positive rate of the correlated Brownian-motion fit.

A study by simulation on the user's own tree, with one compiled model (the
data are ``pm.Data``, so every simulated data set is fitted without recompiling):

:func:`run_power_study`
    For each true evolutionary correlation (default 0, 0.2, 0.4, 0.6) simulate
    ``n_datasets`` data sets of two traits by bivariate Brownian motion with the
    given rates, add measurement error (known standard errors, or a within-species
    variance divided by the number of specimens per species), fit the correlated
    model and record whether the 95% HDI of ``evo_corr`` excludes zero. The share of
    such fits is the power (at a true correlation of 0: the false-positive rate). The
    same share is reported for an ordinary Pearson correlation test that ignores the
    tree (``scipy.stats.pearsonr``, p < 0.05) on the same data, which shows how
    often shared ancestry alone produces a "significant" correlation (Felsenstein
    1985, Am. Nat. 125:1-15). Shares come with binomial Monte Carlo standard errors
    ``sqrt(p (1 - p) / n)``.

Simulation-based calibration of the same model is in :mod:`cladewise.studies.calibration`,
the figure in :func:`cladewise.report.study_figures.plot_power`.

The prior of a built model is scaled to the data it was built on (see
:mod:`cladewise.model.build`). The study builds once, on a reference data set
simulated on the tree with the study's rates and no correlation, and keeps that prior
for every refit, so the prior is close to what a real analysis of such data would use.

Command line: ``cladewise power SPEC --out DIR`` (see :mod:`cladewise.cli.power`
for the spec format).
"""

from __future__ import annotations

import dataclasses
import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from cladewise.data.trees import FlatTree
from cladewise.errors import InputError
from cladewise.inference.fit import json_default
from cladewise.inference.results import atomic_write
from cladewise.studies.refit import (
    Progress,
    check_study_tree,
    default_study_options,
    fit_problems,
    make_refit_study,
    output_folder,
    say,
    simulate_datasets,
)

__all__ = [
    "PowerResult",
    "run_power_study",
    "measurement_se",
]

_DEFAULT_CORRELATIONS = (0.0, 0.2, 0.4, 0.6)


def _pair(value: Any, name: str, positive: bool = False) -> np.ndarray:
    a = np.asarray(value, dtype=float)
    try:
        a = np.broadcast_to(a, (2,)).astype(float)
    except ValueError:
        raise InputError(f"{name} must be one number or two (one per trait); got {value!r}") from None
    if not np.all(np.isfinite(a)) or (positive and np.any(a <= 0)):
        raise InputError(f"{name} must be finite{' and > 0' if positive else ''}; got {value!r}")
    return a


def _traits(traits: Sequence[str]) -> list[str]:
    names = [str(t) for t in traits]
    if len(names) != 2 or names[0] == names[1] or "species" in names:
        raise InputError(f"traits must be two different names (not 'species'); got {list(traits)!r}")
    return names


def measurement_se(
    tree: FlatTree,
    se: Any = None,
    within_variance: Any = None,
    specimens: Any = None,
    seed: int | np.random.Generator | None = 0,
) -> np.ndarray | None:
    """Standard errors of the species means (n_tips x 2), or None for no error.

    Parameters
    ----------
    tree : FlatTree
    se : array_like, optional
        Known standard errors: one number, one per trait, or ``(n_tips, 2)``.
    within_variance : array_like, optional
        Variance among specimens of one species (one number or one per trait); with
        ``specimens`` gives ``se = sqrt(within_variance / n)``.
    specimens : int, (low, high), sequence or mapping, optional
        Specimens per species: one number; ``(low, high)`` drawn once per species
        (both included) from ``seed``; one per species in tip order; or a mapping
        species name -> number that names every tip.
    seed : int or Generator
        Only used to draw ``(low, high)`` sample sizes.
    """
    n = tree.n_tips
    if se is not None and (within_variance is not None or specimens is not None):
        raise InputError("give either standard errors or within_variance with specimens, not both")
    if se is not None:
        a = np.asarray(se, dtype=float)
        try:
            a = np.broadcast_to(a, (n, 2)).astype(float)
        except ValueError:
            raise InputError(
                f"standard errors must be one number, two (one per trait) or an array of shape ({n}, 2)"
            ) from None
        if not np.all(np.isfinite(a)) or np.any(a < 0):
            raise InputError("standard errors must be finite and >= 0")
        return None if not np.any(a > 0) else a
    if (within_variance is None) != (specimens is None):
        raise InputError("within_variance and specimens go together: give both (or standard errors instead)")
    if within_variance is None:
        return None
    w = _pair(within_variance, "within_variance")
    if np.any(w < 0):
        raise InputError("within_variance must be >= 0")
    if isinstance(specimens, Mapping):
        missing = [t for t in tree.tip_names if t not in specimens]
        extra = sorted(set(map(str, specimens)) - set(tree.tip_names))
        if missing or extra:
            raise InputError(
                "specimens per species must name every tip of the tree exactly; "
                + (f"missing: {missing[:5]}{' ...' if len(missing) > 5 else ''} " if missing else "")
                + (f"not in the tree: {extra[:5]}" if extra else "")
            )
        nn = np.array([specimens[t] for t in tree.tip_names], dtype=float)
    elif isinstance(specimens, (tuple, list)) and len(specimens) == 2 and n != 2:
        lo, hi = (int(v) for v in specimens)
        if hi < lo:
            raise InputError(f"specimens range [{lo}, {hi}] has high < low")
        gen = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        nn = gen.integers(lo, hi + 1, size=n).astype(float)
    else:
        nn = np.asarray(specimens, dtype=float)
        try:
            nn = np.broadcast_to(nn, (n,)).astype(float)
        except ValueError:
            raise InputError(
                f"specimens must be a number, [low, high], one number per species ({n}) or a "
                "table species -> number"
            ) from None
    if not np.all(np.isfinite(nn)) or np.any(nn < 1) or np.any(nn != np.round(nn)):
        raise InputError("specimens per species must be whole numbers >= 1")
    out = np.sqrt(w[None, :] / nn[:, None])
    return None if not np.any(out > 0) else out


def _rate_matrix(rates: np.ndarray, corr: float) -> np.ndarray:
    sd = np.sqrt(rates)
    return np.array([[1.0, corr], [corr, 1.0]]) * np.outer(sd, sd)


# ------------------------------------------------------------------ power
@dataclass
class PowerResult:
    """Outcome of :func:`run_power_study`.

    Attributes
    ----------
    table : DataFrame
        One row per true correlation: ``true_correlation``, ``n_datasets``,
        ``share_hdi_excludes_zero`` and ``share_hdi_excludes_zero_mcse`` (share of
        fits whose HDI of evo_corr excludes 0, and its binomial Monte Carlo se), ``pearson_share`` and
        ``pearson_mcse`` (share with Pearson p < alpha), ``phylo_mean_estimate``
        (mean posterior mean of evo_corr), ``pearson_mean_r`` and
        ``fits_with_warnings`` (divergences or R-hat > 1.01).
    fits : DataFrame
        One row per simulated data set.
    settings : dict
        Everything needed to repeat the study.
    """

    table: pd.DataFrame
    fits: pd.DataFrame
    settings: dict[str, Any] = field(default_factory=dict)

    def to_text(self) -> str:
        s = self.settings
        lines = [
            f"Power study: {s['n_species']} species, {s['n_datasets']} data sets per correlation, "
            f"rates {s['rates']}, measurement error: {s['measurement_error']}.",
            f"'phylogenetic' = {100 * s['hdi_prob']:.0f}% HDI of the evolutionary correlation excludes 0; "
            f"'Pearson' = non-phylogenetic Pearson test p < {s['alpha']:g}.",
            "At a true correlation of 0 the share is the false-positive rate. +- is the Monte Carlo se.",
            "",
            f"{'true corr':>9}  {'phylogenetic':>14}  {'Pearson':>14}  {'mean estimate':>13}  {'warnings':>8}",
        ]
        for _, r in self.table.iterrows():
            lines.append(
                f"{r.true_correlation:>9.2f}  {r.share_hdi_excludes_zero:>7.3f} +- {r.share_hdi_excludes_zero_mcse:.3f}  "
                f"{r.pearson_share:>7.3f} +- {r.pearson_mcse:.3f}  {r.phylo_mean_estimate:>13.3f}  "
                f"{int(r.fits_with_warnings):>8d}"
            )
        return "\n".join(lines)

    def save(self, out_dir: str | Path, overwrite: bool = False) -> dict[str, Path]:
        """Write power_table.csv, power_fits.csv and power.json; returns their paths.

        An existing non-empty folder is refused unless ``overwrite`` is true. The
        figure is drawn by :func:`cladewise.report.study_figures.save_power_figure`.
        """
        out = output_folder(out_dir, overwrite)
        names = {"table": "power_table.csv", "fits": "power_fits.csv", "json": "power.json"}

        def write(folder: Path) -> None:
            self.table.to_csv(folder / names["table"], index=False)
            self.fits.to_csv(folder / names["fits"], index=False)
            doc = {"settings": self.settings, "table": self.table.to_dict(orient="records"),
                   "note": "Data simulated by cladewise for a power study; not observations."}
            (folder / names["json"]).write_text(json.dumps(doc, indent=2, default=json_default) + "\n")

        atomic_write(out, write, what="power")
        return {k: out / v for k, v in names.items()}


def run_power_study(
    tree: FlatTree,
    *,
    traits: Sequence[str] = ("trait_1", "trait_2"),
    correlations: Sequence[float] = _DEFAULT_CORRELATIONS,
    n_datasets: int = 100,
    rates: Any = (1.0, 1.0),
    root_means: Any = (0.0, 0.0),
    se: Any = None,
    within_variance: Any = None,
    specimens: Any = None,
    seed: int = 1,
    options: Any = None,
    hdi_prob: float = 0.95,
    alpha: float = 0.05,
    progress: Progress = None,
    scheduler: str | None = None,
    n_workers: int | None = None,
) -> PowerResult:
    """Power and false-positive rate of the correlated BM fit on a tree, by simulation.

    Parameters
    ----------
    tree : FlatTree
        The user's tree (original branch lengths; Brownian motion on them).
    traits : two str
        Names of the two traits (labels only).
    correlations : sequence of float
        True evolutionary correlations, each in (-1, 1).
    n_datasets : int
        Data sets simulated and fitted per correlation.
    rates : one or two float
        Brownian rates (variance per unit branch length) of the two traits.
    root_means : one or two float
        Values at the root.
    se, within_variance, specimens
        Measurement error of the species means, see :func:`measurement_se`; none by
        default. The fit treats these standard errors as known.
    seed : int
        Seeds the simulation and the samplers; the study is reproducible.
    options : SamplingOptions, optional
        Default: nutpie, 2 chains, 500 draws after 500 tuning steps, no progress bar.
    hdi_prob : float
        Width of the highest-density interval that must exclude 0.
    alpha : float
        Significance level of the Pearson test.
    progress : callable, optional
        Called with one line of text after each batch of fits.
    scheduler : str, optional
        Run the fits as one task per data set on the dask scheduler at this address
        (or scheduler file); see :mod:`cladewise.studies.cluster`. The numbers are
        the same as in one process: data sets and seeds are drawn here first.
    n_workers : int, optional
        Without ``scheduler``: run the fits on a local dask cluster of this many
        worker processes (default: in this process).

    Returns
    -------
    PowerResult
    """
    check_study_tree(tree)
    names = _traits(traits)
    corrs = [float(c) for c in np.atleast_1d(np.asarray(correlations, dtype=float))]
    if not corrs or any(not (-1.0 < c < 1.0) for c in corrs):
        raise InputError(f"correlations must be numbers strictly between -1 and 1; got {list(correlations)!r}")
    if not isinstance(n_datasets, (int, np.integer)) or n_datasets < 2:
        raise InputError(f"n_datasets must be a whole number >= 2; got {n_datasets!r}")
    if not 0.5 <= float(hdi_prob) < 1.0 or not 0.0 < float(alpha) < 0.5:
        raise InputError("hdi_prob must be in [0.5, 1) and alpha in (0, 0.5)")
    rates_v = _pair(rates, "rates", positive=True)
    mu = _pair(root_means, "root_means")
    gen = np.random.default_rng(seed)
    se_arr = measurement_se(tree, se, within_variance, specimens, seed=gen)
    options = default_study_options(options)

    t0 = time.perf_counter()
    y_ref = simulate_datasets(tree, _rate_matrix(rates_v, 0.0), mu, se_arr, gen, 1)[0]
    fit_seeds = gen.integers(1, 2**31 - 1, size=(len(corrs), n_datasets))
    # every data set and its sampler seed are fixed here, before any fit, so a
    # cluster gives the same numbers as this process
    work = []
    for ci, c in enumerate(corrs):
        ys = simulate_datasets(tree, _rate_matrix(rates_v, c), mu, se_arr, gen, n_datasets)
        work += [(c, d, ys[d], int(fit_seeds[ci, d])) for d in range(n_datasets)]
    setup = (tree, names, y_ref, se_arr, options)
    if scheduler is None and n_workers is None:
        say(progress, "compiling the model (once for the whole study) ...")
        study = make_refit_study(*setup)
        say(progress, f"compiled in {time.perf_counter() - t0:.0f} s")
        rows = []
        t1 = time.perf_counter()
        for k, (c, d, y, s) in enumerate(work):
            rows.append(power_row(study, c, d, y, s, hdi_prob, alpha))
            if progress is not None and ((d + 1) % 10 == 0 or d + 1 == n_datasets):
                say(progress, f"correlation {c:g}: {d + 1}/{n_datasets} fits "
                               f"({(time.perf_counter() - t1) / (k + 1):.1f} s per fit)")
    else:
        from cladewise.studies.cluster import map_study

        study = make_refit_study(*setup, compile=False)  # here only for its prior and spec
        from cladewise.studies.cluster import memo_key

        key = memo_key("power", *setup)
        rows = map_study(_power_task, [(key, setup, c, d, y, s, hdi_prob, alpha) for c, d, y, s in work],
                         scheduler=scheduler, n_workers=n_workers or 2, progress=progress, what="power fits")
    fits = pd.DataFrame(rows)
    table = _power_table(fits)
    settings = {
        "n_species": tree.n_tips, "traits": names, "correlations": corrs, "n_datasets": int(n_datasets),
        "rates": rates_v.tolist(), "root_means": mu.tolist(),
        "measurement_error": "none" if se_arr is None else
        f"known standard errors (median {float(np.median(se_arr)):.3g})",
        "standard_errors": None if se_arr is None else se_arr.tolist(),
        "seed": int(seed), "hdi_prob": float(hdi_prob), "alpha": float(alpha),
        "sampling": dataclasses.asdict(options), "model": study.built.spec.to_dict(),
        "priors": [dataclasses.asdict(p) for p in study.built.priors],
        "prior_note": "priors scaled once to a reference data set simulated with the given rates and "
                      "no correlation, then kept for every fit",
        "seconds": round(time.perf_counter() - t0, 1),
    }
    return PowerResult(table, fits, settings)


def power_row(study: Any, c: float, d: int, y: np.ndarray, seed: int, hdi_prob: float,
              alpha: float) -> dict[str, Any]:
    """Fit one simulated data set and return its row of ``PowerResult.fits``."""
    import arviz as az

    idata = study.fit(y, seed)
    draws = idata.posterior["evo_corr"][:, :, 0, 1].to_numpy().ravel()
    lo, hi = az.hdi(draws, hdi_prob=float(hdi_prob))
    r, p = stats.pearsonr(y[:, 0], y[:, 1])
    div, rhat = fit_problems(idata)
    return {
        "true_correlation": c, "dataset": d + 1,
        "evo_corr_mean": float(draws.mean()), "hdi_low": float(lo), "hdi_high": float(hi),
        "phylo_significant": bool(lo > 0 or hi < 0),
        "pearson_r": float(r), "pearson_p": float(p), "pearson_significant": bool(p < alpha),
        "divergences": div, "rhat": rhat,
    }


def _power_task(key: str, setup: tuple, c: float, d: int, y: np.ndarray, seed: int, hdi_prob: float, alpha: float,
                tag: Any = None) -> dict[str, Any]:
    """One power fit on a cluster worker; the compiled study is made once per worker."""
    from cladewise.studies.cluster import report_start, worker_memo

    report_start(tag)
    study = worker_memo(key, lambda: make_refit_study(*setup))
    return power_row(study, c, d, y, seed, hdi_prob, alpha)


def _share(flags: pd.Series) -> tuple[float, float]:
    p = float(np.mean(flags))
    return p, math.sqrt(p * (1.0 - p) / len(flags))


def _power_table(fits: pd.DataFrame) -> pd.DataFrame:
    out = []
    for c, g in fits.groupby("true_correlation", sort=False):
        ph, ph_se = _share(g["phylo_significant"])
        pe, pe_se = _share(g["pearson_significant"])
        warn = (g["divergences"] > 0) | (g["rhat"] > 1.01)
        out.append({
            "true_correlation": c, "n_datasets": len(g),
            "share_hdi_excludes_zero": ph, "share_hdi_excludes_zero_mcse": ph_se, "pearson_share": pe, "pearson_mcse": pe_se,
            "phylo_mean_estimate": float(g["evo_corr_mean"].mean()),
            "pearson_mean_r": float(g["pearson_r"].mean()),
            "fits_with_warnings": int(warn.sum()),
        })
    return pd.DataFrame(out)
