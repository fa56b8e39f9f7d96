"""Power, false-positive rate and calibration of the correlated Brownian-motion fit.

Two studies by simulation on the user's own tree, both with one compiled model (the
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

:func:`run_calibration`
    Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018,
    arXiv:1804.06788) of the correlated BM model with known standard errors: true
    parameters are drawn from the compiled model's own prior, data are simulated from
    them, the same model is refitted, and the rank of each true value among ``L``
    thinned posterior draws is recorded. Ranks are uniform on ``0..L`` and central
    posterior intervals cover at their nominal rate when the fit is right.

The prior of a built model is scaled to the data it was built on (see
:mod:`cladewise.model.build`). Both studies build once, on a reference data set
simulated on the tree, and keep that prior for every refit: in the power study the
reference has the study's rates and no correlation, so the prior is close to what a
real analysis of such data would use; in the calibration the prior is the one the
truths are drawn from, as the method requires.

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
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from cladewise.inference.fit import json_default
from cladewise.errors import InputError
from cladewise.data.trees import FlatTree

__all__ = [
    "OKABE_ITO",
    "PowerResult",
    "CalibrationResult",
    "run_power_study",
    "run_calibration",
    "rank_of_truth",
    "summarise_ranks",
    "measurement_se",
    "check_study_tree",
    "trait_pair",
    "trait_names",
    "prepare_output_folder",
    "plot_power",
]

#: Okabe & Ito (2008) colour-blind-safe palette.
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9", "green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7",
}

Progress = Callable[[str], None] | None

_DEFAULT_CORRELATIONS = (0.0, 0.2, 0.4, 0.6)


def _default_options(options: Any) -> Any:
    from cladewise.inference.sampling import SamplingOptions

    if options is None:
        # Short chains are enough for a share of intervals; progress bars of hundreds
        # of fits would drown the log.
        options = SamplingOptions(chains=2, draws=500, tune=500, progress=False)
    options.validate()
    return options


def _say(progress: Progress, message: str) -> None:
    if progress is not None:
        progress(message)


# ------------------------------------------------------------------ validation
def check_study_tree(tree: FlatTree) -> None:
    """Refuse a tree a simulation study cannot use (under 4 tips, bad lengths, zero height)."""
    if not isinstance(tree, FlatTree):
        raise InputError("tree must be a cladewise FlatTree (read one with cladewise.data.trees.read_tree)")
    if tree.n_tips < 4:
        raise InputError(f"the tree has {tree.n_tips} tips; a simulation study needs at least 4 species")
    if not np.all(np.isfinite(tree.length)) or np.any(tree.length < 0):
        raise InputError("branch lengths must be finite and >= 0 to simulate on the tree")
    if not float(tree.tip_heights().max()) > 0:
        raise InputError("the tree has zero height: every branch length is 0")


def trait_pair(value: Any, name: str, positive: bool = False) -> np.ndarray:
    """One number or two (one per trait) as a length-2 array; finite (and > 0 if ``positive``)."""
    a = np.asarray(value, dtype=float)
    try:
        a = np.broadcast_to(a, (2,)).astype(float)
    except ValueError:
        raise InputError(f"{name} must be one number or two (one per trait); got {value!r}") from None
    if not np.all(np.isfinite(a)) or (positive and np.any(a <= 0)):
        raise InputError(f"{name} must be finite{' and > 0' if positive else ''}; got {value!r}")
    return a


def trait_names(traits: Sequence[str]) -> list[str]:
    """Two different trait names, neither of them ``species``."""
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
    w = trait_pair(within_variance, "within_variance")
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


# ------------------------------------------------------------------ one model
@dataclass
class _Study:
    """A model built on a reference data set and compiled once."""

    built: Any
    compiled: Any
    options: Any
    err_var: np.ndarray | None

    def fit(self, y: np.ndarray, seed: int) -> Any:
        from cladewise.inference.sampling import sample

        values = {"obs_values": np.asarray(y, dtype=float)}
        if self.err_var is not None:
            values["obs_err_var"] = self.err_var
        opts = dataclasses.replace(self.options, seed=int(seed))
        if self.compiled is not None:
            return sample(self.built, opts, compiled=self.compiled.with_data(**values))
        return sample(self.built, opts, tree_values=values)


def _make_study(tree: FlatTree, traits: list[str], y_ref: np.ndarray, se: np.ndarray | None, options: Any) -> _Study:
    from cladewise.model.build import ModelData, ModelSpec, build_model
    from cladewise.inference.sampling import compile_model

    species = list(tree.tip_names)
    values = pd.DataFrame(y_ref, index=species, columns=traits)
    se_df = None if se is None else pd.DataFrame(se, index=species, columns=traits)
    spec = ModelSpec(kind="correlated", traits=traits, evolution="bm",
                     measurement_error="none" if se is None else "se")
    built = build_model(ModelData(tree, values, se=se_df), spec)
    compiled = compile_model(built, options.sampler)
    return _Study(built, compiled, options, None if se is None else se**2)


def _rate_matrix(rates: np.ndarray, corr: float) -> np.ndarray:
    sd = np.sqrt(rates)
    return np.array([[1.0, corr], [corr, 1.0]]) * np.outer(sd, sd)


def _fit_problems(idata: Any) -> tuple[int, float]:
    import arviz as az

    div = int(np.asarray(idata.sample_stats["diverging"]).sum()) if "diverging" in idata.sample_stats else 0
    rhat = float("nan")
    if idata.posterior.sizes["chain"] > 1:
        da = idata.posterior["evo_corr"][:, :, 0, 1]
        rhat = float(az.rhat(da.to_dataset(name="r"))["r"])
    return div, rhat


# ------------------------------------------------------------------ power
@dataclass
class PowerResult:
    """Outcome of :func:`run_power_study`.

    Attributes
    ----------
    table : DataFrame
        One row per true correlation: ``true_correlation``, ``n_datasets``,
        ``phylo_share`` and ``phylo_mcse`` (share of fits whose HDI of evo_corr
        excludes 0, and its binomial Monte Carlo se), ``pearson_share`` and
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
                f"{r.true_correlation:>9.2f}  {r.phylo_share:>7.3f} +- {r.phylo_mcse:.3f}  "
                f"{r.pearson_share:>7.3f} +- {r.pearson_mcse:.3f}  {r.phylo_mean_estimate:>13.3f}  "
                f"{int(r.fits_with_warnings):>8d}"
            )
        return "\n".join(lines)

    def plot(self, ax: Any = None) -> Any:
        """Draw the power curves; returns the matplotlib Figure."""
        return plot_power(self, ax=ax)

    def save(self, out_dir: str | Path, overwrite: bool = False) -> dict[str, Path]:
        """Write power_table.csv, power_fits.csv, power.json, power.png and power.svg.

        An existing non-empty folder is refused unless ``overwrite`` is true.
        """
        out = prepare_output_folder(out_dir, overwrite)
        paths = {
            "table": out / "power_table.csv", "fits": out / "power_fits.csv",
            "json": out / "power.json", "png": out / "power.png", "svg": out / "power.svg",
        }
        self.table.to_csv(paths["table"], index=False)
        self.fits.to_csv(paths["fits"], index=False)
        doc = {"settings": self.settings, "table": self.table.to_dict(orient="records"),
               "note": "Data simulated by cladewise for a power study; not observations."}
        paths["json"].write_text(json.dumps(doc, indent=2, default=json_default) + "\n")
        fig = self.plot()
        fig.savefig(paths["png"], dpi=150)
        fig.savefig(paths["svg"])
        return paths


def prepare_output_folder(out_dir: str | Path, overwrite: bool) -> Path:
    """Create the output folder; refuse a file or a non-empty folder unless ``overwrite``."""
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out} exists and is not a folder; choose another --out")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise InputError(
            f"output folder {out} is not empty; choose a new folder or pass --overwrite "
            "(overwrite=True) to replace its files"
        )
    out.mkdir(parents=True, exist_ok=True)
    return out


def plot_power(result: PowerResult, ax: Any = None) -> Any:
    """Share of significant results against the true correlation, both methods.

    Okabe-Ito colours with different line styles and markers, so the figure reads in
    greyscale too; bars are +- 1.96 Monte Carlo se, clipped to [0, 1].
    """
    if ax is None:
        # a bare Figure (no pyplot): works headless and leaves the user's backend alone
        from matplotlib.figure import Figure

        fig = Figure(figsize=(6.0, 4.2))
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    t = result.table
    s = result.settings
    x = t["true_correlation"].to_numpy()
    def bars(share: str, se: str) -> np.ndarray:
        # +- 1.96 se, clipped to [0, 1]
        p, half = t[share].to_numpy(), 1.96 * t[se].to_numpy()
        return np.vstack([np.minimum(half, p), np.minimum(half, 1 - p)])

    ax.errorbar(x, t["phylo_share"], yerr=bars("phylo_share", "phylo_mcse"), color=OKABE_ITO["blue"],
                linestyle="-", marker="o", capsize=3,
                label=f"phylogenetic model ({100 * s['hdi_prob']:.0f}% HDI excludes 0)")
    ax.errorbar(x, t["pearson_share"], yerr=bars("pearson_share", "pearson_mcse"), color=OKABE_ITO["vermillion"],
                linestyle="--", marker="s", capsize=3,
                label=f"Pearson test ignoring the tree (p < {s['alpha']:g})")
    ax.axhline(s["alpha"], color=OKABE_ITO["black"], linestyle=":", linewidth=1,
               label=f"nominal false-positive rate {s['alpha']:g}")
    ax.set_xlabel("true evolutionary correlation")
    ax.set_ylabel("share of data sets with a 'significant' correlation")
    ax.set_ylim(-0.02, 1.02)
    ax.set_title(f"{s['n_species']} species, {s['n_datasets']} simulated data sets per point", fontsize=10)
    ax.legend(fontsize=8, loc="best", frameon=False)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return fig


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

    Returns
    -------
    PowerResult
    """
    import arviz as az

    check_study_tree(tree)
    names = trait_names(traits)
    corrs = [float(c) for c in np.atleast_1d(np.asarray(correlations, dtype=float))]
    if not corrs or any(not (-1.0 < c < 1.0) for c in corrs):
        raise InputError(f"correlations must be numbers strictly between -1 and 1; got {list(correlations)!r}")
    if not isinstance(n_datasets, (int, np.integer)) or n_datasets < 2:
        raise InputError(f"n_datasets must be a whole number >= 2; got {n_datasets!r}")
    if not 0.5 <= float(hdi_prob) < 1.0 or not 0.0 < float(alpha) < 0.5:
        raise InputError("hdi_prob must be in [0.5, 1) and alpha in (0, 0.5)")
    rates_v = trait_pair(rates, "rates", positive=True)
    mu = trait_pair(root_means, "root_means")
    gen = np.random.default_rng(seed)
    se_arr = measurement_se(tree, se, within_variance, specimens, seed=gen)
    options = _default_options(options)

    t0 = time.perf_counter()
    y_ref = _simulate(tree, _rate_matrix(rates_v, 0.0), mu, se_arr, gen, 1)[0]
    _say(progress, "compiling the model (once for the whole study) ...")
    study = _make_study(tree, names, y_ref, se_arr, options)
    _say(progress, f"compiled in {time.perf_counter() - t0:.0f} s")

    rows = []
    fit_seeds = gen.integers(1, 2**31 - 1, size=(len(corrs), n_datasets))
    for ci, c in enumerate(corrs):
        ys = _simulate(tree, _rate_matrix(rates_v, c), mu, se_arr, gen, n_datasets)
        t1 = time.perf_counter()
        for d in range(n_datasets):
            y = ys[d]
            idata = study.fit(y, int(fit_seeds[ci, d]))
            draws = idata.posterior["evo_corr"][:, :, 0, 1].to_numpy().ravel()
            lo, hi = az.hdi(draws, hdi_prob=float(hdi_prob))
            r, p = stats.pearsonr(y[:, 0], y[:, 1])
            div, rhat = _fit_problems(idata)
            rows.append({
                "true_correlation": c, "dataset": d + 1,
                "evo_corr_mean": float(draws.mean()), "hdi_low": float(lo), "hdi_high": float(hi),
                "phylo_significant": bool(lo > 0 or hi < 0),
                "pearson_r": float(r), "pearson_p": float(p), "pearson_significant": bool(p < alpha),
                "divergences": div, "rhat": rhat,
            })
            if progress is not None and ((d + 1) % 10 == 0 or d + 1 == n_datasets):
                _say(progress, f"correlation {c:g}: {d + 1}/{n_datasets} fits "
                               f"({(time.perf_counter() - t1) / (d + 1):.1f} s per fit)")
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


def _simulate(tree: FlatTree, R: np.ndarray, mu: np.ndarray, se: np.ndarray | None,
              gen: np.random.Generator, n: int) -> np.ndarray:
    from cladewise.studies.simulate import simulate_traits

    return simulate_traits(tree, R, mu, se=se, rng=gen, n_reps=n)


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
            "phylo_share": ph, "phylo_mcse": ph_se, "pearson_share": pe, "pearson_mcse": pe_se,
            "phylo_mean_estimate": float(g["evo_corr_mean"].mean()),
            "pearson_mean_r": float(g["pearson_r"].mean()),
            "fits_with_warnings": int(warn.sum()),
        })
    return pd.DataFrame(out)


# ------------------------------------------------------------------ calibration
@dataclass
class CalibrationResult:
    """Outcome of :func:`run_calibration`.

    Attributes
    ----------
    ranks : DataFrame
        One row per data set and parameter: ``dataset``, ``parameter``,
        ``divergences`` (of that data set's fit), ``true``,
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


def _named_draws(post: Any, traits: list[str]) -> dict[str, np.ndarray]:
    """(chain, draw) arrays of the calibrated parameters, chains concatenated."""
    out = {f"evo_corr[{traits[0]},{traits[1]}]": post["evo_corr"][:, :, 0, 1].to_numpy().ravel()}
    for j, t in enumerate(traits):
        out[f"evo_rate[{t}]"] = post["evo_rate"][:, :, j].to_numpy().ravel()
    for j, t in enumerate(traits):
        out[f"root_mean[{t}]"] = post["root_mean"][:, :, j].to_numpy().ravel()
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
    options = _default_options(options)
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
    y_ref = _simulate(tree, np.eye(2) / float(np.mean(heights)), np.zeros(2), se_arr, gen, 1)[0]
    _say(progress, "compiling the model (once) ...")
    study = _make_study(tree, traits, y_ref, se_arr, options)
    _say(progress, f"compiled in {time.perf_counter() - t0:.0f} s")

    # Truths from the compiled model's own prior (the Potential likelihood is not drawn).
    m = study.built.model
    corr, rate, root = pm.draw([m["evo_corr"], m["evo_rate"], m["root_mean"]], draws=int(n_datasets),
                               random_seed=gen)
    fit_seeds = gen.integers(1, 2**31 - 1, size=int(n_datasets))
    rows, divergences = [], 0
    t1 = time.perf_counter()
    for d in range(int(n_datasets)):
        R = corr[d] * np.sqrt(np.outer(rate[d], rate[d]))
        y = _simulate(tree, R, root[d], se_arr, gen, 1)[0]
        idata = study.fit(y, int(fit_seeds[d]))
        n_div = _fit_problems(idata)[0]
        divergences += n_div
        truth = {f"evo_corr[{traits[0]},{traits[1]}]": corr[d][0, 1]}
        truth.update({f"evo_rate[{t}]": rate[d][j] for j, t in enumerate(traits)})
        truth.update({f"root_mean[{t}]": root[d][j] for j, t in enumerate(traits)})
        for name, draws in _named_draws(idata.posterior, traits).items():
            rows.append({"dataset": d + 1, "parameter": name, "divergences": n_div,
                         **rank_of_truth(float(truth[name]), draws, n_rank_draws, intervals)})
        if progress is not None and ((d + 1) % 10 == 0 or d + 1 == n_datasets):
            _say(progress, f"{d + 1}/{n_datasets} fits ({(time.perf_counter() - t1) / (d + 1):.1f} s per fit)")
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
