"""Step messages for long jobs: shown on a terminal, silent in pipes and logs."""

from __future__ import annotations

import sys
import time
from typing import TextIO

__all__ = ["Progress"]


class Progress:
    """Print ``label i/n: message`` lines to stderr while a job runs.

    Messages appear only when the stream is a terminal (or ``enabled=True``), so
    scripts, tests and log files stay quiet.

    Parameters
    ----------
    total : int
        Number of steps expected (used for the ``i/n`` counter).
    label : str
        What is being done, e.g. ``"writing figures"``.
    stream : file-like, optional
        Where to print (default ``sys.stderr``).
    enabled : bool, optional
        Force on or off; by default on when ``stream`` is a terminal.
    """

    def __init__(self, total: int, label: str, stream: TextIO | None = None,
                 enabled: bool | None = None) -> None:
        self.total = max(int(total), 1)
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty and isatty())
        self.enabled = enabled
        self.count = 0
        self._t0 = time.perf_counter()

    def step(self, message: str) -> None:
        """Count one step and show it."""
        self.count += 1
        if self.enabled:
            print(f"{self.label} {self.count}/{self.total}: {message} ...", file=self.stream, flush=True)

    def done(self, message: str = "done") -> None:
        """Show the end of the job with the time it took."""
        if self.enabled:
            dt = time.perf_counter() - self._t0
            print(f"{self.label}: {message} ({dt:.1f} s)", file=self.stream, flush=True)
