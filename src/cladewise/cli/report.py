"""The ``cladewise report DIR`` subcommand: (re)write the HTML report of a fit folder."""

from __future__ import annotations

import argparse

from cladewise.cli.main import Command, register_command

__all__: list[str] = []


def _report_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("folder", help="fit folder written by 'cladewise fit' (posterior.nc, summary.json)")


def _run_report(args: argparse.Namespace) -> int:
    from cladewise.report import build_fit_report

    res = build_fit_report(args.folder)
    print(f"Report: {res.path}")
    print(f"Figures ({len(res.figures)}, PNG and SVG): {res.path.parent / 'figures'}")
    print(f"Tables ({len(res.tables)}, CSV): {res.path.parent / 'tables'}")
    for name, why in res.skipped.items():
        print(f"  not drawn: {name} ({why})")
    return 0


register_command(Command(
    "report",
    "write report.html (with figures/ and tables/) for a saved fit folder",
    _report_arguments,
    _run_report,
))
