"""Exceptions raised by crustflow.

Every problem with a user's input is a :class:`CrustflowInputError`: its message is one line that names
the input, says what was expected and how to fix it. The command line turns it into exit status 2.
"""

from __future__ import annotations

__all__ = ["CrustflowError", "CrustflowInputError", "CrustflowWriteError", "CrustflowInterrupt"]


class CrustflowError(Exception):
    """Base class of every error crustflow raises on purpose."""


class CrustflowInputError(CrustflowError, ValueError):
    """Bad input (scenario file, grid, parameter): the message says what to change."""


class CrustflowWriteError(CrustflowError, OSError):
    """Writing the outputs failed for a reason outside crustflow (full disk, file-size limit).

    The message is one line saying so; the command line exits with status 1 without asking for a
    bug report.
    """


class CrustflowInterrupt(KeyboardInterrupt):
    """A run ended by a signal (SIGTERM, SIGHUP); ``signum`` is the signal's number."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum
