"""``cladewise check SPEC``: read the files of a spec, match names, summarise the data.

Runs every validation ``fit`` runs before sampling, so "The data can be analysed"
means that a fit of the spec will start.
"""

from __future__ import annotations

import argparse
import json

from cladewise.cli.common import Command

__all__ = ["COMMAND"]


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="analysis specification (TOML) whose [data] section is checked")
    p.add_argument("--json", action="store_true", help="print the summary as JSON instead of text")


def _run(args: argparse.Namespace) -> int:
    from cladewise.pipeline import check_spec

    report = check_spec(args.spec)  # a problem that would stop a fit raises InputError
    if args.json:
        doc = report.to_dict()
        # the data summary stays at the top level, as it always was
        print(json.dumps({**doc.pop("data"), **doc}, indent=2, default=str))
    else:
        print(report.to_text())
        print("\nThe data can be analysed.")
    return 0


COMMAND = Command("check", "read the files of a spec, match names and summarise the data", _arguments, _run)
