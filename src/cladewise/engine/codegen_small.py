"""Writes the straight-line k = 3..6 kernels, ``engine/kernels_k3.py`` ... ``kernels_k6.py``.

The passes compute what the general passes of :mod:`cladewise.engine.kernels` compute
(the same messages, in the same node order, on the compact memory layout of the k = 2
path), with every k x k operation written out for one k as arithmetic on scalar local
variables: no scratch arrays and no loops over traits, so a node's algebra stays in
registers, and no pivoting: every factorisation is ``L D L'`` of a symmetric positive
definite matrix.

Layout (symmetric matrices as their upper triangle, ``T = k(k+1)/2`` numbers;
``B = T + k``). ``Sq[v, 0:B]``: the message ``[J, h]`` node ``v`` pushes across its branch
(after the downward pass, for a tip, its outside moment form ``[Q, m]``);
``Sq[v, B:2B]``: the sum of the messages of the siblings before ``v``. ``Pm[v - N, 0:B]``:
the message accumulated at internal node ``v`` (in the downward pass, the running sum
of the children visited); ``Pm[v - N, B:2B]``: its outside distribution in information
form ``[Lam, eta]`` (``Lam = Q^-1``, ``eta = Lam m``); ``Pm[v - N, 2B]``: 1 when that
outside is a point mass (the root without a root edge, and nodes below it through
zero-length branches), its mean then in place of ``eta``. What is read or written at
a node's parent (anywhere in memory) sits in one row.

* Upward, across a branch ``V = t R = t F F'`` (``F``: Cholesky factor of ``R``, once per
  regime): ``A = I + t F' J F``, ``H = J - t (J F) A^-1 (J F)'``, ``g = h - t (J F) A^-1 F' h``,
  ``log det(I + J V) = log det A`` (Woodbury, Sylvester).
* Downward, conditioning the parent's outside on its other children is a sum in
  information form; pushing it across the child's branch is the upward step again; a
  tip's outside moment form is one ``L D L'`` inverse; an internal node's terms use
  ``A = Lam + J``: ``H = J - J A^-1 J``, ``g = Lam A^-1 (h + eta) - eta``.
* A tip's ``(t R + E + S)[o, o]`` is inverted with the unobserved rows and columns
  replaced by the identity: the factor is then block-diagonal, so the observed block's
  inverse is exactly that of ``[o, o]``, and the rest is set to zero.

The tests compare every task with the general kernels (1e-10) and dense scipy (1e-8).

The generated modules are committed (numba's on-disk cache needs a source file, and
keys the cache on that file). ``tests/engine/test_kernels_small.py`` checks that they
equal what this module writes, so they cannot go stale. After editing this module run::

    PYTHONPATH=src python -m cladewise.engine.codegen_small
"""

from __future__ import annotations

from pathlib import Path

from cladewise.engine.codegen_algebra import (
    Code,
    absorb_factored,
    absorb_info,
    chol_lower,
    dot,
    ldl_inverse,
    load_row,
    logdet,
    matvec_sym,
    store_row,
    sym,
    tri,
)
from cladewise.engine.codegen_templates import DRIVERS, HEADER

__all__ = ["GENERATED_K", "module_source", "module_path", "write_modules"]

#: trait counts with generated kernels
GENERATED_K = (3, 4, 5, 6)


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


def _chol_R(c: Code, k: int, fail: str | None = None) -> None:
    T = k * (k + 1) // 2
    c("# Cholesky factor of each regime's R: V = t F F' on a branch")
    c(f"FR = np.empty((R.shape[0], {T}))")
    c("for rg in range(R.shape[0]):")
    c.indent()
    chol_lower(c, k, lambda i, j: f"R[rg, {i}, {j}]", lambda i, j: f"F{i}{j}", fail)
    for n, (a, b) in enumerate(tri(k)):
        c(f"FR[rg, {n}] = F{b}{a}")
    c.dedent()


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
    c("# a rate matrix that is not positive semidefinite has no likelihood")
    _chol_R(c, k, fail="return -np.inf")
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
    logdet(c, D, "ld", absolute=False)
    c("total += -0.5 * (" + dot([(f"h{i}", f"y{i}") for i in range(k)]) + ") - 0.5 * ld - 0.5 * q * LOG_2PI")
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
    logdet(c, D, "ld", absolute=False)
    c("quad = t * (" + " + ".join(
        f"uz{i} * (" + dot([(f"F{l}{i}", f"g{l}") for l in range(i, k)]) + ")" for i in range(k)) + ")")
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
def _downward(out: Code, k: int, task: str) -> None:
    """The downward pass keeps an internal node's outside distribution in information form
    ``(Lam, eta)`` (``Pm[w, B:2B]``): conditioning on the other children's messages is then
    a sum, and one ``L D L'`` inverse gives a child's outside moment form. A node whose
    outside is a point mass (the root without a root edge, and nodes below it through
    zero-length branches) has ``Pm[w, 2B] = 1`` and its mean in place of ``eta``.

    One function per task (``grad``, ``loo``, ``anc``): the terms of the other tasks are
    left out (``if False:`` blocks, which Python drops when it compiles the module), so
    each compiles only its own code.
    """
    T = k * (k + 1) // 2
    B = T + k
    c = Code()
    c.level = out.level
    c("@njit(**_JIT)")
    c(f"def downward_{task}_k{k}(parent, lengths, y, observed, R, regime, E, err, mu, Pm, Sq,")
    c("               d_lengths, d_y, d_R, d_E, d_err, d_mu, loo_mean, loo_cov, loo_logdens,")
    c("               anc_mean, anc_cov):")
    c.indent()
    c(f'"""Pass from the root to the tips after the upward pass, then the tips\' terms ({task})."""')
    c("n = parent.shape[0]")
    c("ntip = y.shape[0]")
    c("if grad:")
    c.indent()
    for a in ("d_lengths", "d_y", "d_R", "d_E", "d_err", "d_mu"):
        c(f"{a}[:] = 0.0")
    c.dedent()
    c(f"dRs = np.zeros((R.shape[0], {T}))")
    _chol_R(c, k)
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
    c.dedent()
    c.dedent()
    c("if c < ntip:")
    c.indent()
    c("# a tip's outside moment form")
    c("if not point:")
    c.indent()
    ldl_inverse(c, k, "C", "Q", "x", None)
    for i in range(k):
        c(f"m{i} = " + matvec_sym(k, "Q", "e", i))
    c.dedent()
    for a, b in tri(k):
        c(f"{sym('Q', a, b)} += t * R[rg, {b}, {a}]")
    store_row(c, k, "Sq", "c", 0, "Q", "m")
    c("continue")
    c.dedent()
    c("w = c - ntip")
    load_row(c, k, "Pm", "w", 0, "J", "h")
    c("if point and t == 0.0:")
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
    c("if point:")
    c.indent()
    c("# below a point mass m: outside N(m, t R)")
    for a, b in tri(k):
        c(f"{sym('Q', a, b)} = t * R[rg, {b}, {a}]")
    ldl_inverse(c, k, "Q", "L", "y", None)
    for i in range(k):
        c(f"l{i} = " + matvec_sym(k, "L", "m", i))
    c.dedent()
    c("elif t == 0.0:")
    c.indent()
    c("# a zero-length branch: the outside information is the conditioned parent's")
    for a, b in tri(k):
        c(f"{sym('L', a, b)} = {sym('C', a, b)}")
    for i in range(k):
        c(f"l{i} = e{i}")
    c.dedent()
    c("else:")
    c.indent()
    c("# push the conditioned parent's information across the branch (V = t F F')")
    for n, (a, b) in enumerate(tri(k)):
        c(f"F{b}{a} = FR[rg, {n}]")
    absorb_factored(c, k, "C", "e", lambda i, j: f"F{i}{j}", "v", "L", "l", scale="t")
    c.dedent()
    store_row(c, k, "Pm", "w", B, "L", "l")
    c("if want_internal:")
    c.indent()
    absorb_info(c, k, "J", "h", "l", "L", "a", "H", "g")
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
    flags = {"grad": task == "grad", "anc": task == "anc", "loo": task == "loo"}
    flags["want_internal"] = flags["grad"] or flags["anc"]
    for line in c.lines:
        for name, on in flags.items():
            if line.strip() == f"if {name}:":
                line = line.replace(f"if {name}:", f"if {on}:")
        out.lines.append(line)


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
            c(f"Z{i}_{j} = " + dot([(sym(P, i, a), sym(H, a, j)) for a in range(k)]))
    for i in range(k):
        for j in range(k):
            c(f"anc_cov[c, {i}, {j}] = {sym(P, i, j)} - (" + dot([(f"Z{i}_{b}", sym(P, b, j)) for b in range(k)])
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
    logdet(c, D, "ld", absolute=False)
    c.dedent()
    c("else:")
    c("    ld = np.nan")
    c("loo_logdens[c] = -0.5 * (" + dot([(f"a{i}", f"r{i}") for i in range(k)])
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


def module_source(k: int) -> str:
    """The text of ``kernels_k{k}.py``."""
    T = k * (k + 1) // 2
    c = Code()
    _upward(c, k)
    for task in ("grad", "loo", "anc"):
        _downward(c, k, task)
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
