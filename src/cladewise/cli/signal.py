"""``cladewise signal SPEC --out DIR``: phylogenetic signal of each trait.

Blomberg's K with a permutation p-value (fast, descriptive) and the posterior of
Pagel's lambda from a one-trait model (``--no-lambda`` skips the sampling).
"""

from __future__ import annotations

import argparse
import sys

from cladewise.cli.common import Command

__all__ = ["COMMAND"]

_SAMPLING = ("sampler", "chains", "draws", "tune", "seed")


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="analysis specification (TOML); [data] gives the files, [model] the traits "
                                "and the measurement-error model")
    p.add_argument("--out", required=True,
                   help="folder for signal.csv, signal.json, lambda_draws.csv, K_permutations.csv, figures/")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--traits", metavar="NAME", nargs="+",
                   help="traits to analyse (default: the traits of [model], else every trait of the table)")
    p.add_argument("--permutations", type=int, default=999, metavar="N",
                   help="shuffles of the values across species for the p-value of K (default 999; 0: none)")
    p.add_argument("--no-lambda", action="store_true", dest="no_lambda",
                   help="only Blomberg's K: no lambda model is fitted (seconds, not minutes)")
    p.add_argument("--threshold", type=float, default=0.1,
                   help="the table gives P(lambda > threshold) (default 0.1)")
    p.add_argument("--measurement-error", choices=["none", "se", "specimens"], dest="measurement_error",
                   help="override [model] measurement_error for the lambda fits")
    p.add_argument("--sampler", choices=["nutpie", "pymc"], help="override [sampling] sampler")
    p.add_argument("--chains", type=int, help="override [sampling] chains")
    p.add_argument("--draws", type=int, help="override [sampling] draws")
    p.add_argument("--tune", type=int, help="override [sampling] tune")
    p.add_argument("--seed", type=int, help="override [sampling] seed (also seeds the permutations)")


def _run(args: argparse.Namespace) -> int:
    from cladewise.evaluation.signal import signal_from_spec

    def progress(line: str) -> None:
        print(line, file=sys.stderr, flush=True)

    result = signal_from_spec(
        args.spec, out=args.out, overwrite=args.overwrite, traits=args.traits, with_lambda=not args.no_lambda,
        permutations=args.permutations, threshold=args.threshold, measurement_error=args.measurement_error,
        progress=progress, command=args.command_line, **{k: getattr(args, k) for k in _SAMPLING},
    )
    print(result.to_text())
    print(f"\nSaved: {args.out}/signal.csv, signal.json, figures/signal.png")
    return 0


COMMAND = Command("signal", "phylogenetic signal of each trait: Blomberg's K and Pagel's lambda", _arguments, _run)
