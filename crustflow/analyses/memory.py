"""Memory a command needs at the least, checked against the machine before any work starts.

Each estimate is a floor: the arrays a computation cannot do without however small it cuts its
work (one cell for the ensemble's fast path, one row for its fallback, one strip for a run). A run
whose floor exceeds the memory available is refused with one line naming the estimate, the limit
and the fix, instead of failing hours later with ``MemoryError`` or pushing the machine into swap.

To check a new analysis (for example a ``[fit]`` table's steps), write an estimate function
``scenario -> (bytes, what, fix) or None`` and add it to :data:`ESTIMATES`.
"""

from __future__ import annotations

import os
from collections.abc import Callable

from crustflow.errors import CrustflowInputError

__all__ = [
    "available_memory",
    "ensemble_floor",
    "fit_floor",
    "run_floor",
    "check_memory",
    "ESTIMATES",
]

#: Share of the available memory a command may plan to use (the rest for Python, GDAL caches and
#: other processes; common practice, no source).
USABLE_SHARE = 0.8

#: float64 arrays per cell alive at once in a run's strip, halo included (value derived from the
#: variables table and the engine's work arrays, rounded up generously).
RUN_ARRAYS_PER_CELL = 64

#: Rows of a strip at the least (the strip and its two halo rows).
MIN_STRIP_ROWS = 3


def available_memory() -> int | None:
    """Memory this process may still use, bytes: ``MemAvailable`` of ``/proc/meminfo`` (Linux),
    else free physical pages (``os.sysconf``), capped by ``RLIMIT_AS``; None when unknown."""
    found = None
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    found = int(line.split()[1]) * 1024
                    break
    except (OSError, ValueError, IndexError):
        pass
    if found is None:
        try:
            found = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
        except (ValueError, OSError, AttributeError):
            found = None
    try:
        import resource

        limit = resource.getrlimit(resource.RLIMIT_AS)[0]
        if limit != resource.RLIM_INFINITY:
            found = limit if found is None else min(found, limit)
    except (ImportError, OSError, ValueError):
        pass
    return found


def _grid_width(scenario) -> int:
    import rasterio

    try:
        with rasterio.open(scenario.topography) as src:
            return int(src.width)
    except (rasterio.errors.RasterioError, OSError):
        return 1  # the run itself reports the unreadable file


def run_floor(scenario) -> tuple[int, str, str]:
    """The least a strip-wise run needs: one strip of :data:`MIN_STRIP_ROWS` rows."""
    width = _grid_width(scenario)
    need = 8 * RUN_ARRAYS_PER_CELL * MIN_STRIP_ROWS * width
    return need, f"a grid {width} cells wide", "use a narrower grid (crop or coarsen it)"


def ensemble_floor(scenario) -> tuple[int, str, str] | None:
    """The least the ``[ensemble]`` needs: member-by-cell work arrays for one cell (fast path)
    or one row (fallback), plus the sampled parameters (array and table), 8 bytes each."""
    spec = getattr(scenario, "ensemble", None)
    if spec is None:
        return None
    # Imported here: a plain run checks its memory too and need not load the ensemble's modules
    # (their budget tables and figures import geopandas and matplotlib).
    from crustflow.analyses.ensemble.fast import fast_path_obstacle
    from crustflow.analyses.ensemble.run import FAST_ARRAYS, FULL_ARRAYS

    members = spec.members
    samples = 8 * members * (3 * max(len(spec.vary), 1) + 4)
    if fast_path_obstacle(scenario, spec) is None:
        work = 8 * members * max(FAST_ARRAYS, FULL_ARRAYS)
    else:
        work = 8 * members * (len(spec.variables) + 3) * _grid_width(scenario)
    return samples + work, f"{members} ensemble members", "use fewer [ensemble] members"


def _run_estimate(scenario):
    return run_floor(scenario)


def fit_floor(scenario) -> tuple[int, str, str] | None:
    """The least a ``[fit]`` needs: the sampler keeps every step of every walker (parameters and
    log-probability, 8 bytes each) until thinning, and the posterior table holds the kept samples
    with their derived quantities (about three columns per parameter)."""
    spec = getattr(scenario, "fit", None)
    if spec is None:
        return None
    s = spec.sampler
    dims = max(len(spec.parameters), 1)
    chain = 8 * s.walkers * s.steps * (dims + 1)
    kept = 8 * s.walkers * max(s.steps - s.burn_in, 0) // max(s.thin, 1) * 3 * dims
    what = f"{s.walkers} walkers x {s.steps} steps"
    return chain + kept, what, "use fewer [fit.sampler] steps or walkers, or a larger thin"


#: Estimates checked by :func:`check_memory`: ``scenario -> (bytes, what, fix) or None``.
ESTIMATES: list[Callable] = [_run_estimate, ensemble_floor, fit_floor]


def _size(nbytes: float) -> str:
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if nbytes < 1024 or unit == "PiB":
            return f"{nbytes:.3g} {unit}" if unit != "bytes" else f"{int(nbytes)} bytes"
        nbytes /= 1024
    return f"{nbytes:.3g} PiB"  # pragma: no cover


def check_memory(scenario, available: int | None = None) -> None:
    """Refuse a scenario whose least memory need exceeds what the machine has.

    Parameters
    ----------
    scenario : Scenario
    available : int, optional
        Bytes available (default :func:`available_memory`; no check when unknown).

    Raises
    ------
    CrustflowInputError
        Naming what needs the memory, the estimate, the limit and the fix.
    """
    available = available_memory() if available is None else available
    if available is None:
        return
    limit = USABLE_SHARE * available
    for estimate in ESTIMATES:
        found = estimate(scenario)
        if found is None:
            continue
        need, what, fix = found
        if need > limit:
            raise CrustflowInputError(
                f"{what} need at least {_size(need)} of memory, more than the "
                f"{_size(limit)} this machine has available ({USABLE_SHARE:.0%} of "
                f"{_size(available)}); {fix}"
            )
