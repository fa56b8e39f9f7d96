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
``kappa``       ``kappa``     every branch raised to the power kappa (Pagel 1999).
``delta``       ``delta``     node heights h become T (h / T)^delta, T the tree
                              height, so the tree height is kept (Pagel 1999).
``early_burst`` ``rate_change`` rate at height s is exp(rate_change * s); negative
                              values slow evolution through time (Harmon et al.
                              2010, Evolution 64:2385-2396). Exact on any tree.
``ou``          ``alpha``     Ornstein-Uhlenbeck pull towards one optimum (Hansen
                              1997, Evolution 51:1341-1351). Exact on ultrametric
                              trees only; see :func:`transformed_lengths`.
==============  ============  ====================================================

Ornstein-Uhlenbeck root treatment. With ``ou_root="fixed"`` (default) the root
value equals the optimum, which is the root mean ``mu`` of the model; the tip
covariance is ``R/(2 alpha) exp(-2 alpha (T - s_ij)) (1 - exp(-2 alpha s_ij))``
and alpha -> 0 gives Brownian motion back. With ``ou_root="stationary"`` the root
value is drawn from the stationary distribution, which adds a root edge of length
``exp(-2 alpha T) / (2 alpha)``; the covariance becomes
``R/(2 alpha) exp(-2 alpha (T - s_ij))`` (Hansen 1997; Butler & King 2004,
Am. Nat. 164:683-695). On a non-ultrametric tree the OU covariance is not a
Brownian motion on any tree; cladewise then measures time from the tallest tip,
which is an approximation, and :func:`model_warnings` says so.
"""

from __future__ import annotations

from types import ModuleType
from typing import Any

import numpy as np

from cladewise.errors import InputError
from cladewise.trees import FlatTree

__all__ = [
    "MODELS",
    "transformed_lengths",
    "model_warnings",
    "check_model_name",
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


def model_warnings(tree: FlatTree, model: str, rtol: float = 1e-6) -> list[str]:
    """Plain-language warnings about using ``model`` on ``tree``."""
    model = check_model_name(model)
    out = []
    if model in _EXACT_ONLY_ULTRAMETRIC and not tree.is_ultrametric(rtol):
        out.append(
            f"the {model!r} model is exact only on ultrametric trees; this tree's "
            "root-to-tip distances differ, so time is measured from the tallest tip "
            "(an approximation). Consider an ultrametric (time-calibrated) tree."
        )
    return out


def _backend(params: dict[str, Any]) -> ModuleType:
    """numpy unless a parameter is a PyTensor variable."""
    for v in params.values():
        if type(v).__module__.startswith("pytensor"):
            import pytensor.tensor as pt

            return pt
    return np


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
    model = check_model_name(model)
    missing = [p for p in MODELS[model] if p not in params]
    extra = [p for p in params if p not in MODELS[model]]
    if missing or extra:
        raise InputError(
            f"the {model!r} model takes parameters {MODELS[model] or '(none)'}; "
            f"missing {missing}, unexpected {extra}"
        )
    xp = _backend(params)
    length = tree.length
    if model == "bm":
        return length if xp is np else xp.as_tensor_variable(length)

    h_end = tree.heights()
    parent = tree.parent.copy()
    parent[-1] = tree.root
    h_start = h_end[parent]
    h_start[-1] = 0.0
    n = tree.n_tips
    is_tip = np.zeros(tree.n_nodes, dtype=bool)
    is_tip[:n] = True
    root_edge = np.zeros(tree.n_nodes)
    root_edge[-1] = length[-1]
    inner = length - root_edge  # branch lengths without the root edge
    T = float(h_end[:n].max()) if n else 0.0

    if model == "lambda":
        lam = params["lam"]
        # diag(C) = tip height + root edge is kept; everything shared scales by lam
        tip_total = np.where(is_tip, h_end + length[-1], 0.0)
        return xp.where(is_tip, lam * length + (1.0 - lam) * tip_total, lam * length)

    if model == "kappa":
        kappa = params["kappa"]
        safe = np.where(length > 0, length, 1.0)
        return xp.where(length > 0, xp.exp(kappa * np.log(safe)), 0.0)

    if model == "delta":
        delta = params["delta"]
        if T <= 0:
            raise InputError("the delta model needs a tree of positive height")
        end = h_end / T
        start = h_start / T

        def powh(u: np.ndarray) -> Any:
            safe = np.where(u > 0, u, 1.0)
            return xp.where(u > 0, xp.exp(delta * np.log(safe)), 0.0)

        return T * (powh(end) - powh(start)) + root_edge

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
        gap = np.maximum(T - h_end, 0.0)
        out = xp.exp(-two_a * gap) * (-xp.expm1(-two_a * inner)) / two_a + root_edge
        if ou_root == "stationary":
            last = np.zeros(tree.n_nodes)
            last[-1] = 1.0
            out = out + last * xp.exp(-two_a * T) / two_a
        return out

    raise AssertionError(model)  # pragma: no cover
