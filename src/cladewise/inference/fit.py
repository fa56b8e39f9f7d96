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
import os
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr

from cladewise.model.build import BuiltModel, ModelData, ModelSpec, build_model
from cladewise.errors import InputError
from cladewise.inference.sampling import Diagnostics, SamplingOptions, diagnose, sample

__all__ = [
    "FitResult",
    "check_output_folder",
    "fit",
    "finish_fit",
    "pointwise_loglik",
    "summarise",
    "iter_quantities",
    "load_fit",
    "HDI_PROB",
    "LOGLIK_VAR",
]

HDI_PROB = 0.95
LOGLIK_VAR = "y"  # log-likelihood variable (dims chain, draw, species), named like observed_data["y"]


def check_output_folder(out: Path, overwrite: bool) -> None:
    """Refuse an existing non-empty output folder unless ``overwrite`` (never lose results)."""
    if out.exists() and any(out.iterdir()) and not overwrite:
        raise InputError(
            f"output folder {str(out)!r} already holds files; choose a new folder or pass --overwrite"
        )


@dataclass
class FitResult:
    """A finished fit: the InferenceData, its summary table and diagnostics."""

    idata: az.InferenceData
    summary: pd.DataFrame
    diagnostics: Diagnostics
    built: BuiltModel | None
    info: dict[str, Any] = field(default_factory=dict)

    def save(self, out_dir: str | Path, overwrite: bool = False) -> Path:
        """Write posterior.nc, summary.csv and summary.json into ``out_dir``.

        The folder is written in full next to its final place and then renamed, so a
        stopped run never leaves a half-written fit. An existing non-empty folder is
        refused unless ``overwrite`` is true.
        """
        out = Path(out_dir)
        check_output_folder(out, overwrite)
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
        try:
            self.idata.to_netcdf(tmp / "posterior.nc")
            self.summary.to_csv(tmp / "summary.csv", index=False)
            (tmp / "summary.json").write_text(json.dumps(self.to_json(), indent=2, default=json_default))
            if out.exists():
                shutil.rmtree(out)
            os.replace(tmp, out)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        return out

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
            "cautions": CAUTIONS,
        }

    def to_text(self) -> str:
        """Results in words and a table, for the terminal."""
        lines = [
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


# --------------------------------------------------------------------------- LOO terms
def _posterior_points(idata: az.InferenceData, built: BuiltModel) -> tuple[list[dict[str, np.ndarray]], tuple[int, int]]:
    post = idata.posterior
    names = [rv.name for rv in built.model.free_RVs]
    nc, nd = post.sizes["chain"], post.sizes["draw"]
    arrays = {n: post[n].values.reshape((nc * nd,) + post[n].shape[2:]) for n in names}
    points = [{n: arrays[n][s] for n in names} for s in range(nc * nd)]
    return points, (nc, nd)


def engine_draws(built: BuiltModel, idata: az.InferenceData) -> tuple[dict[str, np.ndarray], tuple[int, int]]:
    """Per-draw engine inputs (lengths, y, R, E, err_var, mu) stacked over draws."""
    fn = built.engine_function()
    points, shape = _posterior_points(idata, built)
    outs = [fn(p) for p in points]
    stacked = {k: np.stack([o[k] for o in outs]) for k in outs[0]}
    return stacked, shape


def pointwise_loglik(built: BuiltModel, idata: az.InferenceData) -> xr.DataArray:
    """Leave-one-species-out conditional log density per chain, draw and species.

    ``log p(y_i | y_-i, theta)`` with measurement error included: for joint models
    all of the species' observed traits, for a regression the response given the
    predictors (Bürkner, Gabry & Vehtari 2021). Linear in the number of species.
    """
    from cladewise.engine import loo_logdensity_draws

    d, (nc, nd) = engine_draws(built, idata)
    parent = built.data.tree.parent
    y = d["y"]
    if y.ndim == 3 and np.allclose(y, y[:1]):
        y = y[0]
    if y.ndim == 3:
        # regression residuals differ per draw: one call per draw
        ll = np.stack([
            loo_logdensity_draws(parent, d["lengths"][s:s + 1], y[s], built.observed, d["R"][s:s + 1],
                                 d["E"][s:s + 1], d["err_var"][s:s + 1], d["mu"][s:s + 1])[0]
            for s in range(y.shape[0])
        ])
    else:
        ll = loo_logdensity_draws(parent, d["lengths"], y, built.observed, d["R"], d["E"], d["err_var"], d["mu"])
    ll = ll.reshape(nc, nd, -1)
    return xr.DataArray(
        ll, dims=("chain", "draw", "species"),
        coords={"chain": np.arange(nc), "draw": np.arange(nd), "species": built.species},
        name=LOGLIK_VAR,
    )


def posterior_predictive(built: BuiltModel, idata: az.InferenceData, n_draws: int = 200, seed: int = 0) -> xr.DataArray:
    """Replicated species data (means as they would be measured) for a subset of draws.

    Each replicate is a fresh draw of every species' values from the fitted model:
    evolution on the tree, species-level deviation and measurement error.
    """
    from cladewise.model.within_species import draw_errors
    from cladewise.studies.simulate import simulate_traits

    d, (nc, nd) = engine_draws(built, idata)
    rng = np.random.default_rng(seed)
    total = nc * nd
    pick = np.sort(rng.choice(total, size=min(n_draws, total), replace=False))
    tree = built.data.tree
    n, k = built.observed.shape
    out = np.empty((len(pick), n, k))
    is_regression = built.spec.kind == "regression"
    for a, s in enumerate(pick):
        t = tree.with_lengths(d["lengths"][s])
        x = simulate_traits(t, d["R"][s], d["mu"][s], E=d["E"][s], rng=rng)
        x = x + draw_errors(d["err_var"][s], rng)
        if is_regression:
            # residual + fitted value: y = X beta + e
            fitted = np.where(built.observed, built.y, 0.0) - d["y"][s]
            x = x + fitted
        out[a] = x
    return xr.DataArray(
        out[None], dims=("chain", "draw", "species", "trait"),
        coords={"chain": [0], "draw": pick, "species": built.species, "trait": built.traits},
        name="y_rep",
    )


# --------------------------------------------------------------------------- summary
_PROB_VARS = {"evo_corr", "evo_slope", "coef", "species_corr"}


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
    post = idata.posterior
    for name in var_names:
        if name not in post:
            continue
        da = post[name]
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        for sel, label in quantity_elements(da, extra, name):
            x = da.isel(sel) if sel else da
            yield name, label, np.asarray(x.transpose("chain", "draw").values, dtype=float)


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


def quantity_elements(da: xr.DataArray, extra: list[str], name: str):
    if not extra:
        yield {}, name
        return
    if len(extra) == 1:
        for v in da[extra[0]].values:
            yield {extra[0]: list(da[extra[0]].values).index(v)}, f"{name}[{v}]"
        return
    a, b = extra[:2]
    la, lb = list(da[a].values), list(da[b].values)
    for i, va in enumerate(la):
        for j, vb in enumerate(lb):
            if name in ("evo_corr", "species_corr") and not i < j:
                continue
            if name == "evo_slope":
                if i == j:
                    continue
                yield {a: i, b: j}, f"evo_slope[{va} ~ {vb}]"
                continue
            yield {a: i, b: j}, f"{name}[{va}, {vb}]"


# --------------------------------------------------------------------------- fit
def _describe(built: BuiltModel) -> str:
    s = built.spec
    evo = {"bm": "Brownian motion", "lambda": "Pagel's lambda", "ou": "Ornstein-Uhlenbeck",
           "kappa": "kappa", "delta": "delta", "early_burst": "early burst"}[s.evolution]
    me = {"none": "no measurement error", "se": "known standard errors",
          "specimens": "within-species variance estimated from specimens"}[s.measurement_error]
    if s.kind == "regression":
        head = f"phylogenetic regression {s.formula} with {evo} residuals"
    elif s.kind == "correlated":
        head = f"correlated multivariate evolution of {', '.join(s.traits)} under {evo}"
    else:
        head = f"independent evolution of {', '.join(s.traits)} under {evo} (no evolutionary correlation)"
    if s.species_covariance:
        head += ", plus species-level covariance"
    return f"{head}; {me}"


def finish_fit(
    built: BuiltModel,
    idata: az.InferenceData,
    options: SamplingOptions,
    timing: dict[str, float] | None = None,
    predictive_draws: int = 200,
) -> FitResult:
    """Add log-likelihood, observed data and posterior predictive; summarise."""
    t0 = time.perf_counter()
    ll = pointwise_loglik(built, idata)
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
    se = built.data.se
    if se is not None and all(t in se.columns for t in built.traits):
        const["se"] = xr.DataArray(se[built.traits].to_numpy(dtype=float), dims=("species", "trait"), coords=coords)
    if built.design is not None:
        const["design"] = xr.DataArray(built.design, dims=("species", "term"),
                                       coords={"species": built.species, "term": built.predictors})
    _set_group(idata, "constant_data", xr.Dataset(const))
    if predictive_draws:
        yrep = posterior_predictive(built, idata, n_draws=predictive_draws, seed=options.seed)
        _set_group(idata, "posterior_predictive", xr.Dataset({"y_rep": yrep}))
    t_post = time.perf_counter() - t0
    diag = diagnose(idata, built.summary_vars)
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
    }
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
) -> FitResult:
    """Build a model, sample it and return the finished :class:`FitResult`.

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
    """
    opts = options or SamplingOptions()
    t0 = time.perf_counter()
    built = build_model(data, spec, likelihood=likelihood)
    t1 = time.perf_counter()
    idata = sample(built, opts)
    t2 = time.perf_counter()
    return finish_fit(built, idata, opts, timing={"build": t1 - t0, "sample_and_compile": t2 - t1},
                      predictive_draws=predictive_draws)


def load_fit(out_dir: str | Path) -> tuple[az.InferenceData, dict[str, Any]]:
    """Read a saved fit folder: (InferenceData, summary.json contents)."""
    out = Path(out_dir)
    nc, js = out / "posterior.nc", out / "summary.json"
    if not nc.is_file() or not js.is_file():
        raise InputError(
            f"{str(out)!r} is not a cladewise fit folder (expected posterior.nc and summary.json); "
            "run 'cladewise fit SPEC --out DIR' first"
        )
    return az.from_netcdf(nc), json.loads(js.read_text())
