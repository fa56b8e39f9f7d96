"""What every subcommand module shares: the :class:`Command` record."""

from __future__ import annotations

import argparse
import shlex
from dataclasses import dataclass
from typing import Callable, Sequence

__all__ = ["Command", "command_line"]


@dataclass(frozen=True)
class Command:
    """One subcommand: its name, one-line help, argument setup and action.

    ``run`` returns the exit status (0 for success).
    """

    name: str
    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


def command_line(argv: Sequence[str]) -> str:
    """The command as typed (``argv`` without the program name), for the record kept beside a result."""
    return "cladewise " + " ".join(shlex.quote(a) for a in argv)
