"""Everything the report needs from a saved fit folder, read once.

Only the fit folder is read: standard errors, predictors, the tree and the
observed values are stored in ``posterior.nc`` by the fit, so the report does not
depend on the data files still being where they were. Missing pieces (an older summary.json, a fit without log-likelihood) are recorded
as ``None`` so each section can say what it could not show instead of failing.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import arviz as az
import numpy as np
import pandas as pd

from cladewise.inference.results import load_fit
from cladewise.data.trees import FlatTree

__all__ = ["FitView", "read_fit_folder"]


@dataclass
class FitView:
    """A saved fit, ready for tables and figures."""

    folder: Path
    idata: az.InferenceData
    info: dict[str, Any]
    table: pd.DataFrame
    kind: str
    traits: list[str]
    species: list[str]
    y: np.ndarray | None  # (N, k) observed means, NaN where missing
    se: np.ndarray | None  # (N, k) standard errors, NaN where unknown
    tree: FlatTree | None
    predictors: list[str] = field(default_factory=list)
    design: pd.DataFrame | None = None  # regression design (species x term)
    notes: list[str] = field(default_factory=list)

    @property
    def posterior(self):
        return self.idata.posterior

    def has(self, group: str) -> bool:
        return group in self.idata.groups()


def _species_from(idata: az.InferenceData, info: dict[str, Any]) -> list[str]:
    for g in ("observed_data", "constant_data", "posterior_predictive", "log_likelihood"):
        if g in idata.groups() and "species" in idata[g].coords:
            return [str(s) for s in idata[g]["species"].values]
    return [str(s) for s in info.get("species") or []]


def read_fit_folder(folder: str | Path) -> FitView:
    """Read posterior.nc, summary.json and summary.csv of a fit folder."""
    out = Path(folder)
    idata, info = load_fit(out)

    csv = out / "summary.csv"
    if info.get("quantities"):
        table = pd.DataFrame(info["quantities"])
    elif csv.is_file():
        table = pd.read_csv(csv)
    else:
        table = pd.DataFrame(columns=["quantity", "variable", "mean", "sd", "hdi_low", "hdi_high",
                                      "prob_positive", "r_hat", "ess_bulk", "ess_tail"])
    model = info.get("model") or {}
    kind = str(model.get("kind") or "")
    notes: list[str] = []
    species = _species_from(idata, info)

    y = observed = None
    traits: list[str] = [str(t) for t in (info.get("traits") or [])]
    if "observed_data" in idata.groups() and "y" in idata.observed_data:
        da = idata.observed_data["y"]
        y = np.asarray(da.values, dtype=float)
        if "trait" in da.coords:
            traits = [str(t) for t in da["trait"].values]
        if y.ndim == 1:
            y = y[:, None]
    cd = idata.constant_data if "constant_data" in idata.groups() else None
    if y is not None and cd is not None and "observed" in cd:
        observed = np.asarray(cd["observed"].values, dtype=bool).reshape(y.shape)
        y = np.where(observed, y, np.nan)

    se = None
    for name in ("se", "y_se"):
        if cd is not None and name in cd:
            se = np.asarray(cd[name].values, dtype=float).reshape(-1, len(traits))
    tree = None
    if cd is not None and "tree_parent" in cd and "tree_length" in cd and species:
        parent_da, length_da = cd["tree_parent"], cd["tree_length"]
        if "tree" in length_da.dims:
            # a fit pooled over a tree sample: draw the first tree and say so
            notes.append("fit pooled over a sample of trees: figures that need a tree use its first tree")
            length_da = length_da.isel(tree=0)
            if "tree" in parent_da.dims:
                parent_da = parent_da.isel(tree=0)
        try:
            tree = FlatTree(np.asarray(parent_da.values), np.asarray(length_da.values), tuple(species))
        except ValueError as exc:
            notes.append(f"the stored tree could not be rebuilt ({exc})")
    design = None
    predictors = [str(p) for p in (info.get("predictors") or [])]
    if cd is not None and "design" in cd:
        d = cd["design"]
        cols = [str(c) for c in d[d.dims[1]].values] if len(d.dims) > 1 and d.dims[1] in d.coords else predictors
        design = pd.DataFrame(np.asarray(d.values, dtype=float), index=species, columns=cols)
    return FitView(out, idata, info, table, kind, traits, species, y, se, tree, predictors, design, notes)
