"""``cladewise fit SPEC --out DIR``: fit the model of a spec and save the posterior.

With ``--trees FILE`` or ``--n-trees N`` the model is fitted over a sample of trees
and the draws are pooled; otherwise on the spec's single tree.
"""

from __future__ import annotations

import argparse
import sys

from cladewise.cli.common import Command

__all__ = ["COMMAND", "STRICT_EXIT"]

#: exit status of ``fit --strict`` when the convergence diagnostics find a problem
STRICT_EXIT = 3

_SAMPLING = ("sampler", "chains", "draws", "tune", "seed")


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="analysis specification (TOML) with [data], [model] and [sampling]")
    p.add_argument("--out", required=True, help="folder for posterior.nc, summary.csv, summary.json")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--sampler", choices=["nutpie", "pymc"], help="override [sampling] sampler")
    p.add_argument("--chains", type=int, help="override [sampling] chains")
    p.add_argument("--draws", type=int, help="override [sampling] draws")
    p.add_argument("--tune", type=int, help="override [sampling] tune")
    p.add_argument("--seed", type=int, help="override [sampling] seed")
    p.add_argument("--strict", action="store_true",
                   help="exit with status 3 when the convergence diagnostics find a problem")
    p.add_argument("--no-report", action="store_true", help="do not write report.html")
    anc = p.add_mutually_exclusive_group()
    anc.add_argument("--no-ancestral", dest="ancestral", action="store_false", default=None,
                     help="skip ancestral values and predictions of missing cells (on by default up "
                          "to 20,000 species)")
    anc.add_argument("--ancestral", dest="ancestral", action="store_true", default=None,
                     help="compute ancestral values and predictions even above 20,000 species")
    p.add_argument("--keep-partial", action="store_true",
                   help="on Ctrl-C, save the draws made so far to --out, marked as partial "
                        "(by default an interrupted fit saves nothing)")
    p.add_argument("--trees", metavar="FILE",
                   help="fit over this tree sample (Newick/NEXUS, same species) instead of one tree; "
                        "the draws of all trees are pooled")
    p.add_argument("--n-trees", type=int, metavar="N", dest="n_trees",
                   help="fit a random subset of N trees of the sample ([data] trees or --trees), "
                        "drawn with the sampling seed")


def _run(args: argparse.Namespace) -> int:
    from cladewise.pipeline import fit_from_spec
    from cladewise.report import write_fit_report

    result = fit_from_spec(
        args.spec, out=args.out, overwrite=args.overwrite, trees=args.trees, n_trees=args.n_trees,
        keep_partial=args.keep_partial, progress=None, command=args.command_line, ancestral=args.ancestral,
        **{k: getattr(args, k) for k in _SAMPLING},
    )
    print(result.to_text())
    extra = "".join(f", {name}" for name in result.tables)
    print(f"\nSaved: {args.out}/posterior.nc, summary.csv, summary.json{extra}")
    anc = result.info.get("ancestral")
    if anc:
        print(f"Ancestral values of {anc['n_nodes']} internal nodes from {anc['n_draws']} draws (ancestral.csv); "
              f"{anc['n_predicted_cells']} missing cells predicted (predictions.csv: predictions, not data)")
    if not args.no_report:
        print(f"Report: {write_fit_report(args.out)}")
    if args.strict and not result.diagnostics.ok:
        print(f"Strict mode: diagnostics found problems (see above); exit status {STRICT_EXIT}.", file=sys.stderr)
        return STRICT_EXIT
    return 0


COMMAND = Command("fit", "fit the model of a spec and save the posterior", _arguments, _run)
