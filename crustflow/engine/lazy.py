"""Lazy, dask-backed fields: the command's strip kernel as the tasks of a dask graph.

Each strip of rows is one task: it reads (or takes) its rows with two halo rows, computes them with
the engine's one code path (:func:`crustflow.engine.strips.compute_strip` for scenario files,
:func:`crustflow.engine.blocks.block_fields` for arrays) and returns only the variables asked for,
float32 in their practical units, exactly as the command writes them. The strips' arrays are
concatenated with :func:`dask.array.concatenate`; nothing is computed until the user asks
(``.compute()``, ``.to_zarr()``, ``.to_netcdf()``), and a ``dask.distributed`` client runs the tasks
on its workers like any dask graph.
"""

from __future__ import annotations

import dask
import dask.array as dsa
import numpy as np

from crustflow.engine.blocks import HALO_ROWS, Block, checked_block_fields
from crustflow.engine.checks import InputChecks
from crustflow.engine.strips import compute_strip
from crustflow.geometry.grid import grid_geometry
from crustflow.variables import to_practical

__all__ = ["rows_for_chunks", "lazy_scenario_fields", "lazy_array_fields"]

#: Output dtype of the lazy fields (as in fields.nc and the GeoTIFFs).
DTYPE = np.float32


def rows_for_chunks(chunks, width: int) -> int:
    """Rows per strip: ``chunks`` is cells per side (an int: strips of about chunks x chunks cells,
    as ``--chunk-size``) or a dict ``{"y": rows}``."""
    if isinstance(chunks, dict):
        return max(1, int(chunks.get("y", chunks.get("rows", 1))))
    return max(1, int(chunks) * int(chunks) // max(width, 1))


def _raise_on_failed(state: dict, channel_thickness) -> None:
    """Raise the error of a strip whose own checks failed (channel too thick, bad cell values,
    roof below the channel top)."""
    checks = InputChecks({}, channel_thickness)
    checks.merge(dict(state, grid={}))
    checks.cells.finish()
    checks.column.finish()
    checks.thin.finish()


def _scenario_strip(scenario, r0, r1, names, whole):
    result = compute_strip(scenario, r0, r1, set(names), whole)
    if result["out"] is None or result["checks"]["roof"]:
        _raise_on_failed(result["checks"], scenario.parameters.channel_thickness)
    return tuple(result["out"][n] for n in names)


def _concatenated(tasks, starts, rows, height, width, names) -> dict:
    columns = {n: [] for n in names}
    for task, r0 in zip(tasks, starts, strict=True):
        shape = (min(height, r0 + rows) - r0, width)
        for i, n in enumerate(names):
            columns[n].append(dsa.from_delayed(task[i], shape=shape, dtype=DTYPE))
    return {n: dsa.concatenate(parts, axis=0) for n, parts in columns.items()}


def lazy_scenario_fields(scenario, names, *, rows: int, height: int, width: int, whole) -> dict:
    """Dask arrays of ``names`` for a scenario's files, strip by strip (the command's kernel)."""
    starts = list(range(0, height, rows))
    task = dask.delayed(_scenario_strip, pure=False, nout=len(names))
    tasks = []
    for r0 in starts:
        r1 = min(height, r0 + rows)
        part = whole.part(max(0, r0 - HALO_ROWS), min(height, r1 + HALO_ROWS))
        tasks.append(task(scenario, r0, r1, tuple(names), part))
    return _concatenated(tasks, starts, rows, height, width, names)


def _array_strip(arrays, cell, x, y, crs, spacing, r0, r1, first, setup, names, whole):
    """One strip of in-memory (or dask) rows through the engine's block kernel."""
    p, channel, load = setup
    geometry = grid_geometry(x, y, crs, spacing=spacing)
    block = Block(r0, r1, first, arrays, cell, geometry)
    si = checked_block_fields(block, p, channel=channel, load=load, wanted=set(names), whole=whole)
    return tuple(to_practical(n, si[n]).astype(DTYPE) for n in names)


def lazy_array_fields(grids: dict, cell: dict, setup, names, *, rows: int, crs, spacing, whole):
    """Dask arrays of ``names`` for prepared grids (``topography`` and optionally
    ``crust_thickness`` / ``moho_depth``, DataArrays on the same cells, north up; ``cell``: SI
    parameter grids) strip by strip."""
    topo = grids["topography"]
    height, width = topo.shape
    x, y = topo.x.values, topo.y.values
    starts = list(range(0, height, rows))
    task = dask.delayed(_array_strip, pure=False, nout=len(names))
    tasks = []
    for r0 in starts:
        r1 = min(height, r0 + rows)
        first, stop = max(0, r0 - HALO_ROWS), min(height, r1 + HALO_ROWS)
        arrays = {k: v.data[first:stop] for k, v in grids.items()}
        cells = {k: v.data[first:stop] for k, v in cell.items()}
        part = whole.part(first, stop)
        tasks.append(
            task(
                arrays,
                cells,
                x,
                y[first:stop],
                crs,
                spacing,
                r0,
                r1,
                first,
                setup,
                tuple(names),
                part,
            )
        )
    return _concatenated(tasks, starts, rows, height, width, names)
