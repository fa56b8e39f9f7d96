"""The design of a phylogenetic regression: the formula read with formulaic.

Messages carry no terminal colour codes and say how to quote column names with spaces
or dashes (backticks, formulaic's quoting).
"""

from __future__ import annotations

import re
from typing import Any

import numpy as np

from cladewise.errors import InputError

__all__ = ["regression_data"]

_FORMULA_HINT = 'a column name with spaces or dashes goes in backticks, e.g. formula = "y ~ `body mass`"'


def _plain(error: Exception) -> str:
    # formulaic marks the place of a syntax error with terminal colour codes
    return re.sub(r"\x1b\[[0-9;]*m", "", str(error)).strip()


def _formula_frame(data: Any, spec: Any, needed: list[str]) -> tuple[Any, list[Any], str | None]:
    """The table the formula reads: numeric columns plus the declared discrete traits.

    A discrete response enters as its state codes 0..K-1 (the threshold model turns
    them into liabilities); a discrete predictor as a categorical column with the
    declared order, so its first state is the reference level. Returns the frame, the
    checked discrete traits and the response's name when it is discrete.
    """
    from cladewise.data.discrete import discrete_column, encode_states

    disc = getattr(spec, "discrete", None) or {}
    if not disc:
        return data.values, [], None
    import pandas as pd

    response = str(spec.formula).split("~", 1)[0].strip().strip("`").strip()
    unused = [t for t in disc if t not in needed]
    if unused:
        raise InputError(f"discrete trait(s) {unused} are declared but the formula {spec.formula!r} does not use "
                         "them; name them in the formula or drop them from discrete")
    frame = data.values.copy()
    found, disc_response = [], None
    for name, states in disc.items():
        t = encode_states(discrete_column(data.values, getattr(data, "extra", None), name), data.species,
                          name, states, "the trait table")
        found.append(t)
        if name == response:
            frame[name] = t.codes
            disc_response = name
        else:
            codes = np.where(np.isfinite(t.codes), t.codes, -1).astype(int)
            frame[name] = pd.Categorical.from_codes(codes, categories=list(t.states))
    return frame, found, disc_response


def regression_data(data: Any, spec: Any) -> tuple:
    """Response, observed mask, design matrix and predictor names of a regression spec.

    ``data`` is a :class:`~cladewise.model.build.ModelData` (its ``values`` table),
    ``spec`` a :class:`~cladewise.model.build.ModelSpec` with a ``formula``. Species
    with a response but a missing predictor are left out of the likelihood (a note says
    how many; their design rows are NaN). A declared discrete predictor enters as indicator columns against its
    first state; a declared discrete response as state codes. Returns ``(y, observed,
    [response], X, predictors, [error column], discrete traits, discrete response or
    None)``.

    Raises
    ------
    InputError
        The formula cannot be read, names columns the table lacks, or a predictor is
        constant among the species used.
    """
    from formulaic import Formula
    from formulaic.errors import FormulaicError

    try:
        f = Formula(spec.formula)
        needed = sorted(f.required_variables)
    except FormulaicError as e:
        raise InputError(f"could not read the formula {spec.formula!r}: {_plain(e)} ({_FORMULA_HINT})") from None
    frame, found, disc_response = _formula_frame(data, spec, needed)
    absent = [v for v in needed if v not in frame.columns]
    if absent:
        odd = any(not str(c).isidentifier() for c in frame.columns)
        text = list(getattr(data, "extra", None).columns) if getattr(data, "extra", None) is not None else []
        hint = [v for v in absent if v in text]
        raise InputError(
            f"the formula {spec.formula!r} names {absent}, which are not columns of the trait table; "
            "available: " + ", ".join(map(str, frame.columns)) + (f" ({_FORMULA_HINT})" if odd else "")
            + (f". {hint} hold text: declare a discrete trait with discrete = {{ {hint[0]} = [\"state_a\", "
               "\"state_b\"] }}" if hint else "")
        )
    from formulaic import model_matrix

    try:
        mm = model_matrix(spec.formula, frame, na_action="ignore")
    except FormulaicError as e:
        raise InputError(f"could not build the design from {spec.formula!r}: {_plain(e)} ({_FORMULA_HINT})") from None
    if mm.lhs.shape[1] != 1:
        raise InputError("the formula must have exactly one response on the left of '~'")
    response = str(mm.lhs.columns[0])
    yv = mm.lhs.to_numpy(dtype=float)
    X = mm.rhs.to_numpy(dtype=float)
    predictors = [str(c) for c in mm.rhs.columns]
    ok_x = np.all(np.isfinite(X), axis=1)
    for t in found:  # formulaic codes a missing category as the reference level: leave such species out
        if t.name != disc_response:
            ok_x &= np.isfinite(t.codes)
    observed = np.isfinite(yv) & ok_x[:, None]
    n_drop = int((np.isfinite(yv[:, 0]) & ~ok_x).sum())
    if n_drop:
        data.notes.append(f"{n_drop} species with a response but a missing predictor do not inform the regression")
    X = np.where(ok_x[:, None], X, np.nan)  # NaN rows: a predictor is missing (build fills them with 0)
    for j, p in enumerate(predictors):
        col = X[observed[:, 0], j]
        if p != "Intercept" and col.size and np.ptp(col) == 0:
            raise InputError(f"predictor {p!r} has no variance among the species used; drop it from the formula")
    if disc_response is not None and spec.measurement_error != "none":
        raise InputError(f"the response {disc_response!r} is discrete: its states have no measurement error. "
                         "Use measurement_error = \"none\" (errors in predictors are not modelled by a regression)")
    err_col = response if response in data.values.columns and disc_response is None else None
    return yv, observed, [response], X, predictors, [err_col], found, disc_response
