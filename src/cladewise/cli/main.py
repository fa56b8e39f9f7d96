"""The ``cladewise`` command line: a thin layer over the library.

Subcommands live in a table. A module adds one by calling
:func:`register_command` at import time and by being named in
:data:`COMMAND_MODULES`, which :func:`main` imports before parsing.

User mistakes (:class:`~cladewise.errors.InputError`) end with exit status 2 and a
one-paragraph message on stderr, without a traceback. Anything else is a bug and
is shown in full.
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
import textwrap
import warnings
from dataclasses import dataclass
from typing import Callable, Sequence

from cladewise import __version__
from cladewise.errors import FitError, InputError

__all__ = ["Command", "COMMAND_MODULES", "main", "register_command"]


@dataclass(frozen=True)
class Command:
    """One subcommand: its name, one-line help, argument setup and action.

    ``run`` returns the exit status (0 for success).
    """

    name: str
    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


_COMMANDS: dict[str, Command] = {}

#: Modules imported by :func:`main` so that their commands get registered
#: (e.g. ``"cladewise.fit_command"``). Each calls :func:`register_command`.
COMMAND_MODULES: list[str] = ["cladewise.cli.commands", "cladewise.cli.report", "cladewise.cli.compare", "cladewise.cli.grid", "cladewise.cli.power"]


def register_command(command: Command) -> Command:
    """Add a subcommand to the table (a later one with the same name replaces it)."""
    _COMMANDS[command.name] = command
    return command


# ------------------------------------------------------------------------ check
def _check_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("spec", help="analysis specification (TOML) whose [data] section is checked")
    p.add_argument("--json", action="store_true", help="print the summary as JSON instead of text")


def _run_check(args: argparse.Namespace) -> int:
    from cladewise.config.analysis import load_data, load_spec

    spec = load_spec(args.spec)
    _, summary = load_data(spec)
    if args.json:
        print(json.dumps(summary.to_dict(), indent=2, default=str))
    else:
        print(summary.to_text())
        print("\nThe data can be analysed.")
    return 0


register_command(
    Command(
        "check",
        "read the files of a spec, match names and summarise the data",
        _check_arguments,
        _run_check,
    )
)


# ------------------------------------------------------------------------- main
def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="cladewise",
        description="Bayesian phylogenetic comparative analysis of continuous traits.",
    )
    parser.add_argument("--version", action="version", version=f"cladewise {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for cmd in _COMMANDS.values():
        p = sub.add_parser(cmd.name, help=cmd.help, description=cmd.help)
        cmd.add_arguments(p)
        p.set_defaults(_run=cmd.run)
    return parser


def _say(message: str) -> None:
    text = " ".join(str(message).split())
    wrapped = textwrap.fill("cladewise: error: " + text, width=88, break_on_hyphens=False, break_long_words=False)
    print(wrapped, file=sys.stderr)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    # PyTensor warns at import that no BLAS is linked; sampling runs through numba
    # (nutpie), so the warning only confuses users of the command line.
    warnings.filterwarnings("ignore", message=".*BLAS.*")
    warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz")
    for mod in COMMAND_MODULES:
        importlib.import_module(mod)
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, usage errors
        return int(exc.code or 0) if not isinstance(exc.code, str) else 2
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args._run(args))
    except (InputError, FitError) as exc:
        _say(str(exc))
        return 2
    except KeyboardInterrupt:
        print("cladewise: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    # run through the package module so subcommands register on the same table
    from cladewise.cli.main import main as _main

    sys.exit(_main())
