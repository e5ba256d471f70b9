"""The root of every error a user can cause and act on (bad input, a missing file, a refused model)."""

from __future__ import annotations

__all__ = ["TrainkitError", "TrainkitNote"]


class TrainkitError(ValueError):
    """Something the user gave or asked for cannot be used; the message says what and why.

    Every error class of the kit that reports a user's mistake or a refused input derives
    from this one, and the message names the bad value and the valid choices. The command
    line prints such an error as one ``trainkit:`` line; any other exception is a bug in
    the kit and is shown with its traceback. It derives from ``ValueError`` so that code
    written against the older errors (``except ValueError``) keeps working.
    """


class TrainkitNote(UserWarning):
    """Something a user should hear about that is not an error (e.g. a workspace upgraded
    on open); raised with :func:`warnings.warn`, printed by the command line as one
    ``trainkit: note:`` line."""
