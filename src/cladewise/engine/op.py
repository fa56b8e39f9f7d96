"""PyTensor Op wrapping the linear-time likelihood, for PyMC, pm.sample and nutpie.

One Op computes the value and the whole gradient in one call; its ``grad`` returns
``output_gradient * d_input`` from the Op's own extra outputs, so PyTensor's merge
optimisation evaluates the kernel once per logp-and-gradient evaluation. The tree
(``parent``, ``lengths``) and ``observed`` are ordinary inputs, so they may be
``pm.Data`` and be swapped without recompiling.
"""

from __future__ import annotations

import functools
import hashlib
from pathlib import Path

import numpy as np
import pytensor.tensor as pt
from pytensor.gradient import DisconnectedType, grad_not_implemented, grad_undefined
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op
from pytensor.link.numba.dispatch import basic as numba_basic
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

from cladewise.engine import entries, kernels

__all__ = ["TreeLoglik", "TreeLoglikRegimes", "tree_loglik"]

_FLOAT_INPUTS = (1, 2, 4, 5, 6, 7)  # lengths, y, R, E, err_cov, mu


class TreeLoglik(Op):
    """``(parent, lengths, y, observed, R, E, err_cov, mu) -> (logp, d_lengths, d_y,
    d_R, d_E, d_err_cov, d_mu)``.

    ``err_cov`` is each species' ``k x k`` measurement-error covariance,
    ``(N, k, k)``; :func:`tree_loglik` builds it from variances when the error is
    diagonal. Unobserved cells of ``y`` may hold any finite value; they are ignored,
    as are the rows and columns of ``err_cov`` that belong to them.

    ``k`` (the trait count, when known when the graph is built) selects the kernels
    of that k only (:func:`cladewise.engine.entries.kernel_for`), so a model
    compiles just the path it uses; ``None`` takes the kernels that serve any k.
    """

    __props__ = ("k",)

    def __init__(self, k: int | None = None):
        self.k = None if k is None else int(k)

    def make_node(self, parent, lengths, y, observed, R, E, err_cov, mu):
        parent = pt.as_tensor_variable(parent)
        if parent.dtype != "int64":
            parent = pt.cast(parent, "int64")
        observed = pt.as_tensor_variable(observed)
        if observed.dtype != "bool":
            observed = pt.neq(observed, 0)
        floats = [
            pt.as_tensor_variable(v).astype("float64") for v in (lengths, y, R, E, err_cov, mu)
        ]
        lengths, y, R, E, err_cov, mu = floats
        for v, nd, name in (
            (parent, 1, "parent"),
            (lengths, 1, "lengths"),
            (y, 2, "y"),
            (observed, 2, "observed"),
            (R, 2, "R"),
            (E, 2, "E"),
            (err_cov, 3, "err_cov"),
            (mu, 1, "mu"),
        ):
            if v.ndim != nd:
                raise TypeError(f"{name} must have {nd} dimensions, got {v.ndim}")
        inputs = [parent, lengths, y, observed, R, E, err_cov, mu]
        outputs = [pt.scalar(dtype="float64")] + [v.type() for v in floats]
        return Apply(self, inputs, outputs)

    def perform(self, node, inputs, output_storage):
        parent, lengths, y, observed, R, E, err_cov, mu = (np.ascontiguousarray(a) for a in inputs)
        fn, extra = entries.kernel_for("value_and_grad", y.shape[1])
        res = fn(parent, lengths, y, observed, np.ascontiguousarray(R[None]),
                 np.zeros(parent.shape[0], np.int64), E, err_cov, mu, *extra)
        output_storage[0][0] = np.asarray(res[0], dtype=np.float64)
        for i in range(1, 7):
            output_storage[i][0] = res[i][0] if i == 3 else res[i]

    def infer_shape(self, fgraph, node, input_shapes):
        return [()] + [input_shapes[i] for i in _FLOAT_INPUTS]

    def grad(self, inputs, output_gradients):
        g_logp = output_gradients[0]
        outs = self(*inputs)
        others = output_gradients[1:]
        if any(not isinstance(g.type, DisconnectedType) for g in others):
            # second derivatives are not provided
            return [grad_not_implemented(self, i, x) for i, x in enumerate(inputs)]
        grads = [
            grad_undefined(self, 0, inputs[0], "parent is integer tree data"),
            g_logp * outs[1],
            g_logp * outs[2],
            grad_undefined(self, 3, inputs[3], "observed is boolean data"),
            g_logp * outs[3],
            g_logp * outs[4],
            g_logp * outs[5],
            g_logp * outs[6],
        ]
        return grads


class TreeLoglikRegimes(Op):
    """:class:`TreeLoglik` with one rate matrix per regime.

    ``(parent, lengths, y, observed, R, regime, E, err_cov, mu) -> (logp, d_lengths,
    d_y, d_R, d_E, d_err_cov, d_mu)`` with ``R`` ``(n_regimes, k, k)`` and ``regime``
    an int vector giving each node's branch regime (data, like ``parent``).
    ``k``: as for :class:`TreeLoglik`.
    """

    __props__ = ("k",)

    def __init__(self, k: int | None = None):
        self.k = None if k is None else int(k)

    def make_node(self, parent, lengths, y, observed, R, regime, E, err_cov, mu):
        R = pt.as_tensor_variable(R).astype("float64")
        # the other inputs are checked and converted as for one regime
        base = _tree_loglik_op.make_node(parent, lengths, y, observed, R[0], E, err_cov, mu)
        parent, lengths, y, observed, _, E, err_cov, mu = base.inputs
        if R.ndim != 3:
            raise TypeError(f"R must have 3 dimensions (regimes x k x k), got {R.ndim}")
        regime = pt.as_tensor_variable(regime)
        if regime.dtype != "int64":
            regime = pt.cast(regime, "int64")
        if regime.ndim != 1:
            raise TypeError(f"regime must have 1 dimension, got {regime.ndim}")
        inputs = [parent, lengths, y, observed, R, regime, E, err_cov, mu]
        floats = (lengths, y, R, E, err_cov, mu)
        outputs = [pt.scalar(dtype="float64")] + [v.type() for v in floats]
        return Apply(self, inputs, outputs)

    def perform(self, node, inputs, output_storage):
        args = [np.ascontiguousarray(a) for a in inputs]
        fn, extra = entries.kernel_for("value_and_grad", args[2].shape[1])
        res = fn(*args, *extra)
        output_storage[0][0] = np.asarray(res[0], dtype=np.float64)
        for i in range(1, 7):
            output_storage[i][0] = res[i]

    def infer_shape(self, fgraph, node, input_shapes):
        return [()] + [input_shapes[i] for i in (1, 2, 4, 6, 7, 8)]

    def grad(self, inputs, output_gradients):
        g_logp = output_gradients[0]
        outs = self(*inputs)
        if any(not isinstance(g.type, DisconnectedType) for g in output_gradients[1:]):
            return [grad_not_implemented(self, i, x) for i, x in enumerate(inputs)]
        return [
            grad_undefined(self, 0, inputs[0], "parent is integer tree data"),
            g_logp * outs[1],
            g_logp * outs[2],
            grad_undefined(self, 3, inputs[3], "observed is boolean data"),
            g_logp * outs[3],
            grad_undefined(self, 5, inputs[5], "regime is integer tree data"),
            g_logp * outs[4],
            g_logp * outs[5],
            g_logp * outs[6],
        ]


_tree_loglik_op = TreeLoglik()
_tree_loglik_regimes_op = TreeLoglikRegimes()


def tree_loglik(parent, lengths, y, observed, R, E, err_var, mu, regime=None):
    """Log-likelihood of the tree model as a PyTensor scalar.

    Usable as ``pm.Potential("loglik", tree_loglik(...))``; differentiable with
    respect to ``lengths``, ``y``, ``R``, ``E``, ``err_var`` and ``mu``. ``err_var``
    is either ``(N, k)`` measurement-error variances or ``(N, k, k)`` full
    per-species error covariances (symmetric; the rows and columns of unobserved
    cells are ignored). ``parent``
    (int) and ``observed`` (bool) are data and may be ``pm.Data``. Unobserved cells
    of ``y`` may hold any finite value (fill them with 0). Inputs are trusted:
    validate them once beforehand (e.g. with :func:`cladewise.engine.loglik`).
    Returns ``-inf`` when a tip's observation covariance is not positive definite.

    With ``regime`` (an int vector, one entry per node, data like ``parent``) ``R``
    is ``(n_regimes, k, k)`` and the branch above node ``v`` has covariance
    ``lengths[v] * R[regime[v]]`` (multi-rate Brownian motion).
    """
    err_var = pt.as_tensor_variable(err_var).astype("float64")
    if err_var.ndim == 2:
        # diagonal error: the kernels read the same k x k layout either way
        k = err_var.shape[1]
        err_var = err_var[:, :, None] * pt.eye(k)[None, :, :]
    k = _static_k(y, R, mu)
    if regime is not None:
        return TreeLoglikRegimes(k)(parent, lengths, y, observed, R, regime, E,
                                    err_var, mu)[0]
    return TreeLoglik(k)(parent, lengths, y, observed, R, E, err_var, mu)[0]


def _static_k(y, R, mu) -> int | None:
    """The trait count if the graph fixes it (static shapes or a shared value), else None."""
    for v, axis in ((y, 1), (mu, -1), (R, -1)):
        try:
            t = pt.as_tensor_variable(v)
        except (TypeError, ValueError):
            continue
        if t.type.shape[axis] is not None:
            return int(t.type.shape[axis])
    get = getattr(y, "get_value", None)
    if get is not None:
        value = np.asarray(get())
        if value.ndim == 2:
            return int(value.shape[1])
    return None


@functools.lru_cache(maxsize=1)
def engine_version() -> int:
    """A number that changes whenever any source file of the engine changes.

    PyTensor keys its on-disk numba cache of the Op by the Op's type, properties and
    this number, so an edited kernel is compiled afresh instead of loaded stale.
    """
    h = hashlib.sha256()
    for f in sorted(Path(__file__).parent.glob("*.py")):
        h.update(f.name.encode())
        h.update(f.read_bytes())
    return int(h.hexdigest()[:15], 16)


@register_funcify_default_op_cache_key(TreeLoglik)
def _numba_funcify_tree_loglik(op, node, **kwargs):
    if op.k is not None:
        return _funcify_for_k(op.k, regimes=False), engine_version()
    kernel = kernels.value_and_grad_kernel

    @numba_basic.numba_njit
    def tree_loglik_numba(parent, lengths, y, observed, R, E, err_cov, mu):
        logp, dl, dy, dR, dE, dev, dmu = kernel(
            np.ascontiguousarray(parent),
            np.ascontiguousarray(lengths),
            np.ascontiguousarray(y),
            np.ascontiguousarray(observed),
            np.ascontiguousarray(R),
            np.ascontiguousarray(E),
            np.ascontiguousarray(err_cov),
            np.ascontiguousarray(mu),
        )
        return np.array(logp), dl, dy, dR, dE, dev, dmu

    return tree_loglik_numba, engine_version()


@register_funcify_default_op_cache_key(TreeLoglikRegimes)
def _numba_funcify_tree_loglik_regimes(op, node, **kwargs):
    if op.k is not None:
        return _funcify_for_k(op.k, regimes=True), engine_version()
    kernel = kernels.value_and_grad_regimes_kernel

    @numba_basic.numba_njit
    def tree_loglik_regimes_numba(parent, lengths, y, observed, R, regime, E, err_cov, mu):
        logp, dl, dy, dR, dE, dev, dmu = kernel(
            np.ascontiguousarray(parent),
            np.ascontiguousarray(lengths),
            np.ascontiguousarray(y),
            np.ascontiguousarray(observed),
            np.ascontiguousarray(R),
            np.ascontiguousarray(regime),
            np.ascontiguousarray(E),
            np.ascontiguousarray(err_cov),
            np.ascontiguousarray(mu),
        )
        return np.array(logp), dl, dy, dR, dE, dev, dmu

    return tree_loglik_regimes_numba, engine_version()


def _funcify_for_k(k: int, regimes: bool):
    """numba implementation calling only the kernels of ``k`` traits."""
    fn, extra = entries.kernel_for("value_and_grad", k)
    c = np.ascontiguousarray
    if extra:
        kt = extra[0]  # compile-time trait count, read by the k = 3..6 kernels

        @numba_basic.numba_njit
        def call(parent, lengths, y, observed, R3, regime, E, err_cov, mu):
            if y.shape[1] != k:
                raise ValueError("tree likelihood compiled for another number of traits")
            return fn(c(parent), c(lengths), c(y), c(observed), R3, regime, c(E), c(err_cov), c(mu), kt)
    else:
        @numba_basic.numba_njit
        def call(parent, lengths, y, observed, R3, regime, E, err_cov, mu):
            if y.shape[1] != k:
                raise ValueError("tree likelihood compiled for another number of traits")
            return fn(c(parent), c(lengths), c(y), c(observed), R3, regime, c(E), c(err_cov), c(mu))

    if regimes:
        @numba_basic.numba_njit
        def tree_loglik_regimes_k(parent, lengths, y, observed, R, regime, E, err_cov, mu):
            logp, dl, dy, dR, dE, dev, dmu = call(parent, lengths, y, observed, c(R), c(regime),
                                                  E, err_cov, mu)
            return np.array(logp), dl, dy, dR, dE, dev, dmu

        return tree_loglik_regimes_k

    @numba_basic.numba_njit
    def tree_loglik_k(parent, lengths, y, observed, R, E, err_cov, mu):
        R3 = c(R).reshape((1, k, k))
        regime = np.zeros(parent.shape[0], np.int64)
        logp, dl, dy, dR, dE, dev, dmu = call(parent, lengths, y, observed, R3, regime, E, err_cov, mu)
        return np.array(logp), dl, dy, dR[0], dE, dev, dmu

    return tree_loglik_k
