"""Fitting from Python objects, without a spec file.

:func:`fit_traits` takes a tree (a file path, a Newick string or a read
:class:`~cladewise.data.trees.FlatTree`) and a pandas DataFrame plus the model and
sampler settings, and returns the :class:`~cladewise.inference.fit.FitResult`. The
data go through the same readers, checks and name matching as a spec's files
(:func:`cladewise.config.analysis.prepare_data`), the settings through the same key
tables (``[model]``, ``[sampling]``), and the fit through the same
:func:`cladewise.inference.fit.fit`: the same data, settings and seed give the same
fit as ``cladewise fit`` on a spec.

:func:`signal_traits` does the same for phylogenetic signal
(:func:`cladewise.evaluation.signal.trait_signal`).
"""

from __future__ import annotations

from typing import Any, Sequence

from cladewise.errors import InputError

__all__ = ["prepare_traits", "fit_traits", "signal_traits"]

# the model settings of fit_traits, as keys of a spec's [model]
_MODEL_ARGS = ("kind", "traits", "formula", "evolution", "ou_root", "measurement_error", "species_covariance",
               "error_correlation", "priors", "fixed")
_SAMPLING_ARGS = ("sampler", "chains", "draws", "tune", "seed", "target_accept", "progress")


def _describe_arg(v: Any) -> str:
    import pandas as pd

    if isinstance(v, pd.DataFrame):
        return f"<DataFrame {v.shape[0]} rows x {v.shape[1]} columns>"
    text = repr(v)
    if isinstance(v, str) and len(text) > 60:
        return text[:45] + "...'"
    if not isinstance(v, (str, int, float, bool, list, tuple, dict, type(None))):
        return f"<{type(v).__name__}>"
    return text


def _call_text(name: str, args: dict[str, Any]) -> str:
    return f"cladewise.{name}(" + ", ".join(f"{k}={_describe_arg(v)}" for k, v in args.items()) + ")"


def _data(tree: Any, table: Any, data_args: dict[str, Any]):
    from cladewise.config.analysis import prepare_data
    from cladewise.model.build import ModelData
    from cladewise.pipeline import dropped_notes

    import pandas as pd
    from pathlib import Path

    if tree is None:
        raise InputError("give a tree: a file path, a Newick string or a read tree.")
    if not isinstance(table, (pd.DataFrame, str, Path)):
        raise InputError(f"the trait table must be a pandas DataFrame or a file path; got {type(table).__name__}.")
    match, summary = prepare_data(table, tree, **data_args)
    data = ModelData.from_match(match)
    data.notes.extend(dropped_notes(match))
    return match, summary, data


def _check_traits(td: Any, names: Sequence[str] | None) -> None:
    if names is None:
        return
    if isinstance(names, str):
        raise InputError(f"traits must be a list of column names, e.g. traits=[{names!r}].")
    for t in names:
        td.index(t)  # InputError naming the numeric columns and near misses


def prepare_traits(
    tree: Any,
    table: Any,
    traits: Sequence[str] | None = None,
    *,
    formula: str | None = None,
    kind: str | None = None,
    evolution: str = "bm",
    measurement_error: str = "none",
    species_covariance: bool = False,
    error_correlation: Any = None,
    ou_root: str = "fixed",
    priors: dict[str, Any] | None = None,
    fixed: dict[str, float] | None = None,
    discrete: dict[str, list[Any]] | None = None,
    regimes: dict[str, Any] | None = None,
    species: str = "species",
    specimens: bool = False,
    log: Sequence[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
    drop_unmatched: bool = False,
    keep_tree_only: bool = False,
    sampler: str = "nutpie",
    chains: int = 4,
    draws: int = 1000,
    tune: int = 1000,
    seed: int = 1,
    target_accept: float | None = None,
    progress: bool | None = None,
):
    """Validate and match the data and settings of :func:`fit_traits` without sampling.

    Returns
    -------
    PreparedAnalysis
        ``model_data``, ``model_spec``, ``options``, ``match`` and ``data_summary``,
        as :func:`cladewise.pipeline.prepare_analysis` gives for a spec (``spec`` is None).
    """
    from cladewise.inference.sampling import SamplingOptions
    from cladewise.model.build import ModelSpec
    from cladewise.pipeline import PreparedAnalysis

    data_args = dict(species=species, specimens=specimens, log=tuple(log), se_suffix=se_suffix, n_suffix=n_suffix,
                     sd_suffix=sd_suffix, drop_unmatched=drop_unmatched, keep_tree_only=keep_tree_only)
    match, summary, data = _data(tree, table, data_args)
    _check_traits(match.traits, traits)
    if kind is None:
        kind = "regression" if formula else ("correlated" if traits is not None and len(traits) >= 2
                                             else "independent")
    model: dict[str, Any] = {"kind": kind, "evolution": evolution, "ou_root": ou_root,
                             "measurement_error": measurement_error, "species_covariance": species_covariance}
    if traits is not None:
        model["traits"] = list(traits)
    if formula is not None:
        model["formula"] = formula
    for key, value in (("error_correlation", error_correlation), ("priors", priors), ("fixed", fixed),
                       ("discrete", discrete), ("regimes", regimes)):
        if value is not None:
            model[key] = value
    model_spec = ModelSpec.from_dict(model)
    sampling = {"sampler": sampler, "chains": chains, "draws": draws, "tune": tune, "seed": seed,
                "target_accept": target_accept, "progress": progress}
    options = SamplingOptions.from_dict({k: v for k, v in sampling.items() if v is not None})
    return PreparedAnalysis(None, data, model_spec, options, match, summary)


def fit_traits(
    tree: Any,
    table: Any,
    traits: Sequence[str] | None = None,
    *,
    formula: str | None = None,
    kind: str | None = None,
    evolution: str = "bm",
    measurement_error: str = "none",
    species_covariance: bool = False,
    error_correlation: Any = None,
    ou_root: str = "fixed",
    priors: dict[str, Any] | None = None,
    fixed: dict[str, float] | None = None,
    discrete: dict[str, list[Any]] | None = None,
    regimes: dict[str, Any] | None = None,
    species: str = "species",
    specimens: bool = False,
    log: Sequence[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
    drop_unmatched: bool = False,
    keep_tree_only: bool = False,
    sampler: str = "nutpie",
    chains: int = 4,
    draws: int = 1000,
    tune: int = 1000,
    seed: int = 1,
    target_accept: float | None = None,
    progress: bool | None = None,
    ancestral: bool | None = None,
):
    """Fit a model to a tree and a DataFrame, without a spec file.

    Parameters
    ----------
    tree : path, str or FlatTree
        A Newick or NEXUS file (the first tree is used), Newick text, or a tree read
        with :func:`cladewise.data.treefiles.read_tree`.
    table : DataFrame or path
        One row per species (means, with optional ``<trait>_se``, ``<trait>_n``,
        ``<trait>_sd`` columns) or, with ``specimens=True``, one row per specimen.
        The species are in the column ``species`` (or the index).
    traits : list of str, optional
        Trait columns of a ``correlated`` or ``independent`` model.
    formula : str, optional
        ``"response ~ predictor + ..."`` for a phylogenetic regression.
    kind : {"correlated", "independent", "regression"}, optional
        Default: ``regression`` with a formula, ``correlated`` with two or more
        traits, ``independent`` with one.
    evolution, measurement_error, species_covariance, error_correlation, ou_root, priors, fixed, discrete, regimes
        As the keys of a spec's ``[model]`` (:data:`cladewise.config.analysis.MODEL`).
    species, specimens, log, se_suffix, n_suffix, sd_suffix, drop_unmatched, keep_tree_only
        As the keys of a spec's ``[data]``.
    sampler, chains, draws, tune, seed, target_accept, progress
        As the keys of a spec's ``[sampling]``.
    ancestral : bool, optional
        Add ancestral values and predictions of missing cells, as ``cladewise fit``
        does (default: up to :data:`cladewise.inference.ancestral.MAX_TIPS` species).

    Returns
    -------
    FitResult
        Shows its summary table when printed or displayed in a notebook;
        ``.summary`` (DataFrame), ``.idata`` (ArviZ), ``.save(folder)``,
        ``.report(folder)``.

    Raises
    ------
    InputError
        A tree that does not parse, a table without the species column, an unknown
        trait, species that do not match, a bad setting: each says what to fix.
    """
    from cladewise.inference.fit import fit
    from cladewise.pipeline import add_ancestral, environment

    args = {k: v for k, v in locals().items() if k not in ("fit", "environment", "add_ancestral")}
    prep = prepare_traits(**{k: v for k, v in args.items() if k != "ancestral"})
    result = fit(prep.model_data, prep.model_spec, prep.options)
    add_ancestral(result, prep, ancestral, pooled=False)
    shown = {k: v for k, v in args.items() if k in ("tree", "table", "traits") or
             (v is not None and v != _DEFAULTS.get(k))}
    result.info["data_summary"] = prep.data_summary.to_dict()
    result.info["environment"] = environment()
    result.info["command"] = _call_text("fit_traits", shown)
    return result


def signal_traits(
    tree: Any,
    table: Any,
    traits: Sequence[str] | None = None,
    *,
    measurement_error: str = "none",
    with_lambda: bool = True,
    permutations: int = 999,
    threshold: float | None = None,
    priors: dict[str, Any] | None = None,
    species: str = "species",
    specimens: bool = False,
    log: Sequence[str] = (),
    se_suffix: str = "_se",
    n_suffix: str = "_n",
    sd_suffix: str = "_sd",
    drop_unmatched: bool = False,
    sampler: str = "nutpie",
    chains: int = 4,
    draws: int = 1000,
    tune: int = 1000,
    seed: int = 1,
    target_accept: float | None = None,
    progress: bool | None = None,
):
    """Blomberg's K and the posterior of Pagel's lambda per trait, from a tree and a DataFrame.

    Arguments as in :func:`fit_traits` (``traits`` default: every numeric column);
    ``with_lambda=False`` gives only K (no sampling); ``permutations`` shuffles
    give K's p-value; the table gives P(lambda > ``threshold``) (default 0.1).

    Returns
    -------
    SignalResult
        ``.table`` (DataFrame), ``.figure()``, ``.save(folder)``.
    """
    from cladewise.evaluation.signal import DEFAULT_THRESHOLD, trait_signal
    from cladewise.inference.sampling import SamplingOptions

    data_args = dict(species=species, specimens=specimens, log=tuple(log), se_suffix=se_suffix, n_suffix=n_suffix,
                     sd_suffix=sd_suffix, drop_unmatched=drop_unmatched)
    match, _summary, data = _data(tree, table, data_args)
    _check_traits(match.traits, traits)
    sampling = {"sampler": sampler, "chains": chains, "draws": draws, "tune": tune, "seed": seed,
                "target_accept": target_accept, "progress": progress}
    options = SamplingOptions.from_dict({k: v for k, v in sampling.items() if v is not None})
    return trait_signal(data, traits, options=options, measurement_error=measurement_error, priors=priors,
                        with_lambda=with_lambda, permutations=permutations,
                        threshold=DEFAULT_THRESHOLD if threshold is None else threshold)


_DEFAULTS = {
    "formula": None, "kind": None, "evolution": "bm", "measurement_error": "none", "species_covariance": False,
    "error_correlation": None, "ou_root": "fixed", "priors": None, "fixed": None, "species": "species",
    "specimens": False, "log": (), "se_suffix": "_se", "n_suffix": "_n", "sd_suffix": "_sd",
    "drop_unmatched": False, "sampler": "nutpie", "chains": 4, "draws": 1000, "tune": 1000, "seed": 1,
    "target_accept": None, "progress": None, "discrete": None, "regimes": None, "keep_tree_only": False,
    "ancestral": None,
}
