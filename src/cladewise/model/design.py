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


def regression_data(data: Any, spec: Any) -> tuple:
    """Response, observed mask, design matrix and predictor names of a regression spec.

    ``data`` is a :class:`~cladewise.model.build.ModelData` (its ``values`` table),
    ``spec`` a :class:`~cladewise.model.build.ModelSpec` with a ``formula``. Species
    with a response but a missing predictor are left out of the likelihood (a note says
    how many). Returns ``(y, observed, [response], X, predictors, [error column])``.

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
    absent = [v for v in needed if v not in data.values.columns]
    if absent:
        odd = any(not str(c).isidentifier() for c in data.values.columns)
        raise InputError(
            f"the formula {spec.formula!r} names {absent}, which are not columns of the trait table; "
            "available: " + ", ".join(map(str, data.values.columns)) + (f" ({_FORMULA_HINT})" if odd else "")
        )
    from formulaic import model_matrix

    try:
        mm = model_matrix(spec.formula, data.values, na_action="ignore")
    except FormulaicError as e:
        raise InputError(f"could not build the design from {spec.formula!r}: {_plain(e)} ({_FORMULA_HINT})") from None
    if mm.lhs.shape[1] != 1:
        raise InputError("the formula must have exactly one response on the left of '~'")
    response = str(mm.lhs.columns[0])
    yv = mm.lhs.to_numpy(dtype=float)
    X = mm.rhs.to_numpy(dtype=float)
    predictors = [str(c) for c in mm.rhs.columns]
    ok_x = np.all(np.isfinite(X), axis=1)
    observed = np.isfinite(yv) & ok_x[:, None]
    n_drop = int((np.isfinite(yv[:, 0]) & ~ok_x).sum())
    if n_drop:
        data.notes.append(f"{n_drop} species with a response but a missing predictor do not inform the regression")
    X = np.where(np.isfinite(X), X, 0.0)
    for j, p in enumerate(predictors):
        col = X[observed[:, 0], j]
        if p != "Intercept" and col.size and np.ptp(col) == 0:
            raise InputError(f"predictor {p!r} has no variance among the species used; drop it from the formula")
    err_col = response if response in data.values.columns else None
    return yv, observed, [response], X, predictors, [err_col]
