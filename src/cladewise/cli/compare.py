"""``cladewise compare DIR1 DIR2 ...``: rank saved fits by leave-one-species-out ELPD."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from cladewise.cli.common import Command
from cladewise.errors import InputError

__all__ = ["COMMAND"]

OUTPUT_FILES = ("compare.csv", "compare.json")


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("fits", nargs="+", metavar="DIR", help="saved fit folders (from 'cladewise fit --out DIR'), two or more")
    p.add_argument("--names", nargs="+", metavar="NAME", help="model names, one per folder (default: folder names)")
    p.add_argument("--out", metavar="DIR",
                   help="folder for compare.csv and compare.json (default: the folder holding the first fit)")
    p.add_argument("--overwrite", action="store_true", help="replace existing compare.csv / compare.json")
    p.add_argument("--no-report", action="store_true", help="do not write the HTML comparison report")


def _refuse_repeats(dirs: list[Path]) -> None:
    seen: dict[Path, Path] = {}
    for d in dirs:
        key = d.resolve()
        if key in seen:
            same = f"{seen[key]} and {d}" if str(seen[key]) != str(d) else str(d)
            raise InputError(
                f"the fit folder {same} is given twice; compare needs two or more different fits "
                "of the same data (e.g. 'cladewise compare fit_bm fit_ou')"
            )
        seen[key] = d


def _names(dirs: list[Path], given: list[str] | None) -> list[str]:
    if given:
        if len(given) != len(dirs):
            raise InputError(f"--names gives {len(given)} names for {len(dirs)} fit folders; give one per folder")
        names = list(given)
    else:
        names = [d.resolve().name for d in dirs]
        if len(set(names)) != len(names):
            names = [f"{d.resolve().parent.name}/{d.resolve().name}" for d in dirs]
    if len(set(names)) != len(names):
        raise InputError("two fits would get the same name; pass distinct --names")
    return names


def _run(args: argparse.Namespace) -> int:
    from cladewise.evaluation.compare import compare_fits

    dirs = [Path(d) for d in args.fits]
    if len(dirs) < 2:
        raise InputError("compare needs at least two fit folders")
    _refuse_repeats(dirs)
    names = _names(dirs, args.names)
    out = Path(args.out) if args.out else dirs[0].resolve().parent
    targets = [out / f for f in OUTPUT_FILES]
    existing = [str(t) for t in targets if t.exists()]
    if existing and not args.overwrite:
        # refuse before the (possibly slow) comparison
        raise InputError(f"{', '.join(existing)} already exist; choose another --out or pass --overwrite")
    result = compare_fits(dict(zip(names, dirs)))
    out.mkdir(parents=True, exist_ok=True)
    result.table.to_csv(targets[0], index=False)
    payload = result.to_dict()
    payload["fits"] = {n: str(d.resolve()) for n, d in zip(names, dirs)}
    targets[1].write_text(json.dumps(payload, indent=2))
    print(result.to_text())
    for name, r in result.loo.items():
        if r.flagged:
            print(f"\n{name}:\n{r.to_text()}")
    print(f"\nSaved: {targets[0]}, {targets[1]}")
    if not args.no_report:
        from cladewise.report import write_comparison_report

        path = write_comparison_report(result.table.set_index("model"), out, influential=result.influential,
                                       notes=result.notes)
        print(f"Report: {path}")
    return 0


COMMAND = Command("compare", "rank saved fits of the same data by leave-one-species-out ELPD", _arguments, _run)
