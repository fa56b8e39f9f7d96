"""Can the sampler start? The log density and its gradient at the starting point.

A model whose log density or gradient is not finite where sampling starts fails
inside the sampler with a message about numbers, not about the data. This check
evaluates both before any sampler is compiled and, when one is not finite, names the
term that is not and the most likely cause in the data: branch lengths or trait
values far too large or small, a constant trait.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from cladewise.errors import InputError

__all__ = ["starting_point_problems", "check_starting_point", "likely_causes", "scale_problems"]

_LARGE = 1e6
_SMALL = 1e-6
_MODE = "FAST_COMPILE"
_PYTHON_MODE_MAX_NODES = 20_000  # above: numba mode (see starting_point_problems)
# beyond these the model's numbers lose all precision (squares overflow or vanish in
# float64) even when the starting point happens to be finite: refused outright
_HARD_LARGE = 1e100
_HARD_SMALL = 1e-100


def likely_causes(built: Any) -> list[str]:
    """Facts of the data that make a model's numbers overflow or vanish, in words."""
    causes = []
    tree = built.data.tree
    length = np.asarray(tree.length, dtype=float)
    height = float(np.max(tree.tip_heights())) if tree.n_tips else 0.0
    longest = float(np.max(length)) if length.size else 0.0
    if not np.all(np.isfinite(length)) or longest > _LARGE or height > _LARGE:
        causes.append(
            f"branch lengths are very large (longest {longest:.3g}, tree height {height:.3g}): rescale "
            "the tree so its height is between about 0.01 and 1000 (e.g. millions of years instead of years)"
        )
    elif height < _SMALL:
        causes.append(
            f"the tree height is nearly zero ({height:.3g}): rescale the branch lengths so the height is "
            "between about 0.01 and 1000"
        )
    y = np.asarray(built.y, dtype=float)
    for j, t in enumerate(built.traits):
        v = y[np.isfinite(y[:, j]), j]
        if v.size == 0:
            continue
        big = float(np.max(np.abs(v)))
        sd = float(np.std(v, ddof=1)) if v.size > 1 else 0.0
        if big > _LARGE:
            causes.append(f"trait {t!r} has values as large as {big:.3g}: change its units or analyse "
                          f"its logarithm (log = [\"{t}\"] in [data])")
        elif sd <= _SMALL * max(1.0, big):
            causes.append(f"trait {t!r} is (nearly) constant across species (sd {sd:.3g}): it carries no "
                          "information on evolution; leave it out or check the column")
    fixed = dict(getattr(built.spec, "fixed", None) or {})
    if fixed:
        said = ", ".join(f"{k} = {v:g}" for k, v in fixed.items())
        causes.append(f"[model] fixed sets {said}: at that value the transformed tree may have (nearly) zero "
                      "or overflowing branch lengths; estimate the parameter or choose a milder value")
    if not causes:
        causes.append("no extreme branch length or trait value was found; check the [model.priors] "
                      "settings and the measurement-error columns for zeros or extreme values")
    return causes


def scale_problems(built: Any) -> list[str]:
    """Tree heights or trait values at scales float64 arithmetic cannot handle, in words."""
    out = []
    tree = built.data.tree
    height = float(np.max(tree.tip_heights())) if tree.n_tips else 0.0
    if not np.isfinite(height) or height > _HARD_LARGE or 0 < height < _HARD_SMALL:
        out.append(f"the tree height is {height:.3g}, too far from 1 to compute with: rescale the branch "
                   "lengths so the height is between about 0.01 and 1000 (e.g. millions of years)")
    y = np.asarray(built.y, dtype=float)
    big = float(np.max(np.abs(y[np.isfinite(y)]))) if np.isfinite(y).any() else 0.0
    if big > _HARD_LARGE:
        out.append(f"trait values reach {big:.3g}, too large to compute with: change the units or analyse "
                   "the logarithm (log = [...] in [data])")
    return out


def _apply(model: Any, values: dict[str, np.ndarray]) -> None:
    import pymc as pm

    with model:
        pm.set_data({k: v for k, v in values.items() if k in model.named_vars})


def starting_point_problems(built: Any, tree_values: Sequence[dict[str, np.ndarray]] | None = None) -> list[str]:
    """Every non-finite log density or gradient at the model's starting point, in words.

    Parameters
    ----------
    built : BuiltModel
        The model to check.
    tree_values : sequence of dict, optional
        Tree data of other trees of a sample (see
        :func:`cladewise.model.build.tree_data_values`); each is checked too and
        the model's own tree data are restored afterwards.

    Returns
    -------
    list of str
        Empty when the sampler can start.
    """
    import warnings

    scale = scale_problems(built)
    if scale:
        return scale
    model = built.model
    point = model.initial_point()
    # Python-mode functions: a C compile would cost minutes for one evaluation. But
    # Python mode runs some elementwise products one element at a time (~50 us each):
    # for big trees numba-compiled functions (cached on disk by PyTensor) are faster.
    mode = _MODE if built.data.tree.n_nodes <= _PYTHON_MODE_MAX_NODES else "NUMBA"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        logp_fn = model.compile_logp(mode=mode)
        dlogp_fn = model.compile_dlogp(mode=mode)
        terms_fn = model.compile_fn(model.logp(sum=False), point_fn=True, mode=_MODE)
    sets = [("", None)]
    if tree_values:
        sets += [(f" on tree {i + 1} of the sample", v) for i, v in enumerate(tree_values)]
        own = {name: model[name].get_value() for name in built.tree_data.values() if name in model.named_vars}
    problems: list[str] = []
    try:
        for where, values in sets:
            if values is not None:
                _apply(model, values)
            with np.errstate(all="ignore"), warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                lp = float(logp_fn(point))
                grad = np.asarray(dlogp_fn(point), dtype=float)
            if np.isfinite(lp) and np.all(np.isfinite(grad)):
                continue
            with np.errstate(all="ignore"), warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                terms = terms_fn(point)
            names = [getattr(v, "name", None) or f"term {i}" for i, v in
                     enumerate(list(model.basic_RVs) + list(model.potentials))]
            bad = [n for n, t in zip(names, terms) if not np.all(np.isfinite(np.asarray(t, dtype=float)))]
            what = f"log density {lp:.3g}" if not np.isfinite(lp) else "gradient not finite"
            terms_txt = f" (in {', '.join(bad[:4])})" if bad else ""
            problems.append(f"the model's {what} at the starting point{where}{terms_txt}")
            if values is None:
                break  # the data themselves are at fault; other trees add nothing
    finally:
        if tree_values:
            _apply(model, own)
    return problems


def check_starting_point(built: Any, tree_values: Sequence[dict[str, np.ndarray]] | None = None) -> None:
    """Raise :class:`InputError` naming the likely cause when sampling cannot start."""
    if getattr(built, "likelihood", "tree") == "tree":
        from cladewise.inference.engine_cache import prepare_engine

        prepare_engine(built.observed.shape[1])  # compiles this k's kernels only, announced in the log
    problems = starting_point_problems(built, tree_values)
    if problems and problems == scale_problems(built):
        raise InputError("the data cannot be analysed at this scale: " + "; ".join(problems) + ".")
    if problems:
        raise InputError(
            "the sampler cannot start: " + "; ".join(problems) + ". Likely cause: "
            + "; ".join(likely_causes(built)) + "."
        )
