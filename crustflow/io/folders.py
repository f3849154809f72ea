"""Output folders: written atomically beside the destination, with a run manifest.

Everything is written into a temporary folder beside the destination and moved into place at the end,
so a failed run leaves no half-written output. Inputs are never opened for writing.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path

from crustflow.errors import CrustflowInputError
from crustflow.io.grids import file_checksum

__all__ = [
    "MANIFEST",
    "package_versions",
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


#: Marker file that says a folder is a crustflow output folder (safe to replace).
MANIFEST = "run.json"


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


def check_out_dir(out: Path, inputs: list[Path]) -> None:
    """Refuse output folders that hold inputs or that are not crustflow output folders."""
    out = out.resolve()
    for path in inputs:
        path = Path(path).resolve()
        if out == path or out in path.parents:
            raise CrustflowInputError(
                f"output folder {out} holds the input {path.name}; choose another "
                "--out folder (inputs are never overwritten)"
            )
    if out.exists():
        if not out.is_dir():
            raise CrustflowInputError(f"--out {out} is a file; name a folder")
        if any(out.iterdir()) and not (out / MANIFEST).is_file():
            raise CrustflowInputError(
                f"--out folder {out} is not empty and holds no crustflow run; "
                "choose an empty or new folder"
            )


@contextmanager
def atomic_folder(out: str | Path, inputs=()) -> Iterator[Path]:
    """A temporary folder beside ``out`` that replaces ``out`` only if the block succeeds.

    Parameters
    ----------
    out : path
        The final output folder. An earlier crustflow run there is replaced as a whole.
    inputs : sequence of path
        Input files, which must not lie inside ``out``.

    Yields
    ------
    Path
        The temporary folder to write into. On any error it is removed and ``out`` is untouched.
    """
    out = Path(out).expanduser().resolve()
    check_out_dir(out, list(inputs))
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        yield tmp
        old = None
        if out.exists():
            old = out.parent / f".{out.name}.old-{os.getpid()}"
            out.rename(old)
        tmp.rename(out)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_manifest(folder: Path, manifest: dict, written: list[str]) -> None:
    """Write ``run.json`` listing the outputs."""
    manifest = dict(manifest, outputs=list(written) + [MANIFEST])
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
