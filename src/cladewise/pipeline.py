"""From a spec file to a fit: the one path every command and the grid use.

:func:`fit_from_spec` reads the spec and its files, checks the output folder before
any work, builds the model, checks that the sampler can start, samples (one tree or
a tree sample) and saves the fit folder. :func:`check_spec` runs every one of those
checks without sampling (``cladewise check``).

Single tree or tree sample: a tree sample is fitted when ``trees`` or ``n_trees``
is given, or when the spec names only a tree sample (``[data] trees`` without
``tree``); otherwise the spec's one tree is fitted (a spec's ``trees`` is then
used only when asked for).
"""

from __future__ import annotations

import dataclasses
import platform
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cladewise.config.analysis import Spec, load_data, load_spec
from cladewise.errors import FitInterrupted, InputError
from cladewise.inference.fit import FitResult, fit
from cladewise.inference.results import check_output_folder
from cladewise.inference.sampling import SamplingOptions
from cladewise.model.build import ModelData, ModelSpec

__all__ = [
    "PreparedAnalysis",
    "CheckReport",
    "prepare_analysis",
    "fit_from_spec",
    "check_spec",
    "uses_tree_sample",
    "environment",
]


@dataclass
class PreparedAnalysis:
    """Everything a spec asks for, validated, before any sampling (``spec`` is None
    when the data came from Python objects, :func:`cladewise.direct.prepare_traits`)."""

    spec: Spec | None
    model_data: ModelData
    model_spec: ModelSpec
    options: SamplingOptions
    match: Any
    data_summary: Any

    @property
    def input_paths(self) -> list[Path]:
        """The spec and the data files it names."""
        return _input_paths(self.spec)


def _input_paths(spec: Spec | None) -> list[Path]:
    if spec is None:
        return []
    d = spec.data
    return [p for p in (spec.path, d.traits, d.tree, d.trees) if p is not None]


def _read_spec(spec_path: str | Path | Spec, trees: str | Path | None) -> Spec:
    # a Spec already read (a cluster worker gets one with its own copies of the files)
    spec = spec_path if isinstance(spec_path, Spec) else load_spec(spec_path)
    if trees is not None:
        p = Path(trees).expanduser().resolve()
        if not p.is_file():
            raise InputError(f"tree sample file not found: {trees}. Check the path.")
        spec = dataclasses.replace(spec, data=dataclasses.replace(spec.data, trees=p))
    return spec


def _model_and_options(spec: Spec, sampling_overrides: dict[str, Any]) -> tuple[ModelSpec, SamplingOptions]:
    if not spec.model:
        raise InputError(
            f"{spec.path.name} has no [model] section; add one, e.g.\n"
            '[model]\nkind = "correlated"\ntraits = ["trait_a", "trait_b"]'
        )
    model_spec = ModelSpec.from_dict(dict(spec.model))
    sampling = dict(spec.sampling)
    sampling.update({k: v for k, v in sampling_overrides.items() if v is not None})
    return model_spec, SamplingOptions.from_dict(sampling)


def _prepare(spec: Spec, sampling_overrides: dict[str, Any]) -> PreparedAnalysis:
    model_spec, options = _model_and_options(spec, sampling_overrides)
    match, summary = load_data(spec)
    data = ModelData.from_match(match)
    data.notes.extend(dropped_notes(match))
    return PreparedAnalysis(spec, data, model_spec, options, match, summary)


def prepare_analysis(spec_path: str | Path, **sampling_overrides: Any) -> PreparedAnalysis:
    """Read a spec and its files and validate ``[model]`` and ``[sampling]``.

    ``sampling_overrides`` (e.g. ``draws=500``) replace values of ``[sampling]``;
    ``None`` values are ignored.
    """
    return _prepare(load_spec(spec_path), sampling_overrides)


def dropped_notes(match: Any) -> list[str]:
    """Plain-language notes on species dropped while matching tree and table."""
    notes = []
    tree_drop = getattr(match, "dropped_from_tree", [])
    table_drop = getattr(match, "dropped_from_table", [])
    if tree_drop:
        notes.append(f"{len(tree_drop)} tree tips without data were pruned")
    if table_drop:
        notes.append(f"{len(table_drop)} table species absent from the tree were left out")
    kept = getattr(match, "kept_without_data", [])
    if kept:
        notes.append(f"{len(kept)} tree tips without a table row were kept (keep_tree_only): their values "
                     "are predicted, not observed")
    return notes


def uses_tree_sample(spec: Spec, trees: str | Path | None = None, n_trees: int | None = None) -> bool:
    """True when the fit runs over a tree sample (rule in the module docstring)."""
    return trees is not None or n_trees is not None or (spec.data.tree is None and spec.data.trees is not None)


def environment() -> dict[str, str]:
    """Package versions that reproduce a run."""
    import arviz
    import numpy
    import pymc
    import pytensor

    from cladewise import __version__

    out = {"cladewise": __version__, "python": sys.version.split()[0], "platform": platform.platform(),
           "numpy": numpy.__version__, "pymc": pymc.__version__, "pytensor": pytensor.__version__,
           "arviz": arviz.__version__}
    try:
        import nutpie

        out["nutpie"] = nutpie.__version__
    except ImportError:  # pragma: no cover
        pass
    return out


def _sample_trees(prep: PreparedAnalysis) -> list:
    if prep.spec.data.trees is None or not prep.match.trees:
        raise InputError(
            f"{prep.spec.path.name} names no tree sample: add `trees = \"<file>\"` to [data] or give --trees FILE"
        )
    return prep.match.trees


def fit_from_spec(
    spec_path: str | Path | Spec,
    *,
    out: str | Path | None = None,
    overwrite: bool = False,
    trees: str | Path | None = None,
    n_trees: int | None = None,
    tree_seed: int | None = None,
    keep_partial: bool = False,
    progress: bool | None = True,
    command: str | None = None,
    ancestral: bool | None = None,
    models: Any = None,
    **sampling_overrides: Any,
) -> FitResult:
    """Fit the model a spec describes, on its tree or over a tree sample, and save it.

    Parameters
    ----------
    spec_path : path or Spec
        Analysis spec (TOML) with ``[data]``, ``[model]`` and ``[sampling]``, or
        one already read by :func:`~cladewise.config.analysis.load_spec`.
    out : path, optional
        Fit folder to write; checked before any compiling or sampling
        (:func:`~cladewise.inference.results.check_output_folder`).
    overwrite : bool
        Replace ``out`` when it holds an earlier cladewise output.
    trees : path, optional
        Fit over this tree sample instead of the spec's ``[data] trees``.
    n_trees : int, optional
        Fit a random subset of this many trees of the sample.
    tree_seed : int, optional
        Seed that draws the subset and the per-tree sampling seeds (default: the
        sampling seed).
    keep_partial : bool
        On Ctrl-C save the draws made so far, marked partial, to ``out``.
    progress : bool, optional
        Progress bar and per-tree lines (``None``: only on a terminal).
    command : str, optional
        The command line that started the run, recorded in summary.json.
    ancestral : bool, optional
        Add ancestral values and predictions of missing cells
        (:mod:`cladewise.inference.ancestral`); default: up to
        :data:`~cladewise.inference.ancestral.MAX_TIPS` species.
    models : callable, optional
        ``models(prepared) -> (built, compiled)`` for a single-tree fit: a store of
        built and compiled models to reuse (a cluster worker keeps one per model and
        data, :mod:`cladewise.studies.remote_fit`); default: build and compile here.
    **sampling_overrides
        Replace ``[sampling]`` values (``None`` is ignored), e.g. ``draws=500``.

    Returns
    -------
    FitResult or TreeSampleFit

    Raises
    ------
    InputError
        Any problem with the spec, the files, the output folder or the starting point.
    FitInterrupted
        Ctrl-C: nothing saved, or with ``keep_partial`` the partial fit saved
        (``saved`` names the folder).
    """
    spec = _read_spec(spec_path, trees)
    if progress is not None:
        sampling_overrides = {**sampling_overrides, "progress": bool(progress)}
    target = None
    if out is not None:
        target = check_output_folder(out, overwrite=overwrite, inputs=_input_paths(spec), what="fit")
    pooled = uses_tree_sample(spec, trees, n_trees)
    prep = _prepare(spec, sampling_overrides)
    try:
        if pooled:
            from cladewise.inference.pooled import fit_tree_sample

            result = fit_tree_sample(prep.model_data, prep.model_spec, _sample_trees(prep), prep.options,
                                     n_trees=n_trees, seed=tree_seed, progress=progress,
                                     keep_partial=keep_partial)
        else:
            built, compiled = models(prep) if models is not None else (None, None)
            result = fit(prep.model_data, prep.model_spec, prep.options, keep_partial=keep_partial,
                         built=built, compiled=compiled)
    except FitInterrupted as exc:
        part = exc.partial
        if not (keep_partial and target is not None and part is not None):
            raise FitInterrupted("interrupted: sampling stopped before it finished; nothing was saved") from None
        _describe_run(part, prep, command, pooled)
        part.save(target, overwrite=overwrite, inputs=prep.input_paths)
        raise FitInterrupted(
            f"interrupted: the draws made so far were saved to {out}, marked partial", partial=part, saved=target
        ) from None
    _describe_run(result, prep, command, pooled)
    add_ancestral(result, prep, ancestral, pooled)
    if target is not None:
        result.save(target, overwrite=overwrite, inputs=prep.input_paths)
    return result


def add_ancestral(result: FitResult, prep: PreparedAnalysis, ancestral: bool | None, pooled: bool) -> None:
    """Attach ancestral values and predictions of missing cells to a fit (``ancestral=None``: by size)."""
    from cladewise.inference.ancestral import MAX_TIPS, add_reconstruction

    n = prep.model_data.tree.n_tips
    if ancestral is None:
        ancestral = n <= MAX_TIPS
        if not ancestral:
            result.info["notes"] = list(result.info.get("notes", [])) + [
                f"ancestral values were not computed by default for {n:,} species (over {MAX_TIPS:,}); "
                "ask for them with --ancestral"]
    if ancestral and "tip_mean" in result.built.engine_inputs:
        result.info["notes"] = list(result.info.get("notes", [])) + [
            "ancestral values and predictions are not computed for multi-optimum OU models yet"]
    elif ancestral:
        add_reconstruction(result, tree=prep.model_data.tree, pooled=pooled)


def _describe_run(result: FitResult, prep: PreparedAnalysis, command: str | None, pooled: bool) -> None:
    result.info["spec_path"] = str(prep.spec.path)
    result.info["spec_text"] = prep.spec.path.read_text()
    result.info["data_summary"] = prep.data_summary.to_dict()
    result.info["environment"] = environment()
    result.info["command"] = command or ""
    if pooled:
        result.info["trees_path"] = str(prep.spec.data.trees)


# --------------------------------------------------------------------------- check
@dataclass
class CheckReport:
    """What :func:`check_spec` found: the data summary and any problems that do not block a fit.

    ``problems`` are warnings (a fit can start); blocking problems raise InputError.
    """

    spec_path: Path
    data_summary: Any
    model: dict[str, Any] | None = None
    tree_sample: bool = False
    n_trees: int = 1
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        return {"spec_path": str(self.spec_path), "data": self.data_summary.to_dict(), "model": self.model,
                "tree_sample": self.tree_sample, "n_trees": self.n_trees, "problems": list(self.problems)}

    def to_text(self) -> str:
        lines = [self.data_summary.to_text()]
        if self.model is None:
            lines += ["", "No [model] section: only the data were checked."]
        else:
            where = f"over {self.n_trees} trees" if self.tree_sample else "on one tree"
            lines += ["", f"Model: {self.model.get('kind')} ({self.model.get('evolution')}), fitted {where}; "
                          "it builds and its log density and gradient are finite at the starting point."]
        shown = set(getattr(self.data_summary, "warnings", []) or [])  # printed with the summary
        extra = [p for p in self.problems if p not in shown]
        if extra:
            lines += ["", "Warnings:"] + [f"  - {p}" for p in extra]
        return "\n".join(lines)


def check_spec(spec_path: str | Path, *, trees: str | Path | None = None, n_trees: int | None = None,
               **sampling_overrides: Any) -> CheckReport:
    """Run every check :func:`fit_from_spec` runs up to sampling, without compiling a sampler.

    Reads the spec and its data and tree(s), validates ``[model]`` and
    ``[sampling]``, builds the PyMC model and evaluates its log density and gradient
    at the starting point (on every tree of a sample).

    Returns
    -------
    CheckReport
        The data summary and the non-blocking problems (warnings).

    Raises
    ------
    InputError
        A problem that stops a fit, with its likely cause.
    """
    from cladewise.inference.startcheck import check_starting_point
    from cladewise.model.build import build_model, tree_data_values

    spec = _read_spec(spec_path, trees)
    if not spec.model:
        match, summary = load_data(spec)
        return CheckReport(spec.path, summary, problems=list(getattr(summary, "warnings", []) or []))
    pooled = uses_tree_sample(spec, trees, n_trees)
    prep = _prepare(spec, sampling_overrides)
    if pooled:
        from cladewise.inference.tree_align import build_for_sample, choose_trees

        sample = _sample_trees(prep)
        chosen = choose_trees(len(sample), n_trees, prep.options.seed)
        built, padded = build_for_sample(prep.model_data, prep.model_spec, [sample[i] for i in chosen])
        check_starting_point(built, [tree_data_values(built, t) for t in padded])
        n = len(chosen)
    else:
        built = build_model(prep.model_data, prep.model_spec)
        check_starting_point(built)
        n = 1
    problems = list(getattr(prep.data_summary, "warnings", []) or [])
    problems += [p for p in built.notes if p not in problems and p not in prep.model_data.notes]
    return CheckReport(spec.path, prep.data_summary, model=prep.model_spec.to_dict(), tree_sample=pooled,
                       n_trees=n, problems=problems)
