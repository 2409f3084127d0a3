"""The exception tree of ibprep.

Every error the library raises on purpose derives from :class:`IbprepError`.
Bad user input (a file, a value, a case-file key) is an :class:`InputError`,
which is also a :class:`ValueError`, so generic callers can catch it either way.
Messages say what was expected, what was received and what to do; the library
never prints or exits (only the command line does).
"""

from __future__ import annotations

__all__ = ["IbprepError", "InputError", "MissingDependencyError", "IbprepWarning"]


class IbprepError(Exception):
    """Root of every error raised on purpose by ibprep."""


class InputError(IbprepError, ValueError):
    """Bad user input: a file, a value or a case-file key.

    The message names the offending item and says how to fix it. The command
    line maps this error to exit code 2.
    """


class MissingDependencyError(IbprepError, ImportError):
    """An optional dependency needed by the requested feature is not installed.

    The message names the package (or extra) to install.
    """


class IbprepWarning(UserWarning):
    """Something the caller should know that is not an error (e.g. a body lies wholly outside the grid).

    Raised through :func:`warnings.warn`; the command line turns these into report
    notes, tests can turn them into errors.
    """
