"""The shape of the source, checked from the text of every module (``ast``, no import).

- no import cycle among module-level imports (the graph also holds the imports made
  inside functions, which run later and so cannot break an import);
- no module imports another module's private (``_name``) names;
- ``argparse`` only in ``cladewise/cli``, ``matplotlib`` only in ``cladewise/report``;
- no module over 600 lines except the engine's specialised kernels (``engine/kernels*.py``).

Run alone: ``python -m pytest tests/test_layout.py -q``.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from pathlib import Path


SRC = Path(__file__).resolve().parents[1] / "src"
PACKAGE = "cladewise"
MAX_LINES = 600


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(SRC).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


MODULES: dict[str, Path] = {_module_name(p): p for p in sorted((SRC / PACKAGE).rglob("*.py"))}


@dataclass(frozen=True)
class Import:
    """One import statement of a cladewise module."""

    source: str  # importing module
    target: str  # imported cladewise module
    names: tuple[str, ...]  # names taken from it (empty for `import x`)
    top_level: bool  # runs when the module is imported (not inside a function)
    line: int


def _is_type_checking(node: ast.If) -> bool:
    t = node.test
    return (isinstance(t, ast.Name) and t.id == "TYPE_CHECKING") or (
        isinstance(t, ast.Attribute) and t.attr == "TYPE_CHECKING")


def _absolute(module: str | None, level: int, source: str) -> str:
    if not level:
        return module or ""
    base = source.split(".")
    if not MODULES[source].name == "__init__.py":
        base = base[:-1]
    base = base[: len(base) - (level - 1)]
    return ".".join(base + ([module] if module else []))


def _walk(node: ast.AST, top: bool):
    """Yield (import node, top_level) below ``node``; function bodies are not top level."""
    for child in ast.iter_child_nodes(node):
        if isinstance(child, (ast.Import, ast.ImportFrom)):
            yield child, top
        elif isinstance(child, ast.If) and _is_type_checking(child):
            continue  # never executed
        elif isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)):
            yield from _walk(child, False)
        else:
            yield from _walk(child, top)


def imports(source: str) -> list[Import]:
    """Every import of a cladewise module made by module ``source``."""
    tree = ast.parse(MODULES[source].read_text(), filename=str(MODULES[source]))
    found = []
    for node, top in _walk(tree, True):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == PACKAGE:
                    found.append(Import(source, alias.name, (), top, node.lineno))
        else:
            mod = _absolute(node.module, node.level, source)
            if mod.split(".")[0] != PACKAGE:
                continue
            names = tuple(a.name for a in node.names)
            submodules = [f"{mod}.{n}" for n in names if f"{mod}.{n}" in MODULES]
            for sub in submodules:  # `from cladewise.cli import fit` imports the module cladewise.cli.fit
                found.append(Import(source, sub, (), top, node.lineno))
            rest = tuple(n for n in names if f"{mod}.{n}" not in MODULES)
            if rest or not submodules:
                found.append(Import(source, mod, rest, top, node.lineno))
    return found


def import_graph(function_level: bool) -> dict[str, set[str]]:
    """Module -> the cladewise modules it imports (at module level, or anywhere)."""
    graph: dict[str, set[str]] = {m: set() for m in MODULES}
    for m in MODULES:
        for imp in imports(m):
            if (imp.top_level or function_level) and imp.target in MODULES and imp.target != m:
                graph[m].add(imp.target)
    return graph


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan 1972, SIAM J. Comput. 1:146)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    out: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def _in(module: str, package: str) -> bool:
    return module == package or module.startswith(package + ".")


# ---------------------------------------------------------------------------- tests
def test_the_checker_sees_imports():
    # the checker itself: a known module-level and a known function-level import
    assert "cladewise.errors" in import_graph(False)["cladewise.cli.main"]
    assert "cladewise.pipeline" not in import_graph(False)["cladewise.cli.fit"]
    assert "cladewise.pipeline" in import_graph(True)["cladewise.cli.fit"]
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycle_among_module_level_imports():
    found = cycles(import_graph(function_level=False))
    assert not found, "import cycles: " + "; ".join(" <-> ".join(c) for c in found)


def test_no_private_name_imported_across_modules():
    bad = []
    for m in MODULES:
        for imp in imports(m):
            for name in imp.names:
                if name.startswith("_") and not name.startswith("__") and imp.target != m:
                    bad.append(f"{MODULES[m].relative_to(SRC)}:{imp.line} imports {name} from {imp.target}")
    assert not bad, "\n".join(bad)


def test_no_private_attribute_of_an_imported_module():
    # `from cladewise.inference import sampling` then `sampling._helper(...)`
    bad = []
    for m, path in MODULES.items():
        tree = ast.parse(path.read_text())
        aliases = {}
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                aliases.update({a.asname: a.name for a in node.names if a.asname and a.name in MODULES})
            elif isinstance(node, ast.ImportFrom):
                mod = _absolute(node.module, node.level, m)
                aliases.update({a.asname or a.name: f"{mod}.{a.name}" for a in node.names
                                if f"{mod}.{a.name}" in MODULES})
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                    and node.value.id in aliases and node.attr.startswith("_") and not node.attr.startswith("__")
                    and aliases[node.value.id] != m):
                bad.append(f"{path.relative_to(SRC)}:{node.lineno} uses {node.value.id}.{node.attr}")
    assert not bad, "\n".join(bad)


def _third_party(name: str, allowed_in: str) -> list[str]:
    bad = []
    for m, path in MODULES.items():
        if _in(m, allowed_in):
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            mods = []
            if isinstance(node, ast.Import):
                mods = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and not node.level:
                mods = [node.module or ""]
            if any(x.split(".")[0] == name for x in mods):
                bad.append(f"{path.relative_to(SRC)}:{node.lineno}")
    return bad


def test_argparse_only_in_cli():
    bad = _third_party("argparse", f"{PACKAGE}.cli")
    assert not bad, "argparse outside cladewise/cli: " + ", ".join(bad)


def test_matplotlib_only_in_report():
    bad = _third_party("matplotlib", f"{PACKAGE}.report")
    assert not bad, "matplotlib outside cladewise/report: " + ", ".join(bad)


def _too_long() -> list[str]:
    long = []
    for path in MODULES.values():
        rel = path.relative_to(SRC / PACKAGE)
        if rel.parts[0] == "engine" and rel.name.startswith("kernels"):
            continue  # specialised kernels are long by design
        n = len(path.read_text().splitlines())
        if n > MAX_LINES:
            long.append(f"{rel} ({n} lines)")
    return long


def test_no_module_over_600_lines():
    long = _too_long()
    assert not long, f"modules over {MAX_LINES} lines: " + ", ".join(long)
