"""Reading a scenario file's TOML safely: size, nesting depth, byte-order mark, encoding.

Every failure is a :class:`~crustflow.errors.CrustflowInputError` with one line naming the file
and the fix.
"""

from __future__ import annotations

import codecs
import tomllib
from pathlib import Path

from crustflow.errors import CrustflowInputError

__all__ = ["read_toml", "MAX_DEPTH", "MAX_BYTES"]

#: Deepest nesting of tables and arrays a scenario may use, counting the file itself as 1. The
#: deepest legitimate one is a roof layer's grid, ``[[load.roof.layers]] thickness = {grid, units}``
#: (5); the rest is margin (common practice, no source).
MAX_DEPTH = 8

#: Largest scenario file read (bytes); scenario files are a few kilobytes.
MAX_BYTES = 1024 * 1024


def _depth(value, limit: int) -> int:
    """Nesting depth of tables and arrays in ``value``, counted up to ``limit + 1`` only."""
    if limit < 0 or not isinstance(value, dict | list):
        return 0
    items = value.values() if isinstance(value, dict) else value
    return 1 + max((_depth(v, limit - 1) for v in items), default=0)


def read_toml(path: Path) -> dict:
    """Read a scenario file (TOML) into a dict.

    A UTF-8 byte-order mark at the start (written by some Windows editors) is accepted and skipped;
    files larger than :data:`MAX_BYTES` or nested deeper than :data:`MAX_DEPTH` are refused.

    Raises
    ------
    CrustflowInputError
        Unreadable file, not UTF-8, TOML syntax errors, too large or too deeply nested.
    """
    try:
        size = path.stat().st_size
        if size > MAX_BYTES:
            raise CrustflowInputError(
                f"scenario file {path} is {size} bytes, larger than a scenario file can be "
                f"({MAX_BYTES} bytes); name the scenario's TOML file"
            )
        data = path.read_bytes()
    except OSError as exc:
        raise CrustflowInputError(f"cannot read scenario file {path} ({exc})") from None
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8) :]
    try:
        raw = tomllib.loads(data.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise CrustflowInputError(
            f"scenario file {path} is not UTF-8 text (byte {exc.start}); save it as UTF-8"
        ) from None
    except tomllib.TOMLDecodeError as exc:
        raise CrustflowInputError(
            f"scenario file {path} is not valid TOML ({exc}); fix the syntax"
        ) from None
    except RecursionError:
        raise CrustflowInputError(
            f"scenario file {path} nests tables or arrays too deeply to read; a scenario needs "
            f"at most {MAX_DEPTH} levels"
        ) from None
    if _depth(raw, MAX_DEPTH) > MAX_DEPTH:
        raise CrustflowInputError(
            f"scenario file {path} nests tables or arrays deeper than {MAX_DEPTH} levels; a "
            "scenario needs at most a few (see the README)"
        )
    return raw
