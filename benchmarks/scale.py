# psutil: benchmark-only dependency (pip install psutil); crustflow itself does not need it.
"""How ``crustflow run`` scales with the grid: 2,000 to 20,000 cells a side, time and memory.

    python benchmarks/scale.py                         # 2000, 8000, 20000 cells a side; ~15-25 min
    python benchmarks/scale.py --sizes 500 1000        # quick check
    python benchmarks/scale.py --write-results         # replace the 'scale' section of RESULTS.md
    python benchmarks/scale.py --globe                 # also the whole globe at 30 arc-seconds

Steps:

1. For each size N, build (or reuse) a projected scenario in ``benchmarks/_work/scale_n<N>/``:
   topography and crustal thickness, N x N cells of 250 m in EPSG:32625, float32 tiled (256)
   DEFLATE (predictor 3) GeoTIFFs written in strips of rows (the whole grid is never in memory).
   The values are the invented plateau of :mod:`crustflow.samples.plateau` stretched onto the grid's
   extent, as in ``core_run.py``. Before building, the free disk space (``shutil.disk_usage``) is
   compared with an uncompressed upper bound of what the size needs; sizes that would not fit are
   skipped, and said so. ``three.toml`` asks for flux_east, flux_north and thickening_rate as
   GeoTIFF; ``full.toml`` has no ``[output]`` table (every variable, NetCDF, GeoTIFF, figure).
2. Run, each as a fresh subprocess: ``crustflow run three.toml --quiet`` at every size, the same
   with ``--workers 2`` (a dask.distributed LocalCluster, whose worker processes the memory sum
   includes), and ``crustflow run full.toml --quiet`` up to ``--full-max`` cells a side (8000 by
   default; the full run at 20000 takes long and is estimated from the 8000 one instead).
3. Measure as ``core_run.py`` does: wall time from start to exit, and the peak of the summed
   resident set size of the process and all its descendants, polled with psutil every 20 ms.
   Also the CPU time of the process tree, and the CPU time the rest of the machine used meanwhile
   (other people's jobs on a shared machine), with the load average before each run.
4. Read the stage times of each run from its ``run.json``; profile one three-variable run (8000 by
   default) in this process with cProfile, main thread and writer thread, to split reading,
   computing and writing; time the GeoTIFF compression alone on one output of that run.
5. Print the machine, the tables, where the time goes and the targets (20,000 x 20,000, three
   variables: at most 3 GB peak memory and 3 minutes); with ``--write-results`` put the same into
   the ``<!-- scale:begin -->`` ... ``<!-- scale:end -->`` section of ``RESULTS.md``.

Nothing here asserts on timing; the targets are reported, not enforced.
"""

from __future__ import annotations

import argparse
import cProfile
import importlib
import json
import os
import pstats
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

try:
    import psutil
except ImportError:  # pragma: no cover - told to the user
    sys.exit("scale.py needs psutil (benchmark-only dependency): pip install psutil")

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
WORK = HERE / "_work"
RESULTS = HERE / "RESULTS.md"

PROJECTED_CRS = "EPSG:32625"
CELL = 250.0  # m
#: Projected grids are centred on the zone's central meridian; northern edge at 3900 km.
CENTRE_EASTING = 500e3
NORTH_EDGE = 3900e3
#: Bump when the synthetic grids change, so cached grids are rebuilt.
GRID_VERSION = 1
BLOCK = 256
POLL_SECONDS = 0.02
DEFAULT_SIZES = (2000, 8000, 20000)
THREE_VARIABLES = ("flux_east", "flux_north", "thickening_rate")
#: Targets for the three-variable run on 20,000 x 20,000 cells.
TARGET_SIZE = 20000
TARGET_MB = 3 * 1024
TARGET_S = 180.0
#: Disk kept free beyond the estimate (other people use this disk too).
DISK_RESERVE = 2 << 30
#: Uncompressed bytes per cell: two float32 inputs; three float32 outputs; the full output (21
#: variables, each as a float32 GeoTIFF and in fields.nc).
BYTES_INPUTS = 2 * 4
BYTES_THREE = 3 * 4
BYTES_FULL = 21 * 4 * 2

SCENARIO = """\
title = "scale benchmark: invented plateau, {grid}{suffix}"

[grids]
topography = "topography.tif"
crust_thickness = "crust_thickness.tif"

[channel]
thickness = "15 km"
viscosity = "1e19 Pa*s"
{output}"""

OUTPUT_THREE = """
[output]
variables = ["flux_east", "flux_north", "thickening_rate"]
formats = ["geotiff"]
"""

RUN_NAMES = {
    "three": "3 variables, GeoTIFF",
    "workers": "3 variables, GeoTIFF, --workers {workers}",
    "full": "all variables, NetCDF + GeoTIFF + figure",
}


# --------------------------------------------------------------------------------------------------
# Synthetic scenarios


@dataclass
class Case:
    """One grid: a projected N x N square, or the whole globe in longitude/latitude."""

    key: str  #: folder suffix and label, e.g. "n8000" or "globe30"
    width: int
    height: int
    globe_arcsec: float | None = None

    @property
    def cells(self) -> int:
        return self.width * self.height

    @property
    def label(self) -> str:
        if self.globe_arcsec is None:
            return f"{self.width:,} x {self.height:,}"
        return (
            f"globe {self.width:,} x {self.height:,} ({self.globe_arcsec:g} arc-seconds, EPSG:4326)"
        )

    @property
    def folder(self) -> Path:
        return WORK / f"scale_{self.key}"

    @property
    def crs(self) -> str:
        return PROJECTED_CRS if self.globe_arcsec is None else "EPSG:4326"

    def transform(self):
        from rasterio.transform import from_origin

        if self.globe_arcsec is None:
            west = CENTRE_EASTING - self.width * CELL / 2
            return from_origin(west, NORTH_EDGE, CELL, CELL)
        res = self.globe_arcsec / 3600.0
        return from_origin(-180.0, 90.0, res, res)

    def sample_coordinates(self, rows: slice) -> tuple[np.ndarray, np.ndarray]:
        """Coordinates in the sample plateau's frame for the cells of rows ``rows``: the grid's
        extent is stretched onto the plateau's 800 x 600 km region."""
        from crustflow.samples.plateau import SAMPLE_BOUNDS

        west, south, east, north = SAMPLE_BOUNDS
        u = (np.arange(self.width) + 0.5) / self.width
        v = (np.arange(rows.start, rows.stop) + 0.5) / self.height
        uu, vv = np.meshgrid(u, v)
        return west + uu * (east - west), north - vv * (north - south)


def projected(size: int) -> Case:
    return Case(f"n{size}", size, size)


def globe(arcsec: float) -> Case:
    width, height = round(360 * 3600 / arcsec), round(180 * 3600 / arcsec)
    return Case(f"globe{arcsec:g}", width, height, globe_arcsec=arcsec)


def _grid_paths(case: Case) -> dict[str, Path]:
    folder = case.folder
    return {
        "topography": folder / "topography.tif",
        "crust_thickness": folder / "crust_thickness.tif",
        "three": folder / "three.toml",
        "full": folder / "full.toml",
    }


def grids_present(case: Case) -> bool:
    paths = _grid_paths(case)
    stamp_path = case.folder / "grids.json"
    return (
        stamp_path.is_file()
        and json.loads(stamp_path.read_text()) == _stamp(case)
        and paths["topography"].is_file()
        and paths["crust_thickness"].is_file()
    )


def _stamp(case: Case) -> dict:
    return {
        "version": GRID_VERSION,
        "width": case.width,
        "height": case.height,
        "crs": case.crs,
        "transform": list(case.transform())[:6],
    }


def build_scenario(case: Case) -> dict[str, Path]:
    """Write (or reuse) the grids and both scenario files; the grids strip by strip."""
    import rasterio
    from rasterio.windows import Window

    from crustflow.samples.plateau import plateau_crust_thickness, plateau_elevation

    case.folder.mkdir(parents=True, exist_ok=True)
    paths = _grid_paths(case)
    if grids_present(case):
        print(f"reusing grids in {case.folder}")
    else:
        print(f"building {case.label} grids in {case.folder} ...", flush=True)
        began = time.perf_counter()
        stamp_path = case.folder / "grids.json"
        stamp_path.unlink(missing_ok=True)
        block = min(BLOCK, 16 * max(1, min(case.width, case.height) // 16))
        profile = dict(
            driver="GTiff",
            width=case.width,
            height=case.height,
            count=1,
            dtype="float32",
            crs=case.crs,
            transform=case.transform(),
            nodata=float("nan"),
            compress="deflate",
            predictor=3,
            tiled=True,
            blockxsize=block,
            blockysize=block,
            num_threads="ALL_CPUS",
        )
        grids = (
            ("topography", plateau_elevation, "surface elevation above sea level"),
            ("crust_thickness", plateau_crust_thickness, "crustal thickness, surface to Moho"),
        )
        for key, func, description in grids:
            tmp = paths[key].with_name(paths[key].name + ".partial")
            with rasterio.open(tmp, "w", **profile) as dst:
                # One row of tiles at a time: every tile is complete when it leaves the cache.
                for row0 in range(0, case.height, block):
                    rows = slice(row0, min(case.height, row0 + block))
                    values = func(*case.sample_coordinates(rows)).astype("float32")
                    window = Window(0, row0, case.width, rows.stop - row0)
                    dst.write(values, 1, window=window)
                dst.set_band_description(1, f"{description} (m), invented")
                dst.units = ("m",)
            tmp.replace(paths[key])
        stamp_path.write_text(json.dumps(_stamp(case)) + "\n")
        print(f"  built in {time.perf_counter() - began:.1f} s")
    grid = f"{case.label} cells"
    paths["three"].write_text(
        SCENARIO.format(grid=grid, suffix=", three variables", output=OUTPUT_THREE)
    )
    paths["full"].write_text(SCENARIO.format(grid=grid, suffix=", full output", output=""))
    return paths


# --------------------------------------------------------------------------------------------------
# Disk space


def _folder_bytes(folder: Path) -> int:
    if not folder.is_dir():
        return 0
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())


def disk_need(case: Case, kinds: list[str]) -> int:
    """Upper bound (uncompressed) of the bytes a case still needs on disk for ``kinds`` of run.

    Grids already built need nothing; an output folder is replaced only once the new one is
    complete, so a run needs its whole (uncompressed) output on top of what is there."""
    need = 0 if grids_present(case) else BYTES_INPUTS * case.cells
    per_kind = {"three": BYTES_THREE, "workers": BYTES_THREE, "full": BYTES_FULL}
    # The runs follow each other and each output replaces its predecessor: what is written stays.
    for kind in kinds:
        need += max(0, per_kind[kind] * case.cells - _folder_bytes(case.folder / f"out_{kind}"))
    return need


def plan_disk(
    cases: list[tuple[Case, list[str]]],
) -> tuple[list[tuple[Case, list[str]]], list[str]]:
    """Drop the runs that would not fit on the disk (the full run first, then the whole size)."""
    WORK.mkdir(parents=True, exist_ok=True)
    free = shutil.disk_usage(WORK).free - DISK_RESERVE
    planned, notes = [], []
    for case, kinds in cases:
        need = disk_need(case, kinds)
        if need > free and "full" in kinds:
            lighter = [k for k in kinds if k != "full"]
            note = (
                f"{case.label}: full run skipped, it needs up to {need / 2**30:.1f} GB on disk"
                f" and {free / 2**30:.1f} GB are free (after a {DISK_RESERVE >> 30} "
                "GB reserve)"
            )
            notes.append(note)
            print(note)
            kinds, need = lighter, disk_need(case, lighter)
        if need > free:
            note = (
                f"{case.label}: skipped, it needs up to {need / 2**30:.1f} GB on disk and "
                f"{free / 2**30:.1f} GB are free (after a {DISK_RESERVE >> 30} GB reserve)"
            )
            notes.append(note)
            print(note)
            continue
        free -= need
        planned.append((case, kinds))
    return planned, notes


# --------------------------------------------------------------------------------------------------
# Measuring one subprocess


@dataclass
class Sample:
    """One measured subprocess."""

    wall_s: float
    peak_tree_mb: float  #: highest sampled sum of RSS over the process tree
    cpu_s: float  #: CPU time (user + system) of the process tree
    other_cpu_s: float  #: CPU time the rest of the machine used (this script's polling excluded)
    load_before: tuple[float, float, float]
    samples: int
    stages: dict = field(default_factory=dict)
    strip_rows: int | None = None  #: rows per strip, from run.json

    @property
    def cores(self) -> float:
        return self.cpu_s / self.wall_s

    @property
    def other_cores(self) -> float:
        return self.other_cpu_s / self.wall_s


def _busy_seconds() -> float:
    """CPU seconds spent on all cores other than idle and I/O wait, since boot."""
    t = psutil.cpu_times()
    return sum(
        getattr(t, name, 0.0) for name in ("user", "nice", "system", "irq", "softirq", "steal")
    )


def measure(cmd: list[str]) -> Sample:
    """Run ``cmd`` to completion; return its wall time, peak memory and CPU time."""
    load = os.getloadavg()
    with tempfile.TemporaryFile() as err:
        busy0, self0 = _busy_seconds(), time.process_time()
        began = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err)
        root = psutil.Process(proc.pid)
        done = threading.Event()
        peak = {"rss": 0, "n": 0}
        cpu_seen: dict[int, float] = {}  # per pid: last (user + system) seen, children excluded

        def poll() -> None:
            while not done.is_set():
                try:
                    procs = [root, *root.children(recursive=True)]
                except psutil.Error:
                    procs = []
                total = 0
                for p in procs:
                    try:
                        with p.oneshot():
                            total += p.memory_info().rss
                            times = p.cpu_times()
                        cpu_seen[p.pid] = times.user + times.system
                    except psutil.Error:  # exited between listing and reading
                        pass
                peak["rss"] = max(peak["rss"], total)
                peak["n"] += 1
                done.wait(POLL_SECONDS)

        watcher = threading.Thread(target=poll, daemon=True)
        watcher.start()
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - began
        done.set()
        watcher.join()
        busy = _busy_seconds() - busy0
        monitor = time.process_time() - self0  # this process: the polling thread
        code = os.waitstatus_to_exitcode(status)
        proc.returncode = code
        if code != 0:
            err.seek(0)
            tail = err.read().decode(errors="replace").strip()[-2000:]
            raise RuntimeError(f"exit status {code}: {' '.join(cmd)}\n{tail}")
    # rusage of the child covers the descendants it waited for; the polled sum covers the rest.
    own = max(usage.ru_utime + usage.ru_stime, sum(cpu_seen.values()))
    return Sample(
        wall_s=wall,
        peak_tree_mb=peak["rss"] / 2**20,
        cpu_s=own,
        other_cpu_s=max(0.0, busy - own - monitor),
        load_before=load,
        samples=peak["n"],
    )


def _run_json(out: Path) -> tuple[dict, int | None]:
    """Stage times and rows per strip recorded in a run's ``run.json``."""
    try:
        manifest = json.loads((out / "run.json").read_text())
    except (OSError, ValueError):
        return {}, None
    return manifest.get("stage_seconds", {}), manifest.get("grid", {}).get("strip_rows")


# --------------------------------------------------------------------------------------------------
# Profile of one run in this process


@dataclass
class Profile:
    case: Case
    wall_s: float
    cpu_s: float
    main: dict  #: seconds by part, main thread
    writer: dict  #: seconds by part, writer thread
    compression: dict  #: re-writing one output with and without DEFLATE


def _cumulative(stats: pstats.Stats, path_end: str, func: str) -> float:
    """Cumulative time of ``func`` in the file ending ``path_end``; fails loudly when the timed
    code has moved (a renamed module or function must be followed here, not silently read as 0)."""
    root = Path(__file__).resolve().parents[1]
    module = root / path_end
    if module.name.endswith(".py") and path_end.startswith("crustflow/"):
        if not module.is_file() or f"def {func}(" not in module.read_text():
            raise SystemExit(f"benchmark out of date: {path_end} has no function {func}()")
    total = 0.0
    for (filename, _line, name), (_cc, _nc, _tt, ct, _callers) in stats.stats.items():
        if name == func and filename.replace(os.sep, "/").endswith(path_end):
            total += ct
    return total


def profile_run(case: Case, scenario: Path) -> Profile:
    """Run ``crustflow run`` on the three-variable scenario in this process under cProfile, with
    the writer thread profiled too, and split the time into reading, computing and writing."""
    # Imported beforehand, so that the profile does not count first imports (the subprocess
    # runs do count them, in their 'rest').
    import crustflow.cli
    import crustflow.engine.strips  # noqa: F401
    import crustflow.io.grids
    import crustflow.io.writers
    import crustflow.scenario.document

    out = case.folder / "out_profile"
    thread_profiles: list[cProfile.Profile] = []
    original_run = threading.Thread.run

    def profiled_run(thread: threading.Thread) -> None:
        prof = cProfile.Profile()
        thread_profiles.append(prof)
        prof.enable()
        try:
            original_run(thread)
        finally:
            prof.disable()

    main_prof = cProfile.Profile()
    threading.Thread.run = profiled_run
    try:
        cpu0, began = time.process_time(), time.perf_counter()
        main_prof.enable()
        try:
            status = crustflow.cli.main(["run", str(scenario), "--out", str(out), "--quiet"])
        finally:
            main_prof.disable()
        wall, cpu = time.perf_counter() - began, time.process_time() - cpu0
    finally:
        threading.Thread.run = original_run
    if status != 0:
        raise RuntimeError(f"profiled run failed with status {status}")

    m = pstats.Stats(main_prof)
    read = _cumulative(m, "crustflow/io/grids.py", "read")
    strip = _cumulative(m, "crustflow/engine/strips.py", "compute_strip")
    main = {
        "read the scenario (first use of pint and scipy)": _cumulative(
            m, "crustflow/scenario/document.py", "load_scenario"
        ),
        "read and decompress the inputs (GridSource.read)": read,
        "compute (compute_strip without its reads)": strip - read,
        "wait for the writer thread (queue full, final flush)": _cumulative(
            m, "crustflow/engine/strips.py", "put"
        )
        + _cumulative(m, "crustflow/engine/strips.py", "finish"),
        "close the GeoTIFFs (last row of tiles)": _cumulative(
            m, "crustflow/io/writers.py", "close"
        ),
        "run.json (input checksums, versions)": _cumulative(
            m, "crustflow/io/folders.py", "base_manifest"
        ),
    }
    main["rest (opening grids, output folder, checks)"] = max(0.0, wall - sum(main.values()))
    writer = {"busy": 0.0, "idle": 0.0}
    for prof in thread_profiles:
        w = pstats.Stats(prof)
        loop = _cumulative(w, "crustflow/engine/strips.py", "_loop")
        if not loop:
            continue
        writer["busy"] += _cumulative(w, "crustflow/io/writers.py", "write_rows")
        writer["idle"] += _cumulative(w, "queue.py", "get")
    compression = compression_probe(out / "flux_east.tif")
    shutil.rmtree(out, ignore_errors=True)  # only the numbers are needed
    return Profile(case, wall, cpu, main, writer, compression)


def compression_probe(path: Path) -> dict:
    """Write one output grid again, tiled as crustflow writes it, with and without DEFLATE."""
    import rasterio
    from rasterio.windows import Window

    with rasterio.open(path) as src:
        data = src.read(1)
        profile = dict(
            driver="GTiff",
            width=src.width,
            height=src.height,
            count=1,
            dtype="float32",
            crs=src.crs,
            transform=src.transform,
            nodata=float("nan"),
            tiled=True,
            blockxsize=256,
            blockysize=256,
            num_threads="ALL_CPUS",
        )
    times = {}
    with tempfile.TemporaryDirectory(dir=path.parent.parent) as tmp:
        for name, extra in (("none", {}), ("deflate", {"compress": "deflate", "predictor": 3})):
            target = Path(tmp) / f"{name}.tif"
            began = time.perf_counter()
            with rasterio.open(target, "w", **profile, **extra) as dst:
                for row0 in range(0, data.shape[0], 256):
                    rows = data[row0 : row0 + 256]
                    dst.write(rows, 1, window=Window(0, row0, rows.shape[1], rows.shape[0]))
            times[name] = time.perf_counter() - began
            times[name + "_mb"] = target.stat().st_size / 2**20
            target.unlink()
    times["cells"] = data.size
    return times


# --------------------------------------------------------------------------------------------------
# Machine


def machine() -> dict[str, str]:
    """CPU, cores, memory, OS, versions and code identity, as ``core_run.py`` reports them."""
    sys.path.insert(0, str(HERE))
    try:
        core_run = importlib.import_module("core_run")
    finally:
        sys.path.remove(str(HERE))
    return core_run.machine(REPO)


def _load(values) -> str:
    return " / ".join(f"{v:.2f}" for v in values)


# --------------------------------------------------------------------------------------------------
# Report


@dataclass
class Row:
    case: Case
    kind: str
    runs: list[Sample]

    @property
    def best(self) -> Sample:
        return min(self.runs, key=lambda s: s.wall_s)

    @property
    def peak_tree_mb(self) -> float:
        return max(s.peak_tree_mb for s in self.runs)


def table(rows: list[Row], workers: int, repeat: int) -> list[str]:
    wall = "wall time (s)" if repeat == 1 else f"wall time (s, best of {repeat})"
    lines = [
        f"| grid | run | {wall} | cells per second | peak memory (MB, process tree) "
        "| CPU used (cores) | other processes' CPU (cores) "
        "| load average before (1 / 5 / 15 min) |",
        "|---|---|---:|---:|---:|---:|---:|---|",
    ]
    for row in rows:
        b = row.best
        lines.append(
            f"| {row.case.label} | {RUN_NAMES[row.kind].format(workers=workers)} "
            f"| {b.wall_s:.1f} | {row.case.cells / b.wall_s:,.0f} "
            f"| {row.peak_tree_mb:,.0f} | {b.cores:.2f} | {b.other_cores:.2f} "
            f"| {_load(b.load_before)} |"
        )
    return lines


def stage_table(rows: list[Row], workers: int) -> list[str]:
    names: list[str] = []
    for row in rows:
        for name in row.best.stages:
            if name not in names:
                names.append(name)
    lines = [
        "| grid | run | " + " | ".join(names) + " | rest: start-up, run.json, moving the folder |",
        "|---|---|" + "---:|" * (len(names) + 1),
    ]
    for row in rows:
        st = row.best.stages
        if not st:
            lines.append(
                f"| {row.case.label} | {RUN_NAMES[row.kind].format(workers=workers)} | "
                + " | ".join("-" for _ in names)
                + " | no run.json stage times |"
            )
            continue
        rest = row.best.wall_s - sum(st.values())
        cells = " | ".join(f"{st[n]:.2f}" if n in st else "-" for n in names)
        lines.append(
            f"| {row.case.label} | {RUN_NAMES[row.kind].format(workers=workers)} | "
            f"{cells} | {rest:.2f} |"
        )
    return lines


def _find(rows: list[Row], key: str, kind: str) -> Row | None:
    return next((r for r in rows if r.case.key == key and r.kind == kind), None)


def full_estimate(rows: list[Row], size: int, full_max: int) -> str | None:
    """Estimate the full run at ``size`` from the largest measured full run (scaled by cells)."""
    if size <= full_max:
        return None
    measured = [r for r in rows if r.kind == "full" and r.case.globe_arcsec is None]
    target = next((r for r in rows if r.case.key == f"n{size}"), None)
    if not measured or target is None:
        return None
    ref = max(measured, key=lambda r: r.case.cells)
    st, wall = ref.best.stages, ref.best.wall_s
    if not st:
        return None
    scale = size * size / ref.case.cells
    figure = st.get("draw figure", 0.0)
    per_cell = sum(st.values()) - figure  # the whole-grid step runs out of core: it scales too
    fixed = wall - sum(st.values()) + figure
    estimate = fixed + per_cell * scale
    text = (
        f"Full run at {size:,} x {size:,} **not run, estimated** from the {ref.case.label} "
        f"one: about {estimate:,.0f} s ({estimate / 60:.0f} min), i.e. its strip-wise stages and "
        f"its whole-grid load step ({per_cell:.1f} s) scaled by the cells ({scale:.2f} x) plus "
        f"start-up and the figure ({fixed:.1f} s). The whole-grid step (thin-channel map) runs "
        "out of core above 4.2 M cells, so the peak memory of the measured run is not "
        "extrapolated either way."
    )
    return text


def where_time_goes(rows: list[Row], workers: int, prof: Profile | None) -> list[str]:
    """A few sentences drawn from the numbers."""
    lines: list[str] = []
    three = sorted(
        (r for r in rows if r.kind == "three" and r.case.globe_arcsec is None),
        key=lambda r: r.case.cells,
    )
    if three:
        big = three[-1]
        b = big.best
        cw = b.stages.get("compute and write", 0.0)
        op = b.stages.get("open grids", 0.0)
        rest = b.wall_s - sum(b.stages.values())
        text = (
            f"At {big.case.label} the three-variable run spends {cw:.1f} s of {b.wall_s:.1f} s "
            f"({100 * cw / b.wall_s:.0f} %) in 'compute and write', {op:.2f} s opening the "
            f"grids and {rest:.1f} s in start-up, run.json (SHA-256 of the inputs) and moving "
            "the output folder into place. 'compute and write' covers reading, computing and "
            "writing at once: the main thread reads and computes strip k + 1 while a second "
            "thread hands strip k to GDAL, which compresses tiles on all cores "
            f"(`num_threads=ALL_CPUS`); the process tree used {b.cores:.2f} cores on average."
        )
        if len(three) > 1:
            rates = ", ".join(
                f"{r.case.cells / r.best.wall_s / 1e6:.2g} M at {r.case.width:,}" for r in three
            )
            small = three[0].best
            fixed = small.wall_s - sum(small.stages.values())
            text += (
                f" Throughput in cells per second: {rates} (on the smallest grid, start-up "
                f"and run.json take {fixed:.1f} s of {small.wall_s:.1f} s)."
            )
            top = max(three, key=lambda r: r.case.cells / r.best.wall_s)
            falls = big.case.cells / b.wall_s < 0.9 * top.case.cells / top.best.wall_s
            if big is not top and falls:

                def halo(r: Row) -> str:
                    n = r.best.strip_rows
                    return f"{n} rows, halo {400 / n:.0f} %" if n else "rows unknown"

                text += (
                    f" Throughput falls at {big.case.label}. One cause: strips hold about "
                    "2^19 cells, so they get thinner as the grid gets wider, and the 2 + 2 "
                    "halo rows read and computed around each strip weigh more "
                    f"({halo(big)} against {halo(top)} at {top.case.label}); the rest "
                    "was not isolated."
                )
        lines.append(text)
    pairs = [(r, _find(rows, r.case.key, "workers")) for r in three]
    pairs = [(a, w) for a, w in pairs if w is not None]
    if pairs:
        a, w = pairs[-1]
        ratio = w.best.wall_s / a.best.wall_s
        lines.append(
            f"With `--workers {workers}` at {a.case.label}: {w.best.wall_s:.1f} s "
            f"({ratio:.2f} x the single-process time) and {w.peak_tree_mb:,.0f} MB for the whole "
            f"tree (the main process, which holds the scheduler and alone writes, and {workers} "
            "worker processes, each importing crustflow, starting up and reading its strips; "
            "results travel back pickled). On this "
            f"{os.cpu_count()}-core machine the workers compete with the writer and GDAL's "
            "compression threads for the same cores, so "
            + (
                "they do not pay for themselves here; they are meant for more cores or a cluster."
                if ratio > 0.95
                else "they help by the ratio shown."
            )
        )
    fulls = [r for r in rows if r.kind == "full"]
    if fulls:
        f = max(fulls, key=lambda r: r.case.cells)
        t = _find(rows, f.case.key, "three")
        if t is not None:
            lines.append(
                f"The full output at {f.case.label} takes {f.best.wall_s:.1f} s, "
                f"{f.best.wall_s / t.best.wall_s:.1f} x the three-variable run: 21 variables "
                "computed (peak speed, wall drag and backflow need the per-cell solution, in "
                "strips a quarter the size), and each compressed and written twice (GeoTIFF and "
                "NetCDF)."
            )
    if prof is not None:
        total = prof.wall_s
        parts = "; ".join(f"{k} {v:.1f} s ({100 * v / total:.0f} %)" for k, v in prof.main.items())
        busy, idle = prof.writer["busy"], prof.writer["idle"]
        c = prof.compression
        lines.append(
            f"cProfile of one three-variable run at {prof.case.label}, in process "
            f"(`crustflow.cli.main`), {total:.1f} s wall, {prof.cpu_s:.1f} s CPU "
            f"({prof.cpu_s / total:.2f} cores). Main thread: {parts}. Writer thread: "
            f"{busy:.1f} s handing strips to GDAL (tiles are compressed and written as they "
            f"fill, on GDAL's threads), {idle:.1f} s idle waiting for strips. "
            f"Compression alone: writing one of the outputs ({c['cells'] / 1e6:.0f} M float32 "
            f"cells) again takes {c['deflate']:.2f} s with DEFLATE and predictor 3 "
            f"({c['deflate_mb']:.0f} MB) and {c['none']:.2f} s uncompressed ({c['none_mb']:.0f} "
            f"MB), so compression costs about {max(0.0, c['deflate'] - c['none']):.2f} s of wall "
            "time per variable and writing the bytes very little: for the "
            f"{len(THREE_VARIABLES)} outputs of this run about "
            f"{len(THREE_VARIABLES) * max(0.0, c['deflate'] - c['none']):.1f} s, spread over "
            "GDAL's threads and overlapping the compute."
        )
        comp = prof.main["compute (compute_strip without its reads)"]
        read = prof.main["read and decompress the inputs (GridSource.read)"]
        wait = prof.main["wait for the writer thread (queue full, final flush)"]
        lead = max(
            (("computing", comp), ("reading", read), ("waiting for compression and writing", wait)),
            key=lambda kv: kv[1],
        )
        lines.append(
            f"So the largest share of the main thread goes to {lead[0]} ({lead[1]:.1f} s "
            f"of {total:.1f} s)."
        )
    return lines


def targets(rows: list[Row], workers: int) -> list[str]:
    out = []
    for kind in ("three", "workers"):
        row = _find(rows, f"n{TARGET_SIZE}", kind)
        if row is None:
            continue
        name = RUN_NAMES[kind].format(workers=workers)
        mem, wall = row.peak_tree_mb, row.best.wall_s
        tag = "" if kind == "three" else " (not a target; for comparison)"
        out.append(
            f"- {TARGET_SIZE:,} x {TARGET_SIZE:,}, {name}, peak memory <= "
            f"{TARGET_MB / 1024:g} GB: **{'met' if mem <= TARGET_MB else 'not met'}** "
            f"({mem:,.0f} MB){tag}"
        )
        out.append(
            f"- {TARGET_SIZE:,} x {TARGET_SIZE:,}, {name}, wall time <= "
            f"{TARGET_S / 60:g} min: **{'met' if wall <= TARGET_S else 'not met'}** "
            f"({wall:.1f} s){tag}"
        )
    if not out:
        out.append(f"- the targets concern {TARGET_SIZE:,} x {TARGET_SIZE:,}, which was not run")
    return out


def section(
    args, info: dict, load_start, load_end, rows: list[Row], notes: list[str], prof: Profile | None
) -> str:
    today = datetime.now(UTC).date().isoformat()
    command = "python benchmarks/scale.py --write-results"
    if list(args.sizes) != list(DEFAULT_SIZES):
        command += " --sizes " + " ".join(str(s) for s in args.sizes)
    if args.full_max != 8000:
        command += f" --full-max {args.full_max}"
    if args.repeat != 1:
        command += f" --repeat {args.repeat}"
    if args.workers != 2:
        command += f" --workers {args.workers}"
    if args.profile_size != 8000:
        command += f" --profile-size {args.profile_size}"
    if args.globe:
        command += " --globe" + (
            f" --globe-arcsec {args.globe_arcsec:g}" if args.globe_arcsec != 30 else ""
        )
    largest = max((r.case for r in rows), key=lambda c: c.cells, default=None)
    title = "## scale: how `crustflow run` scales with the grid"
    if largest is not None:
        title += f" (up to {largest.label})"
    lines = ["<!-- scale:begin -->", title, "", f"Recorded {today} with `{command}`.", ""]
    if args.note:
        lines += [args.note, ""]
    lines += [
        "Machine: " + "; ".join(f"{k} {v}" for k, v in info.items()) + ".",
        "",
        f"Load average (1 / 5 / 15 min): {_load(load_start)} at the start, {_load(load_end)} "
        "at the end. The machine is shared: the table gives, per run, the CPU the rest of "
        "the machine used meanwhile (busy CPU time of all cores minus the run's own, per "
        "second of wall time); anything well above 0 means the run shared its cores.",
    ]
    if rows:
        worst = max(rows, key=lambda r: r.best.other_cores)
        name = RUN_NAMES[worst.kind].format(workers=args.workers)
        lines[-1] += (
            f" Here other processes used at most {worst.best.other_cores:.2f} cores "
            f"during a run ({worst.case.label}, {name})"
        )
        lines[-1] += (
            "; the load averages are then mostly this benchmark's own runs."
            if worst.best.other_cores < 0.1
            else "."
        )
    lines += [""]
    lines += table(rows, args.workers, args.repeat) + [""]
    lines += [
        "Projected grids: EPSG:32625, 250 m cells, the invented plateau stretched onto the "
        "extent; float32 tiled (256) DEFLATE inputs. Wall time: subprocess start to exit, "
        "imports included. Peak memory: highest sum of RSS over the process and all its "
        f"descendants (dask workers included), sampled with psutil every "
        f"{POLL_SECONDS * 1000:.0f} ms. CPU used: user + system time of the process tree "
        "per second of wall time.",
        "",
    ]
    lines += ["Stage times (s) from each run's `run.json` (`stage_seconds`):", ""]
    lines += stage_table(rows, args.workers) + [""]
    estimate = full_estimate(rows, TARGET_SIZE, args.full_max)
    if estimate:
        lines += [estimate, ""]
    for note in notes:
        lines += [f"Not run: {note}.", ""]
    if not args.globe:
        lines += [
            "The whole-globe case (EPSG:4326, 30 arc-seconds, 43,200 x 21,600 cells) is "
            "optional (`--globe`) and was not run.",
            "",
        ]
    lines += ["### Where the time goes", ""]
    for paragraph in where_time_goes(rows, args.workers, prof):
        lines += [paragraph, ""]
    lines += ["### Targets", ""] + targets(rows, args.workers) + [""]
    lines += ["<!-- scale:end -->", ""]
    return "\n".join(lines)


def write_results(text: str) -> None:
    head = (
        "# Benchmark results\n\nWritten by the benchmark scripts in this folder with "
        "`--write-results`; see [README.md](README.md) for what each one measures.\n\n"
    )
    old = RESULTS.read_text() if RESULTS.is_file() else head
    pattern = re.compile(r"<!-- scale:begin -->.*?<!-- scale:end -->\n?", re.S)
    if pattern.search(old):
        new = pattern.sub(lambda _: text, old)
    else:
        new = old.rstrip("\n") + "\n\n" + text
    RESULTS.write_text(new)
    print(f"wrote section 'scale' to {RESULTS}")


# --------------------------------------------------------------------------------------------------


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__.split("\n\n")[0], formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument(
        "--sizes",
        type=int,
        nargs="+",
        default=list(DEFAULT_SIZES),
        metavar="N",
        help="cells per side of the projected grids (default: 2000 8000 20000)",
    )
    parser.add_argument(
        "--full-max",
        type=int,
        default=8000,
        metavar="N",
        help="run the full-output scenario up to this size (default 8000; larger "
        "full runs are estimated from the largest measured one)",
    )
    parser.add_argument(
        "--workers",
        type=int,
        default=2,
        metavar="N",
        help="worker processes for the --workers run (default 2)",
    )
    parser.add_argument("--repeat", type=int, default=1, help="runs of each command (default 1)")
    parser.add_argument(
        "--profile-size",
        type=int,
        default=8000,
        metavar="N",
        help="profile a three-variable run in process on the largest measured size "
        "up to N (default 8000; 0: no profile)",
    )
    parser.add_argument(
        "--globe",
        action="store_true",
        help="also the whole globe in EPSG:4326 (43,200 x 21,600 cells at 30 "
        "arc-seconds, ~3.7 GB per float32 grid uncompressed); off by default",
    )
    parser.add_argument(
        "--globe-arcsec",
        type=float,
        default=30.0,
        metavar="S",
        help="cell size of the globe case in arc-seconds (default 30)",
    )
    parser.add_argument(
        "--write-results",
        action="store_true",
        help="write the results into benchmarks/RESULTS.md (section 'scale')",
    )
    parser.add_argument("--note", default="", help="a sentence to put in the RESULTS.md section")
    args = parser.parse_args(argv)
    if min(args.sizes) < 16 or args.repeat < 1 or args.workers < 1:
        parser.error("sizes must be at least 16, --repeat and --workers at least 1")
    if args.globe and not (
        0 < args.globe_arcsec <= 3600
        and (3600 * 180 / args.globe_arcsec) == round(3600 * 180 / args.globe_arcsec)
    ):
        parser.error("--globe-arcsec must divide 180 degrees into whole cells")

    info = machine()
    load_start = os.getloadavg()
    print("machine:")
    for key, value in info.items():
        print(f"  {key:<10} {value}")
    print(f"  load avg   {_load(load_start)}")

    wanted = []
    for size in sorted(set(args.sizes)):
        kinds = ["three", "workers"] + (["full"] if size <= args.full_max else [])
        wanted.append((projected(size), kinds))
    if args.globe:
        wanted.append((globe(args.globe_arcsec), ["three", "workers"]))
    planned, notes = plan_disk(wanted)
    if any(size > args.full_max for size in args.sizes):
        print(
            f"full runs above {args.full_max:,} cells a side are not run: the full run at "
            f"{TARGET_SIZE:,} x {TARGET_SIZE:,} takes long and is estimated from the largest "
            "measured full run"
        )

    crustflow_cmd = Path(sys.executable).with_name("crustflow")
    if not crustflow_cmd.is_file():
        crustflow_cmd = "crustflow"
    rows: list[Row] = []
    for case, kinds in planned:
        paths = build_scenario(case)
        for kind in kinds:
            scenario = paths["full" if kind == "full" else "three"]
            out = case.folder / f"out_{kind}"
            cmd = [str(crustflow_cmd), "run", str(scenario), "--out", str(out), "--quiet"]
            if kind == "workers":
                cmd += ["--workers", str(args.workers)]
            runs = []
            for i in range(args.repeat):
                name = RUN_NAMES[kind].format(workers=args.workers)
                print(f"{case.label}, {name}, run {i + 1}/{args.repeat} ...", end=" ", flush=True)
                sample = measure(cmd)
                sample.stages, sample.strip_rows = _run_json(out)
                runs.append(sample)
                print(
                    f"{sample.wall_s:.1f} s, peak {sample.peak_tree_mb:,.0f} MB, "
                    f"{sample.cores:.2f} cores (others {sample.other_cores:.2f}), "
                    f"load before {_load(sample.load_before)}",
                    flush=True,
                )
            rows.append(Row(case, kind, runs))

    prof = None
    candidates = [c for c, _ in planned if c.globe_arcsec is None and c.width <= args.profile_size]
    if args.profile_size and candidates:
        case = max(candidates, key=lambda c: c.cells)
        print(f"profiling a three-variable run at {case.label} in process ...", flush=True)
        prof = profile_run(case, _grid_paths(case)["three"])
        print(f"  {prof.wall_s:.1f} s")
    load_end = os.getloadavg()

    print()
    print("\n".join(table(rows, args.workers, args.repeat)))
    print()
    print("stage times (s) from run.json:")
    print("\n".join(stage_table(rows, args.workers)))
    print()
    estimate = full_estimate(rows, TARGET_SIZE, args.full_max)
    if estimate:
        print(estimate.replace("**", ""))
        print()
    print("where the time goes:")
    for line in where_time_goes(rows, args.workers, prof):
        print(f"  {line}")
    print()
    print("targets:")
    print("\n".join(targets(rows, args.workers)).replace("**", ""))
    print(f"load average at the end: {_load(load_end)}")
    if args.write_results:
        write_results(section(args, info, load_start, load_end, rows, notes, prof))
    return 0


if __name__ == "__main__":
    sys.exit(main())
