"""Simulation-based calibration of the correlated, regression and specimens models.

Talts, Betancourt, Simpson, Vehtari & Gelman 2018 (arXiv:1804.06788): true
parameters are drawn from the compiled model's own prior, data are simulated from
them, the same model is refitted, and the rank of each true value among ``L``
thinned posterior draws is recorded. Ranks are uniform on ``0..L`` and central
posterior intervals cover at their nominal rate when the fit is right.

The model is built once on a reference data set simulated on the tree (spread about
1 per trait) and its prior, scaled to that reference, is the prior the truths are
drawn from, as the method requires (see :mod:`cladewise.studies.refit`). Truths
include the engine's inputs (transformed branch lengths, rate matrix, root), so data
are simulated by the model's own generative process. Settings: ``correlated``
(known se), ``regression`` (``y ~ x``, x offset from zero and held fixed) and
``specimens`` (correlated within-species error; rebuilt and compiled per data set, so
its data-scaled prior scales follow each data set: close to, not exactly, SBC).
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
    compile_study,
    default_study_options,
    fit_problems,
    say,
    simulate_datasets,
)

__all__ = ["CalibrationResult", "SETTINGS", "run_calibration", "rank_of_truth", "summarise_ranks"]


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
            f"{s.get('title', _TITLES['correlated'])}; ranks among {s['n_rank_draws']} thinned draws "
            f"({s['draws_per_fit']} per fit); {s['divergences']} divergent transitions in all, "
            f"in {s['fits_with_divergences']} of {s['n_datasets']} fits.",
            "",
            "Coverage of central posterior intervals (Monte Carlo se = binomial at the nominal rate):",
        ]
        cov = self.coverage.pivot(index="parameter", columns="nominal", values="coverage")
        se = self.coverage.pivot(index="parameter", columns="nominal", values="mcse")
        ok = self.coverage.pivot(index="parameter", columns="nominal", values="within_2se")
        order = list(dict.fromkeys(self.coverage["parameter"]))
        head = f"{'parameter':<31}" + "".join(f"{f'{100 * q:.0f}%':>20}" for q in cov.columns)
        lines.append(head)
        for p in order:
            cells = "".join(
                f"{cov.loc[p, q]:>9.3f} +- {se.loc[p, q]:.3f}{'' if ok.loc[p, q] else ' *':<2}"
                for q in cov.columns
            )
            lines.append(f"{p:<31}{cells}")
        lines.append("(* more than 2 Monte Carlo se from nominal)")
        lines.append("")
        lines.append("Uniformity of ranks (chi-square on binned ranks, scipy.stats.chisquare):")
        for _, r in self.uniformity.iterrows():
            lines.append(f"{r.parameter:<31} chi2 = {r.chi2:7.2f}  df = {int(r.df)}  p = {r.p_value:.3f}")
        return "\n".join(lines)


#: parameters checked in each setting (model variables; every element is ranked)
CALIBRATED = {
    "correlated": ("evo_corr", "evo_rate", "root_mean"),
    "regression": ("coef", "intercept_at_mean", "evo_rate"),
    "specimens": ("evo_corr", "within_corr", "evo_rate"),
}
SETTINGS = tuple(CALIBRATED)
_TITLES = {
    "correlated": "correlated BM with known standard errors",
    "regression": "phylogenetic regression y ~ x with x of mean 9 and sd 0.5",
    "specimens": "correlated BM of species means from specimens with correlated within-species error",
}


def _labelled(name: str, value: np.ndarray, coords: list[list[Any]], sample_ndim: int) -> dict[str, np.ndarray]:
    """Catalogue label -> ``value[..., element]`` for one parameter (``sample_ndim`` leading sample axes)."""
    return {label: value[(Ellipsis,) + idx] for idx, label in element_labels(name, coords)}


def _named_draws(post: Any, names: Sequence[str]) -> dict[str, np.ndarray]:
    """Draws of every checked element (chains concatenated), by catalogue label."""
    out: dict[str, np.ndarray] = {}
    for name in names:
        da = post[name]
        coords = [list(da.coords[d].values) for d in da.dims[2:]]
        v = da.to_numpy()
        out.update(_labelled(name, v.reshape((-1,) + v.shape[2:]), coords, 1))
    return out


def _reference_data(setting: str, tree: FlatTree, evolution: str, se_arr: np.ndarray | None,
                    counts: np.ndarray | None, x: np.ndarray | None, gen: np.random.Generator):
    """Reference data (spread about 1 per trait, which scales the priors) and the spec of a setting."""
    from cladewise.model.build import ModelData, ModelSpec

    species = list(tree.tip_names)
    # BM with rate 1 / (mean root-to-tip length) gives a tip variance near 1
    R = np.eye(2) / float(np.mean(tree.tip_heights()))
    me = "se" if se_arr is not None else "none"
    if setting == "regression":
        e = simulate_datasets(tree, R[:1, :1], np.zeros(1), se_arr, gen, 1)[0][:, 0]
        values = pd.DataFrame({"y": (x - x.mean()) + e, "x": x}, index=species)
        se_df = None if se_arr is None else pd.DataFrame({"y": se_arr[:, 0]}, index=species)
        spec = ModelSpec(kind="regression", formula="y ~ x", evolution=evolution, measurement_error=me)
        return ModelData(tree, values, se=se_df), spec
    traits = ["trait_1", "trait_2"]
    if setting == "specimens":
        W = 0.25 * np.array([[1.0, 0.5], [0.5, 1.0]])
        data = _specimen_data(tree, simulate_datasets(tree, R, np.zeros(2), None, gen, 1)[0],
                              np.broadcast_to(W, (tree.n_tips, 2, 2)), counts, traits, gen)
        return data, ModelSpec(kind="correlated", traits=traits, evolution=evolution, measurement_error="specimens")
    values = pd.DataFrame(simulate_datasets(tree, R, np.zeros(2), se_arr, gen, 1)[0], index=species, columns=traits)
    se_df = None if se_arr is None else pd.DataFrame(se_arr, index=species, columns=traits)
    return ModelData(tree, values, se=se_df), ModelSpec(kind="correlated", traits=traits, evolution=evolution,
                                                         measurement_error=me)


def _specimen_data(tree: FlatTree, X: np.ndarray, W: np.ndarray, counts: np.ndarray, traits: list[str],
                   gen: np.random.Generator):
    """ModelData of specimen rows ``X_i + e``, ``e ~ N(0, W_i)``, ``counts[i]`` per species."""
    from cladewise.model.build import ModelData

    rows = [X[i] + gen.standard_normal((int(counts[i]), X.shape[1])) @ np.linalg.cholesky(W[i]).T
            for i in range(tree.n_tips)]
    spec_rows = pd.DataFrame(np.concatenate(rows), columns=traits)
    spec_rows.insert(0, "species", np.repeat(np.asarray(tree.tip_names, dtype=object), counts))
    means = spec_rows.groupby("species", sort=False)[traits].mean().reindex(list(tree.tip_names))
    return ModelData(tree, means, specimens=spec_rows)


def _simulate(setting: str, study: Any, truth: dict[str, np.ndarray], se_arr: np.ndarray | None,
              counts: np.ndarray | None, gen: np.random.Generator) -> Any:
    """One data set from drawn truths by the model's generative process.

    ``truth`` holds the engine inputs (transformed branch ``lengths``, rate matrix
    ``R``, root ``mu``) and the model variables. Returns the new ``obs_values`` array,
    or a ModelData for the specimens model (its statistics are constants of the model).
    """
    from cladewise.model.simulate import simulate_traits

    tree = study.built.data.tree
    if setting == "specimens":
        X = simulate_traits(tree, truth["R"], truth["mu"], lengths=truth["lengths"], rng=gen)
        sd = np.exp(0.5 * (truth["within_log_var_mean"][None, :]
                           + truth["within_log_var_sd"][None, :] * truth["within_z"]))
        W = sd[:, :, None] * sd[:, None, :] * truth["within_corr"][None, :, :]
        return _specimen_data(tree, X, W, counts, list(study.built.traits), gen)
    y = simulate_traits(tree, truth["R"], truth["mu"], lengths=truth["lengths"], se=se_arr, rng=gen)
    if setting == "regression":
        # the predictors are data, held fixed; the residual is the tree process plus error
        y = y + (study.built.design @ truth["coef"])[:, None]
    return y


def run_calibration(
    tree: FlatTree,
    n_datasets: int = 200,
    *,
    model: str = "correlated",
    evolution: str = "bm",
    se: Any = None,
    measurement_error: str | None = None,
    n_specimens: tuple[int, int] = (3, 6),
    n_rank_draws: int = 99,
    n_bins: int = 10,
    intervals: Sequence[float] = (0.5, 0.9, 0.95),
    options: Any = None,
    seed: int = 1,
    progress: Progress = None,
    scheduler: str | None = None,
    n_workers: int | None = None,
) -> CalibrationResult:
    """Simulation-based calibration of one model setting.

    Parameters
    ----------
    tree : FlatTree
        Fixed tree of the study.
    n_datasets : int
        Number of (truth, data set) pairs drawn from the prior.
    model : {"correlated", "regression", "specimens"}
        ``"correlated"``: bivariate correlated model of species means (checks
        ``evo_corr``, ``evo_rate``, ``root_mean``). ``"regression"``: ``y ~ x`` with the
        predictor drawn once, mean 9 and sd 0.5, and held fixed (checks ``coef``: the
        intercept at x = 0 and the slope, ``intercept_at_mean``, the residual
        ``evo_rate``, and ``lambda`` under Pagel's lambda). ``"specimens"``: two traits
        measured on the same specimens with a within-species correlation (checks
        ``evo_corr``, ``within_corr``, ``evo_rate``); each species has a fixed number of
        specimens drawn once in ``n_specimens``. The specimen statistics are constants
        of that model, so it is built and compiled again per data set (a compile-cache
        hit); its data-scaled prior scales then follow each data set rather than
        the reference, so that setting is close to, not exactly, SBC.
    evolution : {"bm", "lambda"}
        Evolution model (``"lambda"`` adds Pagel's lambda to the checked parameters).
    se : array_like, optional
        Known standard errors (one number, one per trait or ``(n_tips, k)``), in units
        of the reference data's spread (about 1). Default: drawn once per species and
        trait uniformly in [0.25, 0.75]. Not used by ``"specimens"``.
    measurement_error : {"se", "none"}, optional
        For ``"correlated"`` and ``"regression"``; default ``"se"``.
    n_specimens : (int, int)
        Smallest and largest number of specimens per species (``"specimens"``).
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
    scheduler : str, optional
        Run one task per data set on the dask scheduler at this address (or
        scheduler file); truths, data sets and seeds are drawn here first, so the
        result equals the one-process run (:mod:`cladewise.studies.cluster`).
    n_workers : int, optional
        Without ``scheduler``: a local dask cluster of this many processes
        (default: everything in this process).

    Returns
    -------
    CalibrationResult
    """
    import pymc as pm

    check_study_tree(tree)
    if model not in CALIBRATED:
        raise InputError(f"model must be one of {', '.join(SETTINGS)}; got {model!r}")
    if evolution not in ("bm", "lambda"):
        raise InputError(f"evolution must be 'bm' or 'lambda' for the calibration; got {evolution!r}")
    me = "se" if measurement_error is None else measurement_error
    if model != "specimens" and me not in ("se", "none"):
        raise InputError(f"measurement_error must be 'se' or 'none'; got {measurement_error!r}")
    if model == "specimens" and measurement_error not in (None, "specimens"):
        raise InputError("the specimens setting estimates the measurement error from specimens; "
                         "leave measurement_error unset")
    lo_n, hi_n = (int(v) for v in n_specimens)
    if model == "specimens" and not 2 <= lo_n <= hi_n:
        raise InputError(f"n_specimens must be (smallest, largest) with 2 <= smallest <= largest; got {n_specimens!r}")
    if not isinstance(n_datasets, (int, np.integer)) or n_datasets < 2:
        raise InputError(f"n_datasets must be a whole number >= 2; got {n_datasets!r}")
    if (n_rank_draws + 1) % n_bins:
        raise InputError(f"n_rank_draws + 1 ({n_rank_draws + 1}) must be divisible by n_bins ({n_bins})")
    options = default_study_options(options)
    if options.chains * options.draws < n_rank_draws:
        raise InputError(f"chains x draws must be at least n_rank_draws ({n_rank_draws})")
    gen = np.random.default_rng(seed)
    n = tree.n_tips
    k = 1 if model == "regression" else 2
    se_arr = None
    if model != "specimens" and me == "se":
        if se is None:
            se_arr = gen.uniform(0.25, 0.75, size=(n, k))
        else:
            se_arr = measurement_se(tree, se=se)
            if se_arr is None:
                raise InputError("calibration of the measurement-error model needs standard errors > 0")
            se_arr = np.broadcast_to(se_arr, (n, 2))[:, :k]
    counts = gen.integers(lo_n, hi_n + 1, size=n) if model == "specimens" else None
    x = gen.normal(9.0, 0.5, size=n) if model == "regression" else None

    t0 = time.perf_counter()
    ref, spec = _reference_data(model, tree, evolution, se_arr, counts, x, gen)
    rebuild = model == "specimens"
    # the specimens model is compiled per data set; its reference gives only the prior
    say(progress, "building the reference model ..." if rebuild else "compiling the model (once) ...")
    local = scheduler is None and n_workers is None
    # on a cluster the fits are compiled on the workers; here the model only draws the truths
    study = compile_study(ref, spec, options, compile=not rebuild and local)
    say(progress, f"ready in {time.perf_counter() - t0:.0f} s")
    checked = CALIBRATED[model] + (("lambda",) if evolution == "lambda" else ())

    # Truths from the compiled model's own prior (the Potential likelihoods are not drawn).
    m, eng = study.built.model, study.built.engine_inputs
    names = list(checked)
    if model == "regression":
        names.append("coef")
    if model == "specimens":
        names += ["within_log_var_mean", "within_log_var_sd", "within_z", "within_corr"]
    names = list(dict.fromkeys(names))
    drawn = pm.draw([eng["lengths"], eng["R"], eng["mu"]] + [m[v] for v in names], draws=int(n_datasets),
                    random_seed=gen)
    keys = ["lengths", "R", "mu"] + names
    fit_seeds = gen.integers(1, 2**31 - 1, size=int(n_datasets))
    # every data set and seed is drawn here, before any fit: a cluster gives the same numbers
    work = []
    for d in range(int(n_datasets)):
        truth = {key: np.asarray(v[d]) for key, v in zip(keys, drawn)}
        work.append((d, {n: truth[n] for n in checked}, _simulate(model, study, truth, se_arr, counts, gen),
                     int(fit_seeds[d])))
    t1 = time.perf_counter()
    if local:
        results = []
        for d, truth, data, s in work:
            results.append(calibration_rows(study, d, truth, data, s, checked, n_rank_draws, intervals))
            if progress is not None and ((d + 1) % 10 == 0 or d + 1 == n_datasets):
                say(progress, f"{d + 1}/{n_datasets} fits ({(time.perf_counter() - t1) / (d + 1):.1f} s per fit)")
    else:
        from cladewise.studies.cluster import map_study, memo_key

        setup = (ref, spec, options, not rebuild)
        key = memo_key("calibration", *setup)
        results = map_study(_calibration_task, [(key, setup, d, truth, data, s, checked, n_rank_draws, intervals)
                                                for d, truth, data, s in work],
                            scheduler=scheduler, n_workers=n_workers or 2, progress=progress,
                            what="calibration fits")
    rows = [r for res in results for r in res[0]]
    divergences = sum(res[1] for res in results)
    ranks = pd.DataFrame(rows)
    coverage, uniformity = summarise_ranks(ranks, n_rank_draws, n_bins, intervals)
    settings = {
        "model": model, "title": _TITLES[model] + ("" if evolution == "bm" else ", Pagel's lambda")
        + ("" if model == "specimens" or me == "se" else ", no measurement error"),
        "evolution": evolution, "measurement_error": "specimens" if model == "specimens" else me,
        "n_species": n, "n_datasets": int(n_datasets), "n_rank_draws": int(n_rank_draws),
        "n_bins": int(n_bins), "draws_per_fit": options.chains * options.draws,
        "sampling": dataclasses.asdict(options), "seed": int(seed), "divergences": int(divergences),
        "fits_with_divergences": int((ranks.groupby("dataset")["divergences"].first() > 0).sum()),
        "priors": [dataclasses.asdict(p) for p in study.built.priors],
        "recompiled_per_dataset": rebuild,
        "seconds": round(time.perf_counter() - t0, 1),
    }
    return CalibrationResult(ranks, coverage, uniformity, settings)


def calibration_rows(study: Any, d: int, truth: dict[str, np.ndarray], data: Any, seed: int,
                     checked: Sequence[str], n_rank_draws: int,
                     intervals: Sequence[float]) -> tuple[list[dict[str, Any]], int]:
    """Fit data set ``d`` and rank its true values: (rows of ``ranks``, divergences)."""
    idata = study.fit(data, seed)
    n_div = fit_problems(idata)[0]
    true_el: dict[str, np.ndarray] = {}
    for name in checked:
        da = idata.posterior[name]
        true_el.update(_labelled(name, truth[name], [list(da.coords[c].values) for c in da.dims[2:]], 0))
    rows = [{"dataset": d + 1, "parameter": name, "divergences": n_div,
             "divergent_share": n_div / study.draws_per_fit,
             **rank_of_truth(float(true_el[name]), draws, n_rank_draws, intervals)}
            for name, draws in _named_draws(idata.posterior, checked).items()]
    return rows, n_div


def _calibration_task(key: str, setup: tuple, d: int, truth: dict[str, np.ndarray], data: Any, seed: int,
                      checked: Sequence[str], n_rank_draws: int, intervals: Sequence[float],
                      tag: Any = None) -> tuple[list[dict[str, Any]], int]:
    """One calibration fit on a cluster worker; the study is built (and compiled) once per worker."""
    from cladewise.studies.cluster import report_start, worker_memo

    report_start(tag)
    ref, spec, options, compile = setup
    study = worker_memo(key, lambda: compile_study(ref, spec, options, compile=compile))
    return calibration_rows(study, d, truth, data, seed, checked, n_rank_draws, intervals)


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
