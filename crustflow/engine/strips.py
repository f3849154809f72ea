"""Strip-wise runs: grids of any size in bounded memory, identical to the whole-grid computation.

The grid is processed in strips of rows. Each strip is read with two halo rows on each inner side
(one for the driving gradient, one more for the divergence of the flux), computed with the same
functions as :func:`crustflow.compute_fields`, cropped and written into every output file. Because
gradients and divergences take the grid spacing from the raster's transform and treat only the true
grid edges (and nodata) one-sidedly, the result is identical, bit for bit, to the whole-grid result.
Peak memory is set by the strip size, not the grid size.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np

from crustflow.engine.checks import CellInputCheck, ColumnCheck, GridChecks, ThinCrustCheck
from crustflow.engine.fields import CELL_EXTRAS, crust_thickness_of, fields_si, whole_grid_load
from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import grid_geometry
from crustflow.io.grids import close_sources, open_sources, provenance
from crustflow.variables import VARIABLES, to_practical, variable_attrs

__all__ = ["HALO_ROWS", "CELLS_PER_STRIP", "strip_rows_for", "run_strips"]

#: Halo rows on each inner side of a strip: 1 for the gradient of the load, 1 for the divergence.
HALO_ROWS = 2

#: Cells in one strip when only the load, flux and its divergence are computed (peak memory is
#: roughly 40 float64 arrays of this size); the full one-cell solution (peak speed, drag,
#: backflow) takes about four times as many arrays, so it gets a quarter of this.
CELLS_PER_STRIP = 1 << 19

#: Rows of one output GeoTIFF tile (crustflow.io.writers.GeotiffWriter writes 256 x 256 tiles).
TILE_ROWS = 256

#: Largest grid (cells) for the whole-grid steps: load filters and the thin-channel warning hold
#: about ten float64 copies of the grid (8 GB at this size on a 24 GB machine).
WHOLE_GRID_CELLS = 100_000_000

#: Variables the volume budgets and arrow layers read.
BUDGET_VARIABLES = (
    "flux_east",
    "flux_north",
    "flux_azimuth",
    "thickening_rate",
    "uplift_rate",
    "mean_velocity_east",
    "mean_velocity_north",
)

#: Largest side, in cells, of the decimated copy kept for the figure.
FIGURE_CELLS = 800


def strip_rows_for(width: int, cells: int = CELLS_PER_STRIP) -> int:
    """Rows per strip for a grid ``width`` cells wide: a multiple of the 256-row output tiles when
    that keeps a strip near ``cells`` cells, else a power of two (a tile fills over several strips)."""
    rows = max(1, cells // max(width, 1))
    if rows >= TILE_ROWS:
        return (rows // TILE_ROWS) * TILE_ROWS
    return 1 << (rows.bit_length() - 1)  # a power of two divides the tile: tiles fill exactly


def _gdal_cache_bytes(variables: int, width: int) -> int:
    """GDAL block cache big enough to hold one row of output tiles of every file, and 64 MB."""
    return max(64 << 20, int(1.5 * variables * width * TILE_ROWS * 4))


def run_strips(
    scenario,
    folder: str | Path,
    *,
    strip_rows: int | None = None,
    stage: Callable[[str], None] | None = None,
    progress: bool = False,
    budget_fields: str | Path | None = None,
    client=None,
) -> dict:
    """Compute a scenario strip by strip and write its NetCDF and GeoTIFF outputs into ``folder``.

    Parameters
    ----------
    scenario : Scenario
    folder : path
        An existing (temporary) folder; ``fields.nc`` and ``<variable>.tif`` are written into it,
        as the scenario's ``[output]`` asks.
    strip_rows : int, optional
        Rows per strip (default: from :data:`CELLS_PER_STRIP`).
    stage : callable, optional
        Called with a stage name as work starts.
    progress : bool
        Show a progress bar of rows done on stderr (for grids of more than a few strips).
    budget_fields : path, optional
        Also write the variables budgets need (:data:`BUDGET_VARIABLES`) into this NetCDF file,
        unless ``fields.nc`` already holds them; the result's ``budget_fields`` names the file
        to read them from.
    client : dask.distributed.Client, optional
        Compute the strips on the cluster's workers (each reads the input files by path, so a
        multi-machine cluster needs a shared filesystem); the results come back to this process,
        which alone writes the output files, in order (no file locks are needed). Results are
        identical to the serial run.

    Returns
    -------
    dict
        ``written`` (file names), ``provenance`` (grid alignment), ``ranges`` (min, max per
        summary variable), ``backflow_cells``, ``valid_cells``, ``figure`` (a small decimated
        ``xarray.Dataset`` of the flux for the map) and ``shape``.

    Raises
    ------
    CrustflowInputError
        Every check of :func:`crustflow.solve`; nothing in ``folder`` is then complete.
    """
    note = stage or (lambda name: None)
    folder = Path(folder)
    note("open grids")
    import rasterio

    names = list(scenario.variables or VARIABLES)
    cache = _gdal_cache_bytes(len(names) + len(BUDGET_VARIABLES), _width_of(scenario))
    with rasterio.Env(GDAL_CACHEMAX=cache):
        return _run_strips(
            scenario,
            folder,
            strip_rows=strip_rows,
            note=note,
            progress=progress,
            budget_fields=budget_fields,
            client=client,
            window=max(2, 2 * _workers(client)),
        )


def _width_of(scenario) -> int:
    """Width of the topography grid (a guess if it cannot be read: open_sources reports why)."""
    import rasterio

    try:
        with rasterio.open(scenario.topography) as src:
            return src.width
    except (rasterio.errors.RasterioError, OSError):
        return 4096


def _run_strips(
    scenario, folder: Path, *, strip_rows, note, progress, budget_fields, client=None, window=4
) -> dict:
    from crustflow.io.writers import GeotiffWriter, NetcdfWriter, netcdf_attrs

    sources = open_sources(scenario)
    writers: list = []
    writer = None
    try:
        topo = sources["topography"]
        p = scenario.parameters
        x, y = topo.coords()
        t = topo.transform
        height, width = topo.height, topo.width
        names = list(scenario.variables or VARIABLES)
        skipped = []
        if height * width > WHOLE_GRID_CELLS:
            # Whole-grid steps hold several float64 copies of the grid in memory.
            if scenario.load.filtered:
                raise CrustflowInputError(
                    f"[load] smoothing / elastic_thickness act on the whole grid, and this grid "
                    f"has {height * width:,} cells (more than {WHOLE_GRID_CELLS:,}); resample the "
                    "grids coarser for a filtered run, or remove the [load] filters"
                )
            if "thin_channel_warning" in names:
                if scenario.variables:
                    raise CrustflowInputError(
                        f"thin_channel_warning needs the whole grid in memory and this grid has "
                        f"{height * width:,} cells (more than {WHOLE_GRID_CELLS:,}); remove it "
                        "from [output] variables or resample the grids coarser"
                    )
                names.remove("thin_channel_warning")
                skipped.append("thin_channel_warning")
        figure_vars = ["flux_magnitude", "flux_east", "flux_north"]
        make_figure = "figure" in scenario.formats
        wanted = set(names) | set(figure_vars if make_figure else [])
        side = None
        if budget_fields is not None:
            wanted |= set(BUDGET_VARIABLES)
        full = bool(wanted & CELL_EXTRAS)
        rows = strip_rows or strip_rows_for(width, CELLS_PER_STRIP // (4 if full else 1))
        # Summary lines for the terminal, from what is computed anyway (no extra work).
        summary = [n for n in ("flux_magnitude", "thickening_rate", "uplift_rate") if n in wanted]
        written = []
        nc = tifs = None
        if "netcdf" in scenario.formats:
            attrs = netcdf_attrs(scenario.title, json.dumps(scenario.written), dict(vars(p)))
            nc = NetcdfWriter(
                folder / "fields.nc",
                x,
                y,
                topo.crs,
                t,
                {n: variable_attrs(n) for n in names},
                attrs,
                chunk_rows=rows,
            )
            writers.append(nc)
            written.append("fields.nc")
        if budget_fields is not None:
            if nc is not None and set(BUDGET_VARIABLES) <= set(names):
                side_path = folder / "fields.nc"
            else:
                side_path = Path(budget_fields)
                side = NetcdfWriter(
                    side_path,
                    x,
                    y,
                    topo.crs,
                    t,
                    {n: variable_attrs(n) for n in BUDGET_VARIABLES},
                    netcdf_attrs(scenario.title, json.dumps(scenario.written), dict(vars(p))),
                    chunk_rows=rows,
                )
                writers.append(side)
        if "geotiff" in scenario.formats:
            from crustflow.variables import CAUTION

            tifs = {}
            for n in names:
                tifs[n] = GeotiffWriter(
                    folder / f"{n}.tif",
                    crs=topo.crs,
                    transform=t,
                    height=height,
                    width=width,
                    attrs=dict(variable_attrs(n), caution=CAUTION),
                )
                writers.append(tifs[n])
                written.append(f"{n}.tif")
        step = max(1, -(-max(height, width) // FIGURE_CELLS))
        fig_rows = {n: [] for n in figure_vars}
        ranges = {n: [np.inf, -np.inf] for n in summary}
        counts = {"backflow": 0, "valid": 0, "unconverged": 0}
        checks = GridChecks(sources)
        thin = ThinCrustCheck(p.channel_thickness)
        cell_check = CellInputCheck()
        note("compute and write")
        from tqdm import tqdm

        def write(r0: int, out: dict) -> None:
            if nc is not None:
                nc.write_rows(r0, {n: out[n] for n in names})
            if side is not None:
                side.write_rows(r0, {n: out[n] for n in BUDGET_VARIABLES})
            if tifs is not None:
                for n in names:
                    tifs[n].write_rows(r0, out[n])

        writer = _BackgroundWriter(write)
        bar = tqdm(
            total=height,
            unit=" rows",
            desc="crustflow",
            leave=False,
            file=sys.stderr,
            disable=not progress or height <= rows,
            dynamic_ncols=True,
        )
        ls = scenario.load
        whole_p = whole_warning = None
        if ls.filtered or "thin_channel_warning" in wanted:
            note("whole-grid load")
            full = {key: src.read() for key, src in sources.items()}
            full_cell = {
                k: g.to_si(full[k]) for k, g in {**scenario.channel.grids, **ls.grids}.items()
            }
            H_full = full["topography"]
            T_full = crust_thickness_of(
                H_full,
                p,
                crust_thickness=full.get("crust_thickness"),
                moho_depth=full.get("moho_depth"),
            )
            whole_p, whole_warning = whole_grid_load(
                H_full,
                T_full,
                grid_geometry(x, y, topo.crs, spacing=(t.a, t.e)),
                p,
                load_setup=ls,
                cell=full_cell,
                filtered=ls.filtered,
                mask="thin_channel_warning" in wanted,
            )
            del full, full_cell, H_full, T_full
            note("compute and write")
        column = ColumnCheck()

        def merge(result: dict) -> bool:
            """Fold a strip's checks into the run's; True when the run must stop."""
            stats = result["stats"]
            for key, (count, vmin, vmax) in stats["grid"].items():
                checks.count[key] += count
                checks.vmin[key] = min(checks.vmin[key], vmin)
                checks.vmax[key] = max(checks.vmax[key], vmax)
            for key, (count, example) in stats["cell_bad"].items():
                old = cell_check.bad.get(key, (0, example))
                cell_check.bad[key] = (old[0] + count, old[1])
            thin.cells += stats["thin"][0]
            thin.thinnest = min(thin.thinnest, stats["thin"][1])
            column.update(None, stats["excluded"])
            column.roof_cells += stats["roof"]
            return bool(thin.cells or cell_check.bad or column.roof_cells)

        def consume(r0: int, out: dict) -> None:
            writer.put(r0, out)
            for n in summary:
                v = out[n][np.isfinite(out[n])]
                if v.size:
                    ranges[n] = [
                        min(ranges[n][0], float(v.min())),
                        max(ranges[n][1], float(v.max())),
                    ]
            if "solver_converged" in out:
                counts["unconverged"] += int((out["solver_converged"] == 0).sum())
            if "backflow" in out:
                counts["backflow"] += int(np.nansum(out["backflow"]))
                counts["valid"] += int(np.isfinite(out["backflow"]).sum())
            if make_figure:
                first = (-r0) % step
                for n in figure_vars:
                    fig_rows[n].append(out[n][first::step, step // 2 :: step])

        starts = list(range(0, height, rows))

        def job(r0: int) -> tuple:
            r1 = min(height, r0 + rows)
            a, b = max(0, r0 - HALO_ROWS), min(height, r1 + HALO_ROWS)
            return (
                scenario,
                r0,
                r1,
                wanted,
                None if whole_p is None else whole_p[a:b],
                None if whole_warning is None else whole_warning[a:b],
            )

        if client is None:
            for r0 in starts:
                result = compute_strip(*job(r0), sources=sources)
                bar.update(result["rows"])
                if merge(result):
                    break
                consume(r0, result["out"])
        else:
            for result in _distributed(client, [job(r0) for r0 in starts], window):
                bar.update(result["rows"])
                if merge(result):
                    break
                consume(result["r0"], result["out"])
        bar.close()
        writer.finish()
        checks.finish()  # on early exit these stats are partial: enough to name the likely cause
        cell_check.finish()
        column.finish()
        thin.finish()
        for w in writers:
            w.close()
        writers.clear()
        figure = None
        if make_figure:
            figure = _figure_dataset(fig_rows, x, y, step, topo.crs, scenario.title)
        return {
            "written": written,
            "provenance": provenance(sources),
            "ranges": ranges,
            "backflow_cells": counts["backflow"] if "backflow" in wanted else None,
            "valid_cells": counts["valid"],
            "figure": figure,
            "unconverged_cells": counts["unconverged"],
            "excluded_cells": column.excluded,
            "thin_channel_cells": None if whole_warning is None else int(np.nansum(whole_warning)),
            "budget_fields": side_path if budget_fields is not None else None,
            "skipped_variables": skipped,
            "shape": [height, width],
            "strip_rows": rows,
        }
    finally:
        if writer is not None:
            writer.finish(raise_errors=False)
        for w in writers:
            w.close()
        close_sources(sources)


def compute_strip(
    scenario, r0: int, r1: int, wanted, whole_p=None, whole_warning=None, *, sources=None
) -> dict:
    """Compute rows ``r0:r1`` of a scenario (with halo rows read around them).

    A pure task: it opens the input grids itself unless ``sources`` is given, so it can run in a
    worker process. Returns the strip's variables in practical units (``out``), the statistics
    the run's input checks need (``stats``), and ``r0``/``rows``.
    """
    own_sources = sources is None
    if own_sources:
        sources = open_sources(scenario)
    try:
        topo = sources["topography"]
        p = scenario.parameters
        x, y = topo.coords()
        t = topo.transform
        height = topo.height
        a, b = max(0, r0 - HALO_ROWS), min(height, r1 + HALO_ROWS)
        own = slice(r0 - a, r1 - a)
        arrays = {key: src.read(a, b) for key, src in sources.items()}
        grid_stats = {}
        for key, values in arrays.items():
            finite = values[own][np.isfinite(values[own])]
            grid_stats[key] = (
                (finite.size, float(finite.min()), float(finite.max()))
                if finite.size
                else (0, np.inf, -np.inf)
            )
        H = arrays["topography"]
        T = crust_thickness_of(
            H, p, crust_thickness=arrays.get("crust_thickness"), moho_depth=arrays.get("moho_depth")
        )
        cell = {
            k: g.to_si(arrays[k])
            for k, g in {**scenario.channel.grids, **scenario.load.grids}.items()
        }
        cell_check = CellInputCheck()
        cell_check.update({k: v[own] for k, v in cell.items()})
        thin = ThinCrustCheck(p.channel_thickness)
        h_cell = cell.get("channel_thickness")
        thin.update(
            np.where(np.isfinite(H), T, np.nan)[own], None if h_cell is None else h_cell[own]
        )
        stats = {
            "grid": grid_stats,
            "cell_bad": dict(cell_check.bad),
            "thin": (thin.cells, thin.thinnest),
            "roof": 0,
            "excluded": 0,
        }
        result = {"r0": r0, "rows": r1 - r0, "stats": stats, "out": None}
        if thin.cells or cell_check.bad:
            return result
        geom = grid_geometry(x, y[a:b], topo.crs, spacing=(t.a, t.e))
        diagnostics: dict = {}
        si = fields_si(
            H,
            T,
            geom,
            p,
            wanted=wanted,
            setup=scenario.channel,
            cell=cell,
            load_setup=scenario.load,
            diagnostics=diagnostics,
            p_top_filtered=whole_p,
            thin_channel=whole_warning,
        )
        roof_bad, excluded = diagnostics.get("roof_bad"), diagnostics.get("excluded")
        stats["roof"] = 0 if roof_bad is None else int(np.count_nonzero(roof_bad[own]))
        stats["excluded"] = 0 if excluded is None else int(excluded[own].sum())
        # float32 here, as in the files: the same numbers whichever process computed them
        result["out"] = {n: to_practical(n, v[own]).astype("float32") for n, v in si.items()}
        return result
    finally:
        if own_sources:
            close_sources(sources)


def _workers(client) -> int:
    if client is None:
        return 1
    try:
        return max(1, len(client.scheduler_info().get("workers", {})))
    except Exception:  # noqa: BLE001 - any scheduler hiccup: be conservative
        return 1


def _distributed(client, jobs: list, window: int):
    """Run ``compute_strip`` jobs on a dask.distributed cluster, at most ``window`` in flight,
    yielding results in row order."""
    from collections import deque

    pending: deque = deque()
    jobs = iter(jobs)
    for args in jobs:
        pending.append(client.submit(compute_strip, *args, pure=False))
        if len(pending) >= window:
            break
    while pending:
        future = pending.popleft()
        result = future.result()
        future.release()
        nxt = next(jobs, None)
        if nxt is not None:
            pending.append(client.submit(compute_strip, *nxt, pure=False))
        yield result


class _BackgroundWriter:
    """Writes strips in a second thread while the next strip is computed (GDAL, HDF5 and numpy
    release the GIL). One strip waits in the queue at most, so memory stays bounded; files are
    touched by the writer thread only, in order."""

    def __init__(self, write: Callable[[int, dict], None]) -> None:
        import queue
        import threading

        self._write = write
        self._queue: queue.Queue = queue.Queue(maxsize=1)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._loop, name="crustflow-writer", daemon=True)
        self._thread.start()

    def _loop(self) -> None:
        while True:
            item = self._queue.get()
            if item is None:
                return
            if self._error is None:
                try:
                    self._write(*item)
                except BaseException as exc:  # noqa: BLE001 - handed to the main thread
                    self._error = exc

    def put(self, row0: int, arrays: dict) -> None:
        """Queue a strip (blocks while the previous one is still being written)."""
        if self._error is not None:
            raise self._error
        self._queue.put((row0, arrays))

    def finish(self, raise_errors: bool = True) -> None:
        """Wait for every queued strip; raise the writer's error, if any."""
        if self._thread.is_alive():
            self._queue.put(None)
            self._thread.join()
        if raise_errors and self._error is not None:
            raise self._error


def _figure_dataset(rows: dict, x, y, step: int, crs, title: str):
    import rioxarray  # noqa: F401
    import xarray as xr

    xs = x[step // 2 :: step]
    ys = y[::step]
    data = {n: (("y", "x"), np.concatenate(v, axis=0), variable_attrs(n)) for n, v in rows.items()}
    ds = xr.Dataset(data, coords={"y": ys[: data["flux_east"][1].shape[0]], "x": xs})
    ds.attrs["title"] = title
    return ds.rio.write_crs(crs)
