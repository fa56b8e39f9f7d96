"""``cladewise report DIR``: (re)write the HTML report of a fit folder."""

from __future__ import annotations

import argparse

from cladewise.cli.common import Command

__all__ = ["COMMAND"]


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("folder", help="fit folder written by 'cladewise fit' (posterior.nc, summary.json)")


def _run(args: argparse.Namespace) -> int:
    from cladewise.report import build_fit_report

    res = build_fit_report(args.folder)
    print(f"Report: {res.path}")
    print(f"Figures ({len(res.figures)}, PNG and SVG): {res.path.parent / 'figures'}")
    print(f"Tables ({len(res.tables)}, CSV): {res.path.parent / 'tables'}")
    for name, why in res.skipped.items():
        print(f"  not drawn: {name} ({why})")
    return 0


COMMAND = Command("report", "write report.html (with figures/ and tables/) for a saved fit folder", _arguments, _run)
