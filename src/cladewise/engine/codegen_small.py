"""Writes the straight-line k = 3..6 kernels, ``engine/kernels_k3.py`` ... ``kernels_k6.py``.

The passes are the general algorithm of :mod:`cladewise.engine.kernels` (same messages,
same order) on the compact memory layout of the k = 2 path, with every k x k
operation written out for one k as arithmetic on scalar local variables: no scratch
arrays, no loops over traits, so the compiler keeps a node's algebra in registers.
At large N the passes are bound by memory access (a node's parent is anywhere in the
node order), so all that is read or written at the parent sits in one row of ``Pm``
(internal nodes) and the per-node data read in node order in one row of ``Sq``:
``Pm[v - N, 0:B]`` the message accumulated at internal node ``v``, ``Pm[v - N, B:2B]``
its outside moment form (downward pass), ``Sq[v, 0:B]`` the message ``v`` pushes across
its branch (after the downward pass, for a tip, its outside moment form) and
``Sq[v, B:2B]`` the sum of the messages of the siblings before ``v``.

* Symmetric matrices are stored and computed as their upper triangle (``T = k(k+1)/2``
  numbers): a node's row holds ``[J (T), h (k)]`` (canonical form) or ``[P (T), m (k)]``
  (moment form), ``B = T + k`` numbers.
* :func:`absorb` (``M = I + J V``, solve ``M [H | g] = [J | h - J m]``) is Gaussian
  elimination with partial pivoting on the augmented matrix, as in the general path
  (``M`` is invertible but not symmetric, and its leading minors can vanish).
* The downward conditioning of a parent's outside ``N(m_p, P_p)`` on its other
  children's messages ``(J_s, h_s)`` solves ``(I + P_p J_s) [Q | m] = [P_p | m_p + P_p h_s]``,
  the same ``Q = P_p - P_p H P_p`` and ``m = m_p + P_p g`` with one solve instead of a
  solve and two products (push-through identity).
* A tip's ``(t R + E + S)[o, o]`` is inverted through ``L D L'`` with the unobserved rows
  and columns replaced by the identity: the factor is then block-diagonal, so the
  observed block's inverse is exactly that of ``[o, o]`` and the rest is set to zero.

The generated modules are committed (numba's on-disk cache needs a source file, and
keys the cache on that file). ``tests/engine/test_kernels_small.py`` checks that they
equal what this module writes, so they cannot go stale. After editing this module run::

    PYTHONPATH=src python -m cladewise.engine.codegen_small
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["GENERATED_K", "module_source", "module_path", "write_modules"]

#: trait counts with generated kernels
GENERATED_K = (3, 4, 5, 6)


def tri(k: int) -> list[tuple[int, int]]:
    """Upper-triangle index pairs in storage order."""
    return [(i, j) for i in range(k) for j in range(i, k)]


def sym(name: str, i: int, j: int) -> str:
    """Local variable of a symmetric matrix entry (upper triangle)."""
    return f"{name}{min(i, j)}{max(i, j)}"


def pos(k: int, i: int, j: int) -> int:
    """Column of symmetric entry ``(i, j)`` in a row."""
    return tri(k).index((min(i, j), max(i, j)))


class Code:
    """Lines of Python with an indentation level."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.level = 0

    def __call__(self, line: str = "") -> None:
        self.lines.append(("    " * self.level + line) if line else "")

    def indent(self) -> "Code":
        self.level += 1
        return self

    def dedent(self) -> None:
        self.level -= 1

    def text(self) -> str:
        return "\n".join(self.lines) + "\n"


def _dot(pairs: list[tuple[str, str]]) -> str:
    return " + ".join(f"{a} * {b}" for a, b in pairs) if pairs else "0.0"


def load_row(c: Code, k: int, arr: str, row: str, off: int, mat: str, vec: str,
             plus: tuple[str, str, int] | None = None) -> None:
    """``mat`` (symmetric) and ``vec`` from ``arr[row, off:off + B]`` (plus another row)."""
    T = k * (k + 1) // 2
    for n, (i, j) in enumerate(tri(k)):
        extra = f" + {plus[0]}[{plus[1]}, {plus[2] + n}]" if plus else ""
        c(f"{sym(mat, i, j)} = {arr}[{row}, {off + n}]{extra}")
    for i in range(k):
        extra = f" + {plus[0]}[{plus[1]}, {plus[2] + T + i}]" if plus else ""
        c(f"{vec}{i} = {arr}[{row}, {off + T + i}]{extra}")


def store_row(c: Code, k: int, arr: str, row: str, off: int, mat: str, vec: str) -> None:
    T = k * (k + 1) // 2
    for n, (i, j) in enumerate(tri(k)):
        c(f"{arr}[{row}, {off + n}] = {sym(mat, i, j)}")
    for i in range(k):
        c(f"{arr}[{row}, {off + T + i}] = {vec}{i}")


def gauss(c: Code, A: list[list[str]], rhs: list[list[str]], p: str, logdet: str | None) -> list[list[str]]:
    """Solve ``A X = rhs`` (k x k, columns of expressions) by elimination with partial pivoting.

    Returns the solution columns (names of locals); ``logdet`` names a local for
    ``log |det A|``.
    """
    k = len(A)
    nc = len(rhs)
    rows = [[f"{p}{r}_{j}" for j in range(k + nc)] for r in range(k)]
    for r in range(k):
        for j in range(k):
            c(f"{rows[r][j]} = {A[r][j]}")
        for j in range(nc):
            c(f"{rows[r][k + j]} = {rhs[j][r]}")
    for col in range(k):
        if col < k - 1:
            c(f"pb = abs({rows[col][col]})")
            c(f"pp = {col}")
            for r in range(col + 1, k):
                c(f"pa = abs({rows[r][col]})")
                c("if pa > pb:")
                c.indent()
                c("pb = pa")
                c(f"pp = {r}")
                c.dedent()
            for n, r in enumerate(range(col + 1, k)):
                c(("if" if n == 0 else "elif") + f" pp == {r}:")
                cols = range(col, k + nc)
                a = ", ".join([rows[col][j] for j in cols] + [rows[r][j] for j in cols])
                b = ", ".join([rows[r][j] for j in cols] + [rows[col][j] for j in cols])
                c.indent()
                c(f"{a} = {b}")
                c.dedent()
        c(f"{p}i{col} = 1.0 / {rows[col][col]}")
        for r in range(col + 1, k):
            c(f"pf = {rows[r][col]} * {p}i{col}")
            for j in range(col + 1, k + nc):
                c(f"{rows[r][j]} -= pf * {rows[col][j]}")
    if logdet is not None:
        _logdet(c, [rows[i][i] for i in range(k)], logdet, absolute=True)
    out = []
    for j in range(nc):
        for i in range(k - 1, -1, -1):
            terms = "".join(f" - {rows[i][l]} * {rows[l][k + j]}" for l in range(i + 1, k))
            c(f"{rows[i][k + j]} = ({rows[i][k + j]}{terms}) * {p}i{i}")
        out.append([rows[i][k + j] for i in range(k)])
    return out


def _logdet(c: Code, factors: list[str], out: str, absolute: bool) -> None:
    """``out = log(prod factors)``: one log of the product unless it would leave the range."""
    prod = " * ".join(factors)
    c(f"pd = {'abs(' + prod + ')' if absolute else prod}")
    c("if pd > 1e-280 and pd < 1e280:")
    c.indent()
    c(f"{out} = math.log(pd)")
    c.dedent()
    c("else:")
    c.indent()
    f = (lambda x: f"math.log(abs({x}))") if absolute else (lambda x: f"math.log({x})")
    c(f"{out} = " + " + ".join(f(x) for x in factors))
    c.dedent()


def ldl_factor(c: Code, k: int, K: str, p: str, fail: str | None) -> list[str]:
    """``K = L D L'`` (symmetric locals ``K``; unit lower ``{p}L{i}{j}``, ``{p}D{j}``,
    reciprocals ``{p}r{j}``); returns the names of ``D``.

    ``fail``: a statement run when a pivot is not positive (``K`` not positive definite).
    """
    D = [f"{p}D{j}" for j in range(k)]
    for j in range(k):
        for l in range(j):
            c(f"{p}w{j}{l} = {p}L{j}{l} * {D[l]}")
        c(f"{D[j]} = {sym(K, j, j)}" + "".join(f" - {p}L{j}{l} * {p}w{j}{l}" for l in range(j)))
        if fail:
            c(f"if not {D[j]} > 0.0:")
            c.indent()
            c(fail)
            c.dedent()
        c(f"{p}r{j} = 1.0 / {D[j]}")
        for i in range(j + 1, k):
            c(f"{p}L{i}{j} = ({sym(K, i, j)}" + "".join(f" - {p}L{i}{l} * {p}w{j}{l}" for l in range(j))
              + f") * {p}r{j}")
    return D


def ldl_inverse(c: Code, k: int, K: str, W: str, p: str, fail: str | None) -> list[str]:
    """``W = K^-1`` (symmetric locals) by :func:`ldl_factor`; returns the names of ``D``."""
    D = ldl_factor(c, k, K, p, fail)

    def Li(i: int, j: int) -> str:  # inverse of the unit lower factor
        return "1.0" if i == j else f"{p}M{i}{j}"

    for j in range(k):
        for i in range(j + 1, k):
            c(f"{Li(i, j)} = -({p}L{i}{j}" + "".join(f" + {p}L{i}{l} * {Li(l, j)}" for l in range(j + 1, i))
              + ")")
    for a, b in tri(k):
        terms = []
        for l in range(b, k):
            x = f"{p}r{l}"
            if l != a:
                x += f" * {Li(l, a)}"
            if l != b:
                x += f" * {Li(l, b)}"
            terms.append(x)
        c(f"{sym(W, a, b)} = " + " + ".join(terms))
    return D


def absorb_factored(c: Code, k: int, J: str, r: str, F, p: str, H: str, g: str,
                    scale: str | None = None) -> list[str]:
    """:func:`~cladewise.engine.kernels.absorb` of ``(J, r)`` with ``N(0, s F F')``, ``F`` lower.

    With ``U = J F`` and ``A = I + s F' U`` (symmetric, >= I: no pivoting needed),
    ``H = J - s U A^-1 U'``, ``g = r - s U A^-1 F' r`` and ``log det(I + s J F F') =
    log det A`` (Woodbury, Sylvester). Writes the locals ``H`` (symmetric) and ``g``;
    returns the names of ``A``'s ``L D L'`` pivots. ``F(i, j)`` names entry ``i >= j``.
    """
    sc = f"{scale} * " if scale else ""
    for i in range(k):
        for j in range(k):
            c(f"{p}U{i}_{j} = " + _dot([(sym(J, i, l), F(l, j)) for l in range(j, k)]))
    for a, b in tri(k):
        c(f"{sym(p + 'A', a, b)} = " + ("1.0 + " if a == b else "") + sc + "("
          + _dot([(F(l, a), f"{p}U{l}_{b}") for l in range(a, k)]) + ")")
    D = ldl_factor(c, k, p + "A", p, None)
    for i in range(k):
        for j in range(k):
            c(f"{p}Y{i}_{j} = {p}U{i}_{j}" + "".join(f" - {p}Y{i}_{l} * {p}L{j}{l}" for l in range(j)))
    for i in range(k):
        for j in range(k):
            c(f"{p}Z{i}_{j} = {p}Y{i}_{j} * {p}r{j}")
    for a, b in tri(k):
        c(f"{sym(H, a, b)} = {sym(J, a, b)} - {sc}(" + _dot([(f"{p}Z{a}_{l}", f"{p}Y{b}_{l}") for l in range(k)])
          + ")")
    for i in range(k):
        c(f"{p}z{i} = " + _dot([(F(l, i), f"{r}{l}") for l in range(i, k)]))
    for i in range(k):
        c(f"{p}x{i} = {p}z{i}" + "".join(f" - {p}L{i}{l} * {p}x{l}" for l in range(i)))
    for i in range(k):
        c(f"{g}{i} = {r}{i} - {sc}(" + _dot([(f"{p}Z{i}_{l}", f"{p}x{l}") for l in range(k)]) + ")")
    return D


def chol_lower(c: Code, k: int, K, out) -> None:
    """Cholesky factor ``F`` (``F F' = K``) of a positive semidefinite ``K``: a pivot that
    is not positive gives a zero column (exact for the zero matrix)."""
    for j in range(k):
        c(f"fd = {K(j, j)}" + "".join(f" - {out(j, l)} * {out(j, l)}" for l in range(j)))
        c(f"{out(j, j)} = math.sqrt(fd) if fd > 0.0 else 0.0")
        c(f"fr = 1.0 / {out(j, j)} if fd > 0.0 else 0.0")
        for i in range(j + 1, k):
            c(f"{out(i, j)} = ({K(i, j)}" + "".join(f" - {out(i, l)} * {out(j, l)}" for l in range(j))
              + ") * fr")


def matvec_sym(k: int, M: str, v: str, i: int) -> str:
    return _dot([(sym(M, i, j), f"{v}{j}") for j in range(k)])


def load_R(c: Code, k: int, rg: str = "rg") -> None:
    for i in range(k):
        for j in range(k):
            c(f"R{i}_{j} = R[{rg}, {i}, {j}]")


# --------------------------------------------------------------------- the module
HEADER = '''"""Straight-line kernels for k = {k} traits (generated by :mod:`cladewise.engine.codegen_small`).

Do not edit: change the generator and run ``python -m cladewise.engine.codegen_small``.
Same arguments and results as the ``*_regimes_kernel`` functions of
:mod:`cladewise.engine.kernels`; row layout ``B = {B}`` numbers, see the generator.
"""

# ruff: noqa
from __future__ import annotations

import math

import numpy as np
from numba import njit

from cladewise.engine.kernels import (
    LOG_2PI,
    MODE_ANCESTRAL,
    MODE_GRAD,
    MODE_LOO,
    PREFETCH_AHEAD,
    prefetch_row,
)

# contract: let LLVM fuse a * b + c into one instruction (rounding differs by an ulp)
_JIT = {{"cache": True, "nogil": True, "fastmath": {{"contract"}}}}
K = {k}
B = {B}
'''


def _tip_K(c: Code, k: int, base: str) -> None:
    """``K`` (symmetric locals) of a tip: observed block from ``base(i, j)``, identity elsewhere."""
    for a, b in tri(k):
        other = "1.0" if a == b else "0.0"
        cond = f"o{a}" if a == b else f"o{a} and o{b}"
        c(f"{sym('K', a, b)} = ({base(a, b)}) if {cond} else {other}")


def _observed(c: Code, k: int, row: str) -> None:
    for i in range(k):
        c(f"o{i} = observed[{row}, {i}]")
    c("q = " + " + ".join(f"(1 if o{i} else 0)" for i in range(k)))


def _mask_W(c: Code, k: int) -> None:
    for a, b in tri(k):
        cond = f"o{a}" if a == b else f"o{a} and o{b}"
        c(f"{sym('W', a, b)} = {sym('W', a, b)} if {cond} else 0.0")


def _upward(c: Code, k: int) -> None:
    T = k * (k + 1) // 2
    B = T + k
    c("@njit(**_JIT)")
    c(f"def upward_k{k}(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq):")
    c.indent()
    c('"""Pruning pass; returns the log-likelihood (empty ``Sq``: value only, ``Pm`` B wide)."""')
    c("n = parent.shape[0]")
    c("ntip = y.shape[0]")
    c("store = Sq.shape[0] > 0")
    for a, b in tri(k):
        c(f"{sym('E', a, b)} = E[{b}, {a}]")
    c("# Cholesky factor of each regime's R: V = t F F' on a branch")
    c(f"FR = np.empty((R.shape[0], {T}))")
    c("for rg in range(R.shape[0]):")
    c.indent()
    chol_lower(c, k, lambda i, j: f"R[rg, {i}, {j}]", lambda i, j: f"F{i}{j}")
    for n, (a, b) in enumerate(tri(k)):
        c(f"FR[rg, {n}] = F{b}{a}")
    c.dedent()
    c("for w in range(n - ntip):")
    c(f"    for i in range({B}):")
    c("        Pm[w, i] = 0.0")
    c("total = 0.0")
    for a, b in tri(k):
        c(f"{sym('J', a, b)} = 0.0")
    for i in range(k):
        c(f"h{i} = 0.0")
    c("for v in range(n):")
    c.indent()
    c("t = lengths[v]")
    c("rg = regime[v]")
    c("if v < ntip:")
    c.indent()
    _observed(c, k, "v")
    _tip_K(c, k, lambda a, b: f"t * R[rg, {b}, {a}] + {sym('E', a, b)} + "
           + (f"err[v, {a}, {a}]" if a == b else f"0.5 * (err[v, {a}, {b}] + err[v, {b}, {a}])"))
    D = ldl_inverse(c, k, "K", "W", "x", "return -np.inf")
    _mask_W(c, k)
    for i in range(k):
        c(f"y{i} = y[v, {i}] if o{i} else 0.0")
    for a, b in tri(k):
        c(f"{sym('J', a, b)} = {sym('W', a, b)}")
    for i in range(k):
        c(f"h{i} = {matvec_sym(k, 'W', 'y', i)}")
    _logdet(c, D, "ld", absolute=False)
    c("total += -0.5 * (" + _dot([(f"h{i}", f"y{i}") for i in range(k)]) + ") - 0.5 * ld - 0.5 * q * LOG_2PI")
    c.dedent()
    c("else:")
    c.indent()
    c("w = v - ntip")
    load_row(c, k, "Pm", "w", 0, "J", "h")
    c("if t != 0.0:")
    c.indent()
    for n, (a, b) in enumerate(tri(k)):
        c(f"F{b}{a} = FR[rg, {n}]")
    for i in range(k):
        c(f"r{i} = h{i}")
    D = absorb_factored(c, k, "J", "r", lambda i, j: f"F{i}{j}", "u", "H", "g", scale="t")
    _logdet(c, D, "ld", absolute=False)
    c("quad = t * (" + " + ".join(
        f"uz{i} * (" + _dot([(f"F{l}{i}", f"g{l}") for l in range(i, k)]) + ")" for i in range(k)) + ")")
    c("total += -0.5 * ld + 0.5 * quad")
    for a, b in tri(k):
        c(f"{sym('J', a, b)} = {sym('H', a, b)}")
    for i in range(k):
        c(f"h{i} = g{i}")
    c.dedent()
    c.dedent()
    c("if v + PREFETCH_AHEAD < n - 1:")
    c("    prefetch_row(Pm, parent[v + PREFETCH_AHEAD] - ntip)")
    c("p = parent[v] - ntip")
    c("if store:")
    c.indent()
    store_row(c, k, "Sq", "v", 0, "J", "h")
    c.dedent()
    c("if p >= 0:")
    c.indent()
    c("if store:")
    c(f"    for i in range({B}):")
    c(f"        Sq[v, {B} + i] = Pm[p, i]")
    for n, (a, b) in enumerate(tri(k)):
        c(f"Pm[p, {n}] += {sym('J', a, b)}")
    for i in range(k):
        c(f"Pm[p, {T + i}] += h{i}")
    c.dedent()
    c.dedent()
    c("# J, h now hold the root's message")
    for i in range(k):
        c(f"m{i} = mu[{i}]")
    c("quad = " + " + ".join(f"m{i} * (h{i} - 0.5 * (" + matvec_sym(k, "J", "m", i) + "))" for i in range(k)))
    c("return total + quad")
    c.dedent()
    c()
    c()
def absorb_info(c: Code, k: int, J: str, r: str, Lam: str, p: str, H: str, g: str) -> list[str]:
    """:func:`~cladewise.engine.kernels.absorb` of ``(J, r)`` with ``N(0, Lam^-1)``.

    With ``A = Lam + J`` (symmetric positive definite: no pivoting), ``H = J - J A^-1 J``
    and ``g = r - J A^-1 r`` (Woodbury). Leaves ``A = L D L'`` in ``{p}L``, ``{p}D``,
    ``{p}r`` and ``J L^-T`` in ``{p}Y``; returns the names of ``D``.
    """
    for a, b in tri(k):
        c(f"{sym(p + 'A', a, b)} = {sym(Lam, a, b)} + {sym(J, a, b)}")
    D = ldl_factor(c, k, p + "A", p, None)
    for i in range(k):
        for j in range(k):
            c(f"{p}Y{i}_{j} = {sym(J, i, j)}" + "".join(f" - {p}Y{i}_{l} * {p}L{j}{l}" for l in range(j)))
    for i in range(k):
        for j in range(k):
            c(f"{p}Z{i}_{j} = {p}Y{i}_{j} * {p}r{j}")
    for a, b in tri(k):
        c(f"{sym(H, a, b)} = {sym(J, a, b)} - (" + _dot([(f"{p}Z{a}_{l}", f"{p}Y{b}_{l}") for l in range(k)]) + ")")
    for i in range(k):
        c(f"{p}x{i} = {r}{i}" + "".join(f" - {p}L{i}{l} * {p}x{l}" for l in range(i)))
    for i in range(k):
        c(f"{g}{i} = {r}{i} - (" + _dot([(f"{p}Z{i}_{l}", f"{p}x{l}") for l in range(k)]) + ")")
    return D


def _downward(c: Code, k: int) -> None:
    """The downward pass keeps an internal node's outside distribution in information form
    ``(Lam, eta)`` (``Pm[w, B:2B]``): conditioning on the other children's messages is then
    a sum, and one ``L D L'`` inverse gives a child's outside moment form. A node whose
    outside is a point mass (the root without a root edge, and nodes below it through
    zero-length branches) has ``Pm[w, 2B] = 1`` and its mean in place of ``eta``.
    """
    T = k * (k + 1) // 2
    B = T + k
    c("@njit(**_JIT)")
    c(f"def downward_k{k}(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,")
    c("               d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,")
    c("               anc_mean, anc_cov):")
    c.indent()
    c('"""Pass from the root to the tips after the upward pass, then the tips\' terms."""')
    c("n = parent.shape[0]")
    c("ntip = y.shape[0]")
    c("grad = (mode & MODE_GRAD) != 0")
    c("anc = (mode & MODE_ANCESTRAL) != 0")
    c("loo = (mode & MODE_LOO) != 0")
    c("want_internal = grad or anc")
    c("if grad:")
    c.indent()
    for a in ("d_lengths", "d_y", "d_R", "d_E", "d_err", "d_mu"):
        c(f"{a}[:] = 0.0")
    c.dedent()
    c(f"dRs = np.zeros((R.shape[0], {T}))")
    c("root = n - 1")
    c("for c in range(root, -1, -1):")
    c.indent()
    c("t = lengths[c]")
    c("rg = regime[c]")
    c("if c == root:")
    c.indent()
    c("point = True")
    for i in range(k):
        c(f"m{i} = mu[{i}]")
    for a, b in tri(k):
        c(f"{sym('Q', a, b)} = 0.0")
    c.dedent()
    c("else:")
    c.indent()
    c("if c >= PREFETCH_AHEAD:")
    c("    prefetch_row(Pm, parent[c - PREFETCH_AHEAD] - ntip)")
    c("p = parent[c] - ntip")
    c("# the other children's messages: before c (upward pass) plus after c (running sum)")
    load_row(c, k, "Sq", "c", B, "S", "s", plus=("Pm", "p", 0))
    c(f"for i in range({B}):")
    c("    Pm[p, i] += Sq[c, i]")
    c(f"point = Pm[p, {2 * B}] != 0.0")
    c("if point:")
    c.indent()
    for i in range(k):
        c(f"m{i} = Pm[p, {B + T + i}]")
    for a, b in tri(k):
        c(f"{sym('Q', a, b)} = 0.0")
    c.dedent()
    c("else:")
    c.indent()
    c("# condition the parent's outside on them: information adds")
    load_row(c, k, "Pm", "p", B, "C", "e")
    for a, b in tri(k):
        c(f"{sym('C', a, b)} += {sym('S', a, b)}")
    for i in range(k):
        c(f"e{i} += s{i}")
    ldl_inverse(c, k, "C", "Q", "x", None)
    for i in range(k):
        c(f"m{i} = " + matvec_sym(k, "Q", "e", i))
    c.dedent()
    c.dedent()
    c("point = point and t == 0.0")
    for a, b in tri(k):
        c(f"{sym('Q', a, b)} += t * R[rg, {b}, {a}]")
    c("if c < ntip:")
    c.indent()
    store_row(c, k, "Sq", "c", 0, "Q", "m")
    c("continue")
    c.dedent()
    c("w = c - ntip")
    load_row(c, k, "Pm", "w", 0, "J", "h")
    c("if point:")
    c.indent()
    c(f"Pm[w, {2 * B}] = 1.0")
    for i in range(k):
        c(f"Pm[w, {B + T + i}] = m{i}")
    c("if want_internal:")
    c.indent()
    c("# absorbing into a point mass: H = J, g = h - J m")
    for a, b in tri(k):
        c(f"{sym('H', a, b)} = {sym('J', a, b)}")
    for i in range(k):
        c(f"g{i} = h{i} - (" + matvec_sym(k, "J", "m", i) + ")")
    c("if grad:")
    c.indent()
    _grad_terms(c, k, "g", "H")
    c("if c == root:")
    c.indent()
    for i in range(k):
        c(f"d_mu[{i}] = g{i}")
    c.dedent()
    c.dedent()
    c("if anc:")
    c.indent()
    for i in range(k):
        c(f"anc_mean[c, {i}] = m{i}")
        for j in range(k):
            c(f"anc_cov[c, {i}, {j}] = 0.0")
    c.dedent()
    c.dedent()
    c.dedent()
    c("else:")
    c.indent()
    c(f"Pm[w, {2 * B}] = 0.0")
    c("if t == 0.0 and c != root:")
    c.indent()
    c("# a zero-length branch: the outside information is the conditioned parent's")
    for a, b in tri(k):
        c(f"{sym('L', a, b)} = {sym('C', a, b)}")
    for i in range(k):
        c(f"l{i} = e{i}")
    c.dedent()
    c("else:")
    c.indent()
    ldl_inverse(c, k, "Q", "L", "y", None)
    for i in range(k):
        c(f"l{i} = " + matvec_sym(k, "L", "m", i))
    c.dedent()
    store_row(c, k, "Pm", "w", B, "L", "l")
    c("if want_internal:")
    c.indent()
    for i in range(k):
        c(f"r{i} = h{i} - (" + matvec_sym(k, "J", "m", i) + ")")
    absorb_info(c, k, "J", "r", "L", "a", "H", "g")
    c("if grad:")
    c.indent()
    _grad_terms(c, k, "g", "H")
    c("if c == root:")
    c.indent()
    for i in range(k):
        c(f"d_mu[{i}] = g{i}")
    c.dedent()
    c.dedent()
    c("if anc:")
    c.indent()
    c("# posterior N((L + J)^-1 (l + h), (L + J)^-1)")
    for a, b in tri(k):
        c(f"{sym('aA', a, b)} = {sym('L', a, b)} + {sym('J', a, b)}")
    ldl_inverse(c, k, "aA", "Z", "z", None)
    for i in range(k):
        c(f"u{i} = l{i} + h{i}")
    for i in range(k):
        c(f"anc_mean[c, {i}] = " + matvec_sym(k, "Z", "u", i))
        for j in range(k):
            c(f"anc_cov[c, {i}, {j}] = {sym('Z', i, j)}")
    c.dedent()
    c.dedent()
    c.dedent()
    c(f"for i in range({B}):")
    c("    Pm[w, i] = 0.0")
    c.dedent()
    _tips(c, k)
    c("if grad:")
    c.indent()
    c("for rg in range(R.shape[0]):")
    c.indent()
    for n, (a, b) in enumerate(tri(k)):
        c(f"d_R[rg, {a}, {b}] += dRs[rg, {n}]")
        if a != b:
            c(f"d_R[rg, {b}, {a}] += dRs[rg, {n}]")
    c.dedent()
    for a, b in tri(k):
        c(f"d_E[{a}, {b}] += {sym('dE', a, b)}")
        if a != b:
            c(f"d_E[{b}, {a}] += {sym('dE', a, b)}")
    c.dedent()
    c.dedent()
    c()
    c()


def _grad_terms(c: Code, k: int, g: str, H: str) -> None:
    """``G = (g g' - H) / 2``: ``d_lengths[c] = tr(R G)``, ``dRs[rg] += t G``."""
    for a, b in tri(k):
        c(f"{sym('G', a, b)} = 0.5 * ({g}{a} * {g}{b} - {sym(H, a, b)})")
    terms = []
    for a, b in tri(k):
        r = f"R[rg, {a}, {a}]" if a == b else f"(R[rg, {a}, {b}] + R[rg, {b}, {a}])"
        terms.append(f"{r} * {sym('G', a, b)}")
    c("d_lengths[c] = " + " + ".join(terms))
    for n, (a, b) in enumerate(tri(k)):
        c(f"dRs[rg, {n}] += t * {sym('G', a, b)}")


def _anc_terms(c: Code, k: int, P: str, m: str, g: str, H: str) -> None:
    """Posterior ``N(m + P g, P - P H P)`` into ``anc_mean[c]``, ``anc_cov[c]``."""
    for i in range(k):
        c(f"anc_mean[c, {i}] = {m}{i} + " + matvec_sym(k, P, g, i))
    for i in range(k):
        for j in range(k):
            c(f"Z{i}_{j} = " + _dot([(sym(P, i, a), sym(H, a, j)) for a in range(k)]))
    for i in range(k):
        for j in range(k):
            c(f"anc_cov[c, {i}, {j}] = {sym(P, i, j)} - (" + _dot([(f"Z{i}_{b}", sym(P, b, j)) for b in range(k)])
              + ")")


def _tips(c: Code, k: int) -> None:
    """Terms of every tip from its outside moment form in ``Sq[c, 0:B]`` (one sweep)."""
    for a, b in tri(k):
        c(f"{sym('dE', a, b)} = 0.0")
    for a, b in tri(k):
        c(f"{sym('E', a, b)} = E[{b}, {a}]")
    c("for c in range(ntip):")
    c.indent()
    c("t = lengths[c]")
    c("rg = regime[c]")
    load_row(c, k, "Sq", "c", 0, "P", "m")
    for a, b in tri(k):
        val = f"err[c, {a}, {a}]" if a == b else f"0.5 * (err[c, {a}, {b}] + err[c, {b}, {a}])"
        c(f"{sym('X', a, b)} = {val}")
    c("if loo:")
    c.indent()
    for i in range(k):
        c(f"loo_mean[c, {i}] = m{i}")
    for i in range(k):
        for j in range(k):
            c(f"loo_cov[c, {i}, {j}] = {sym('P', i, j)} + E[{i}, {j}] + {sym('X', i, j)}")
    c.dedent()
    _observed(c, k, "c")
    c("if q == 0:")
    c.indent()
    c("if loo:")
    c("    loo_logdens[c] = 0.0")
    c("if grad:")
    c("    d_lengths[c] = 0.0")
    c("if anc:")
    c.indent()
    for i in range(k):
        c(f"anc_mean[c, {i}] = m{i}")
    for i in range(k):
        for j in range(k):
            c(f"anc_cov[c, {i}, {j}] = {sym('P', i, j)}")
    c.dedent()
    c("continue")
    c.dedent()
    _tip_K(c, k, lambda a, b: f"{sym('P', a, b)} + {sym('E', a, b)} + {sym('X', a, b)}")
    D = ldl_inverse(c, k, "K", "W", "x", None)
    _mask_W(c, k)
    for i in range(k):
        c(f"r{i} = (y[c, {i}] - m{i}) if o{i} else 0.0")
    for i in range(k):
        c(f"a{i} = " + matvec_sym(k, "W", "r", i))
    c("if loo:")
    c.indent()
    c("if " + " and ".join(f"{d} > 0.0" for d in D) + ":")
    c.indent()
    _logdet(c, D, "ld", absolute=False)
    c.dedent()
    c("else:")
    c("    ld = np.nan")
    c("loo_logdens[c] = -0.5 * (" + _dot([(f"a{i}", f"r{i}") for i in range(k)])
      + ") - 0.5 * ld - 0.5 * q * LOG_2PI")
    c.dedent()
    c("if grad:")
    c.indent()
    _grad_terms(c, k, "a", "W")
    for a, b in tri(k):
        c(f"{sym('dE', a, b)} += {sym('G', a, b)}")
        c(f"d_err[c, {a}, {b}] = {sym('G', a, b)}")
        if a != b:
            c(f"d_err[c, {b}, {a}] = {sym('G', a, b)}")
    for i in range(k):
        c(f"d_y[c, {i}] = -a{i}")
    c("if c == root:")
    c.indent()
    for i in range(k):
        c(f"d_mu[{i}] = a{i}")
    c.dedent()
    c.dedent()
    c("if anc:")
    c.indent()
    _anc_terms(c, k, "P", "m", "a", "W")
    c.dedent()
    c.dedent()


DRIVERS = '''
@njit(**_JIT)
def _run(parent, lengths, y, observed, R, regime, E, err, mu, mode, d_lengths, d_y, d_R,
         d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens, anc_mean, anc_cov):
    n = parent.shape[0]
    Pm = np.empty((n - y.shape[0], 2 * B + 1))
    Sq = np.empty((n, 2 * B))
    logp = upward_k{k}(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq)
    if np.isfinite(logp):
        downward_k{k}(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq, mode,
                    d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,
                    anc_mean, anc_cov)
    return logp


@njit(**_JIT)
def loglik_k{k}(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`cladewise.engine.kernels.loglik_regimes_kernel` for k = {k}."""
    return upward_k{k}(parent, lengths, y, observed, R, regime, E, err, mu,
                     np.empty((parent.shape[0] - y.shape[0], B)), np.empty((0, 1)))


@njit(**_JIT)
def value_and_grad_k{k}(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`cladewise.engine.kernels.value_and_grad_regimes_kernel` for k = {k}."""
    n = parent.shape[0]
    ntip = y.shape[0]
    d_lengths = np.zeros(n)
    d_y = np.zeros((ntip, K))
    d_R = np.zeros(R.shape)
    d_E = np.zeros((K, K))
    d_err = np.zeros((ntip, K, K))
    d_mu = np.zeros(K)
    e1 = np.empty((0, K))
    e2 = np.empty((0, K, K))
    e0 = np.empty(0)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_GRAD, d_lengths, d_y,
                d_R, d_E, d_err, d_mu, e1, e2, e0, e1, e2)
    if not np.isfinite(logp):
        d_lengths[:] = 0.0
        d_y[:] = 0.0
        d_R[:] = 0.0
        d_E[:] = 0.0
        d_err[:] = 0.0
        d_mu[:] = 0.0
    return logp, d_lengths, d_y, d_R, d_E, d_err, d_mu


@njit(**_JIT)
def loo_k{k}(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`cladewise.engine.kernels.loo_regimes_kernel` for k = {k}."""
    ntip = y.shape[0]
    loo_mean = np.full((ntip, K), np.nan)
    loo_cov = np.full((ntip, K, K), np.nan)
    loo_logdens = np.full(ntip, np.nan)
    e1 = np.empty((0, K))
    e2 = np.empty((0, K, K))
    e0 = np.empty(0)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_LOO, e0, e1,
                np.empty(R.shape), np.empty((K, K)), e2, np.empty(K), loo_mean, loo_cov,
                loo_logdens, e1, e2)
    return loo_mean, loo_cov, loo_logdens, logp


@njit(**_JIT)
def ancestral_k{k}(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`cladewise.engine.kernels.ancestral_regimes_kernel` for k = {k}."""
    n = parent.shape[0]
    anc_mean = np.full((n, K), np.nan)
    anc_cov = np.full((n, K, K), np.nan)
    e1 = np.empty((0, K))
    e2 = np.empty((0, K, K))
    e0 = np.empty(0)
    logp = _run(parent, lengths, y, observed, R, regime, E, err, mu, MODE_ANCESTRAL, e0, e1,
                np.empty(R.shape), np.empty((K, K)), e2, np.empty(K), e1, e2, e0, anc_mean,
                anc_cov)
    return anc_mean, anc_cov, logp


@njit(**_JIT)
def loo_logdens_draws_k{k}(parent, lengths, y, observed, R, regime, E, err, mu):
    """:func:`cladewise.engine.kernels.loo_logdens_draws_regimes_kernel` for k = {k}."""
    S = R.shape[0]
    n = parent.shape[0]
    ntip = y.shape[0]
    out = np.empty((S, ntip))
    loo_mean = np.empty((ntip, K))
    loo_cov = np.empty((ntip, K, K))
    e1 = np.empty((0, K))
    e2 = np.empty((0, K, K))
    e0 = np.empty(0)
    ek = np.empty((K, K))
    ev = np.empty(K)
    eR = np.empty(R.shape[1:])
    Pm = np.empty((n - ntip, 2 * B + 1))
    Sq = np.empty((n, 2 * B))
    for s in range(S):
        ln = lengths[s if lengths.shape[0] > 1 else 0]
        evs = err[s if err.shape[0] > 1 else 0]
        rgs = regime[s if regime.shape[0] > 1 else 0]
        logp = upward_k{k}(parent, ln, y, observed, R[s], rgs, E[s], evs, mu[s], Pm, Sq)
        if not np.isfinite(logp):
            out[s, :] = np.nan
            continue
        downward_k{k}(parent, ln, y, observed, R[s], rgs, E[s], evs, mu[s], Pm, Sq, MODE_LOO,
                    e0, e1, eR, ek, e2, ev, loo_mean, loo_cov, out[s], e1, e2)
    return out
'''


def module_source(k: int) -> str:
    """The text of ``kernels_k{k}.py``."""
    T = k * (k + 1) // 2
    c = Code()
    _upward(c, k)
    _downward(c, k)
    return HEADER.format(k=k, B=T + k) + "\n\n" + c.text() + DRIVERS.format(k=k)


def module_path(k: int) -> Path:
    return Path(__file__).resolve().parent / f"kernels_k{k}.py"


def write_modules() -> list[Path]:
    """(Re)write the generated modules whose text changed; returns those written.

    Unchanged files are left alone so that numba's cache (keyed on the file's time
    stamp) stays valid.
    """
    out = []
    for k in GENERATED_K:
        path = module_path(k)
        text = module_source(k)
        if not path.exists() or path.read_text() != text:
            path.write_text(text)
            out.append(path)
    return out


if __name__ == "__main__":
    for p in write_modules():
        print("wrote", p)
