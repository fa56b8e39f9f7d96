"""Drawing lives in report/ only: no other package module imports matplotlib (issue 11).

Checked from the source with the standard library's ``ast`` parser, so an import
inside a function counts too.
"""

from __future__ import annotations

import ast
from pathlib import Path

SRC = Path(__file__).resolve().parents[2] / "src" / "cladewise"


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
            out.add(node.module.split(".")[0])
    return out


def test_matplotlib_only_in_report():
    files = [p for p in SRC.rglob("*.py") if "report" not in p.relative_to(SRC).parts]
    assert len(files) > 20  # the package was found
    offenders = [str(p.relative_to(SRC)) for p in files if "matplotlib" in _imports(p)]
    assert offenders == []
    # and report/ does draw: the check above looks at the right thing
    assert "matplotlib" in _imports(SRC / "report" / "style.py")
