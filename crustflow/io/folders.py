"""Output folders: written atomically beside the destination, with a run manifest.

Everything is written into a temporary folder beside the destination and moved into place at the end,
so a failed run leaves no half-written output. Inputs are never opened for writing.
"""

from __future__ import annotations

import errno
import glob
import json
import os
import platform
import shutil
import socket
import stat
import sys
import tempfile
import warnings
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path

from crustflow.errors import CrustflowError, CrustflowInputError, CrustflowWriteError
from crustflow.io.grids import file_checksum

try:
    import resource
except ImportError:  # pragma: no cover - not on Windows
    resource = None

__all__ = [
    "MANIFEST",
    "OWNER_KEY",
    "PARTIAL_MARKER",
    "package_versions",
    "protected_inputs",
    "foreign_entries",
    "stale_partials",
    "write_failure",
    "check_out_dir",
    "atomic_folder",
    "write_manifest",
    "base_manifest",
]


#: Packages whose versions go into the run manifest.
_PACKAGES = (
    "crustflow",
    "numpy",
    "scipy",
    "xarray",
    "rioxarray",
    "rasterio",
    "pyproj",
    "dask",
    "matplotlib",
    "pint",
    "netCDF4",
    "geopandas",
)


#: The run manifest; with the ownership marker below it says a folder is a crustflow output folder.
MANIFEST = "run.json"

#: Manifest key of crustflow's ownership marker: ``{"format": 1, "files": {name: entry}}``.
OWNER_KEY = "crustflow_output"

#: Version of the ownership listing's layout.
OWNER_FORMAT = 1

#: Marker file written first into a partial folder (pid, host, start time of the run).
PARTIAL_MARKER = ".crustflow-partial.json"

#: Free bytes (or bytes below the file-size limit) under which a failed write is put down to a
#: full disk or the limit (common practice, no source: a few file-system blocks).
_DISK_SLACK = 64 * 1024

#: Files up to this size (bytes) are listed with their SHA-256, larger ones by size only
#: (common practice, no source: checksums of multi-GB grids would cost more than the check is worth).
CHECKSUM_LIMIT = 16 * 1024 * 1024


def package_versions() -> dict[str, str]:
    """Versions of Python, GDAL and the packages crustflow relies on."""
    out = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    try:
        import rasterio

        out["GDAL"] = rasterio.__gdal_version__
    except ImportError:  # pragma: no cover - rasterio is a dependency
        pass
    return out


def protected_inputs(scenario, *extra) -> list[Path]:
    """Every file a command reads and must never delete: the scenario's inputs, the scenario file
    itself and ``extra`` (for example the earlier run a budget reuses)."""
    paths = list(scenario.input_paths)
    if getattr(scenario, "source", None) is not None:
        paths.append(Path(scenario.source))
    return paths + [Path(p) for p in extra if p is not None]


def _entry(path: Path) -> dict:
    """Kind, size and (for small files) SHA-256 of one entry of an output folder."""
    info = path.lstat()
    if stat.S_ISDIR(info.st_mode):
        return {"kind": "folder"}
    if not stat.S_ISREG(info.st_mode):
        return {"kind": "other"}
    entry = {"kind": "file", "size": info.st_size}
    if info.st_size <= CHECKSUM_LIMIT:
        entry["sha256"] = file_checksum(path)
    return entry


def _walk(folder: Path) -> dict[str, Path]:
    """Every entry under ``folder`` (relative POSIX name -> path), hidden ones included, without
    following symbolic links."""
    found = {}
    for root, dirs, files in os.walk(folder, followlinks=False):
        for name in dirs + files:
            path = Path(root) / name
            found[path.relative_to(folder).as_posix()] = path
    return found


def output_listing(folder: Path) -> dict[str, dict]:
    """The ownership listing of a finished output folder: every entry with its kind and size."""
    skip = {MANIFEST, PARTIAL_MARKER}
    return {
        name: _entry(path) for name, path in sorted(_walk(Path(folder)).items()) if name not in skip
    }


def _owned_listing(out: Path) -> dict[str, dict] | None:
    """The ownership listing in ``out``'s manifest (name -> kind, size, checksum), or None when the
    manifest is missing, unreadable or carries no crustflow marker of this format."""
    try:
        manifest = json.loads((out / MANIFEST).read_text())
        listing = manifest[OWNER_KEY]["files"]
        if manifest[OWNER_KEY]["format"] != OWNER_FORMAT or not isinstance(listing, dict):
            return None
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return listing


def foreign_entries(out: Path) -> list[str]:
    """Entries of the folder ``out`` that crustflow cannot prove it wrote (sorted names).

    Everything counts as foreign unless ``out/run.json`` carries crustflow's ownership marker and
    every entry in ``out`` is listed there with the same kind and size (and checksum, for files up
    to :data:`CHECKSUM_LIMIT` bytes).
    """
    listing = _owned_listing(out)
    if listing is None:  # nothing is provably ours: the top level is enough to say so
        return sorted(entry.name for entry in os.scandir(out))
    foreign, seen = [], set()
    for root, dirs, files in os.walk(out, followlinks=False):
        for name in list(dirs) + files:
            path = Path(root) / name
            rel = path.relative_to(out).as_posix()
            if rel == MANIFEST:
                continue
            seen.add(rel)
            expected = listing.get(rel)
            if expected is None:
                foreign.append(rel)
                if name in dirs:
                    dirs.remove(name)  # a foreign folder: do not walk the user's tree
                continue
            actual = _entry(path)
            if isinstance(expected, dict) and "sha256" not in expected:
                actual.pop("sha256", None)
            if actual != expected:
                foreign.append(rel)
                if name in dirs:
                    dirs.remove(name)  # a foreign folder: do not walk the user's tree
    foreign += [f"{name} (missing)" for name in listing if name not in seen]
    return sorted(foreign)


def _name_list(names: list[str], limit: int = 3) -> str:
    shown = ", ".join(n if n.isprintable() else repr(n) for n in names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")


def check_out_dir(out: Path, inputs: list[Path]) -> None:
    """Refuse an output folder unless crustflow may write there.

    ``out`` may be new, an empty folder, or a folder crustflow provably wrote (see
    :func:`foreign_entries`). It may not be or hold an input, or lie under a file.

    Raises
    ------
    CrustflowInputError
        Naming the input or the foreign files and the fix.
    """
    out = Path(out).expanduser().resolve()
    for path in inputs:
        path = Path(path).expanduser().resolve()
        if out == path or out in path.parents:
            raise CrustflowInputError(
                f"output folder {out} holds the input {path}; choose another --out folder "
                "(inputs are never overwritten or deleted)"
            )
    for parent in (out, *out.parents):
        if parent.exists() or parent.is_symlink():
            if not parent.is_dir():
                raise CrustflowInputError(
                    f"--out {out}: {parent} is a file, not a folder; choose another --out folder"
                )
            break
    if out.is_dir():
        foreign = foreign_entries(out)
        if foreign:
            raise CrustflowInputError(
                f"--out folder {out} holds files crustflow did not write (or that changed since): "
                f"{_name_list(foreign)}; choose a new or empty --out folder, or move those files"
            )


def _partial_alive(marker: dict) -> bool:
    """Is the run that wrote a partial-folder marker possibly still running?"""
    if marker.get("host") != socket.gethostname():
        return True  # another machine's run: cannot tell, so leave it alone
    try:
        os.kill(int(marker["pid"]), 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError, ValueError, TypeError, KeyError):
        return True
    return True


def stale_partials(out: Path) -> list[Path]:
    """Partial folders of killed runs into ``out``: ``.NAME.partial-*`` beside it that carry
    crustflow's partial marker naming a process on this host that no longer runs."""
    out = Path(out).expanduser().resolve()
    stale = []
    if not out.parent.is_dir():
        return stale
    for path in out.parent.glob(f".{glob.escape(out.name)}.partial-*"):
        if path.is_symlink() or not path.is_dir():
            continue
        try:
            marker = json.loads((path / PARTIAL_MARKER).read_text())
        except (OSError, ValueError):
            continue  # no marker: not provably ours
        if isinstance(marker, dict) and marker.get(OWNER_KEY) and not _partial_alive(marker):
            stale.append(path)
    return stale


def _make_parents(folder: Path) -> list[Path]:
    """Create ``folder`` and its missing parents; return those created (deepest last)."""
    missing = [p for p in (folder, *folder.parents) if not p.exists()][::-1]
    created = []
    try:
        for path in missing:
            path.mkdir()
            created.append(path)
    except OSError as exc:
        _remove_created(created)
        raise _write_error(exc, folder) from None
    return created


def _remove_created(created: list[Path]) -> None:
    """Remove the (empty) parent folders this run created, deepest first."""
    for path in reversed(created):
        try:
            path.rmdir()
        except OSError:
            break  # something else is in there now: leave it and its parents


def _write_error(exc: OSError, out: Path) -> Exception:
    """A one-line error for a failed write: unwritable place, full disk or file-size limit."""
    if isinstance(exc, PermissionError) or exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        return CrustflowInputError(
            f"cannot write to {out} ({exc.strerror or exc.__class__.__name__}); "
            "choose another --out folder"
        )
    if exc.errno == errno.ENOSPC:
        return CrustflowWriteError(
            f"no space left on the device while writing {out}; free space or choose another "
            "--out folder (nothing was written)"
        )
    if exc.errno == errno.EFBIG:
        return CrustflowWriteError(
            f"file size limit reached while writing {out}; raise the limit (ulimit -f) or "
            "write fewer variables (nothing was written)"
        )
    if exc.errno == errno.EDQUOT:
        return CrustflowWriteError(
            f"disk quota exceeded while writing {out}; free space or choose another --out "
            "folder (nothing was written)"
        )
    return exc


def write_failure(exc: BaseException, out: Path) -> BaseException:
    """Turn an error raised while writing into ``out`` into a clear one where it is about the
    disk (no space, size limit, quota, permissions); other errors are returned unchanged."""
    if isinstance(exc, OSError) and exc.errno is not None:
        return _write_error(exc, out)
    text = str(exc)
    if isinstance(exc, RuntimeError | OSError) and "HDF error" in text:
        # netCDF4 reports a full disk or a size limit only as "NetCDF: HDF error"
        return CrustflowWriteError(
            f"writing a NetCDF file in {out} failed (NetCDF: HDF error), most likely no space "
            "left on the device or a file size limit reached; free space or choose another "
            "--out folder (nothing was written)"
        )
    lowered = text.lower()
    if "no space left" in lowered:
        return _write_error(OSError(errno.ENOSPC, "No space left on device"), out)
    if "file too large" in lowered or "file size limit" in lowered:
        return _write_error(OSError(errno.EFBIG, "File too large"), out)
    return exc


def _disk_trouble(tmp: Path, out: Path) -> Exception | None:
    """A full disk or a file that reached the process's file-size limit (RLIMIT_FSIZE) in ``tmp``,
    as a one-line error; None when neither is the case."""
    try:
        sizes = [p.lstat().st_size for p in _walk(tmp).values() if p.is_file()]
        if resource is not None:
            limit = resource.getrlimit(resource.RLIMIT_FSIZE)[0]
            if limit != resource.RLIM_INFINITY and max(sizes, default=0) >= limit - _DISK_SLACK:
                return _write_error(OSError(errno.EFBIG, "File too large"), out)
        disk = os.statvfs(tmp)
        if disk.f_bavail * disk.f_frsize < _DISK_SLACK:
            return _write_error(OSError(errno.ENOSPC, "No space left on device"), out)
    except (OSError, AttributeError):
        return None
    return None


def _start_partial(out: Path) -> Path:
    """Make the partial folder beside ``out`` and write crustflow's marker into it first."""
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    except OSError as exc:
        raise _write_error(exc, out) from None
    marker = {
        OWNER_KEY: OWNER_FORMAT,
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "started": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    try:
        (tmp / PARTIAL_MARKER).write_text(json.dumps(marker) + "\n")
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise _write_error(exc, out) from None
    return tmp


def _remove_listed(old: Path, listing: dict[str, dict]) -> None:
    """Remove from ``old`` only the entries its manifest lists (and the manifest), then the
    folder itself if nothing else is left; warn about anything kept."""
    for name in sorted(listing, key=lambda n: n.count("/"), reverse=True):
        path = old / name
        kind = listing[name].get("kind")
        try:
            if kind == "file" and path.is_file() and not path.is_symlink():
                path.unlink()
            elif kind == "folder" and path.is_dir() and not path.is_symlink():
                path.rmdir()
        except OSError:
            pass  # not empty (something foreign inside) or gone: keep it
    with suppress(OSError):
        (old / MANIFEST).unlink()
    try:
        old.rmdir()
    except OSError:
        left = sorted(_walk(old))
        warnings.warn(
            f"the earlier output folder had files crustflow did not write ({_name_list(left)}); "
            f"they were kept in {old}",
            stacklevel=3,
        )


def _replace(tmp: Path, out: Path) -> None:
    """Move ``tmp`` into place as ``out``; an earlier crustflow folder there is set aside and only
    the files its manifest lists are removed."""
    listing = None
    if out.is_dir():
        foreign = foreign_entries(out)
        if foreign:
            raise CrustflowInputError(
                f"--out folder {out} changed during the run and now holds files crustflow did not "
                f"write: {_name_list(foreign)}; move them, or choose another --out folder"
            )
        listing = _owned_listing(out) or {}
    (tmp / PARTIAL_MARKER).unlink(missing_ok=True)
    if listing is None:
        tmp.rename(out)
        return
    old = out.parent / f".{out.name}.old-{os.getpid()}"
    out.rename(old)
    tmp.rename(out)
    _remove_listed(old, listing)


@contextmanager
def atomic_folder(out: str | Path, inputs=()) -> Iterator[Path]:
    """A temporary folder beside ``out`` that replaces ``out`` only if the block succeeds.

    Parameters
    ----------
    out : path
        The final output folder: new, empty, or an earlier crustflow output folder (which is replaced;
        only the files its manifest lists are removed). Anything else is refused.
    inputs : sequence of path
        Every file the command reads (see :func:`protected_inputs`); none may lie inside ``out``.

    Yields
    ------
    Path
        The temporary folder to write into. On any error or interruption it is removed, and so are
        parent folders of ``out`` this call created; ``out`` is untouched.

    Notes
    -----
    The partial folder ``.NAME.partial-XXXX`` carries a marker (pid, host, start time) written
    first; a later run into the same place removes such folders whose process is gone.
    Errors from a full disk or a file-size limit are re-raised as :class:`CrustflowWriteError`.
    """
    out = Path(out).expanduser().resolve()
    check_out_dir(out, list(inputs))
    for stale in stale_partials(out):
        shutil.rmtree(stale, ignore_errors=True)
    created = _make_parents(out.parent)
    try:
        tmp = _start_partial(out)
    except BaseException:
        _remove_created(created)
        raise
    try:
        yield tmp
        trouble = _disk_trouble(tmp, out)  # some writers (libtiff) drop failed writes silently
        if trouble is not None:
            raise trouble
        _replace(tmp, out)
    except BaseException as exc:
        clear = exc
        if isinstance(exc, Exception) and not isinstance(exc, CrustflowError):
            clear = _disk_trouble(tmp, out) or write_failure(exc, out)
        shutil.rmtree(tmp, ignore_errors=True)
        _remove_created(created)
        if clear is not exc:
            raise clear from None
        raise


def write_manifest(folder: Path, manifest: dict, written: list[str]) -> None:
    """Write ``run.json``: the outputs, and crustflow's ownership marker with the listing of every
    entry in ``folder`` (kind, size, checksum of small files), so that a later run may replace it."""
    manifest = dict(manifest, outputs=list(written) + [MANIFEST])
    manifest[OWNER_KEY] = {"format": OWNER_FORMAT, "files": output_listing(folder)}
    (Path(folder) / MANIFEST).write_text(json.dumps(manifest, indent=2, default=str) + "\n")


def base_manifest(scenario, timings: dict, provenance: dict | None = None) -> dict:
    """The run manifest: scenario as written and resolved, versions, checksums, timings."""

    return {
        "crustflow_run": "channel-flow fields",
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "command": " ".join(Path(sys.argv[0]).name.split() + sys.argv[1:]),
        "scenario_file": str(scenario.source) if scenario.source else None,
        "scenario_as_written": scenario.written,
        "scenario_resolved_SI": scenario.resolved(),
        "inputs": {str(p): {"sha256": file_checksum(p)} for p in scenario.input_paths},
        "alignment": provenance or {},
        "versions": package_versions(),
        "stage_seconds": {k: round(v, 4) for k, v in timings.items()},
        "units_note": "rates use the Julian year, 1 yr = 365.25 d",
    }
