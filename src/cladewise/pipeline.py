"""Running a spec file: files -> data -> model -> fit -> saved folder.

This is the library behind ``cladewise fit``; notebooks can call :func:`fit_spec`
directly.
"""

from __future__ import annotations

import platform
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cladewise.model.build import ModelData, ModelSpec
from cladewise.errors import InputError
from cladewise.inference.fit import check_output_folder, FitResult, fit
from cladewise.inference.sampling import SamplingOptions
from cladewise.config.analysis import Spec, load_data, load_spec

__all__ = ["PreparedAnalysis", "prepare_analysis", "fit_spec", "environment"]


@dataclass
class PreparedAnalysis:
    """Everything a spec asks for, validated, before any sampling."""

    spec: Spec
    model_data: ModelData
    model_spec: ModelSpec
    options: SamplingOptions
    match: Any
    data_summary: Any


def prepare_analysis(spec_path: str | Path, **sampling_overrides: Any) -> PreparedAnalysis:
    """Read a spec and its files and validate ``[model]`` and ``[sampling]``.

    ``sampling_overrides`` (e.g. ``draws=500``) replace values of ``[sampling]``;
    ``None`` values are ignored.
    """
    spec = load_spec(spec_path)
    if not spec.model:
        raise InputError(
            f"{spec.path.name} has no [model] section; add one, e.g.\n"
            '[model]\nkind = "correlated"\ntraits = ["trait_a", "trait_b"]'
        )
    model_spec = ModelSpec.from_dict(dict(spec.model))
    sampling = dict(spec.sampling)
    sampling.update({k: v for k, v in sampling_overrides.items() if v is not None})
    options = SamplingOptions.from_dict(sampling)
    match, summary = load_data(spec)
    data = ModelData.from_match(match)
    data.notes.extend(dropped_notes(match))
    return PreparedAnalysis(spec, data, model_spec, options, match, summary)


def dropped_notes(match: Any) -> list[str]:
    notes = []
    tree_drop = getattr(match, "dropped_from_tree", [])
    table_drop = getattr(match, "dropped_from_table", [])
    if tree_drop:
        notes.append(f"{len(tree_drop)} tree tips without data were pruned")
    if table_drop:
        notes.append(f"{len(table_drop)} table species absent from the tree were left out")
    return notes


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


def fit_spec(
    spec_path: str | Path,
    out_dir: str | Path | None = None,
    overwrite: bool = False,
    command: str | None = None,
    **sampling_overrides: Any,
) -> FitResult:
    """Fit the model a spec describes and (optionally) save it to ``out_dir``."""
    prep = prepare_analysis(spec_path, **sampling_overrides)
    if out_dir is not None:
        out = Path(out_dir)
        check_output_folder(out, overwrite)
    result = fit(prep.model_data, prep.model_spec, prep.options)
    result.info["spec_path"] = str(prep.spec.path)
    result.info["spec_text"] = prep.spec.path.read_text()
    result.info["data_summary"] = prep.data_summary.to_dict()
    result.info["environment"] = environment()
    result.info["command"] = command or ""
    if out_dir is not None:
        result.save(out_dir, overwrite=overwrite)
    return result


# =============================================================================
# shim until flow lands: `fit_from_spec` and `check_spec` over today's code, so
# the command line can be written against the one pipeline path. The lead
# replaces this block with flow's versions when merging.
# =============================================================================
@dataclass
class CheckReport:
    """What :func:`check_spec` found: the data summary and non-blocking problems (shim until flow lands)."""

    spec_path: Path
    data_summary: Any
    model: dict[str, Any] | None = None
    problems: list[str] | None = None

    @property
    def ok(self) -> bool:
        return not self.problems

    def to_dict(self) -> dict[str, Any]:
        return {"spec_path": str(self.spec_path), "data": self.data_summary.to_dict(), "model": self.model,
                "problems": list(self.problems or [])}

    def to_text(self) -> str:
        return self.data_summary.to_text()


def check_spec(spec_path: str | Path) -> CheckReport:
    """Run the validations of a fit up to sampling; blocking problems raise InputError (shim)."""
    from dataclasses import asdict

    from cladewise.model.build import build_model

    spec = load_spec(spec_path)
    if not spec.model:
        _, summary = load_data(spec)
        SamplingOptions.from_dict(dict(spec.sampling))
        return CheckReport(spec.path, summary)
    prep = prepare_analysis(spec_path)
    build_model(prep.model_data, prep.model_spec)
    return CheckReport(spec.path, prep.data_summary, model=asdict(prep.model_spec))


def fit_from_spec(
    spec_path: str | Path,
    *,
    out: str | Path | None = None,
    overwrite: bool = False,
    trees: str | Path | None = None,
    n_trees: int | None = None,
    tree_seed: int | None = None,
    keep_partial: bool = False,
    progress: bool | None = True,
    command: str | None = None,
    **sampling_overrides: Any,
) -> FitResult:
    """Fit a spec on its tree or over a tree sample (shim until flow lands).

    ``tree_seed`` and ``keep_partial`` are accepted but not acted on here.
    """
    if trees is not None or n_trees is not None:
        from cladewise.inference.treesample import fit_spec_tree_sample

        return fit_spec_tree_sample(spec_path, out, trees=trees, n_trees=n_trees, overwrite=overwrite,
                                    command=command, progress=progress, **sampling_overrides)
    return fit_spec(spec_path, out, overwrite=overwrite, command=command, progress=progress, **sampling_overrides)
