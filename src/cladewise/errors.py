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
