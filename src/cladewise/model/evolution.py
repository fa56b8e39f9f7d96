"""Models of evolution as branch-length transforms.

Every model in the family is Brownian motion on a tree whose branch lengths have
been rewritten by the model's parameters, so the likelihood engine only ever sees a
vector of lengths. The transforms work on numpy arrays and on PyTensor tensors (the
same code, so gradients reach the parameters when sampling).

==============  ============  ====================================================
name            parameter     effect on the tree
==============  ============  ====================================================
``bm``          (none)        lengths unchanged (Brownian motion)
``lambda``      ``lam``       internal branches (and root edge) times lambda; tip
                              branches stretched so root-to-tip distances stay
                              (Pagel 1999, Nature 401:877-884). Exact on any tree.
``kappa``       ``kappa``     every branch below the root raised to the power kappa
                              (Pagel 1999).
``delta``       ``delta``     node heights h become T (h / T)^delta, T the tree
                              height, so the tree height is kept (Pagel 1999).
``early_burst`` ``rate_change`` rate at height s is exp(rate_change * s); negative
                              values slow evolution through time (Harmon et al.
                              2010, Evolution 64:2385-2396). Exact on any tree.
``ou``          ``alpha``     Ornstein-Uhlenbeck pull towards one optimum (Hansen
                              1997, Evolution 51:1341-1351). The lengths are exact
                              on ultrametric trees; other trees add a per-tip
                              scale (:func:`ou_rescaled_inputs`).
==============  ============  ====================================================

Root edge. A branch above the root (the last entry of the lengths, often 0) is a
stretch of Brownian motion shared by every species: every transform leaves it
unchanged, so it adds its length to every entry of the covariance, except
``lambda``, whose definition scales every shared (off-diagonal) entry, the root
edge's share included, while keeping the diagonal.

Ornstein-Uhlenbeck root treatment. With ``ou_root="fixed"`` (default) the root
value equals the optimum, which is the root mean ``mu`` of the model; the tip
covariance is ``R/(2 alpha) exp(-2 alpha (T - s_ij)) (1 - exp(-2 alpha s_ij))``
and alpha -> 0 gives Brownian motion back. With ``ou_root="stationary"`` the root
value is drawn from the stationary distribution, which adds a root edge of length
``exp(-2 alpha T) / (2 alpha)``; the covariance becomes
``R/(2 alpha) exp(-2 alpha (T - s_ij))`` (Hansen 1997; Butler & King 2004,
Am. Nat. 164:683-695). On a non-ultrametric tree the OU covariance is not a
Brownian motion on any tree; the lengths alone measure time from the tallest tip.
The exact covariance (Hansen 1997) is ``D C D`` with C the covariance of these
lengths and ``D`` the per-tip scale of :func:`ou_tip_scale` (Ho & Ane 2014, Syst.
Biol. 63:397-408). Every tip has the mean ``mu`` under both root treatments, so
``y_i = mu + D_i z_i + e_i`` with ``z`` Brownian on C, and the model evaluates the
likelihood exactly on rescaled data (:func:`ou_rescaled_inputs`), still in linear
time. Only a species-level covariance between several traits (which would become
``E / D_i^2`` per species) keeps the approximation, and :func:`model_warnings` says so.
"""

from __future__ import annotations

from dataclasses import dataclass
from types import ModuleType
from typing import Any

import numpy as np

from cladewise.errors import InputError
from cladewise.data.trees import FlatTree

__all__ = [
    "MODELS",
    "EvolutionDescription",
    "DESCRIPTIONS",
    "TREE_ARRAY_NAMES",
    "tree_arrays",
    "lengths_from_arrays",
    "transformed_lengths",
    "model_warnings",
    "check_model_name",
    "ou_tip_scale",
    "ou_rescaled_inputs",
]

#: model name -> names of its parameters
MODELS: dict[str, tuple[str, ...]] = {
    "bm": (),
    "lambda": ("lam",),
    "kappa": ("kappa",),
    "delta": ("delta",),
    "early_burst": ("rate_change",),
    "ou": ("alpha",),
}



@dataclass(frozen=True)
class EvolutionDescription:
    """How a model of evolution is named and explained (fit summary and report).

    ``name`` is the short name used in the one-line fit description, ``source`` the
    publication, ``covariance`` the tip covariance C(theta) in words and symbols.
    """

    name: str
    source: str
    covariance: str

    @property
    def title(self) -> str:
        """``name (source)``, or the name alone when there is no source."""
        return f"{self.name} ({self.source})" if self.source else self.name


#: model name -> its description; one entry per model of :data:`MODELS`
DESCRIPTIONS: dict[str, EvolutionDescription] = {
    "bm": EvolutionDescription(
        "Brownian motion", "",
        "C_ij = t_ij, the length of the path shared by species i and j from the root"),
    "lambda": EvolutionDescription(
        "Pagel's lambda", "Pagel 1999",
        "C_ij(λ) = λ · t_ij for i ≠ j and C_ii = t_ii: λ = 1 is Brownian motion, "
        "λ = 0 makes species independent"),
    "kappa": EvolutionDescription("kappa", "Pagel 1999", "every branch length b becomes b^κ"),
    "delta": EvolutionDescription(
        "delta", "Pagel 1999",
        "every node height h becomes T · (h / T)^δ, T the tree height (kept): δ > 1 puts more "
        "change near the tips, δ < 1 near the root"),
    "early_burst": EvolutionDescription(
        "early burst", "Harmon et al. 2010",
        "the rate at height t (distance from the root) is exp(r · t) times the rate at the root; "
        "r < 0 slows evolution through time"),
    "ou": EvolutionDescription(
        "Ornstein-Uhlenbeck", "Hansen 1997",
        "C_ij(α) = exp(−α · d_ij) · (1 − exp(−2α · t_ij)) / (2α), with d_ij the path length "
        "between i and j; the pull α draws traits back towards one optimum"),
}

_EXACT_ONLY_ULTRAMETRIC = {"ou"}


def check_model_name(name: str) -> str:
    """Return the canonical model name or raise an :class:`InputError`."""
    key = str(name).strip().lower().replace("-", "_").replace(" ", "_")
    aliases = {"brownian": "bm", "brownian_motion": "bm", "pagel_lambda": "lambda",
               "eb": "early_burst", "ornstein_uhlenbeck": "ou"}
    key = aliases.get(key, key)
    if key not in MODELS:
        raise InputError(
            f"unknown evolution model {name!r}; choose one of: {', '.join(MODELS)}"
        )
    return key


def model_warnings(tree: FlatTree, model: str, rtol: float = 1e-6, exact_ou: bool = False,
                   reason: str = "", ultrametric: bool | None = None) -> list[str]:
    """Plain-language warnings about using ``model`` on ``tree``.

    ``exact_ou``: the caller uses the exact per-tip scale of :func:`ou_tip_scale` (the
    fitted model does),
    so a non-ultrametric tree needs no warning. ``reason`` says why it could not.
    ``ultrametric`` overrides the check of ``tree`` (a tree sample judges all its trees).
    """
    model = check_model_name(model)
    out = []
    if ultrametric is None:
        ultrametric = tree.is_ultrametric(rtol)
    if model in _EXACT_ONLY_ULTRAMETRIC and not exact_ou and not ultrametric:
        out.append(
            f"the {model!r} model is used here as an approximation: the tree's root-to-tip "
            "distances differ, so time is measured from the tallest tip"
            + (f" ({reason})" if reason else "")
            + ". Consider an ultrametric (time-calibrated) tree."
        )
    return out


def _backend(*values: Any) -> ModuleType:
    """numpy unless a value is a PyTensor variable."""
    for v in values:
        if type(v).__module__.startswith("pytensor"):
            import pytensor.tensor as pt

            return pt
    return np


#: names of the per-tree arrays a transform needs (all data, never parameters)
TREE_ARRAY_NAMES = ("length", "h_start", "h_end", "is_tip", "is_root", "height")


def tree_arrays(tree: FlatTree) -> dict[str, np.ndarray]:
    """The per-node arrays the transforms read, as plain numpy arrays.

    Kept separate from the tree so a compiled model can receive another tree of the
    same size as data (``pm.Data``) without recompiling.

    Returns
    -------
    dict
        ``length`` (branch lengths, last entry the root edge), ``h_start`` and
        ``h_end`` (distance from the root to both ends of each branch), ``is_tip``
        and ``is_root`` (0/1 floats), ``height`` (tallest root-to-tip distance, 0-d).
    """
    h_end = tree.heights()
    parent = tree.parent.copy()
    parent[-1] = tree.root
    h_start = h_end[parent]
    h_start[-1] = 0.0
    is_tip = np.zeros(tree.n_nodes)
    is_tip[: tree.n_tips] = 1.0
    is_root = np.zeros(tree.n_nodes)
    is_root[-1] = 1.0
    height = np.asarray(h_end[: tree.n_tips].max() if tree.n_tips else 0.0)
    return {"length": tree.length.copy(), "h_start": h_start, "h_end": h_end,
            "is_tip": is_tip, "is_root": is_root, "height": height}


def _check_params(model: str, params: dict[str, Any]) -> None:
    missing = [p for p in MODELS[model] if p not in params]
    extra = [p for p in params if p not in MODELS[model]]
    if missing or extra:
        raise InputError(
            f"the {model!r} model takes parameters {MODELS[model] or '(none)'}; "
            f"missing {missing}, unexpected {extra}"
        )


def transformed_lengths(
    tree: FlatTree, model: str, ou_root: str = "fixed", **params: Any
) -> Any:
    """Branch lengths of ``tree`` rewritten by an evolution model.

    Parameters
    ----------
    tree : FlatTree
        The tree (its lengths and heights are data).
    model : str
        One of :data:`MODELS`.
    ou_root : {"fixed", "stationary"}
        Root treatment of the Ornstein-Uhlenbeck model (module docstring).
    **params
        The model's parameters (floats or PyTensor scalars), e.g. ``lam=0.7``.

    Returns
    -------
    ndarray or TensorVariable, shape (n_nodes,)
        New lengths; the last entry is the root edge.
    """
    return lengths_from_arrays(tree_arrays(tree), model, ou_root=ou_root, **params)


def lengths_from_arrays(
    arrays: dict[str, Any], model: str, ou_root: str = "fixed", **params: Any
) -> Any:
    """:func:`transformed_lengths` on the arrays of :func:`tree_arrays`.

    The arrays may be numpy arrays or PyTensor variables (for example ``pm.Data``).
    """
    model = check_model_name(model)
    _check_params(model, params)
    xp = _backend(*params.values(), *arrays.values())
    length = arrays["length"]
    if model == "bm":
        return length if xp is np else xp.as_tensor_variable(length)
    h_start, h_end = arrays["h_start"], arrays["h_end"]
    is_tip, is_root = arrays["is_tip"], arrays["is_root"]
    root_edge = is_root * length
    inner = length - root_edge  # branch lengths without the root edge
    T = arrays["height"]
    root_len = (is_root * length).sum()

    if model == "lambda":
        lam = params["lam"]
        # diag(C) = tip height + root edge is kept; everything shared scales by lam
        tip_total = is_tip * (h_end + root_len)
        return is_tip * (lam * length + (1.0 - lam) * tip_total) + (1.0 - is_tip) * lam * length

    if model == "kappa":
        kappa = params["kappa"]
        pos = inner > 0
        safe = xp.where(pos, inner, 1.0)
        # the root edge stays as it is, as in every other transform (module docstring)
        return xp.where(pos, xp.exp(kappa * xp.log(safe)), 0.0) + root_edge

    if model == "delta":
        delta = params["delta"]
        T_safe = xp.where(T > 0, T, 1.0)

        def powh(u: Any) -> Any:
            pos = u > 0
            safe = xp.where(pos, u, 1.0)
            return xp.where(pos, xp.exp(delta * xp.log(safe)), 0.0)

        return T * (powh(h_end / T_safe) - powh(h_start / T_safe)) + root_edge

    if model == "early_burst":
        r = params["rate_change"]
        # expm1(r d)/r without dividing by zero at r = 0 (and no NaN in gradients)
        r_safe = xp.where(abs(r) < 1e-10, 1e-10, r)
        return xp.exp(r_safe * h_start) * xp.expm1(r_safe * inner) / r_safe + root_edge

    if model == "ou":
        alpha = params["alpha"]
        if ou_root not in ("fixed", "stationary"):
            raise InputError("ou_root must be 'fixed' or 'stationary'")
        two_a = 2.0 * alpha
        # tau(b) - tau(a) = exp(-2a(T-b)) (1 - exp(-2a(b-a))) / (2a): stable for big alpha
        gap = xp.maximum(T - h_end, 0.0)
        out = xp.exp(-two_a * gap) * (-xp.expm1(-two_a * inner)) / two_a + root_edge
        if ou_root == "stationary":
            out = out + is_root * xp.exp(-two_a * T) / two_a
        return out

    raise AssertionError(model)  # pragma: no cover


def ou_tip_scale(arrays: dict[str, Any], alpha: Any) -> Any:
    """Per-tip scale that makes the OU lengths exact on a non-ultrametric tree.

    With d_i the root-to-tip distance of tip i and s_ij the shared path length, the
    OU covariance with the root at the optimum is (Hansen 1997)
    ``V_ij = exp(-alpha (d_i + d_j - 2 s_ij)) (1 - exp(-2 alpha s_ij)) / (2 alpha)``
    (stationary root: without the last factor's ``- exp(...)`` term). It factors as
    ``D_i C_ij D_j`` with C the covariance of :func:`lengths_from_arrays` for ``ou``
    (node heights mapped to ``exp(-2 alpha (T - h)) / (2 alpha)``, T the tallest tip)
    and ``D_i = exp(alpha (T - d_i))`` (Ho & Ane 2014, Syst. Biol. 63:397-408). On an
    ultrametric tree D is 1.

    Parameters
    ----------
    arrays : dict
        From :func:`tree_arrays` (numpy or PyTensor).
    alpha : float or TensorVariable

    Returns
    -------
    ndarray or TensorVariable, shape (n_nodes,)
        D for every node (tips first; the entries of internal nodes are not used).
    """
    xp = _backend(alpha, *arrays.values())
    gap = xp.maximum(arrays["height"] - arrays["h_end"], 0.0)
    return xp.exp(alpha * gap)


def ou_rescaled_inputs(scale: Any, y: Any, observed: Any, mu: Any, err_var: Any, E: Any
                       ) -> tuple[Any, Any, Any, Any]:
    """Engine inputs that make the OU likelihood exact on a non-ultrametric tree.

    Under OU every tip has the mean ``mu`` (root at the optimum, or drawn from the
    stationary distribution around it), so ``y_i = mu + D_i z_i + e_i`` with ``z``
    Brownian on the OU lengths and D from :func:`ou_tip_scale`. Dividing by ``D_i``:
    ``y'_i = mu + (y_i - mu) / D_i`` follows the engine's model with error variances
    ``err_var_i / D_i^2``, and ``log p(y) = log p'(y') - sum over observed cells of
    log D_i`` (change of variables).

    Parameters
    ----------
    scale : TensorVariable or ndarray, shape (n_nodes,)
        From :func:`ou_tip_scale` (tips first).
    y, observed : (n, k)
        Values (0 where unobserved) and the observed mask.
    mu : (k,)
        Mean of every tip.
    err_var : (n, k) or (n, k, k)
        Measurement-error variances (or per-species covariances).
    E : (k, k)
        Species-level covariance: ``E / D_i^2`` joins each species' error (variance for
        k = 1, a k x k covariance for k > 1), and the returned E' is zero.

    Returns
    -------
    y', err_var', E', log_scale
        ``log_scale`` (n,) is ``log D_i``; a log-likelihood over a set of cells subtracts
        ``log_scale`` once per observed cell of the set.
    """
    xp = _backend(scale, y, mu, err_var, E)
    n, k = observed.shape
    D = scale[:n]
    log_scale = xp.log(D)
    y_new = xp.where(observed, mu[None, :] + (y - mu[None, :]) / D[:, None], 0.0)
    # A species-level covariance is error around the species' own values: it scales
    # with D too, so it joins each species' error (the engine ignores rows and columns
    # of unobserved cells).
    if k == 1:
        err_var = err_var + xp.where(observed, E[0, 0], 0.0).reshape(err_var.shape)
    else:
        if err_var.ndim == 2:
            err_var = err_var[:, :, None] * xp.eye(k)[None, :, :]
        err_var = err_var + E[None, :, :]
    E = E * 0.0
    inv2 = 1.0 / D**2
    shape = (n,) + (1,) * (err_var.ndim - 1)
    return y_new, err_var * inv2.reshape(shape), E, log_scale
