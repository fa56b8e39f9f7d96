"""Subcommands registered with the command line (thin wrappers over the library)."""

from __future__ import annotations

import argparse
import shlex
import sys

from cladewise.cli.main import Command, register_command

__all__: list[str] = []


def _fit_arguments(p: argparse.ArgumentParser) -> None:
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
    from cladewise.inference.treesample import add_tree_sample_arguments

    add_tree_sample_arguments(p)  # --trees FILE, --n-trees N: fit over a sample of trees


def _run_fit(args: argparse.Namespace) -> int:
    from cladewise.pipeline import fit_spec

    from cladewise.inference.treesample import fit_tree_sample_from_args, uses_tree_sample

    command = "cladewise " + " ".join(shlex.quote(a) for a in sys.argv[1:])
    if uses_tree_sample(args):
        result = fit_tree_sample_from_args(args)
    else:
        result = fit_spec(
            args.spec, args.out, overwrite=args.overwrite, command=command,
            sampler=args.sampler, chains=args.chains, draws=args.draws, tune=args.tune, seed=args.seed,
        )
    print(result.to_text())
    print(f"\nSaved: {args.out}/posterior.nc, summary.csv, summary.json")
    if not args.no_report:
        try:
            from cladewise.report import write_fit_report
        except ImportError:
            pass
        else:
            path = write_fit_report(args.out)
            print(f"Report: {path}")
    if args.strict and not result.diagnostics.ok:
        print("Strict mode: diagnostics found problems (see above); exit status 3.", file=sys.stderr)
        return 3
    return 0


register_command(Command("fit", "fit the model of a spec and save the posterior", _fit_arguments, _run_fit))


def _simulate_arguments(p: argparse.ArgumentParser) -> None:
    from cladewise.studies.simulate import add_simulate_arguments

    add_simulate_arguments(p)


def _run_simulate(args: argparse.Namespace) -> int:
    from cladewise.studies.simulate import run_simulate

    return run_simulate(args)


register_command(Command("simulate", "simulate trait data on a tree from a spec's [simulation] table",
                         _simulate_arguments, _run_simulate))
