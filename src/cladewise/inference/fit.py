"""One fit, end to end: build, sample, add the groups ArviZ needs, summarise, save.

Every fit ends as an ArviZ ``InferenceData`` with ``posterior``, ``sample_stats``,
``observed_data``, ``constant_data``, ``posterior_predictive`` and a ``log_likelihood``
group holding one value per species and draw: the log density of that species'
observed values given all other species (the leave-one-species-out conditional from
the tree engine), so ``arviz.loo`` and ``arviz.compare`` are right for correlated
data without glue.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr

from cladewise.errors import FitInterrupted
from cladewise.model.build import BuiltModel, ModelData, ModelSpec, build_model
from cladewise.inference.diagnostics import Diagnostics, diagnose
from cladewise.inference.draws import LOGLIK_VAR, EngineDraws, engine_draws, pointwise_loglik
from cladewise.inference.results import atomic_write, check_output_folder, load_fit
from cladewise.inference.sampling import SamplingOptions, sample
from cladewise.model.describe import describe_model
from cladewise.model.quantities import iter_elements, signed_names

__all__ = [
    "FitResult",
    "fit",
    "finish_fit",
    "posterior_predictive",
    "summarise",
    "iter_quantities",
    "HDI_PROB",
    # defined elsewhere, importable from here as before
    "check_output_folder",
    "load_fit",
    "pointwise_loglik",
    "engine_draws",
    "LOGLIK_VAR",
]

HDI_PROB = 0.95


@dataclass(repr=False)
class FitResult:
    """A finished fit: the InferenceData, its summary table and diagnostics.

    Printed, it shows :meth:`to_text`; in a notebook, the summary table as HTML.
    """

    idata: az.InferenceData
    summary: pd.DataFrame
    diagnostics: Diagnostics
    built: BuiltModel | None
    info: dict[str, Any] = field(default_factory=dict)
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)  # extra CSV files: name -> table

    def save(self, out_dir: str | Path, overwrite: bool = False, inputs: Sequence[str | Path] = ()) -> Path:
        """Write posterior.nc, summary.csv and summary.json into ``out_dir``.

        The folder is written in full next to its final place and then swapped in
        (:func:`~cladewise.inference.results.atomic_write`), so a stopped run never
        leaves a half-written fit. An existing folder is replaced only with
        ``overwrite`` and only when cladewise wrote it
        (:func:`~cladewise.inference.results.check_output_folder`).
        """
        check_output_folder(out_dir, overwrite=overwrite, inputs=inputs, what="fit")
        return atomic_write(out_dir, self.write_files, what="fit")

    def report(self, out_dir: str | Path, overwrite: bool = False) -> Path:
        """Save the fit to the folder ``out_dir`` and write its ``report.html`` there."""
        from cladewise.report import write_fit_report

        self.save(out_dir, overwrite=overwrite)
        return write_fit_report(out_dir)

    def __repr__(self) -> str:
        return self.to_text()

    __str__ = __repr__

    def _repr_html_(self) -> str:
        from cladewise.report.display import fit_html

        return fit_html(self)

    def write_files(self, folder: Path) -> None:
        """Write the fit's files into an existing (staging) folder."""
        folder = Path(folder)
        self.idata.posterior.attrs["cladewise_info"] = json.dumps(self.info, default=json_default)
        self.idata.to_netcdf(folder / "posterior.nc")
        self.summary.to_csv(folder / "summary.csv", index=False)
        (folder / "summary.json").write_text(json.dumps(self.to_json(), indent=2, default=json_default))
        for name, table in self.tables.items():
            table.to_csv(folder / name, index=False)

    def mark_partial(self, reason: str) -> None:
        """Mark this fit as built from the draws made before an interrupt."""
        self.info["partial"] = True
        self.info["partial_reason"] = reason
        self.info["notes"] = list(self.info.get("notes", [])) + [f"PARTIAL: {reason}"]
        if self.diagnostics is not None:
            self.diagnostics.problems.insert(0, f"partial fit: {reason}")

    def to_json(self) -> dict[str, Any]:
        """The contents of summary.json (schema in the README)."""
        rows = self.summary.replace({np.nan: None}).to_dict(orient="records")
        info = self.info
        return {
            "cladewise_version": _version(),
            "description": info.get("description", ""),
            "model": info.get("model", {}),
            "n_species": info.get("n_species"),
            "species": info.get("species", []),
            "traits": info.get("traits"),
            "predictors": info.get("predictors", []),
            "loglik_kind": info.get("loglik_kind"),
            "likelihood": info.get("likelihood"),
            "hdi_prob": HDI_PROB,
            "quantities": rows,
            "diagnostics": self.diagnostics.to_dict(),
            "priors": info.get("priors", []),
            "notes": info.get("notes", []),
            "sampling": info.get("sampling", {}),
            "timing_seconds": info.get("timing", {}),
            "data_summary": info.get("data_summary"),
            "spec_path": info.get("spec_path"),
            "spec_text": info.get("spec_text"),
            "command": info.get("command"),
            "environment": info.get("environment", {}),
            "tree_newick": info.get("tree_newick"),
            "partial": bool(info.get("partial", False)),
            "ancestral": info.get("ancestral"),
            "cautions": CAUTIONS,
            # regime models only: the painting (regime names, regime of every node's branch)
            **({"regimes": info["regimes"]} if info.get("regimes") else {}),
        }

    def to_text(self) -> str:
        """Results in words and a table, for the terminal."""
        lines = [PARTIAL_NOTE, ""] if self.info.get("partial") else []
        lines += [
            f"Model: {self.info.get('description', '')}",
            f"Species: {self.info.get('n_species')}  Traits: {', '.join(self.info.get('traits', []))}",
            "",
            f"Posterior summary (mean, sd, {int(HDI_PROB * 100)}% HDI, P(>0) for correlations, slopes and coefficients):",
            _format_table(self.summary),
            "",
            "Priors:",
        ]
        lines += [f"  {p['parameter']}: {p['distribution']}  ({p['reason']})" for p in self.info.get("priors", [])]
        lines += ["", self.diagnostics.to_text()]
        if self.info.get("notes"):
            lines += ["", "Notes:"] + [f"  - {n}" for n in self.info["notes"]]
        lines += ["", CAUTIONS]
        return "\n".join(lines)


PARTIAL_NOTE = ("PARTIAL FIT: sampling was interrupted; these are the draws made before the "
                "interrupt, not a finished fit. Refit to completion before reporting anything.")

CAUTIONS = (
    "Cautions: an evolutionary correlation is not evidence that one trait causes the other; "
    "results are conditional on the tree and on the model of evolution (compare models with LOO "
    "and check tree uncertainty); with few species the intervals are wide and priors matter."
)


def _version() -> str:
    from cladewise import __version__

    return __version__


def json_default(o: Any) -> Any:
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    return str(o)


def _format_table(df: pd.DataFrame) -> str:
    cols = ["quantity", "mean", "sd", "hdi_low", "hdi_high", "prob_positive", "r_hat", "ess_bulk"]
    view = df[[c for c in cols if c in df.columns]].copy()
    with pd.option_context("display.max_rows", 200, "display.width", 160):
        return view.to_string(index=False, float_format=lambda v: f"{v:.3g}", na_rep="")


# --------------------------------------------------------------------------- posterior predictive
def posterior_predictive(built: BuiltModel, idata: az.InferenceData, n_draws: int = 200, seed: int = 0,
                         engine: EngineDraws | None = None) -> xr.DataArray:
    """Replicated species data (means as they would be measured) for a subset of draws.

    Each replicate is a fresh draw of every species' values from the fitted model:
    evolution on the tree, species-level deviation and measurement error.
    """
    from cladewise.model.simulate import simulate_traits
    from cladewise.model.within_species import draw_errors

    post = idata.posterior
    nc, nd = int(post.sizes["chain"]), int(post.sizes["draw"])
    rng = np.random.default_rng(seed)
    total = nc * nd
    pick = np.sort(rng.choice(total, size=min(n_draws, total), replace=False))
    # only the picked draws: per-draw inputs are tree-sized
    d, _ = (engine or EngineDraws(built)).draws(idata, pick)
    tree = built.data.tree
    n, k = built.observed.shape
    out = np.empty((len(pick), n, k))
    is_regression = built.spec.kind == "regression"
    for s in range(len(pick)):  # d holds the picked draws, in order
        t = tree.with_lengths(d["lengths"][s])
        mu = d["mu"][s]
        painting = getattr(built, "painting", None)
        x = simulate_traits(t, d["R"][s], mu, E=d["E"][s], rng=rng,
                            regime=None if painting is None else painting.node_regime)
        x = x + draw_errors(d["err_var"][s], rng)
        # OU on a non-ultrametric tree: the engine inputs describe y' = mu + (y - mu) / D
        # (D = 1 otherwise), so a replicate of y' maps back to y = mu + D (y' - mu)
        D = np.exp(d["log_scale"][s])[:, None]
        x = mu + D * (x - mu)
        if "tip_mean" in d:  # multi-optimum OU: the engine saw y minus each tip's expected value
            x = x + d["tip_mean"][s]
        if "fitted" in d:  # probit regression: liability = X beta + residual
            x = x + d["fitted"][s]
        elif is_regression:
            # residual + fitted value: y = X beta + e
            resid = np.where(built.observed, mu + D * (d["y"][s] - mu), 0.0)
            x = x + np.where(built.observed, built.y, 0.0) - resid
        out[s] = x
    if built.discrete is not None:  # liabilities -> states by the draw's thresholds
        from cladewise.evaluation.discrete import draw_cuts, states_from_liabilities

        out = states_from_liabilities(built, out, draw_cuts(built, idata)[pick])
    return xr.DataArray(
        out[None], dims=("chain", "draw", "species", "trait"),
        coords={"chain": [0], "draw": pick, "species": built.species, "trait": built.traits},
        name="y_rep",
    )


# --------------------------------------------------------------------------- summary
_PROB_VARS = signed_names()  # P(>0) reported for these (the quantity catalogue)


def summarise(idata: az.InferenceData, built: BuiltModel | None = None, var_names: list[str] | None = None) -> pd.DataFrame:
    """One row per reported quantity: mean, sd, HDI, P(>0), R-hat and ESS."""
    import warnings

    with warnings.catch_warnings():
        # constant quantities (a fixed parameter) give 0/0 in R-hat and ESS: NaN is right
        warnings.simplefilter("ignore", RuntimeWarning)
        return _summarise(idata, built, var_names)


def iter_quantities(idata: az.InferenceData, var_names: list[str]):
    """Yield (variable, label, draws as a chain x draw array) for every reported element.

    Correlation matrices give their upper triangle, slope matrices their off-diagonal.
    """
    yield from iter_elements(idata.posterior, var_names)


def _summarise(idata: az.InferenceData, built: BuiltModel | None, var_names: list[str] | None) -> pd.DataFrame:
    names = var_names or (built.summary_vars if built else list(idata.posterior.data_vars))
    rows = []
    for name, label, vals in iter_quantities(idata, names):
        flat = vals.reshape(-1)
        hdi = az.hdi(flat, hdi_prob=HDI_PROB)
        row = {
            "quantity": label, "variable": name,
            "mean": float(flat.mean()), "sd": float(flat.std(ddof=1)),
            "hdi_low": float(hdi[0]), "hdi_high": float(hdi[1]),
            "prob_positive": float((flat > 0).mean()) if name in _PROB_VARS else np.nan,
            "r_hat": float(az.rhat(vals)) if vals.shape[0] > 1 else np.nan,
            "ess_bulk": float(az.ess(vals, method="bulk")),
            "ess_tail": float(az.ess(vals, method="tail")),
        }
        rows.append(row)
    return pd.DataFrame(rows)


# --------------------------------------------------------------------------- fit
def _describe(built: BuiltModel) -> str:
    return describe_model(built.spec, full_within="within_corr" in built.model.named_vars)


def finish_fit(
    built: BuiltModel,
    idata: az.InferenceData,
    options: SamplingOptions,
    timing: dict[str, float] | None = None,
    predictive_draws: int = 200,
    engine: EngineDraws | None = None,
) -> FitResult:
    """Add log-likelihood, observed and constant data and posterior predictive; summarise.

    The constant data make the fit folder self-describing: missing-cell mask,
    standard errors, specimen counts and within-species variances, regression
    design and the tree; ``info`` adds the tree as Newick. ``engine`` reuses a
    compiled :class:`~cladewise.inference.draws.EngineDraws` (one per tree sample).
    """
    from cladewise.data.treefiles import format_newick

    t0 = time.perf_counter()
    engine = engine or EngineDraws(built)
    ll = pointwise_loglik(built, idata, engine)
    _set_group(idata, "log_likelihood", xr.Dataset({LOGLIK_VAR: ll}))
    coords = {"species": built.species, "trait": built.traits}
    _set_group(idata, "observed_data", xr.Dataset({
        "y": xr.DataArray(built.y, dims=("species", "trait"), coords=coords),
    }))
    const = {
        "observed": xr.DataArray(built.observed, dims=("species", "trait"), coords=coords),
        "tree_parent": xr.DataArray(built.data.tree.parent, dims=("node",)),
        "tree_length": xr.DataArray(built.data.tree.length, dims=("node",)),
    }
    for name, frame in (("se", built.data.se), ("n_specimens", built.data.n), ("within_var", built.data.sample_var)):
        if frame is not None and all(t in frame.columns for t in built.traits):
            const[name] = xr.DataArray(frame[built.traits].to_numpy(dtype=float), dims=("species", "trait"),
                                       coords=coords)
    if built.design is not None:
        const["design"] = xr.DataArray(built.design, dims=("species", "term"),
                                       coords={"species": built.species, "term": built.predictors})
    _set_group(idata, "constant_data", xr.Dataset(const))
    if predictive_draws:
        yrep = posterior_predictive(built, idata, n_draws=predictive_draws, seed=options.seed, engine=engine)
        _set_group(idata, "posterior_predictive", xr.Dataset({"y_rep": yrep}))
    t_post = time.perf_counter() - t0
    diag = diagnose(idata, built.summary_vars)
    from cladewise.evaluation.discrete import geometry_advice

    advice = geometry_advice(built, diag.divergences)
    if advice:
        diag.problems.append(advice)
    summary = summarise(idata, built)
    info = {
        "description": _describe(built),
        "model": built.spec.to_dict(),
        "n_species": len(built.species),
        "species": built.species,
        "traits": built.traits,
        "predictors": built.predictors,
        "loglik_kind": built.loglik_kind,
        "likelihood": built.likelihood,
        "priors": [p.__dict__ for p in built.priors],
        "notes": built.notes,
        "sampling": options.__dict__,
        "timing": {**(timing or {}), "postprocess": t_post},
        "tree_newick": format_newick(built.data.tree, digits=17),
    }
    if getattr(built, "painting", None) is not None:  # for the report's regime figure
        pa = built.painting
        info["regimes"] = {"name": pa.name, "regimes": list(pa.regimes),
                           "node_regime": pa.node_regime.tolist(), "parent": built.data.tree.parent.tolist()}
    idata.posterior.attrs["cladewise_info"] = json.dumps(info, default=json_default)
    return FitResult(idata=idata, summary=summary, diagnostics=diag, built=built, info=info)


def _set_group(idata: az.InferenceData, name: str, ds: xr.Dataset) -> None:
    """Add or replace one group of an InferenceData."""
    if name in idata.groups():
        setattr(idata, name, ds)
    else:
        idata.add_groups({name: ds})


def fit(
    data: ModelData,
    spec: ModelSpec,
    options: SamplingOptions | None = None,
    likelihood: str = "tree",
    predictive_draws: int = 200,
    *,
    built: BuiltModel | None = None,
    compiled: Any = None,
    keep_partial: bool = False,
) -> FitResult:
    """Build a model, check its starting point, sample it and return the :class:`FitResult`.

    Parameters
    ----------
    data : ModelData
        Matched data (:meth:`ModelData.from_match`).
    spec : ModelSpec
        The model to fit.
    options : SamplingOptions, optional
        Sampler settings (nutpie, 4 chains x 1000 draws by default).
    likelihood : {"tree", "dense"}
        Linear-time engine (default) or the dense reference.
    predictive_draws : int
        Posterior draws used for the posterior predictive group (0: none).
    built : BuiltModel, optional
        The model already built from ``data`` and ``spec`` (skips building and
        the starting-point check).
    compiled : optional
        ``built`` already compiled (:func:`~cladewise.inference.sampling.compile_model`),
        to fit it again without compiling (nutpie only).
    keep_partial : bool
        On Ctrl-C, finish the draws made so far into a fit marked partial and
        attach it to the exception (``partial``); otherwise ``partial`` is None.

    Raises
    ------
    InputError
        The log density or its gradient is not finite at the starting point.
    FitInterrupted
        Sampling was stopped by Ctrl-C (the partial draws ride on the exception).
    """
    from cladewise.inference.startcheck import check_starting_point

    opts = options or SamplingOptions()
    t0 = time.perf_counter()
    if built is None:
        built = build_model(data, spec, likelihood=likelihood)
        check_starting_point(built)
    t1 = time.perf_counter()
    try:
        idata = sample(built, opts, compiled=compiled)
    except FitInterrupted as exc:
        part = None
        if keep_partial and exc.partial is not None:
            part = finish_fit(built, exc.partial, opts, predictive_draws=predictive_draws)
            n = part.idata.posterior.sizes["draw"]
            part.mark_partial(f"sampling was interrupted after {n} of {opts.draws} draws per chain")
        raise FitInterrupted(str(exc), partial=part) from None
    t2 = time.perf_counter()
    return finish_fit(built, idata, opts, timing={"build": t1 - t0, "sample_and_compile": t2 - t1},
                      predictive_draws=predictive_draws)
