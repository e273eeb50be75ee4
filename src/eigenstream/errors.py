"""Exception and warning types raised by eigenstream.

Every user-facing failure is one of these, with a one-line message that names the
file, row, column, key or option involved and says what to do. The CLI maps them to
exit codes (see README, "Exit codes").
"""

from __future__ import annotations


class EigenstreamError(Exception):
    """Base class of every error eigenstream raises on purpose."""

    exit_code = 1


class ConfigError(EigenstreamError, ValueError):
    """A configuration key, value or command-line option is wrong."""

    exit_code = 2


class InputError(EigenstreamError, ValueError):
    """The input table cannot be read or holds values that cannot be embedded."""

    exit_code = 3


class CheckpointError(EigenstreamError, OSError):
    """The work directory is missing, locked, unwritable or damaged."""

    exit_code = 4


class NotConverged(EigenstreamError, RuntimeError):
    """The eigensolver stopped before reaching the requested residual.

    Parameters
    ----------
    message : str
        What happened and what to change.
    eigenvalues, eigenvectors : ndarray or None
        The best approximations found so far.
    """

    exit_code = 5

    def __init__(self, message: str, eigenvalues=None, eigenvectors=None):
        super().__init__(message)
        self.eigenvalues = eigenvalues
        self.eigenvectors = eigenvectors


class EigenstreamWarning(UserWarning):
    """A result was produced but something about it deserves attention."""
