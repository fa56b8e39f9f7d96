"""The command line: one module per subcommand and an explicit table of them (:mod:`cladewise.cli.main`)."""

from cladewise.cli.main import main

__all__ = ["main"]
