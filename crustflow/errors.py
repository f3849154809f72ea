"""Exceptions raised by crustflow.

Every problem with a user's input is a :class:`CrustflowInputError`: its message is one line that names
the input, says what was expected and how to fix it. The command line turns it into exit status 2.
"""

from __future__ import annotations

__all__ = ["CrustflowError", "CrustflowInputError"]


class CrustflowError(Exception):
    """Base class of every error crustflow raises on purpose."""


class CrustflowInputError(CrustflowError, ValueError):
    """Bad input (scenario file, grid, parameter): the message says what to change."""
