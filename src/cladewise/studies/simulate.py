"""Simulating continuous traits on a tree.

Model (the same family the likelihood engine fits, :mod:`cladewise.model.build`)::

    X (n_tips x k)   multivariate Brownian motion with rate matrix R on the given
                     (possibly transformed) branch lengths, started at the root
                     value ``mu`` plus ``length[root] * R`` of root-edge variance;
    Y = X + D        true species means, D ~ Normal(0, E) independently per species;
    observed         either Y + Normal(0, se^2) per species, or specimens
                     Y + Normal(0, W) per individual, reduced to mean, se and n.

Draws are exact: one pre-order pass from the root to the tips,
``x_child = x_parent + sqrt(t_child) * L z`` with ``L L' = R``, vectorised over
replicates and over all nodes at the same depth.

Command line: ``cladewise simulate SPEC --out DIR``; the SPEC format (the
``[simulation]`` table) and its reader are in :mod:`cladewise.config.simulation`.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from cladewise.errors import InputError
from cladewise.inference.results import atomic_write, check_output_folder
from cladewise.model.evolution import check_model_name, transformed_lengths
from cladewise.data.trees import FlatTree
from cladewise.data.treefiles import format_newick
from cladewise.model.simulate import (
    as_rng,
    branch_lengths,
    matrix_root,
    per_species,
    simulate_traits,
    square_matrix,
)

__all__ = [
    "SimulatedData",
    "simulate_traits",
    "simulate_dataset",
    "write_dataset",
]


def _sample_sizes(n_specimens: Any, n: int, gen: np.random.Generator) -> np.ndarray:
    if isinstance(n_specimens, range):
        vals = np.asarray(n_specimens)
        if vals.size == 0:
            raise InputError("n_specimens range is empty.")
        sizes = gen.choice(vals, size=n)
    elif isinstance(n_specimens, tuple) and len(n_specimens) == 2:
        lo, hi = (int(v) for v in n_specimens)
        if hi < lo:
            raise InputError(f"n_specimens range ({lo}, {hi}) has high < low.")
        sizes = gen.integers(lo, hi + 1, size=n)
    else:
        a = np.asarray(n_specimens)
        if a.ndim == 0:
            sizes = np.full(n, int(a))
        elif a.shape == (n,):
            sizes = a.astype(np.int64)
        else:
            raise InputError(
                "n_specimens must be an integer, a (low, high) tuple, a range, or one "
                f"integer per species ({n}); got shape {a.shape}."
            )
        if not np.all(a == np.round(a)):
            raise InputError("n_specimens must be whole numbers.")
    sizes = np.asarray(sizes, dtype=np.int64)
    if np.any(sizes < 1):
        raise InputError("every species needs at least 1 specimen (n_specimens >= 1).")
    return sizes


def _blank(shape: tuple[int, ...], share: float, gen: np.random.Generator, name: str) -> np.ndarray:
    """Boolean mask with exactly round(share * size) cells chosen at random."""
    if not 0.0 <= share < 1.0:
        raise InputError(f"{name} must be in [0, 1); got {share}.")
    size = int(np.prod(shape))
    mask = np.zeros(size, dtype=bool)
    mask[gen.choice(size, size=int(round(share * size)), replace=False)] = True
    return mask.reshape(shape)


def _reduce_specimens(specimens: pd.DataFrame, traits: list[str], species: Sequence[str]) -> pd.DataFrame:
    """Species means, standard errors (sd / sqrt(n), ddof 1) and counts per trait."""
    g = specimens.groupby("species", sort=False)[traits]
    mean = g.mean().reindex(species)
    sd = g.std(ddof=1).reindex(species)
    cnt = g.count().reindex(species).fillna(0).astype(np.int64)
    se = sd / np.sqrt(cnt.where(cnt > 0))
    out = pd.DataFrame({"species": list(species)})
    for t in traits:
        out[t] = mean[t].to_numpy()
    for t in traits:
        out[f"{t}_se"] = se[t].to_numpy()
    for t in traits:
        # a species not measured for a trait has no count (blank), not n = 0
        out[f"{t}_n"] = pd.array(cnt[t].to_numpy(), dtype="Int64")
        out.loc[out[f"{t}_n"] == 0, f"{t}_n"] = pd.NA
    return out


@dataclass
class SimulatedData:
    """One simulated data set.

    Attributes
    ----------
    species : DataFrame
        Species-mean table: ``species``, trait columns and, when measured,
        ``<trait>_se`` and ``<trait>_n`` columns. Blank cells are NaN.
    specimens : DataFrame or None
        One row per individual (``species`` and trait columns), when drawn.
    truth : dict
        Settings and true values (``true_means`` is an ``n_tips x k`` DataFrame).
    tree : FlatTree
        The tree the data were simulated on (original branch lengths).
    """

    species: pd.DataFrame
    specimens: pd.DataFrame | None
    truth: dict[str, Any] = field(default_factory=dict)
    tree: FlatTree | None = None


def simulate_dataset(
    tree: FlatTree,
    traits: list[str],
    R: Any,
    mu: Any,
    *,
    E: Any = None,
    within_var: Any = None,
    n_specimens: Any = None,
    se: Any = None,
    missing_share: float = 0.0,
    missing_specimen_share: float = 0.0,
    lengths: Any = None,
    model: str = "bm",
    model_params: dict[str, float] | None = None,
    seed: int | np.random.Generator | None = 0,
    regime: Any = None,
    regime_rate_ratios: Any = None,
) -> SimulatedData:
    """Simulate a species table (and optionally specimen rows) on a tree.

    Parameters
    ----------
    tree : FlatTree
    traits : list of str
        Trait names, one per row of ``R``.
    R, mu, E
        As in :func:`simulate_traits`.
    within_var : array_like, optional
        Variance among specimens of one species: scalar, per trait, or a k x k
        matrix. Required with ``n_specimens``.
    n_specimens : int, (low, high) tuple, range or array of int, optional
        Specimens per species: fixed, drawn uniformly from ``low..high`` (both
        included) or from a ``range``, or given per species (tip order). When
        given, specimens are drawn and reduced to means, se and n.
    se : array_like, optional
        Without specimens: known standard errors added as measurement noise and
        written as ``<trait>_se`` columns.
    missing_share : float
        Share of species x trait cells left blank (exact count, chosen at random).
        With specimens a blank cell removes that trait from all of the species'
        specimens (the species was not measured for it).
    missing_specimen_share : float
        Share of single specimen cells left blank (specimens only).
    lengths : array_like, optional
        Transformed branch lengths; exclusive with ``model`` other than "bm".
    model, model_params
        Branch-length transform applied with
        ``cladewise.model.evolution.transformed_lengths(tree, model, **model_params)``.
    seed : int or Generator
    regime, regime_rate_ratios : optional
        Multi-rate Brownian motion: ``regime`` (n_nodes,) ints (e.g. a
        :class:`cladewise.data.regimes.Painting`'s ``node_regime``) and one rate
        multiplier per regime; regime r evolves with ``ratio[r] * R``.

    Returns
    -------
    SimulatedData

    Notes
    -----
    A species with one specimen has an undefined standard error (NaN); one with
    no specimen values for a trait has a blank mean, se and n (``<NA>``).
    """
    traits = [str(t) for t in traits]
    if len(set(traits)) != len(traits) or any(t == "species" for t in traits):
        raise InputError("trait names must be unique and must not be 'species'.")
    R = square_matrix(R, len(traits), "R")
    k, n = len(traits), tree.n_tips
    model = check_model_name(model)
    params = dict(model_params or {})
    if model != "bm" or params:
        if lengths is not None:
            raise InputError("give either lengths or a model transform, not both.")
        lengths = _transform(tree, model, params)
    ln = branch_lengths(tree, lengths)
    gen = as_rng(seed)

    if regime is None:
        values = simulate_traits(tree, R, mu, lengths=ln, E=E, rng=gen)
    else:
        ratios = np.asarray(regime_rate_ratios, dtype=float).reshape(-1)
        if not np.all(np.isfinite(ratios)) or np.any(ratios <= 0):
            raise InputError("regime rate ratios must be finite and > 0.")
        values = simulate_traits(tree, ratios[:, None, None] * R[None], mu, lengths=ln, E=E, rng=gen,
                                 regime=regime)
    species = list(tree.tip_names)
    truth: dict[str, Any] = {
        "traits": traits,
        "rate_matrix": R,
        "root_means": np.broadcast_to(np.asarray(mu, dtype=float), (k,)).copy(),
        "species_covariance": None if E is None else square_matrix(E, k, "E"),
        "within_variance": None,
        "model": model,
        "model_parameters": params,
        "lengths": ln.copy(),
        **({} if regime is None else {"regime": np.asarray(regime).tolist(),
                                      "regime_rate_ratios": np.asarray(regime_rate_ratios, float).tolist()}),
        "seed": seed if isinstance(seed, (int, np.integer)) else None,
        "true_means": pd.DataFrame(values, index=pd.Index(species, name="species"), columns=traits),
        "missing_share": float(missing_share),
        "missing_specimen_share": float(missing_specimen_share),
    }
    cell_blank = _blank((n, k), missing_share, gen, "missing_share")

    if n_specimens is not None:
        if se is not None:
            raise InputError("give either n_specimens (se from specimens) or se, not both.")
        if within_var is None:
            raise InputError("within_var (variance among specimens) is needed with n_specimens.")
        W = square_matrix(within_var, k, "within_var")
        sizes = _sample_sizes(n_specimens, n, gen)
        rows = np.repeat(np.arange(n), sizes)
        spec = values[rows] + gen.standard_normal((rows.size, k)) @ matrix_root(W, "within_var").T
        spec[cell_blank[rows]] = np.nan
        spec[_blank(spec.shape, missing_specimen_share, gen, "missing_specimen_share")] = np.nan
        specimens = pd.DataFrame(spec, columns=traits)
        specimens.insert(0, "species", np.asarray(species, dtype=object)[rows])
        table = _reduce_specimens(specimens, traits, species)
        truth["within_variance"] = W
        truth["specimens_per_species"] = sizes
        return SimulatedData(table, specimens, truth, tree)

    if missing_specimen_share:
        raise InputError("missing_specimen_share needs n_specimens (specimen rows).")
    table = pd.DataFrame({"species": species})
    obs = values.copy()
    if se is not None:
        s = per_species(se, n, k, "se")
        obs = obs + gen.standard_normal((n, k)) * s
        s[cell_blank] = np.nan
        truth["standard_errors"] = s
    obs[cell_blank] = np.nan
    for j, t in enumerate(traits):
        table[t] = obs[:, j]
    if se is not None:
        for j, t in enumerate(traits):
            table[f"{t}_se"] = s[:, j]
    return SimulatedData(table, None, truth, tree)


def _transform(tree: FlatTree, model: str, params: dict[str, Any]) -> np.ndarray:
    return np.asarray(transformed_lengths(tree, model, **params), dtype=float)


# --------------------------------------------------------------------- output
def _jsonable(obj: Any) -> Any:
    """Plain JSON values; NaN (a blank cell) becomes null."""
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return _jsonable(float(obj))
    if isinstance(obj, dict):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    return obj


def write_dataset(sim: SimulatedData, out_dir: str | Path, *, overwrite: bool = False,
                  inputs: Sequence[str | Path] = ()) -> dict[str, Path]:
    """Write a simulated data set to a folder, all at once.

    Parameters
    ----------
    sim : SimulatedData
    out_dir : path
        Created if needed. An existing folder is replaced only with
        ``overwrite=True`` and only when cladewise wrote it
        (:func:`cladewise.inference.results.check_output_folder`).
    inputs : paths
        Input files (the spec, the tree); a folder holding them is refused.

    Returns
    -------
    dict of str to Path
        ``species``, ``true_means``, ``truth``, ``tree`` and, with specimens,
        ``specimens``.
    """
    out = check_output_folder(out_dir, overwrite=overwrite, inputs=inputs, what="data set")
    names = {"species": "species.csv", "true_means": "true_means.csv", "truth": "truth.json"}
    if sim.specimens is not None:
        names["specimens"] = "specimens.csv"
    if sim.tree is not None:
        names["tree"] = "tree.nwk"
    atomic_write(out, lambda folder: _write_dataset_files(sim, folder), what="simulate")
    return {k: Path(out_dir) / v for k, v in names.items()}


def _write_dataset_files(sim: SimulatedData, folder: Path) -> None:
    sim.species.to_csv(folder / "species.csv", index=False)
    if sim.specimens is not None:
        sim.specimens.to_csv(folder / "specimens.csv", index=False)
    truth = dict(sim.truth)
    truth.pop("true_means").to_csv(folder / "true_means.csv")
    truth["note"] = "Invented data simulated by cladewise; not observations."
    (folder / "truth.json").write_text(json.dumps(_jsonable(truth), indent=2) + "\n")
    if sim.tree is not None:
        # 17 significant digits: lengths round-trip exactly.
        (folder / "tree.nwk").write_text(format_newick(sim.tree, digits=17) + "\n")
