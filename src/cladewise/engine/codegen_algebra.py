"""Python-source emitters for straight-line k x k algebra on scalar locals.

Used by :mod:`cladewise.engine.codegen_small` to write the k = 3..6 kernels. A
symmetric matrix ``X`` is held in the locals ``X{i}{j}`` (``i <= j``), a vector ``v`` in
``v{i}``; each emitter appends lines to a :class:`Code` and names what it defines.
"""

from __future__ import annotations

__all__ = ["Code", "tri", "sym", "dot", "load_row", "store_row", "logdet", "ldl_factor",
           "ldl_inverse", "absorb_factored", "absorb_info", "chol_lower", "matvec_sym"]


def tri(k: int) -> list[tuple[int, int]]:
    """Upper-triangle index pairs in storage order."""
    return [(i, j) for i in range(k) for j in range(i, k)]


def sym(name: str, i: int, j: int) -> str:
    """Local variable of a symmetric matrix entry (upper triangle)."""
    return f"{name}{min(i, j)}{max(i, j)}"


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


def dot(pairs: list[tuple[str, str]]) -> str:
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


def logdet(c: Code, factors: list[str], out: str, absolute: bool) -> None:
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
            c(f"{p}U{i}_{j} = " + dot([(sym(J, i, l), F(l, j)) for l in range(j, k)]))
    for a, b in tri(k):
        c(f"{sym(p + 'A', a, b)} = " + ("1.0 + " if a == b else "") + sc + "("
          + dot([(F(l, a), f"{p}U{l}_{b}") for l in range(a, k)]) + ")")
    D = ldl_factor(c, k, p + "A", p, None)
    for i in range(k):
        for j in range(k):
            c(f"{p}Y{i}_{j} = {p}U{i}_{j}" + "".join(f" - {p}Y{i}_{l} * {p}L{j}{l}" for l in range(j)))
    for i in range(k):
        for j in range(k):
            c(f"{p}Z{i}_{j} = {p}Y{i}_{j} * {p}r{j}")
    for a, b in tri(k):
        c(f"{sym(H, a, b)} = {sym(J, a, b)} - {sc}(" + dot([(f"{p}Z{a}_{l}", f"{p}Y{b}_{l}") for l in range(k)])
          + ")")
    for i in range(k):
        c(f"{p}z{i} = " + dot([(F(l, i), f"{r}{l}") for l in range(i, k)]))
    for i in range(k):
        c(f"{p}x{i} = {p}z{i}" + "".join(f" - {p}L{i}{l} * {p}x{l}" for l in range(i)))
    for i in range(k):
        c(f"{g}{i} = {r}{i} - {sc}(" + dot([(f"{p}Z{i}_{l}", f"{p}x{l}") for l in range(k)]) + ")")
    return D


def chol_lower(c: Code, k: int, K, out, fail: str | None = None) -> None:
    """Cholesky factor ``F`` (``F F' = K``) of a positive semidefinite ``K``: a pivot that
    is not positive gives a zero column (exact for the zero matrix). ``fail``: a statement
    run when a pivot is negative beyond rounding (``K`` not semidefinite)."""
    for j in range(k):
        c(f"fd = {K(j, j)}" + "".join(f" - {out(j, l)} * {out(j, l)}" for l in range(j)))
        if fail:
            c(f"if fd < -1e-12 * abs({K(j, j)}):")
            c.indent()
            c(fail)
            c.dedent()
        c(f"{out(j, j)} = math.sqrt(fd) if fd > 0.0 else 0.0")
        c(f"fr = 1.0 / {out(j, j)} if fd > 0.0 else 0.0")
        for i in range(j + 1, k):
            c(f"{out(i, j)} = ({K(i, j)}" + "".join(f" - {out(i, l)} * {out(j, l)}" for l in range(j))
              + ") * fr")


def matvec_sym(k: int, M: str, v: str, i: int) -> str:
    return dot([(sym(M, i, j), f"{v}{j}") for j in range(k)])


def absorb_info(c: Code, k: int, J: str, h: str, eta: str, Lam: str, p: str, H: str, g: str) -> None:
    """:func:`~cladewise.engine.kernels.absorb` of ``(J, h)`` with ``N(m, Lam^-1)``, ``eta = Lam m``.

    With ``A = Lam + J`` (symmetric positive definite: no pivoting), ``H = J - J A^-1 J``
    (Woodbury) and ``g = Lam A^-1 (h + eta) - eta`` (``A^-1 (h + eta)`` is the posterior
    mean; ``g = Lam`` times its distance from ``m``).
    """
    for a, b in tri(k):
        c(f"{sym(p + 'A', a, b)} = {sym(Lam, a, b)} + {sym(J, a, b)}")
    ldl_factor(c, k, p + "A", p, None)
    for i in range(k):
        for j in range(k):
            c(f"{p}Y{i}_{j} = {sym(J, i, j)}" + "".join(f" - {p}Y{i}_{l} * {p}L{j}{l}" for l in range(j)))
    for i in range(k):
        for j in range(k):
            c(f"{p}Z{i}_{j} = {p}Y{i}_{j} * {p}r{j}")
    for a, b in tri(k):
        c(f"{sym(H, a, b)} = {sym(J, a, b)} - (" + dot([(f"{p}Z{a}_{l}", f"{p}Y{b}_{l}") for l in range(k)]) + ")")
    for i in range(k):
        c(f"{p}x{i} = {h}{i} + {eta}{i}" + "".join(f" - {p}L{i}{l} * {p}x{l}" for l in range(i)))
    for i in range(k):
        c(f"{p}x{i} *= {p}r{i}")
    for i in range(k - 1, -1, -1):
        c(f"{p}x{i} = {p}x{i}" + "".join(f" - {p}L{l}{i} * {p}x{l}" for l in range(i + 1, k)))
    for i in range(k):
        c(f"{g}{i} = " + matvec_sym(k, Lam, p + "x", i) + f" - {eta}{i}")
