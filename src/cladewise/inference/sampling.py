"""Sampling a built model.

nutpie (numba-compiled NUTS) is the default; PyMC's own NUTS is the fallback. The
diagnostics live in :mod:`cladewise.inference.diagnostics` (re-exported here).

Both samplers stop on Ctrl-C and quietly hand back the draws made so far; here an
interrupt is noticed and raised as :class:`~cladewise.errors.FitInterrupted`
(carrying those partial draws), so a cut-short run is never taken for a full one.
"""

from __future__ import annotations

import contextlib
import os
import signal
import sys
import threading
import time
from dataclasses import dataclass
from typing import Any

import arviz as az
import numpy as np

from cladewise.config.analysis import SAMPLING
from cladewise.config.tables import read_table
from cladewise.model.build import BuiltModel
from cladewise.errors import FitInterrupted, InputError
from cladewise.inference.diagnostics import BFMI_MIN, ESS_MIN, RHAT_MAX, Diagnostics, diagnose  # noqa: F401

__all__ = [
    "SamplingOptions", "Diagnostics", "sample", "diagnose", "compile_model", "complete_draws",
    "one_blas_thread",
]

@dataclass
class SamplingOptions:
    """How to sample; the ``[sampling]`` table of a spec."""

    sampler: str = "nutpie"
    chains: int = 4
    draws: int = 1000
    tune: int = 1000
    seed: int = 1
    target_accept: float = 0.95  # measured: 0.37% divergent draws at 0.9 vs 0.085% at 0.95 (bench_calibration.py)
    progress: bool | None = None  # None: show a progress bar only on a terminal

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "SamplingOptions":
        # keys, types and ranges are declared once, in config.analysis.SAMPLING
        opts = cls(**read_table(d, SAMPLING))
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
        with _interrupts() as stopped, one_blas_thread():
            idata = _run(lambda: nutpie.sample(
                compiled, draws=opts.draws, tune=opts.tune, chains=opts.chains,
                seed=opts.seed, progress_bar=progress, target_accept=opts.target_accept,
                cores=min(opts.chains, os.cpu_count() or 1),
            ))
    else:
        import pymc as pm

        with built.model:
            if tree_values:
                pm.set_data({k: v for k, v in tree_values.items() if k in built.model.named_vars})
            with _interrupts() as stopped, one_blas_thread():
                idata = _run(lambda: pm.sample(
                    draws=opts.draws, tune=opts.tune, chains=opts.chains,
                    cores=min(opts.chains, os.cpu_count() or 1), random_seed=opts.seed,
                    progressbar=progress, target_accept=opts.target_accept,
                    compute_convergence_checks=False,
                ))
    if stopped:
        raise FitInterrupted(partial=complete_draws(idata))
    return idata


@contextlib.contextmanager
def one_blas_thread():
    """Limit BLAS (OpenBLAS, MKL) to one thread while chains sample in parallel.

    The compiled log density calls BLAS for small products. With one chain per core,
    BLAS's own worker threads only compete with the other chains and spin while
    waiting: on 2 cores, 4 demo chains sampled about 4x slower with OpenBLAS's
    default thread count than with one thread (benchmarks/bench_speed.py).
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - a dependency of PyMC
        yield
        return
    with threadpool_limits(limits=1, user_api="blas"):
        yield


def _run(call: Any) -> Any:
    try:
        return call()
    except KeyboardInterrupt as exc:
        if isinstance(exc, FitInterrupted):
            raise
        raise FitInterrupted() from None


@contextlib.contextmanager
def _interrupts():
    """Note a Ctrl-C while sampling (both samplers catch it and return partial draws).

    Yields a list that is non-empty after an interrupt. Signal handlers can only be
    set in the main thread; elsewhere (a dask worker) no Ctrl-C can arrive anyway.
    """
    stopped: list[bool] = []
    if threading.current_thread() is not threading.main_thread():
        yield stopped
        return

    def handler(signum: int, frame: Any) -> None:
        stopped.append(True)
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGINT, handler)
    try:
        yield stopped
    finally:
        signal.signal(signal.SIGINT, previous)


def complete_draws(idata: Any) -> Any:
    """The draws every chain finished before an interrupt (``None`` when there are none).

    Chains stop at different points; draws beyond the shortest chain, and draws
    holding NaN (not made yet), are dropped so every chain has the same length.
    """
    if idata is None or "posterior" not in idata.groups():
        return None
    post = idata.posterior
    if not post.data_vars or post.sizes.get("draw", 0) == 0:
        return None
    done = np.ones((post.sizes["chain"], post.sizes["draw"]), dtype=bool)
    for da in post.data_vars.values():
        vals = np.asarray(da.transpose("chain", "draw", ...).values, dtype=float)
        done &= np.isfinite(vals.reshape(vals.shape[0], vals.shape[1], -1)).all(axis=2)
    n = int(np.min(np.cumprod(done, axis=1).sum(axis=1)))
    if n < 1:
        return None
    return idata.isel(draw=slice(0, n), groups=["posterior", "sample_stats"])


def timed(fn, *args, **kwargs):
    """(result, seconds) of a call."""
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0
