"""Sampling a built model and judging the result.

nutpie (numba-compiled NUTS) is the default; PyMC's own NUTS is the fallback. After
every fit the diagnostics are put in words using the thresholds of Vehtari et al.
2021 (Bayesian Analysis 16:667-718): R-hat above 1.01, bulk or tail ESS below 400,
any divergent transition, and E-BFMI below 0.3 (the last is common practice).
"""

from __future__ import annotations

import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any

import arviz as az
import numpy as np

from cladewise.model.build import BuiltModel
from cladewise.errors import FitError, InputError

__all__ = ["SamplingOptions", "Diagnostics", "sample", "diagnose", "compile_model"]

RHAT_MAX = 1.01
ESS_MIN = 400
BFMI_MIN = 0.3


@dataclass
class SamplingOptions:
    """How to sample; the ``[sampling]`` table of a spec."""

    sampler: str = "nutpie"
    chains: int = 4
    draws: int = 1000
    tune: int = 1000
    seed: int = 1
    target_accept: float = 0.9
    progress: bool | None = None  # None: show a progress bar only on a terminal

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "SamplingOptions":
        known = set(cls.__dataclass_fields__)
        unknown = sorted(set(d) - known)
        if unknown:
            raise InputError(f"unknown key(s) in [sampling]: {unknown}; known keys: {', '.join(sorted(known))}")
        opts = cls(**d)
        opts.validate()
        return opts

    def validate(self) -> None:
        if self.sampler not in ("nutpie", "pymc"):
            raise InputError(f"[sampling] sampler = {self.sampler!r}: choose 'nutpie' (fast, default) or 'pymc'")
        for name in ("chains", "draws", "tune"):
            v = getattr(self, name)
            if not isinstance(v, int) or v < (1 if name != "tune" else 0):
                raise InputError(f"[sampling] {name} must be a positive whole number, got {v!r}")
        if not 0.5 <= float(self.target_accept) < 1.0:
            raise InputError("[sampling] target_accept must be between 0.5 and 1")

    def show_progress(self) -> bool:
        if self.progress is not None:
            return bool(self.progress)
        return sys.stderr.isatty()


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


def compile_model(built: BuiltModel, sampler: str = "nutpie") -> Any:
    """Compile once for nutpie; the result serves every tree of the same size.

    A model of the same structure compiled before, in any process, is loaded from
    the on-disk cache of :mod:`cladewise.inference.compile_cache`.
    """
    if sampler != "nutpie":
        return None
    from cladewise.inference.compile_cache import compile_cached

    return compile_cached(built.model)


def sample(
    built: BuiltModel,
    options: SamplingOptions | None = None,
    compiled: Any = None,
    tree_values: dict[str, np.ndarray] | None = None,
) -> az.InferenceData:
    """Draw from the posterior of a built model.

    Parameters
    ----------
    built : BuiltModel
        From :func:`cladewise.model.build.build_model`.
    options : SamplingOptions, optional
        Sampler, chains, draws, tuning and seed.
    compiled : optional
        A model already compiled by :func:`compile_model` (nutpie only).
    tree_values : dict, optional
        New values of the model's tree data (``pm.Data`` name -> array), to fit
        another tree of a sample without recompiling.

    Returns
    -------
    arviz.InferenceData
        posterior and sample_stats (log-likelihood and the other groups are added by
        :func:`cladewise.inference.fit.fit`).
    """
    opts = options or SamplingOptions()
    opts.validate()
    progress = opts.show_progress()
    if opts.sampler == "nutpie":
        import nutpie

        if compiled is None:
            compiled = compile_model(built, "nutpie")
        if tree_values:
            # the graph may not read every tree array (Brownian motion ignores heights)
            known = getattr(compiled, "shared_data", tree_values)
            compiled = compiled.with_data(**{k: v for k, v in tree_values.items() if k in known})
        idata = nutpie.sample(
            compiled, draws=opts.draws, tune=opts.tune, chains=opts.chains,
            seed=opts.seed, progress_bar=progress, target_accept=opts.target_accept,
            cores=min(opts.chains, os.cpu_count() or 1),
        )
    else:
        import pymc as pm

        with built.model:
            if tree_values:
                pm.set_data({k: v for k, v in tree_values.items() if k in built.model.named_vars})
            idata = pm.sample(
                draws=opts.draws, tune=opts.tune, chains=opts.chains,
                cores=min(opts.chains, os.cpu_count() or 1), random_seed=opts.seed,
                progressbar=progress, target_accept=opts.target_accept,
                compute_convergence_checks=False,
            )
    return idata


def diagnose(idata: az.InferenceData, var_names: list[str]) -> Diagnostics:
    """Compute R-hat, ESS, divergences and E-BFMI and describe any problem."""
    post = idata.posterior
    names = [v for v in var_names if v in post]
    # correlation matrices have a constant diagonal: R-hat/ESS are NaN there, skip them
    summ = az.summary(idata, var_names=names, kind="diagnostics") if names else None
    if summ is not None:
        rhat = summ["r_hat"].to_numpy(dtype=float)
        eb = summ["ess_bulk"].to_numpy(dtype=float)
        et = summ["ess_tail"].to_numpy(dtype=float)
        finite = np.isfinite(rhat)
        max_rhat = float(np.max(rhat[finite])) if finite.any() else float("nan")
        min_eb = float(np.min(eb[np.isfinite(eb)])) if np.isfinite(eb).any() else float("nan")
        min_et = float(np.min(et[np.isfinite(et)])) if np.isfinite(et).any() else float("nan")
    else:
        max_rhat = min_eb = min_et = float("nan")
    stats = idata.sample_stats
    div = int(np.asarray(stats["diverging"]).sum()) if "diverging" in stats else 0
    try:
        bfmi = float(np.min(az.bfmi(idata)))
    except Exception:  # pragma: no cover - energy missing
        bfmi = float("nan")
    n_draws = int(post.sizes["chain"] * post.sizes["draw"])
    problems = []
    n_chains = int(post.sizes["chain"])
    if n_chains > 1 and max_rhat > RHAT_MAX:
        problems.append(f"R-hat {max_rhat:.3f} > {RHAT_MAX}: chains disagree; run longer or check the model")
    if min_eb < ESS_MIN:
        problems.append(f"bulk ESS {min_eb:.0f} < {ESS_MIN}: too few effective draws for stable means; draw more")
    if min_et < ESS_MIN:
        problems.append(f"tail ESS {min_et:.0f} < {ESS_MIN}: interval ends are unstable; draw more")
    if div:
        problems.append(f"{div} divergent transitions: the posterior may be biased; raise target_accept or reparametrise")
    if np.isfinite(bfmi) and bfmi < BFMI_MIN:
        problems.append(f"E-BFMI {bfmi:.2f} < {BFMI_MIN}: the sampler explores energy poorly (common practice threshold)")
    if n_chains == 1:
        problems.append("only one chain: R-hat cannot check convergence; use 4 chains for results you report")
    return Diagnostics(max_rhat, min_eb, min_et, div, bfmi, n_draws, problems)


def timed(fn, *args, **kwargs):
    """(result, seconds) of a call."""
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0
