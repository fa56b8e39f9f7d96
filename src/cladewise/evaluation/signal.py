"""Phylogenetic signal per trait: the posterior of Pagel's lambda and Blomberg's K.

For every trait two answers are given side by side:

* **Pagel's lambda** (Pagel 1999, Nature 401:877-884): the posterior from a one-trait
  model (``kind = "independent"``, ``evolution = "lambda"``) fitted through the one
  fit path (:func:`cladewise.inference.fit.fit`), with the spec's measurement-error
  model. Measurement error matters here: variation between species that is really
  error in the species means looks like a lack of resemblance among relatives, so
  ignoring it pulls lambda towards 0. Species with a missing value stay in the model
  (the likelihood engine handles missing cells exactly).
* **Blomberg's K** (Blomberg, Garland & Ives 2003) with a permutation p-value
  (:mod:`cladewise.evaluation.blomberg`): fast and descriptive; it takes the species
  means as exact (no measurement error) and drops species without a value.

:func:`trait_signal` works on matched data (:class:`~cladewise.model.build.ModelData`);
:func:`signal_from_spec` reads a spec (``cladewise signal``).
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from cladewise.errors import InputError
from cladewise.evaluation.blomberg import KResult, blomberg_k

__all__ = ["SignalResult", "TraitSignal", "trait_signal", "signal_from_spec", "signal_traits_of_spec",
           "SIGNAL_CAUTIONS", "DEFAULT_THRESHOLD"]

HDI_PROB = 0.95
#: lambda above this counts as "some signal" in the column P(lambda > threshold)
DEFAULT_THRESHOLD = 0.1
#: prior settings a one-trait lambda model takes over from the spec
_PRIOR_KEYS = ("rate_scale", "root_sd", "lambda_beta")

SIGNAL_CAUTIONS = (
    "Cautions: K is descriptive: it takes species means as exact, so measurement error in the "
    "means lowers it (error inflates the differences between close relatives), and its "
    "permutation p-value tests only 'no pattern at all', not Brownian motion; lambda near 0 with few species is "
    "weakly informed, so read its whole interval, not its mean; both depend on the tree and on "
    "its branch lengths (check tree uncertainty); signal in a trait says nothing about why "
    "relatives resemble each other."
)


@dataclass
class TraitSignal:
    """The signal of one trait: K (always) and the lambda posterior (when fitted)."""

    trait: str
    k: KResult
    lambda_draws: np.ndarray | None = None  # chain x draw
    diagnostics: Any = None
    notes: list[str] = field(default_factory=list)

    def row(self, threshold: float) -> dict[str, Any]:
        """One row of the signal table."""
        import arviz as az

        row: dict[str, Any] = {"trait": self.trait, "n_species_K": self.k.n_species, "K": self.k.k,
                               "K_p_value": self.k.p_value}
        if self.lambda_draws is not None:
            flat = self.lambda_draws.reshape(-1)
            lo, hi = az.hdi(flat, hdi_prob=HDI_PROB)
            row.update({
                "lambda_mean": float(flat.mean()), "lambda_median": float(np.median(flat)),
                "lambda_hdi_low": float(lo), "lambda_hdi_high": float(hi),
                f"P(lambda>{threshold:g})": float((flat > threshold).mean()),
                "lambda_r_hat": float(az.rhat(self.lambda_draws)) if self.lambda_draws.shape[0] > 1 else np.nan,
                "lambda_ess_bulk": float(az.ess(self.lambda_draws, method="bulk")),
                "diagnostics_ok": bool(self.diagnostics.ok) if self.diagnostics is not None else None,
            })
        return row


@dataclass
class SignalResult:
    """Phylogenetic signal of several traits: a table, the draws behind it and notes."""

    traits: list[TraitSignal]
    threshold: float = DEFAULT_THRESHOLD
    settings: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    @property
    def table(self) -> pd.DataFrame:
        """One row per trait: K, its p-value, and the lambda posterior summary."""
        return pd.DataFrame([t.row(self.threshold) for t in self.traits])

    def __getitem__(self, trait: str) -> TraitSignal:
        for t in self.traits:
            if t.trait == trait:
                return t
        raise KeyError(trait)

    def to_text(self) -> str:
        """The table and notes, for a terminal."""
        with pd.option_context("display.max_rows", 200, "display.width", 160):
            table = self.table.to_string(index=False, float_format=lambda v: f"{v:.3g}", na_rep="")
        me = self.settings.get("measurement_error", "none")
        lines = ["Phylogenetic signal per trait", ""]
        lines.append(f"Blomberg's K with a permutation p-value ({self.settings.get('permutations')} shuffles "
                     f"of the values across species, seed {self.settings.get('seed')}).")
        if self.settings.get("lambda", True):
            lines.append(f"Pagel's lambda: posterior of a one-trait model (measurement error: {me}); "
                         f"mean, median, {int(HDI_PROB * 100)}% HDI and P(lambda > {self.threshold:g}).")
        lines += ["", table]
        notes = list(self.notes) + [n for t in self.traits for n in t.notes]
        for t in self.traits:
            if t.diagnostics is not None and not t.diagnostics.ok:
                notes.append(f"{t.trait}: lambda fit diagnostics found problems: " + "; ".join(t.diagnostics.problems))
        if notes:
            lines += ["", "Notes:"] + [f"  - {n}" for n in notes]
        lines += ["", SIGNAL_CAUTIONS]
        return "\n".join(lines)

    def __repr__(self) -> str:
        return self.to_text()

    __str__ = __repr__

    def _repr_html_(self) -> str:
        from cladewise.report.html import esc, table_html

        df = self.table
        table = table_html(df, numeric=[c for c in df.columns if c not in ("trait", "diagnostics_ok")])
        return (f"<div><p><b>Phylogenetic signal per trait</b></p>{table}"
                f"<p><small>{esc(SIGNAL_CAUTIONS)}</small></p></div>")

    def to_json(self) -> dict[str, Any]:
        from cladewise import __version__

        return {
            "cladewise_version": __version__,
            "settings": self.settings,
            "threshold": self.threshold,
            "hdi_prob": HDI_PROB,
            "traits": [{"trait": t.trait, "K": t.k.to_dict(),
                        "lambda_diagnostics": t.diagnostics.to_dict() if t.diagnostics is not None else None,
                        "notes": t.notes} for t in self.traits],
            "table": self.table.replace({np.nan: None}).to_dict(orient="records"),
            "notes": self.notes,
            "cautions": SIGNAL_CAUTIONS,
        }

    def figure(self):
        """The figure: lambda posterior and K null distribution per trait (matplotlib)."""
        from cladewise.report.signal_figure import signal_figure

        return signal_figure(self)

    def write_files(self, folder: Path) -> None:
        """signal.csv, signal.json, lambda_draws.csv, figures/signal.png|svg into ``folder``."""
        from cladewise.inference.fit import json_default
        from cladewise.report.style import save_figure

        folder = Path(folder)
        self.table.to_csv(folder / "signal.csv", index=False)
        (folder / "signal.json").write_text(json.dumps(self.to_json(), indent=2, default=json_default))
        frames = []
        for t in self.traits:
            if t.lambda_draws is not None:
                c, d = np.indices(t.lambda_draws.shape)
                frames.append(pd.DataFrame({"trait": t.trait, "chain": c.ravel(), "draw": d.ravel(),
                                            "lambda": t.lambda_draws.ravel()}))
        if frames:
            pd.concat(frames).to_csv(folder / "lambda_draws.csv", index=False)
        nulls = [pd.DataFrame({"trait": t.trait, "K_permuted": t.k.null}) for t in self.traits if t.k.null.size]
        if nulls:
            pd.concat(nulls).to_csv(folder / "K_permutations.csv", index=False)
        save_figure(self.figure(), folder / "figures", "signal", "Phylogenetic signal",
                    "Left: posterior of Pagel's lambda per trait (95% HDI shaded). Right: Blomberg's K "
                    "of the shuffled values (grey) and the observed K (line).")

    def save(self, out: str | Path, *, overwrite: bool = False, inputs: Sequence[str | Path] = ()) -> Path:
        """Write the signal folder (checked first, written atomically)."""
        from cladewise.inference.results import atomic_write, check_output_folder

        check_output_folder(out, overwrite=overwrite, inputs=inputs, what="signal")
        return atomic_write(out, self.write_files, what="signal")


# ----------------------------------------------------------------------------- compute
def _lambda_fit(data: Any, trait: str, measurement_error: str, priors: dict[str, Any], options: Any):
    from cladewise.inference.fit import fit
    from cladewise.model.build import ModelSpec

    spec = ModelSpec.from_dict({"kind": "independent", "traits": [trait], "evolution": "lambda",
                                "measurement_error": measurement_error,
                                "priors": {k: v for k, v in priors.items() if k in _PRIOR_KEYS}})
    return fit(data, spec, options, predictive_draws=0)


def trait_signal(
    data: Any,
    traits: Sequence[str] | None = None,
    *,
    options: Any = None,
    measurement_error: str = "none",
    priors: dict[str, Any] | None = None,
    with_lambda: bool = True,
    permutations: int = 999,
    seed: int | None = None,
    threshold: float = DEFAULT_THRESHOLD,
    progress: Any = None,
) -> SignalResult:
    """Blomberg's K and the posterior of Pagel's lambda for each trait.

    Parameters
    ----------
    data : ModelData
        Matched data (:meth:`cladewise.model.build.ModelData.from_match`).
    traits : list of str, optional
        Traits to analyse (default: every trait of ``data``).
    options : SamplingOptions, optional
        Sampler settings of the lambda fits.
    measurement_error : {"none", "se", "specimens"}
        Measurement-error model of the lambda fits (as ``[model] measurement_error``).
    priors : dict, optional
        ``rate_scale``, ``root_sd`` and ``lambda_beta`` are used (others ignored).
    with_lambda : bool
        False: only K (fast, no sampling).
    permutations : int
        Shuffles for the K p-value (0: none).
    seed : int, optional
        Seed of the shuffles (default: the sampling seed).
    threshold : float
        The table gives P(lambda > threshold).
    progress : callable, optional
        Called with a line of text before each trait's lambda fit.

    Raises
    ------
    InputError
        Unknown trait, a trait with fewer than 3 values, a bad setting.
    """
    from cladewise.inference.sampling import SamplingOptions

    if not 0 < threshold < 1:
        raise InputError(f"the lambda threshold must lie between 0 and 1; got {threshold}.")
    opts = options or SamplingOptions()
    seed = opts.seed if seed is None else seed
    names = list(traits) if traits else list(data.values.columns)
    for t in names:
        if t not in data.values.columns:
            raise InputError(f"no trait '{t}' in the data; traits are: {', '.join(data.values.columns)}.")
    out: list[TraitSignal] = []
    for j, t in enumerate(names):
        kres = blomberg_k(data.tree, data.values[t].to_numpy(dtype=float), permutations=permutations,
                          seed=None if seed is None else seed + j)
        notes = []
        if kres.dropped:
            n_out = len(kres.dropped)
            notes.append(f"{t}: {n_out} species without a value {'was' if n_out == 1 else 'were'} left out of K"
                         + (" (kept in the lambda model, which handles missing values)" if with_lambda else ""))
        ts = TraitSignal(t, kres, notes=notes)
        if with_lambda:
            if progress is not None:
                progress(f"Fitting Pagel's lambda for {t} ({j + 1} of {len(names)})")
            me = measurement_error
            if me == "se" and (data.se is None or t not in data.se.columns or data.se[t].isna().all()):
                me = "none"  # e.g. a predictor measured once per species
                ts.notes.append(f"{t}: no standard errors in the table, so its lambda model has no "
                                "measurement error")
            res = _lambda_fit(data, t, me, priors or {}, opts)
            ts.lambda_draws = np.asarray(res.idata.posterior["lambda"].values, dtype=float)
            ts.diagnostics = res.diagnostics
            ts.notes += [f"{t}: {n}" for n in res.info.get("notes", []) if n not in data.notes]
        out.append(ts)
    settings = {"traits": names, "permutations": int(permutations), "seed": seed, "lambda": bool(with_lambda),
                "measurement_error": measurement_error if with_lambda else None,
                "sampling": dict(opts.__dict__) if with_lambda else None}
    return SignalResult(out, threshold=threshold, settings=settings, notes=list(data.notes))


# ----------------------------------------------------------------------------- spec
def signal_traits_of_spec(spec: Any, available: Sequence[str]) -> list[str]:
    """The traits a spec's ``[model]`` names (its ``traits``, or the columns of its
    formula), else every trait of the table."""
    model = spec.model or {}
    if model.get("traits"):
        return list(model["traits"])
    if model.get("formula"):
        named = [t for t in available if re.search(rf"(?<![\w.]){re.escape(t)}(?![\w.])", model["formula"])]
        if named:
            return named
    return list(available)


def signal_from_spec(
    spec_path: str | Path,
    *,
    out: str | Path | None = None,
    overwrite: bool = False,
    traits: Sequence[str] | None = None,
    with_lambda: bool = True,
    permutations: int = 999,
    threshold: float = DEFAULT_THRESHOLD,
    measurement_error: str | None = None,
    progress: Any = None,
    command: str | None = None,
    **sampling_overrides: Any,
) -> SignalResult:
    """Phylogenetic signal of a spec's traits (``cladewise signal``), saved to ``out``.

    The data come from the spec's ``[data]``; the traits from ``traits``, else the
    spec's ``[model]`` (:func:`signal_traits_of_spec`); the measurement-error model
    and the priors from ``[model]`` (``measurement_error`` overrides it); the sampler
    settings from ``[sampling]`` and ``sampling_overrides``. ``out`` is checked
    before any work.
    """
    from cladewise.config.analysis import load_data, load_spec
    from cladewise.inference.results import check_output_folder
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.model.build import ModelData
    from cladewise.pipeline import dropped_notes

    spec = load_spec(spec_path)
    inputs = [p for p in (spec.path, spec.data.traits, spec.data.tree, spec.data.trees) if p is not None]
    if out is not None:
        check_output_folder(out, overwrite=overwrite, inputs=inputs, what="signal")
    sampling = dict(spec.sampling)
    sampling.update({k: v for k, v in sampling_overrides.items() if v is not None})
    options = SamplingOptions.from_dict(sampling)
    match, _summary = load_data(spec)
    data = ModelData.from_match(match)
    data.notes.extend(dropped_notes(match))
    names = list(traits) if traits else signal_traits_of_spec(spec, list(data.values.columns))
    me = measurement_error or (spec.model or {}).get("measurement_error", "none")
    result = trait_signal(data, names, options=options, measurement_error=me,
                          priors=dict((spec.model or {}).get("priors", {}) or {}), with_lambda=with_lambda,
                          permutations=permutations, threshold=threshold, progress=progress)
    if (spec.model or {}).get("fixed"):
        result.notes.append("the spec's [model.fixed] is not used here: lambda is estimated for each trait")
    result.settings.update({"spec_path": str(spec.path), "command": command or ""})
    if out is not None:
        result.save(out, overwrite=overwrite, inputs=inputs)
    return result
