"""Simulating continuous traits on a tree.

Model (the same family the likelihood engine fits, see DESIGN.md)::

    X (n_tips x k)   multivariate Brownian motion with rate matrix R on the given
                     (possibly transformed) branch lengths, started at the root
                     value ``mu`` plus ``length[root] * R`` of root-edge variance;
    Y = X + D        true species means, D ~ Normal(0, E) independently per species;
    observed         either Y + Normal(0, se^2) per species, or specimens
                     Y + Normal(0, W) per individual, reduced to mean, se and n.

Draws are exact: one pre-order pass from the root to the tips,
``x_child = x_parent + sqrt(t_child) * L z`` with ``L L' = R``, vectorised over
replicates and over all nodes at the same depth.

Command line: ``cladewise simulate SPEC --out DIR``. SPEC is a TOML file::

    # Invented example.
    [data]
    tree = "tree.nwk"              # relative to this file; the first tree is used

    [simulation]
    traits = ["mass", "speed"]     # trait (column) names, k of them
    rates = [0.04, 0.09]           # Brownian rate per trait: variance per unit
                                   # branch length (diagonal of R)
    correlation = 0.6              # evolutionary correlation: one number (k = 2)
                                   # or a k x k matrix as nested lists; default 0
    root_means = [2.0, 1.0]        # root value per trait; default 0
    species_variance = [0.01, 0.01]     # optional: diagonal of E (species-level,
    species_correlation = 0.0           # non-phylogenetic), correlation as above
    within_variance = [0.02, 0.05]      # variance among specimens of a species
    specimens_per_species = [3, 12]     # an integer, or [low, high]: drawn
                                        # uniformly per species, both included
    # standard_errors = [0.05, 0.1]     # instead of specimens: known se per trait
    missing_share = 0.1                 # share of species x trait cells left blank
    missing_specimen_share = 0.0        # share of single specimen cells left blank
    seed = 1
    replicates = 1                      # > 1 writes DIR/replicate_0001, ...
    model = "bm"                        # bm, lambda, ou, kappa, delta, early_burst
    model_parameters = {}               # passed to the branch-length transform:
                                        # { lam = 0.5 } (lambda), { alpha = 1.0 }
                                        # (ou, optional ou_root = "stationary"),
                                        # { kappa = .. }, { delta = .. },
                                        # { rate_change = .. } (early_burst)

Output folder: ``species.csv`` (``species``, trait columns, ``<trait>_se``,
``<trait>_n``), ``specimens.csv`` (``species`` and trait columns, one row per
individual) when specimens were drawn, ``true_means.csv`` (the true species means Y),
``truth.json`` (every setting and parameter) and ``tree.nwk``.
"""

from __future__ import annotations

import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from cladewise.errors import InputError
from cladewise.model.evolution import check_model_name, transformed_lengths
from cladewise.data.trees import FlatTree, format_newick, read_tree

__all__ = [
    "SimulatedData",
    "simulate_traits",
    "simulate_dataset",
    "write_dataset",
    "dataset_from_spec",
]

RngLike = np.random.Generator | int | None


# ----------------------------------------------------------------- validation
def _as_rng(rng: RngLike) -> np.random.Generator:
    if isinstance(rng, np.random.Generator):
        return rng
    return np.random.default_rng(rng)


def _square(M: Any, k: int | None, name: str) -> np.ndarray:
    """A symmetric k x k matrix from a scalar (k = 1), a vector (diagonal) or a matrix."""
    A = np.asarray(M, dtype=float)
    if A.ndim == 0:
        A = A.reshape(1, 1) if k in (None, 1) else np.eye(k) * float(A)
    elif A.ndim == 1:
        A = np.diag(A)
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise InputError(f"{name} must be a square matrix; got shape {A.shape}.")
    if k is not None and A.shape[0] != k:
        raise InputError(f"{name} must be {k} x {k} (one row per trait); got {A.shape}.")
    if not np.all(np.isfinite(A)):
        raise InputError(f"{name} contains NaN or infinite values.")
    if not np.allclose(A, A.T, rtol=1e-10, atol=1e-12):
        raise InputError(f"{name} must be symmetric.")
    return 0.5 * (A + A.T)


def _matrix_root(A: np.ndarray, name: str) -> np.ndarray:
    """L with L L' = A; accepts positive semi-definite matrices (e.g. a zero E)."""
    try:
        return np.linalg.cholesky(A)
    except np.linalg.LinAlgError:
        pass
    w, V = np.linalg.eigh(A)
    scale = max(float(np.abs(w).max()), 1e-300)
    if w.min() < -1e-10 * scale:
        raise InputError(
            f"{name} is not positive semi-definite (smallest eigenvalue {w.min():.3g}); "
            "check the variances and correlations (|correlation| <= 1 and jointly "
            "consistent)."
        )
    return V * np.sqrt(np.clip(w, 0.0, None))


def _branch_lengths(tree: FlatTree, lengths: Any) -> np.ndarray:
    ln = tree.length if lengths is None else np.asarray(lengths, dtype=float)
    if ln.shape != (tree.n_nodes,):
        raise InputError(
            f"lengths must have one entry per node ({tree.n_nodes}); got shape {ln.shape}."
        )
    if not np.all(np.isfinite(ln)) or np.any(ln < 0):
        raise InputError("branch lengths must be finite and >= 0 to simulate on them.")
    return ln


def _depth_levels(tree: FlatTree) -> list[np.ndarray]:
    """Non-root nodes grouped by depth (number of edges from the root), top first."""
    depth = np.zeros(tree.n_nodes, dtype=np.int64)
    par = tree.parent
    for i in range(tree.n_nodes - 2, -1, -1):
        depth[i] = depth[par[i]] + 1
    order = np.argsort(depth[:-1], kind="stable")
    bounds = np.cumsum(np.bincount(depth[:-1])[1:])
    return [g for g in np.split(order, bounds[:-1]) if g.size]


def _per_species(v: Any, n: int, k: int, name: str) -> np.ndarray:
    """Broadcast a scalar, per-trait vector or (n, k) array to (n, k)."""
    a = np.asarray(v, dtype=float)
    try:
        a = np.broadcast_to(a, (n, k)).copy()
    except ValueError:
        raise InputError(
            f"{name} must be a number, one value per trait ({k}) or an array of shape "
            f"({n}, {k}); got shape {a.shape}."
        ) from None
    if not np.all(np.isfinite(a)) or np.any(a < 0):
        raise InputError(f"{name} must be finite and >= 0.")
    return a


# ----------------------------------------------------------------- simulation
def simulate_traits(
    tree: FlatTree,
    R: Any,
    mu: Any,
    *,
    lengths: Any = None,
    E: Any = None,
    se: Any = None,
    rng: RngLike = None,
    n_reps: int | None = None,
) -> np.ndarray:
    """Exact Gaussian draws of species values on a tree.

    Parameters
    ----------
    tree : FlatTree
    R : array_like, (k, k)
        Brownian rate matrix (a scalar for one trait, a vector for a diagonal R).
    mu : array_like, (k,)
        Root value.
    lengths : array_like, (n_nodes,), optional
        Branch lengths to use instead of ``tree.length`` (e.g. after a model
        transform). ``lengths[root]`` is the root edge.
    E : array_like, (k, k), optional
        Species-level covariance added independently to every species.
    se : array_like, optional
        Measurement standard errors: scalar, per trait ``(k,)`` or ``(n_tips, k)``.
    rng : numpy Generator or int seed, optional
    n_reps : int, optional
        Number of independent replicates.

    Returns
    -------
    ndarray
        ``(n_tips, k)``, or ``(n_reps, n_tips, k)`` when ``n_reps`` is given; rows in
        the order of ``tree.tip_names``. Covariance of the flattened rows is
        ``kron(C, R) + kron(I, E) + diag(se^2)``.
    """
    R = _square(R, None, "R")
    k = R.shape[0]
    try:
        mu_v = np.broadcast_to(np.asarray(mu, dtype=float), (k,))
    except ValueError:
        mu_v = None
    if mu_v is None or not np.all(np.isfinite(mu_v)):
        raise InputError(f"mu must be one finite value per trait ({k}); got {mu!r}.")
    ln = _branch_lengths(tree, lengths)
    gen = _as_rng(rng)
    reps = 1 if n_reps is None else int(n_reps)
    if reps < 1:
        raise InputError("n_reps must be at least 1.")
    L = _matrix_root(R, "R")
    n, m = tree.n_tips, tree.n_nodes

    # Increments on every branch at once; the pre-order pass only adds them up.
    incr = gen.standard_normal((reps, m, k)) @ L.T
    incr *= np.sqrt(ln)[None, :, None]
    x = np.empty((reps, m, k))
    x[:, -1] = mu_v + incr[:, -1]
    par = tree.parent
    for nodes in _depth_levels(tree):
        x[:, nodes] = x[:, par[nodes]] + incr[:, nodes]
    out = x[:, :n]
    if E is not None:
        LE = _matrix_root(_square(E, k, "E"), "E")
        out = out + gen.standard_normal((reps, n, k)) @ LE.T
    if se is not None:
        s = _per_species(se, n, k, "se")
        out = out + gen.standard_normal((reps, n, k)) * s
    return out[0] if n_reps is None else out


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
    R = _square(R, len(traits), "R")
    k, n = len(traits), tree.n_tips
    model = check_model_name(model)
    params = dict(model_params or {})
    if model != "bm" or params:
        if lengths is not None:
            raise InputError("give either lengths or a model transform, not both.")
        lengths = _transform(tree, model, params)
    ln = _branch_lengths(tree, lengths)
    gen = _as_rng(seed)

    values = simulate_traits(tree, R, mu, lengths=ln, E=E, rng=gen)
    species = list(tree.tip_names)
    truth: dict[str, Any] = {
        "traits": traits,
        "rate_matrix": R,
        "root_means": np.broadcast_to(np.asarray(mu, dtype=float), (k,)).copy(),
        "species_covariance": None if E is None else _square(E, k, "E"),
        "within_variance": None,
        "model": model,
        "model_parameters": params,
        "lengths": ln.copy(),
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
        W = _square(within_var, k, "within_var")
        sizes = _sample_sizes(n_specimens, n, gen)
        rows = np.repeat(np.arange(n), sizes)
        spec = values[rows] + gen.standard_normal((rows.size, k)) @ _matrix_root(W, "within_var").T
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
        s = _per_species(se, n, k, "se")
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


def write_dataset(sim: SimulatedData, out_dir: str | Path, *, overwrite: bool = False) -> dict[str, Path]:
    """Write a simulated data set to a folder.

    Parameters
    ----------
    sim : SimulatedData
    out_dir : path
        Created if needed. An existing non-empty folder is refused unless
        ``overwrite=True`` (files of the same name are then replaced).

    Returns
    -------
    dict of str to Path
        ``species``, ``true_means``, ``truth``, ``tree`` and, with specimens,
        ``specimens``.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out} exists and is not a folder; choose another --out.")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise InputError(
            f"output folder {out} is not empty; choose a new folder or pass overwrite "
            "(--overwrite on the command line) to replace its files."
        )
    out.mkdir(parents=True, exist_ok=True)
    paths = {"species": out / "species.csv", "true_means": out / "true_means.csv",
             "truth": out / "truth.json"}
    sim.species.to_csv(paths["species"], index=False)
    if sim.specimens is not None:
        paths["specimens"] = out / "specimens.csv"
        sim.specimens.to_csv(paths["specimens"], index=False)
    truth = dict(sim.truth)
    truth.pop("true_means").to_csv(paths["true_means"])
    truth["note"] = "Invented data simulated by cladewise; not observations."
    paths["truth"].write_text(json.dumps(_jsonable(truth), indent=2) + "\n")
    if sim.tree is not None:
        paths["tree"] = out / "tree.nwk"
        # 17 significant digits: lengths round-trip exactly.
        paths["tree"].write_text(format_newick(sim.tree, digits=17) + "\n")
    return paths


# ------------------------------------------------------------- spec files
def _spec_matrix(spec: dict[str, Any], var_key: str, cor_key: str, k: int, required: bool) -> np.ndarray | None:
    if var_key not in spec:
        if required:
            raise InputError(f"[simulation] needs '{var_key}' (one variance per trait).")
        return None
    var = np.broadcast_to(np.asarray(spec[var_key], dtype=float), (k,))
    if np.any(var < 0):
        raise InputError(f"[simulation] {var_key} must be >= 0.")
    cor = np.asarray(spec.get(cor_key, 0.0), dtype=float)
    if cor.ndim == 0:
        if k > 2 and float(cor) != 0.0:
            raise InputError(
                f"[simulation] {cor_key}: give a {k} x {k} matrix for more than two traits."
            )
        cor = np.eye(k) + float(cor) * (1 - np.eye(k))
    if cor.shape != (k, k) or np.any(np.abs(cor) > 1) or np.any(np.diag(cor) != 1):
        raise InputError(
            f"[simulation] {cor_key} must be one number in [-1, 1] or a {k} x {k} "
            "correlation matrix with ones on the diagonal."
        )
    sd = np.sqrt(var)
    return cor * np.outer(sd, sd)


def dataset_from_spec(spec_path: Path, seed_override: int | None) -> tuple[dict[str, Any], FlatTree]:
    """Read a ``[simulation]`` spec: keyword arguments of :func:`simulate_dataset`
    (plus ``replicates`` and ``seed``) and the tree."""
    try:
        doc = tomllib.loads(spec_path.read_text())
    except FileNotFoundError:
        raise InputError(f"spec file {spec_path} not found.") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{spec_path} is not valid TOML: {exc}") from None
    tree_rel = doc.get("data", {}).get("tree")
    if not tree_rel:
        raise InputError(f'{spec_path} needs [data] tree = "path/to/tree".')
    tree_path = (spec_path.parent / tree_rel).resolve()
    if not tree_path.is_file():
        raise InputError(f"tree file {tree_path} (from [data] tree) not found.")
    sim = doc.get("simulation")
    if not isinstance(sim, dict):
        raise InputError(f"{spec_path} needs a [simulation] table (see `cladewise simulate --help`).")
    known = {"traits", "rates", "correlation", "root_means", "species_variance",
             "species_correlation", "within_variance", "specimens_per_species",
             "standard_errors", "missing_share", "missing_specimen_share", "seed",
             "replicates", "model", "model_parameters"}
    unknown = set(sim) - known
    if unknown:
        raise InputError(
            f"unknown [simulation] keys {sorted(unknown)}; allowed: {sorted(known)}."
        )
    traits = sim.get("traits")
    if not isinstance(traits, list) or not traits:
        raise InputError('[simulation] needs traits = ["name", ...].')
    k = len(traits)
    n_spec = sim.get("specimens_per_species")
    if n_spec is not None and "standard_errors" in sim:
        raise InputError(
            "give either specimens_per_species (se computed from specimens) or "
            "standard_errors (known se), not both."
        )
    if n_spec is None and "within_variance" in sim:
        raise InputError("within_variance needs specimens_per_species.")
    if isinstance(n_spec, list):
        if len(n_spec) != 2:
            raise InputError("specimens_per_species must be an integer or [low, high].")
        n_spec = (int(n_spec[0]), int(n_spec[1]))
    kwargs = dict(
        traits=traits,
        R=_spec_matrix(sim, "rates", "correlation", k, True),
        mu=sim.get("root_means", 0.0),
        E=_spec_matrix(sim, "species_variance", "species_correlation", k, False),
        within_var=sim.get("within_variance"),
        n_specimens=n_spec,
        se=sim.get("standard_errors"),
        missing_share=float(sim.get("missing_share", 0.0)),
        missing_specimen_share=float(sim.get("missing_specimen_share", 0.0)),
        model=str(sim.get("model", "bm")),
        model_params=dict(sim.get("model_parameters", {})),
        seed=int(seed_override if seed_override is not None else sim.get("seed", 0)),
    )
    if np.size(kwargs["mu"]) not in (1, k):
        raise InputError(f"root_means must be one number or {k} numbers (one per trait).")
    kwargs["replicates"] = int(sim.get("replicates", 1))
    if kwargs["replicates"] < 1:
        raise InputError("replicates must be at least 1.")
    return kwargs, read_tree(tree_path)

