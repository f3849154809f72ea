"""Strip-wise runs: grids of any size in bounded memory, identical to the whole-grid computation.

The grid is processed in strips of rows, each read by the one block reader
(:mod:`crustflow.engine.blocks`: halo rows, SI parameter grids, geometry) and computed with
:func:`~crustflow.engine.blocks.block_fields`, cropped and written into every output file; the
result is identical, bit for bit, to the whole-grid result. Peak memory is set by the strip size,
not the grid size. The whole-grid load step (filters, thin-channel flag) runs in memory on small
grids and out of core above :data:`crustflow.engine.outofcore.IN_MEMORY_CELLS` cells
(:mod:`crustflow.engine.outofcore`, scratch files in a temporary folder inside ``folder``), so
memory stays bounded at any size.

A run is: a :class:`RunPlan` (variables, strip height), the whole-grid pre-step, the loop over
strips (here or on a dask.distributed cluster), the :class:`_Sinks` that write NetCDF and GeoTIFF
in a background thread, and the :class:`_Summary` of ranges and counts for the terminal.
"""

from __future__ import annotations

import json
import shutil
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from crustflow.engine.blocks import HALO_ROWS, BlockReader, WholeGridLoad, block_fields
from crustflow.engine.checks import InputChecks
from crustflow.engine.fields import CELL_EXTRAS
from crustflow.engine.outofcore import IN_MEMORY_CELLS, out_of_core_load
from crustflow.engine.progress import Progress
from crustflow.io.grids import provenance
from crustflow.io.writers import GeotiffWriter, NetcdfWriter, check_compression, netcdf_attrs
from crustflow.variables import CAUTION, VARIABLES, to_practical, variable_attrs

__all__ = ["HALO_ROWS", "CELLS_PER_STRIP", "strip_rows_for", "run_strips"]

#: Cells in one strip when only the load, flux and its divergence are computed (peak memory is
#: roughly 40 float64 arrays of this size); the full one-cell solution (peak speed, drag,
#: backflow) takes about four times as many arrays, so it gets a quarter of this.
CELLS_PER_STRIP = 1 << 19

#: Rows of one output GeoTIFF tile (crustflow.io.writers.GeotiffWriter writes 256 x 256 tiles).
TILE_ROWS = 256

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

#: Output files finished at once when a run closes them (the machine's two cores).
CLOSING_THREADS = 2

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
    note("open grids")
    import rasterio

    check_compression(scenario.compression, scenario.formats)
    names = list(scenario.variables or VARIABLES)
    cache = _gdal_cache_bytes(len(names) + len(BUDGET_VARIABLES), _width_of(scenario))
    scratch = Path(tempfile.mkdtemp(prefix=".scratch-", dir=folder))
    whole = WholeGridLoad()
    try:
        with rasterio.Env(GDAL_CACHEMAX=cache), BlockReader(scenario) as reader:
            plan = plan_run(scenario, reader.height, reader.width, strip_rows, budget_fields)
            whole = _whole_grid_step(reader, plan, note, scratch)
            return _loop(
                scenario, reader, plan, whole, Path(folder), budget_fields, note, progress, client
            )
    finally:
        if hasattr(whole, "close"):
            whole.close()
        shutil.rmtree(scratch, ignore_errors=True)


def _loop(scenario, reader, plan, whole, folder, budget_fields, note, progress, client) -> dict:
    """Compute, write and summarise the strips (see :func:`run_strips`); the progress bar counts
    rows once they are written."""
    bar = Progress(
        plan.height,
        unit=" rows",
        desc="compute and write",
        bar=progress and plan.height > plan.rows,
    )
    with bar, _Sinks(scenario, reader, plan, Path(folder), budget_fields, bar.update) as sinks:
        note("compute and write")
        summary = _Summary(plan, reader)
        checks = InputChecks(reader.sources, scenario.parameters.channel_thickness)
        for result in _strip_results(reader, plan, whole, client):
            checks.merge(result["checks"])
            if checks.failed:
                break
            sinks.write_strip(result["r0"], result["out"])
            summary.add(result["r0"], result["out"])
        sinks.complete()
        checks.finish()  # on early exit these stats are partial: enough to name the cause
    return summary.result(
        written=sinks.written,
        provenance=provenance(reader.sources),
        excluded=checks.column.excluded,
        whole=whole,
        budget_fields=sinks.budget_path,
        title=scenario.title,
    )


def _width_of(scenario) -> int:
    """Width of the topography grid (a guess if it cannot be read: open_sources reports why)."""
    import rasterio

    try:
        with rasterio.open(scenario.topography) as src:
            return src.width
    except (rasterio.errors.RasterioError, OSError):
        return 4096


@dataclass
class RunPlan:
    """What a run computes and writes, and in strips of how many rows."""

    names: list[str]  #: variables written to the files
    wanted: set[str]  #: variables computed (files, figure, budgets)
    rows: int  #: rows per strip
    height: int
    width: int
    make_figure: bool
    filtered: bool  #: the scenario's [load] filters act on the whole grid
    skipped: list[str] = field(default_factory=list)
    summary: list[str] = field(default_factory=list)  #: variables whose ranges are reported

    @property
    def starts(self) -> range:
        return range(0, self.height, self.rows)


def plan_run(scenario, height: int, width: int, strip_rows=None, budget_fields=None) -> RunPlan:
    """The variables a run computes and writes and its strip height (every variable at any grid
    size: the whole-grid steps run out of core on large grids)."""
    names = list(scenario.variables or VARIABLES)
    skipped: list[str] = []
    make_figure = "figure" in scenario.formats
    wanted = set(names) | set(FIGURE_VARIABLES if make_figure else ())
    if budget_fields is not None:
        wanted |= set(BUDGET_VARIABLES)
    full = bool(wanted & CELL_EXTRAS)
    rows = strip_rows or strip_rows_for(width, CELLS_PER_STRIP // (4 if full else 1))
    summary = [n for n in ("flux_magnitude", "thickening_rate", "uplift_rate") if n in wanted]
    return RunPlan(
        names, wanted, rows, height, width, make_figure, scenario.load.filtered, skipped, summary
    )


#: Variables the figures draw (flux map, rates map), plus the input elevation for their contours,
#: coastline and hillshade (metres, decimated with them).
FIGURE_VARIABLES = (
    "flux_magnitude",
    "flux_east",
    "flux_north",
    "thickening_rate",
    "uplift_rate",
    "elevation",
)

#: Attributes of the elevation kept for the figures (it is an input, not a VARIABLES entry).
ELEVATION_ATTRS = {"long_name": "surface elevation above sea level", "units": "m"}


def _whole_grid_step(reader: BlockReader, plan: RunPlan, note, scratch: Path):
    """The load filters and the thin-channel flag, over the whole grid, before the strips: in
    memory up to :data:`IN_MEMORY_CELLS` cells, out of core (files in ``scratch``) above."""
    thin = "thin_channel_warning" in plan.wanted
    if not (plan.filtered or thin):
        return WholeGridLoad()
    note("whole-grid load")
    if plan.height * plan.width <= IN_MEMORY_CELLS:
        return reader.whole_grid_load(filtered=plan.filtered, thin_channel=thin)
    return out_of_core_load(reader, scratch, filtered=plan.filtered, thin_channel=thin)


def _strip_results(reader: BlockReader, plan: RunPlan, whole: WholeGridLoad, client):
    """Each strip's result, in row order: computed here, or on the cluster's workers."""
    scenario = reader.scenario
    if client is None:
        for r0 in plan.starts:
            r1 = min(plan.height, r0 + plan.rows)
            yield compute_strip(scenario, r0, r1, plan.wanted, whole, reader=reader)
        return

    def job(r0: int) -> tuple:
        r1 = min(plan.height, r0 + plan.rows)
        part = whole.part(max(0, r0 - HALO_ROWS), min(plan.height, r1 + HALO_ROWS))
        return (scenario, r0, r1, plan.wanted, part)

    window = max(2, 2 * _workers(client))
    yield from _distributed(client, [job(r0) for r0 in plan.starts], window)


def compute_strip(
    scenario, r0: int, r1: int, wanted, whole: WholeGridLoad | None = None, *, reader=None
) -> dict:
    """Compute rows ``r0:r1`` of a scenario (with halo rows read around them).

    A pure task: it opens the input grids itself unless a ``reader`` is given, so it can run in a
    worker process. Returns the strip's variables in practical units, float32 as in the files
    (``out``; None when a check failed), the state of its input checks (``checks``), ``r0`` and
    ``rows``.
    """
    own_reader = reader is None
    reader = BlockReader(scenario) if own_reader else reader
    try:
        p = scenario.parameters
        block = reader.read(r0, r1)
        checks = InputChecks(reader.sources, p.channel_thickness)
        thickness = block.crust_thickness(p)
        own = block.own
        checks.update(
            block.own_rows(block.arrays),
            thickness[own],
            block.own_rows(block.cell),
            block.elevation[own],
        )
        result = {"r0": r0, "rows": r1 - r0, "checks": checks.state(), "out": None}
        if checks.failed:
            return result
        diagnostics: dict = {}
        si = block_fields(
            block,
            p,
            channel=scenario.channel,
            load=scenario.load,
            wanted=wanted,
            whole=whole,
            diagnostics=diagnostics,
            crust_thickness=thickness,
        )
        checks.update_column(diagnostics.get("roof_bad"), diagnostics.get("excluded"))
        result["checks"] = checks.state()
        # float32 here, as in the files: the same numbers whichever process computed them
        result["out"] = {n: to_practical(n, v).astype("float32") for n, v in si.items()}
        if "elevation" in wanted:  # the figures' context, from the strip already read
            result["out"]["elevation"] = block.elevation[own].astype("float32")
        return result
    finally:
        if own_reader:
            reader.close()


class _Sinks:
    """The run's output files (NetCDF, GeoTIFF, the budgets' side file), written strip by strip in
    two background threads, one for the NetCDF files and one for the GeoTIFFs (netCDF4 and GDAL
    release the GIL while compressing, so the two codecs run on both cores); closed on exit, also
    on errors."""

    def __init__(
        self, scenario, reader: BlockReader, plan: RunPlan, folder: Path, budget_fields, on_written
    ):
        self.plan, self.written, self._files = plan, [], []
        self._on_written = on_written
        self.nc = self.side = self.tifs = None
        self.budget_path = None
        self._grid = (reader.x, reader.y, reader.crs, reader.transform)
        self._codec = scenario.compression
        attrs = netcdf_attrs(
            scenario.title, json.dumps(scenario.written), dict(vars(scenario.parameters))
        )
        if "netcdf" in scenario.formats:
            self.nc = self._netcdf(folder / "fields.nc", plan.names, attrs)
            self.written.append("fields.nc")
        if budget_fields is not None:
            if self.nc is not None and set(BUDGET_VARIABLES) <= set(plan.names):
                self.budget_path = folder / "fields.nc"
            else:
                self.budget_path = Path(budget_fields)
                self.side = self._netcdf(self.budget_path, BUDGET_VARIABLES, attrs)
        if "geotiff" in scenario.formats:
            self.tifs = {n: self._geotiff(folder / f"{n}.tif", n) for n in plan.names}
            self.written += [f"{n}.tif" for n in plan.names]
        self._writers = [_BackgroundWriter(self._write_netcdf), _BackgroundWriter(self._write_tifs)]

    def _netcdf(self, path: Path, names, attrs) -> NetcdfWriter:
        x, y, crs, t = self._grid
        attrs_of = {n: variable_attrs(n) for n in names}
        writer = NetcdfWriter(
            path, x, y, crs, t, attrs_of, attrs, chunk_rows=self.plan.rows, compression=self._codec
        )
        self._files.append(writer)
        return writer

    def _geotiff(self, path: Path, name: str) -> GeotiffWriter:
        _, _, crs, t = self._grid
        writer = GeotiffWriter(
            path,
            crs=crs,
            transform=t,
            height=self.plan.height,
            width=self.plan.width,
            attrs=dict(variable_attrs(name), caution=CAUTION),
            compression=self._codec,
        )
        self._files.append(writer)
        return writer

    def _write_netcdf(self, r0: int, out: dict) -> None:
        if self.nc is not None:
            self.nc.write_rows(r0, {n: out[n] for n in self.plan.names})
        if self.side is not None:
            self.side.write_rows(r0, {n: out[n] for n in BUDGET_VARIABLES})

    def _write_tifs(self, r0: int, out: dict) -> None:
        for n, tif in (self.tifs or {}).items():
            tif.write_rows(r0, out[n])
        self._on_written(next(iter(out.values())).shape[0])  # rows now on disk

    def write_strip(self, r0: int, out: dict) -> None:
        """Queue a strip's rows for writing (the arrays are only read, by both threads)."""
        for writer in self._writers:
            writer.put(r0, out)

    def complete(self) -> None:
        """Write what is queued and close every file (raises a writer's error, if any)."""
        for writer in self._writers:
            writer.finish()
        self._close()

    def _close(self) -> None:
        """Close every file; GeoTIFFs are finished (statistics, overviews, style) two at a time,
        since GDAL releases the GIL while it builds and compresses overviews."""
        from concurrent.futures import ThreadPoolExecutor

        files, self._files = self._files, []
        with ThreadPoolExecutor(max_workers=CLOSING_THREADS) as pool:
            for done in [pool.submit(f.close) for f in files]:
                done.result()

    def __enter__(self) -> _Sinks:
        return self

    def __exit__(self, *exc) -> None:
        for writer in self._writers:
            writer.finish(raise_errors=False)
        self._close()


class _Summary:
    """Ranges of the summary variables, cell counts and the decimated figure rows of a run."""

    def __init__(self, plan: RunPlan, reader: BlockReader) -> None:
        self.plan = plan
        self.grid = (reader.x, reader.y, reader.crs)
        self.step = max(1, -(-max(plan.height, plan.width) // FIGURE_CELLS))
        self.figure_rows = {n: [] for n in FIGURE_VARIABLES}
        self.ranges = {n: [np.inf, -np.inf] for n in plan.summary}
        self.counts = {"backflow": 0, "valid": 0, "unconverged": 0}

    def add(self, r0: int, out: dict) -> None:
        """Fold in a strip's rows."""
        for n in self.plan.summary:
            v = out[n][np.isfinite(out[n])]
            if v.size:
                low, high = self.ranges[n]
                self.ranges[n] = [min(low, float(v.min())), max(high, float(v.max()))]
        if "solver_converged" in out:
            self.counts["unconverged"] += int((out["solver_converged"] == 0).sum())
        if "backflow" in out:
            self.counts["backflow"] += int(np.nansum(out["backflow"]))
            self.counts["valid"] += int(np.isfinite(out["backflow"]).sum())
        if self.plan.make_figure:
            first, step = (-r0) % self.step, self.step
            for n in FIGURE_VARIABLES:
                # copies: views would keep every strip's arrays alive until the run ends
                self.figure_rows[n].append(out[n][first::step, step // 2 :: step].copy())

    def result(self, *, written, provenance, excluded, whole, budget_fields, title) -> dict:
        """The run's summary dict (see :func:`run_strips`)."""
        plan = self.plan
        figure = None
        if plan.make_figure:
            x, y, crs = self.grid
            figure = _figure_dataset(self.figure_rows, x, y, self.step, crs, title)
        thin = whole.flagged_cells()
        return {
            "written": written,
            "provenance": provenance,
            "ranges": self.ranges,
            "backflow_cells": self.counts["backflow"] if "backflow" in plan.wanted else None,
            "valid_cells": self.counts["valid"],
            "figure": figure,
            "unconverged_cells": self.counts["unconverged"],
            "excluded_cells": excluded,
            "thin_channel_cells": thin,
            "budget_fields": budget_fields,
            "skipped_variables": plan.skipped,
            "shape": [plan.height, plan.width],
            "strip_rows": plan.rows,
        }


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
    data = {
        n: (
            ("y", "x"),
            np.concatenate(v, axis=0),
            ELEVATION_ATTRS if n == "elevation" else variable_attrs(n),
        )
        for n, v in rows.items()
    }
    ds = xr.Dataset(data, coords={"y": ys[: data["flux_east"][1].shape[0]], "x": xs})
    ds.attrs["title"] = title
    return ds.rio.write_crs(crs)
