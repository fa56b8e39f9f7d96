"""The command line: a table of subcommands, thin over the library."""

from cladewise.cli.main import main

__all__ = ["main"]
