"""The ``cladewise`` command line: a thin layer over the library.

Every subcommand is a module of this package with a ``COMMAND``; :data:`COMMANDS`
lists them in the order of ``cladewise --help``.

Exit statuses: 0 success; 2 a user mistake (:class:`~cladewise.errors.InputError`,
:class:`~cladewise.errors.FitError` or a usage error), reported as one paragraph on
stderr without a traceback; 3 ``fit --strict`` with failed diagnostics; 130 Ctrl-C,
one line on stderr; 141 the reader of stdout went away (``cladewise check spec |
head -1``), quietly. Anything else is a bug and is shown in full.
"""

from __future__ import annotations

import argparse
import os
import sys
import textwrap
import warnings
from typing import Sequence

from cladewise import __version__
from cladewise.cli import cache, check, compare, fit, grid, power, report, signal, simulate
from cladewise.cli.common import Command, command_line
from cladewise.errors import FitError, InputError

__all__ = ["COMMANDS", "EXIT_INTERRUPTED", "EXIT_BROKEN_PIPE", "main"]

#: every subcommand, in the order of ``cladewise --help``
COMMANDS: tuple[Command, ...] = (
    check.COMMAND,
    fit.COMMAND,
    signal.COMMAND,
    simulate.COMMAND,
    report.COMMAND,
    compare.COMMAND,
    grid.COMMAND,
    power.COMMAND,
    cache.COMMAND,
)

#: what an interrupt leaves behind, for commands that keep something
_KEPT_ON_INTERRUPT = {
    "grid": "finished fits are kept in the output folder and skipped when the grid is run again",
    "simulate": "folders already written are kept (the last one may be incomplete)",
}

EXIT_INTERRUPTED = 130  # 128 + SIGINT, as a shell reports a Ctrl-C
EXIT_BROKEN_PIPE = 141  # 128 + SIGPIPE, as a shell reports a reader that went away


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="cladewise",
        description="Bayesian phylogenetic comparative analysis of continuous traits.",
    )
    parser.add_argument("--version", action="version", version=f"cladewise {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for cmd in COMMANDS:
        p = sub.add_parser(cmd.name, help=cmd.help, description=cmd.help)
        cmd.add_arguments(p)
        p.set_defaults(_run=cmd.run)
    return parser


def _say(message: str) -> None:
    text = " ".join(str(message).split())
    wrapped = textwrap.fill("cladewise: error: " + text, width=88, break_on_hyphens=False, break_long_words=False)
    print(wrapped, file=sys.stderr)


def _interrupted(command: str | None, exc: KeyboardInterrupt) -> None:
    saved = getattr(exc, "saved", None)  # the pipeline's FitInterrupted names where partial draws went
    if saved is not None:
        kept = f"the draws made so far were saved to {saved}, marked partial"
    else:
        kept = _KEPT_ON_INTERRUPT.get(command or "", "nothing saved")
    try:
        print(f"cladewise: interrupted; {kept}", file=sys.stderr, flush=True)
    except (OSError, ValueError):
        pass


def _silence_stdout() -> None:
    # The reader of stdout has gone; point stdout at devnull so that the flush at
    # interpreter exit does not raise again (Python docs, "Note on SIGPIPE").
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass  # stdout is not a real file (e.g. captured by a test runner)


def _show_library_log() -> None:
    """Show the library's INFO messages (what is compiling and why) on stderr, once."""
    import logging

    log = logging.getLogger("cladewise")
    if not any(getattr(h, "_cladewise_cli", False) for h in log.handlers):
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("cladewise: %(message)s"))
        handler._cladewise_cli = True  # type: ignore[attr-defined]
        log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    # PyTensor warns at import that no BLAS is linked; sampling runs through numba
    # (nutpie), so the warning only confuses users of the command line.
    warnings.filterwarnings("ignore", message=".*BLAS.*")
    warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz")
    command = None
    argv = list(sys.argv[1:] if argv is None else argv)
    try:
        parser = _parser()
        try:
            args = parser.parse_args(argv)
        except SystemExit as exc:  # --help, --version, usage errors
            sys.stdout.flush()
            return int(exc.code or 0) if not isinstance(exc.code, str) else 2
        command = getattr(args, "command", None)
        if not command:
            parser.print_help(sys.stderr)
            return 2
        args.command_line = command_line(argv)  # recorded beside results
        _show_library_log()
        try:
            status = int(args._run(args))
        except (InputError, FitError) as exc:
            _say(str(exc))
            status = 2
        sys.stdout.flush()  # inside the try, so a closed pipe is seen here
        return status
    except KeyboardInterrupt as exc:
        _interrupted(command, exc)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        _silence_stdout()
        return EXIT_BROKEN_PIPE


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
