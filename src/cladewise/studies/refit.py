"""One compiled model refitted to many simulated data sets: shared by the studies.

The power study (:mod:`cladewise.studies.power`) and the simulation-based calibration
(:mod:`cladewise.studies.calibration`) both build a model once on a reference data
set and refit it to every simulated data set without recompiling (the data are
``pm.Data``); data held as model constants (specimen statistics) are refitted by a
rebuild, which the compile cache turns into a load.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from cladewise.data.trees import FlatTree
from cladewise.errors import InputError

__all__ = [
    "Progress",
    "RefitStudy",
    "make_refit_study",
    "compile_study",
    "default_study_options",
    "check_study_tree",
    "simulate_datasets",
    "fit_problems",
    "output_folder",
    "say",
]

Progress = Callable[[str], None] | None


def default_study_options(options: Any) -> Any:
    """Sampler settings of a study: the given ones (validated) or 2 x 500 draws, no progress bar."""
    from cladewise.inference.sampling import SamplingOptions

    if options is None:
        # Short chains are enough for a share of intervals; progress bars of hundreds
        # of fits would drown the log.
        options = SamplingOptions(chains=2, draws=500, tune=500, progress=False)
    options.validate()
    return options


def say(progress: Progress, message: str) -> None:
    """Pass one line to the progress callback, if any."""
    if progress is not None:
        progress(message)


def check_study_tree(tree: FlatTree) -> None:
    """Raise :class:`InputError` unless traits can be simulated on ``tree``."""
    if not isinstance(tree, FlatTree):
        raise InputError("tree must be a cladewise FlatTree (read one with cladewise.data.treefiles.read_tree)")
    if tree.n_tips < 4:
        raise InputError(f"the tree has {tree.n_tips} tips; a simulation study needs at least 4 species")
    if not np.all(np.isfinite(tree.length)) or np.any(tree.length < 0):
        raise InputError("branch lengths must be finite and >= 0 to simulate on the tree")
    if not float(tree.tip_heights().max()) > 0:
        raise InputError("the tree has zero height: every branch length is 0")


@dataclass
class RefitStudy:
    """A model built on a reference data set and compiled once."""

    built: Any
    compiled: Any
    options: Any
    err_var: np.ndarray | None

    def fit(self, y: Any, seed: int) -> Any:
        """Sample the model on data ``y`` with ``seed``; returns InferenceData.

        ``y`` is the species x traits array of the ``obs_values`` data (the compiled
        model is reused), or a whole :class:`~cladewise.model.build.ModelData` for data
        held as constants in the model (specimen statistics): the model is then built
        again with the reference's spec and compiled, a cache hit for the same structure.
        """
        from cladewise.inference.sampling import sample

        if not isinstance(y, np.ndarray):
            # compiled per data set: the compile cache makes the same structure a quick load
            fresh = compile_study(y, self.built.spec, self.options)
            return fresh.fit(fresh.built.y, seed)
        values = {"obs_values": np.where(np.isfinite(y), y, 0.0)}
        if self.err_var is not None:
            values["obs_err_var"] = self.err_var
        opts = dataclasses.replace(self.options, seed=int(seed))
        if self.compiled is not None:
            return sample(self.built, opts, compiled=self.compiled.with_data(**values))
        return sample(self.built, opts, tree_values=values)

    @property
    def draws_per_fit(self) -> int:
        """Posterior draws kept per fit (all chains)."""
        return int(self.options.chains * self.options.draws)


def make_refit_study(
    tree: FlatTree, traits: list[str], y_ref: np.ndarray, se: np.ndarray | None, options: Any,
    compile: bool = True,
) -> RefitStudy:
    """Build and compile the correlated BM model (known se when ``se`` is given) on ``y_ref``.

    ``compile=False`` builds only (a client whose fits run on a cluster).
    """
    from cladewise.model.build import ModelData, ModelSpec

    species = list(tree.tip_names)
    values = pd.DataFrame(y_ref, index=species, columns=traits)
    se_df = None if se is None else pd.DataFrame(se, index=species, columns=traits)
    spec = ModelSpec(kind="correlated", traits=traits, evolution="bm",
                     measurement_error="none" if se is None else "se")
    return compile_study(ModelData(tree, values, se=se_df), spec, options, compile=compile)


def compile_study(data: Any, spec: Any, options: Any, compile: bool = True) -> RefitStudy:
    """Build ``spec`` on reference ``data`` (a ModelData) and compile it once.

    ``compile=False`` builds only (for studies that rebuild the model per data set
    and need the reference model just for its prior).

    With ``measurement_error = "se"`` the squared standard errors of the reference
    are kept and passed with every refit (they are data, like the values).
    """
    from cladewise.inference.sampling import compile_model
    from cladewise.model.build import build_model

    built = build_model(data, spec)
    compiled = compile_model(built, options.sampler) if compile else None
    err_var = None
    if spec.measurement_error == "se":
        err_var = np.asarray(built.model["obs_err_var"].get_value(), dtype=float)
    return RefitStudy(built, compiled, options, err_var)


def simulate_datasets(tree: FlatTree, R: np.ndarray, mu: np.ndarray, se: np.ndarray | None,
                      gen: np.random.Generator, n: int) -> np.ndarray:
    """``n`` data sets (n x species x traits) by BM with rate matrix ``R`` plus measurement error."""
    from cladewise.model.simulate import simulate_traits

    return simulate_traits(tree, R, mu, se=se, rng=gen, n_reps=n)


def fit_problems(idata: Any) -> tuple[int, float]:
    """(divergent transitions, R-hat of the evolutionary correlation) of one fit."""
    import arviz as az

    div = int(np.asarray(idata.sample_stats["diverging"]).sum()) if "diverging" in idata.sample_stats else 0
    rhat = float("nan")
    if idata.posterior.sizes["chain"] > 1 and "evo_corr" in idata.posterior:
        da = idata.posterior["evo_corr"][:, :, 0, 1]
        rhat = float(az.rhat(da.to_dataset(name="r"))["r"])
    return div, rhat


def output_folder(out_dir: str | Path, overwrite: bool, what: str = "power study") -> Path:
    """Check a study's output folder before any work (see
    :func:`cladewise.inference.results.check_output_folder`)."""
    from cladewise.inference.results import check_output_folder

    return check_output_folder(out_dir, overwrite=overwrite, what=what)
