"""Exceptions raised for problems the user can fix.

The command line catches :class:`InputError` and prints its message without a
traceback; anything else is a bug in cladewise and is shown in full.
"""

from __future__ import annotations


class InputError(ValueError):
    """A problem with the user's files, spec or arguments.

    The message must say what is wrong and how to fix it.
    """


class FitError(RuntimeError):
    """A model could not be built or sampled for a reason the user can act on."""


class FitInterrupted(KeyboardInterrupt):
    """Sampling was stopped (Ctrl-C) before it finished.

    A ``KeyboardInterrupt``, so it ends a program like Ctrl-C does. ``partial`` holds
    the draws made so far (an ``arviz.InferenceData`` or ``None``); they are never
    saved as a complete fit. ``saved`` is the folder where they were saved, marked
    partial, when the caller asked for that.
    """

    def __init__(self, message: str = "interrupted: sampling stopped before it finished; nothing was saved",
                 partial: object = None, saved: object = None) -> None:
        super().__init__(message)
        self.partial = partial
        self.saved = saved

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else "interrupted"
