"""Model pieces of evolutionary regimes: multi-rate Brownian motion and multi-optimum OU.

Multi-rate Brownian motion (O'Meara, Ané, Sanderson & Wainwright 2006, Evolution
60:922-933): the branch above node v evolves with the rate matrix of its regime,
``R[regime[v]]``, so the tip covariance is ``sum_r C_r (x) R_r`` with ``C_r`` the
shared path length spent in regime r. The engine takes one rate matrix per regime
(:func:`cladewise.engine.tree_loglik` with ``regime``). Two parametrisations:

``rates = "own"``
    every regime has its own rates and correlations: ``R_r = diag(s_r) Omega_r
    diag(s_r)`` with ``s_r^2 = ratio_r * diag(R_0)``, ``log ratio_r ~ Normal(0, sd)``
    per trait and an LKJ prior on ``Omega_r``. Regime 0 keeps the rate matrix (and
    priors) of the single-regime model.
``rates = "scaled"``
    one shared matrix scaled per regime: ``R_r = ratio_r R_0`` (one ratio per regime).

Multi-optimum Ornstein-Uhlenbeck (Hansen 1997, Evolution 51:1341-1351; Butler & King
2004, Am. Nat. 164:683-695): shared alpha and rate matrix, one optimum per regime.
The root value is the optimum of the root's regime (fixed root; with a stationary
root, its mean). The expected value of tip i is ``sum_r W_ir(alpha) theta_r`` with

    W_ir = exp(-alpha d_i) [r = regime of the root]
           + sum over branches b on the root-to-i path in regime r of
             exp(-alpha (d_i - h_end(b))) - exp(-alpha (d_i - h_start(b)))

(d_i the root-to-tip distance, h the distance from the root). Writing
``exp(-alpha (d_i - h)) = D_i exp(-alpha (T - h))`` with T the tallest tip and
``D_i = exp(alpha (T - d_i))`` (1 on an ultrametric tree; the per-tip scale of
:func:`cladewise.model.evolution.ou_tip_scale`) every term is at most 1, and the
sums over the path are one pass from the root (:class:`PathSums`), O(N x regimes),
with a gradient in alpha through the per-branch terms.
"""

from __future__ import annotations

import numpy as np
import pytensor.tensor as pt
from numba import njit
from pytensor.gradient import grad_undefined
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op
from pytensor.link.numba.dispatch import basic as numba_basic
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

__all__ = ["PathSums", "path_sums", "ou_regime_weights", "RATES"]

#: parametrisations of per-regime rates
RATES = ("own", "scaled", "shared")


@njit(cache=True, nogil=True)
def _path_sums(parent, regime, b, n_tips, n_reg):
    """``A[i, r]``: sum of ``b[v]`` over branches v in regime r on the path to tip i."""
    n = parent.shape[0]
    acc = np.zeros((n, n_reg))
    for v in range(n - 2, -1, -1):  # pre-order: parents before children
        p = parent[v]
        for r in range(n_reg):
            acc[v, r] = acc[p, r]
        acc[v, regime[v]] += b[v]
    return acc[:n_tips].copy()


@njit(cache=True, nogil=True)
def _path_sums_grad(parent, regime, g, n_nodes):
    """Adjoint of :func:`_path_sums`: ``gb[v] = sum of g[i, regime[v]]`` over tips i below v."""
    n_tips, n_reg = g.shape
    below = np.zeros((n_nodes, n_reg))
    below[:n_tips] = g
    gb = np.zeros(n_nodes)
    for v in range(n_nodes - 1):  # post-order: children before parents
        gb[v] = below[v, regime[v]]
        p = parent[v]
        for r in range(n_reg):
            below[p, r] += below[v, r]
    return gb


class PathSums(Op):
    """``(parent, regime, b, g_like) -> A``: per-tip sums of branch values by regime.

    ``A[i, r] = sum of b[v]`` over the branches v on the root-to-tip path of tip i
    whose regime is r (root edge excluded). Linear in ``b``; the gradient is the
    post-order adjoint. ``n_tips`` and ``n_regimes`` are fixed at construction.
    """

    __props__ = ("n_tips", "n_regimes")

    def __init__(self, n_tips: int, n_regimes: int) -> None:
        self.n_tips = int(n_tips)
        self.n_regimes = int(n_regimes)

    def make_node(self, parent, regime, b):
        parent = pt.cast(pt.as_tensor_variable(parent), "int64")
        regime = pt.cast(pt.as_tensor_variable(regime), "int64")
        b = pt.as_tensor_variable(b).astype("float64")
        return Apply(self, [parent, regime, b], [pt.dmatrix()])

    def perform(self, node, inputs, output_storage):
        parent, regime, b = inputs
        output_storage[0][0] = _path_sums(np.ascontiguousarray(parent), np.ascontiguousarray(regime),
                                          np.ascontiguousarray(b), self.n_tips, self.n_regimes)

    def infer_shape(self, fgraph, node, input_shapes):
        return [(self.n_tips, self.n_regimes)]

    def grad(self, inputs, output_gradients):
        parent, regime, b = inputs
        gb = PathSumsGrad()(parent, regime, output_gradients[0], b)
        return [grad_undefined(self, 0, parent, "tree data"),
                grad_undefined(self, 1, regime, "regime data"), gb]


class PathSumsGrad(Op):
    """Adjoint of :class:`PathSums` (its gradient with respect to ``b``)."""

    __props__ = ()

    def make_node(self, parent, regime, g, b):
        # b (the forward input) only gives the number of nodes
        parent = pt.cast(pt.as_tensor_variable(parent), "int64")
        regime = pt.cast(pt.as_tensor_variable(regime), "int64")
        g = pt.as_tensor_variable(g).astype("float64")
        b = pt.as_tensor_variable(b).astype("float64")
        return Apply(self, [parent, regime, g, b], [pt.dvector()])

    def perform(self, node, inputs, output_storage):
        parent, regime, g, b = inputs
        output_storage[0][0] = _path_sums_grad(np.ascontiguousarray(parent), np.ascontiguousarray(regime),
                                               np.ascontiguousarray(g), b.shape[0])

    def infer_shape(self, fgraph, node, input_shapes):
        return [input_shapes[3]]

    def grad(self, inputs, output_gradients):  # pragma: no cover - second derivatives unused
        raise NotImplementedError("second derivatives of regime path sums are not provided")


@register_funcify_default_op_cache_key(PathSums)
def _numba_funcify_path_sums(op, node, **kwargs):
    n_tips, n_reg = op.n_tips, op.n_regimes

    @numba_basic.numba_njit
    def path_sums_numba(parent, regime, b):
        return _path_sums(np.ascontiguousarray(parent), np.ascontiguousarray(regime),
                          np.ascontiguousarray(b), n_tips, n_reg)

    return path_sums_numba, 1


@register_funcify_default_op_cache_key(PathSumsGrad)
def _numba_funcify_path_sums_grad(op, node, **kwargs):
    @numba_basic.numba_njit
    def path_sums_grad_numba(parent, regime, g, b):
        return _path_sums_grad(np.ascontiguousarray(parent), np.ascontiguousarray(regime),
                               np.ascontiguousarray(g), b.shape[0])

    return path_sums_grad_numba, 1


def path_sums(parent, regime, b, n_tips: int, n_regimes: int):
    """PyTensor ``(n_tips, n_regimes)`` path sums of ``b`` (see :class:`PathSums`)."""
    return PathSums(n_tips, n_regimes)(parent, regime, b)


def ou_regime_weights(arrays, parent, regime, alpha, n_tips: int, n_regimes: int, root_regime: int):
    """``W_ir / D_i``: OU weights of the optima divided by the per-tip scale (module docstring).

    ``arrays`` are the tree arrays of :func:`cladewise.model.evolution.tree_arrays`
    (numpy or PyTensor); rows sum to ``1 / D_i`` (1 on an ultrametric tree). Works
    on numpy inputs too (then returns numpy).
    """
    T = arrays["height"]
    h_end, h_start, is_root = arrays["h_end"], arrays["h_start"], arrays["is_root"]
    numeric = all(isinstance(v, (np.ndarray, float, int, np.floating)) for v in
                  (T, h_end, h_start, alpha))
    xp = np if numeric else pt
    gap_end = xp.maximum(T - h_end, 0.0)
    gap_start = xp.maximum(T - h_start, 0.0)
    b = (xp.exp(-alpha * gap_end) - xp.exp(-alpha * gap_start)) * (1.0 - is_root)
    root_term = xp.exp(-alpha * T)
    onehot = np.zeros(n_regimes)
    onehot[root_regime] = 1.0
    if numeric:
        A = _path_sums(np.asarray(parent, np.int64), np.asarray(regime, np.int64),
                       np.asarray(b, float), n_tips, n_regimes)
    else:
        A = path_sums(parent, regime, b, n_tips, n_regimes)
    return A + root_term * onehot[None, :]


# --------------------------------------------------------------------------- spec -> painting
def painting_from_spec(regimes: dict, tree, extra=None, values=None):
    """The :class:`~cladewise.data.regimes.Painting` a ``[model.regimes]`` table asks for.

    ``extra`` (text columns) and ``values`` (numeric columns) are DataFrames indexed
    by species, searched for ``column``.
    """
    from cladewise.data.regimes import Clade, paint_clades, paint_from_species
    from cladewise.errors import InputError

    name = str(regimes.get("name", "regimes"))
    clades = regimes.get("clades") or {}
    column = regimes.get("column")
    if bool(clades) == bool(column):
        raise InputError("[model.regimes] needs either `column` (a species-level regime column) or "
                         "[model.regimes.clades.<name>] tables (named clades), not both or neither")
    if column:
        src = None
        for frame in (extra, values):
            if frame is not None and column in frame.columns:
                src = frame[column]
                break
        if src is None:
            raise InputError(f"[model.regimes] column = {column!r} is not a column of the trait table")
        mapping = {str(s): (None if (v is None or (isinstance(v, float) and np.isnan(v)))
                            else (str(int(v)) if isinstance(v, (float, np.floating)) and float(v).is_integer()
                                  else str(v)))
                   for s, v in src.items()}
        return paint_from_species(tree, mapping, order=regimes.get("order"), name=name)
    cl = [Clade(regime=str(c.get("regime", key)), species=tuple(c.get("species", ())),
                node=c.get("node"), starts=str(c.get("starts", "stem")))
          for key, c in clades.items()]
    return paint_clades(tree, cl, background=str(regimes.get("background", "background")), name=name)


def check_regime_spec(spec) -> None:
    """Combinations of ``[model.regimes]`` keys with the rest of ``[model]``."""
    from cladewise.errors import InputError

    r = spec.regimes
    rates = r.get("rates", "own")
    optima = bool(r.get("optima", False))
    if optima and spec.evolution != "ou":
        raise InputError("[model.regimes] optima = true needs evolution = \"ou\" (one optimum per regime)")
    if rates == "shared" and not optima:
        raise InputError("[model.regimes] rates = \"shared\" with no optima leaves nothing to differ "
                         "between regimes; use rates = \"own\" or \"scaled\", or optima = true with OU")
    if optima and spec.kind == "regression":
        raise InputError("[model.regimes] optima are not available for a regression; use kind = "
                         "\"correlated\" or \"independent\" for multi-optimum OU")
    if spec.evolution not in ("bm", "ou"):
        raise InputError(f"[model.regimes] works with evolution = \"bm\" or \"ou\", not {spec.evolution!r}")


def check_painting(spec, painting, tree, k: int, notes: list) -> None:
    """Enough branches per regime for its parameters; the painting's notes join ``notes``."""
    from cladewise.data.regimes import check_branch_counts

    rates = spec.regimes.get("rates", "own")
    own = rates == "own" and k >= 2 and spec.kind == "correlated"
    check_branch_counts(painting, tree, k, own_matrix=own)
    counts = painting.branch_counts(tree)
    notes.append(f"regimes ({painting.name}): " + ", ".join(
        f"{name} {int(c)} branches" for name, c in zip(painting.regimes, counts)))
    notes.extend(painting.notes)


# --------------------------------------------------------------------------- PyMC terms
def regime_terms(spec, painting, tensors, parent, regime, R0, mu, evo, y, observed, traits, pri, priors,
                 PriorInfo):
    """Per-regime rate matrices ``(n_regimes, k, k)`` and, for multi-optimum OU, the
    expected tip values divided by the OU tip scale ``(N, k)`` (else None).

    Creates the reported variables ``regime_rate``, ``rate_ratio``, ``log_rate_ratio``,
    ``regime_corr`` and ``regime_corr_diff`` (own rates, k >= 2), ``regime_optimum``
    and ``optimum_diff`` (optima).
    """
    import pymc as pm

    from cladewise.model.priors import scale_facts

    model = pm.modelcontext(None)
    names = list(painting.regimes)
    n_reg, k = len(names), len(traits)
    n = y.shape[0]
    model.add_coord("regime", names)
    model.add_coord("regime_", names[1:])
    r = spec.regimes
    rates = r.get("rates", "own")
    sd = float(r.get("rate_ratio_sd", 1.5))
    if rates == "shared":
        R = pt.stack([R0] * n_reg)
    else:
        if rates == "scaled" or k == 1:
            lr = pm.Normal("log_rate_ratio_", 0.0, sd, dims="regime_")
            lr2 = pt.outer(lr, pt.ones(k))
        else:
            lr2 = pm.Normal("log_rate_ratio_", 0.0, sd, dims=("regime_", "trait"))
        priors.append(PriorInfo("log rate ratio of each regime to regime " + repr(names[0]),
                                f"Normal(0, {sd:g})", "ratios from about 1/19 to 19 (95%)"))
        pm.Deterministic("log_rate_ratio", lr2, dims=("regime_", "trait"))
        pm.Deterministic("rate_ratio", pt.exp(lr2), dims=("regime_", "trait"))
        if rates == "scaled" or k == 1:
            Rs = [R0] + [R0 * pt.exp(lr[i]) for i in range(n_reg - 1)]
        elif spec.kind == "independent":
            # no correlations to differ: per-trait rate ratios only
            Rs = [R0] + [R0 * pt.diag(pt.exp(lr2[i])) for i in range(n_reg - 1)]
        else:
            eta = float(pri.get("lkj_eta", 1.0))
            sd0 = pt.sqrt(pt.diag(R0))
            corr0 = R0 / pt.outer(sd0, sd0)
            corrs = [corr0]
            Rs = [R0]
            for i in range(1, n_reg):
                corr = pm.LKJCorr(f"regime_corr_matrix_{i}", n=k, eta=eta, return_matrix=True)
                corrs.append(corr)
                s = sd0 * pt.exp(0.5 * lr2[i - 1])
                Rs.append(corr * pt.outer(s, s))
            priors.append(PriorInfo("evolutionary correlation matrix of each further regime",
                                    f"LKJ(eta={eta:g})", "as for the reference regime"))
            iu = np.triu_indices(k, 1)
            pairs = [f"{traits[a]} & {traits[b]}" for a, b in zip(*iu)]
            model.add_coord("trait_pair", pairs)
            C = pt.stack(corrs)[:, iu[0], iu[1]]
            pm.Deterministic("regime_corr", C, dims=("regime", "trait_pair"))
            pm.Deterministic("regime_corr_diff", C[1:] - C[:1], dims=("regime_", "trait_pair"))
        R = pt.stack(Rs)
    pm.Deterministic("regime_rate", pt.stack([pt.diag(R[i]) for i in range(n_reg)]),
                     dims=("regime", "trait"))
    mean = None
    if r.get("optima", False):
        osd = float(r.get("optimum_sd", 2.0))
        sds = np.array([scale_facts(y[observed[:, j], j])[1] for j in range(k)])
        shift = pm.Normal("optimum_diff", 0.0, osd * sds, dims=("regime_", "trait"))
        priors.append(PriorInfo("difference of each regime's optimum from regime " + repr(names[0]),
                                f"Normal(0, {osd:g} trait sds)", "optima within a few trait sds"))
        theta = pt.concatenate([mu[None, :], mu[None, :] + shift], axis=0)
        pm.Deterministic("regime_optimum", theta, dims=("regime", "trait"))
        W = ou_regime_weights_tensor(tensors, parent, regime, evo["alpha"], n, n_reg)
        mean = pt.dot(W, theta)
    return R, mean


def ou_regime_weights_tensor(tensors, parent, regime, alpha, n_tips: int, n_regimes: int):
    """:func:`ou_regime_weights` with the root's regime read from the ``regime`` tensor."""
    T = tensors["height"]
    gap_end = pt.maximum(T - tensors["h_end"], 0.0)
    gap_start = pt.maximum(T - tensors["h_start"], 0.0)
    b = (pt.exp(-alpha * gap_end) - pt.exp(-alpha * gap_start)) * (1.0 - tensors["is_root"])
    A = path_sums(parent, regime, b, n_tips, n_regimes)
    root_onehot = pt.eq(pt.arange(n_regimes), regime[-1]).astype("float64")
    return A + pt.exp(-alpha * T) * root_onehot[None, :]
