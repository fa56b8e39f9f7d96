"""``cladewise power SPEC --out DIR``: power and false-positive rate on your own tree.

For each true evolutionary correlation, two traits are simulated on the tree many
times by bivariate Brownian motion, the correlated model is fitted to every data set
(one compiled model for the whole study), and the command reports how often the 95%
HDI of the evolutionary correlation excludes zero, beside how often a Pearson test
that ignores the tree gives p < 0.05 on the same data. At a true correlation of 0 the
share is the false-positive rate. See :func:`cladewise.studies.power.run_power_study`.

SPEC is a TOML file with ``[data] tree`` and a ``[power]`` table; the format is documented
in :mod:`cladewise.config.power`.

Output folder (a folder cladewise did not write is refused; ``--overwrite`` replaces one it did):
``power_table.csv`` (one row per correlation: shares and Monte Carlo standard
errors), ``power_fits.csv`` (one row per data set), ``power.json`` (settings, priors,
the spec text and the table), ``power.png`` and ``power.svg`` (the figure).
"""

from __future__ import annotations

import argparse
import sys

from cladewise.cli.common import Command
from cladewise.config.power import load_power_spec
from cladewise.errors import InputError

__all__ = ["COMMAND"]


def _arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="TOML file with [data] tree and a [power] table (see the docs of cladewise.cli.power)")
    p.add_argument("--out", required=True, help="folder for power_table.csv, power_fits.csv, power.json, power.png/.svg")
    p.add_argument("--overwrite", action="store_true", help="replace files in an existing non-empty folder")
    p.add_argument("--n-datasets", type=int, help="override [power] n_datasets")
    p.add_argument("--seed", type=int, help="override [power] seed")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run one fit per data set on this dask scheduler (tcp://host:port or scheduler file); "
                        "same numbers as without it")
    p.add_argument("--workers", type=int, metavar="N",
                   help="run the fits on a local dask cluster of N processes (default: in this process)")


def _run(args: argparse.Namespace) -> int:
    from cladewise.report.study_figures import save_power_figure
    from cladewise.studies.power import run_power_study
    from cladewise.studies.refit import output_folder

    spec = load_power_spec(args.spec)
    if args.n_datasets is not None:
        if args.n_datasets < 2:
            raise InputError("--n-datasets must be at least 2")
        spec.kwargs["n_datasets"] = args.n_datasets
    if args.seed is not None:
        spec.kwargs["seed"] = args.seed
    # refuse a used folder now rather than after an hour of fitting
    output_folder(args.out, args.overwrite)

    def say(msg: str) -> None:
        print(msg, file=sys.stderr, flush=True)

    if args.workers is not None and args.workers < 1:
        raise InputError("--workers must be at least 1")
    result = run_power_study(spec.tree, options=spec.options, progress=say, scheduler=args.scheduler,
                             n_workers=args.workers, **spec.kwargs)
    result.settings.update({
        "spec_path": str(spec.path), "spec_text": spec.text,
        "command": args.command_line,
    })
    paths = result.save(args.out, overwrite=True)
    paths.update(save_power_figure(result, args.out))
    print(result.to_text())
    print("\nSaved: " + ", ".join(str(p) for p in paths.values()))
    return 0


COMMAND = Command("power", "power and false-positive rate of the correlated model on your tree, by simulation",
                  _arguments, _run)
