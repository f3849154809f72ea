# psutil: benchmark-only dependency (pip install psutil); crustflow itself does not need it.
"""Benchmark of the core command, ``crustflow run``, against a hand-written numpy/rasterio script.

    python benchmarks/core_run.py                    # 4000 x 4000 cells, best of 2
    python benchmarks/core_run.py --size 500         # quick check
    python benchmarks/core_run.py --write-results --label baseline

Steps:

1. Build a synthetic projected scenario in ``benchmarks/_work/n<SIZE>/`` (git-ignored), or reuse it:
   topography and crustal thickness as float32 tiled DEFLATE GeoTIFFs in EPSG:32625 at 250 m cells.
   The values are the invented Varnessa Plateau of :mod:`crustflow.samples.plateau` (800 x 600 km) stretched
   onto the grid's extent, so a smaller ``--size`` gives the same landscape with steeper slopes.
   Two scenario files: ``scenario.toml`` (flux_east, flux_north, thickening_rate; GeoTIFF only) and
   ``scenario_full.toml`` (no ``[output]`` table: every variable, NetCDF, GeoTIFF and the figure).
2. Run, each as a fresh subprocess, ``--repeat`` times in turn: ``benchmarks/hand_script.py`` (the
   reference a researcher would write by hand), ``crustflow run scenario.toml --quiet`` and
   ``crustflow run scenario_full.toml --quiet``.
3. Measure the wall time of each subprocess (start to exit, interpreter start-up and imports
   included) and its peak memory: psutil polls the process and all its descendants every 20 ms and
   sums their resident set sizes; the highest sum is the peak of the process tree. As a cross-check
   the kernel's high-water mark of the largest single process (``ru_maxrss`` from ``os.wait4`` on
   that very child) is shown too: it cannot miss a short spike, but it does not add up several
   processes.
4. Print the machine, a table (best wall time of the repeats, cells per second, peak memory) and
   whether the targets are met; with ``--write-results``, put the same into ``RESULTS.md``.

Nothing here asserts on timing; the targets are reported, not enforced.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import platform
import re
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
    sys.exit("core_run.py needs psutil (benchmark-only dependency): pip install psutil")

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
WORK = HERE / "_work"
HAND_SCRIPT = HERE / "hand_script.py"
RESULTS = HERE / "RESULTS.md"

CRS = "EPSG:32625"
CELL = 250.0  # m
#: Grid centred on the zone's central meridian (500 km false easting); northern edge at 3900 km.
CENTRE_EASTING = 500e3
NORTH_EDGE = 3900e3
#: Bump when the synthetic grids change, so cached grids are rebuilt.
GRID_VERSION = 1
BLOCK = 256
POLL_SECONDS = 0.02
THREE_VARIABLES = ("flux_east", "flux_north", "thickening_rate")

SCENARIO = """\
title = "core_run benchmark: invented plateau, {size} x {size} cells at 250 m{suffix}"

[grids]
topography = "topography.tif"
crust_thickness = "crust_thickness.tif"

[channel]
thickness = "15 km"
viscosity = "1e19 Pa*s"
{output}"""

#: Imports what ``crustflow run`` imports; prints the file of every crustflow module loaded.
SOURCE_PROBE = (
    "import sys, crustflow, crustflow.cli, crustflow.engine.api, crustflow.io.writers, crustflow.io.grids, "
    "crustflow.scenario.document, crustflow.figures.common\n"
    "print(' '.join(m.__file__ for n, m in sys.modules.items() "
    "if n.split('.')[0] == 'crustflow' and getattr(m, '__file__', None)))"
)

OUTPUT_THREE = """
[output]
variables = ["flux_east", "flux_north", "thickening_rate"]
formats = ["geotiff"]
"""


# --------------------------------------------------------------------------------------------------
# Synthetic scenario


def _sample_coordinates(x, y, size):
    """Map grid coordinates onto the sample plateau's 800 x 600 km region."""
    from crustflow.samples.plateau import SAMPLE_BOUNDS

    west, south, east, north = SAMPLE_BOUNDS
    extent = size * CELL
    u = (x - (CENTRE_EASTING - extent / 2)) / extent
    v = (NORTH_EDGE - y) / extent
    return west + u * (east - west), north - v * (north - south)


def build_scenario(size: int, folder: Path) -> dict[str, Path]:
    """Write (or reuse) the grids and the two scenario files for a ``size`` x ``size`` grid."""
    import rasterio
    from rasterio.transform import from_origin

    from crustflow.samples.plateau import plateau_crust_thickness, plateau_elevation

    folder.mkdir(parents=True, exist_ok=True)
    paths = {
        "topography": folder / "topography.tif",
        "crust_thickness": folder / "crust_thickness.tif",
        "three": folder / "scenario.toml",
        "full": folder / "scenario_full.toml",
    }
    stamp_path = folder / "grids.json"
    stamp = {"version": GRID_VERSION, "size": size, "cell_m": CELL, "crs": CRS}
    fresh = (
        stamp_path.is_file()
        and json.loads(stamp_path.read_text()) == stamp
        and paths["topography"].is_file()
        and paths["crust_thickness"].is_file()
    )
    if fresh:
        print(f"reusing grids in {folder}")
    else:
        print(f"building {size} x {size} grids in {folder} ...", flush=True)
        began = time.perf_counter()
        stamp_path.unlink(missing_ok=True)
        west = CENTRE_EASTING - size * CELL / 2
        transform = from_origin(west, NORTH_EDGE, CELL, CELL)
        block = min(BLOCK, 16 * max(1, size // 16))
        profile = dict(
            driver="GTiff",
            width=size,
            height=size,
            count=1,
            dtype="float32",
            crs=CRS,
            transform=transform,
            nodata=float("nan"),
            compress="deflate",
            predictor=3,
            tiled=True,
            blockxsize=block,
            blockysize=block,
        )
        xs = west + CELL * (np.arange(size) + 0.5)
        strip = 2 * block
        grids = (
            ("topography", plateau_elevation, "surface elevation above sea level"),
            ("crust_thickness", plateau_crust_thickness, "crustal thickness, surface to Moho"),
        )
        for key, func, description in grids:
            tmp = paths[key].with_name(paths[key].name + ".partial")
            with rasterio.open(tmp, "w", **profile) as dst:
                for row0 in range(0, size, strip):
                    rows = min(strip, size - row0)
                    ys = NORTH_EDGE - CELL * (np.arange(row0, row0 + rows) + 0.5)
                    sx, sy = _sample_coordinates(*np.meshgrid(xs, ys), size)
                    window = rasterio.windows.Window(0, row0, size, rows)
                    dst.write(func(sx, sy).astype("float32"), 1, window=window)
                dst.set_band_description(1, f"{description} (m), invented")
                dst.units = ("m",)
            tmp.replace(paths[key])
        stamp_path.write_text(json.dumps(stamp) + "\n")
        print(f"  built in {time.perf_counter() - began:.1f} s")
    paths["three"].write_text(
        SCENARIO.format(size=size, suffix=", three variables", output=OUTPUT_THREE)
    )
    paths["full"].write_text(SCENARIO.format(size=size, suffix=", full output", output=""))
    return paths


# --------------------------------------------------------------------------------------------------
# Measuring one subprocess


@dataclass
class Sample:
    """One measured subprocess."""

    wall_s: float
    peak_tree_mb: float  #: highest sampled sum of RSS over the process tree
    maxrss_mb: float  #: kernel high-water RSS of the largest single process in the tree
    samples: int
    stages: dict = field(default_factory=dict)


def _tree_rss(root: psutil.Process) -> int:
    try:
        procs = [root, *root.children(recursive=True)]
    except psutil.Error:
        return 0
    total = 0
    for proc in procs:
        try:
            total += proc.memory_info().rss
        except psutil.Error:  # exited between listing and reading
            pass
    return total


def measure(cmd: list[str], *, env: dict | None = None) -> Sample:
    """Run ``cmd`` to completion; return its wall time and peak memory. Raises on failure."""
    with tempfile.TemporaryFile() as err:
        began = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err, env=env)
        root = psutil.Process(proc.pid)
        done = threading.Event()
        peak = {"rss": 0, "n": 0}

        def poll() -> None:
            while not done.is_set():
                peak["rss"] = max(peak["rss"], _tree_rss(root))
                peak["n"] += 1
                done.wait(POLL_SECONDS)

        watcher = threading.Thread(target=poll, daemon=True)
        watcher.start()
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - began
        done.set()
        watcher.join()
        proc.returncode = os.waitstatus_to_exitcode(status)
        if proc.returncode != 0:
            err.seek(0)
            tail = err.read().decode(errors="replace").strip()[-2000:]
            raise RuntimeError(f"exit status {proc.returncode}: {' '.join(cmd)}\n{tail}")
    return Sample(
        wall_s=wall,
        peak_tree_mb=peak["rss"] / 2**20,
        maxrss_mb=usage.ru_maxrss / 1024,
        samples=peak["n"],
    )


def _stages(out: Path) -> dict:
    try:
        return json.loads((out / "run.json").read_text()).get("stage_seconds", {})
    except (OSError, ValueError):
        return {}


# --------------------------------------------------------------------------------------------------
# Machine and provenance


def machine(source: Path) -> dict[str, str]:
    """CPU, cores, memory, OS and the versions that matter for the numbers."""
    import rasterio

    import crustflow

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        cpu = platform.processor() or "unknown"
    physical = psutil.cpu_count(logical=False)
    return {
        "CPU": cpu,
        "cores": f"{os.cpu_count()} logical" + (f", {physical} physical" if physical else ""),
        "memory": f"{psutil.virtual_memory().total / 2**30:.1f} GiB",
        "OS": f"{platform.system()} {platform.release()}",
        "Python": platform.python_version(),
        "numpy": np.__version__,
        "GDAL": rasterio.__gdal_version__,
        "rasterio": rasterio.__version__,
        "crustflow": f"{crustflow.__version__} ({code_identity(source)})",
    }


def source_digest(source: Path) -> str:
    """Digest of the crustflow sources under ``source`` (the package folder's parent)."""
    digest = hashlib.sha256()
    for path in sorted((source / "crustflow").glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()[:12]


def code_identity(source: Path) -> str:
    """Where the crustflow code that runs comes from (commit or folder), with a source digest."""
    if source.resolve() != REPO:
        where = os.path.relpath(source, REPO) if REPO in source.resolve().parents else source
        return f"sources from {where}, sha256 {source_digest(source)}"
    try:
        commit = subprocess.run(
            ["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            timeout=10,
        ).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        commit = ""
    return f"working tree at commit {commit or 'unknown'}, sources sha256 {source_digest(source)}"


# --------------------------------------------------------------------------------------------------
# Agreement of the outputs (so the two runs are known to compute the same thing)


def agreement(paths: dict[str, Path], hand_out: Path, crustflow_out: Path) -> str:
    """Compare hand-script and crustflow fluxes where the models coincide (land, interior)."""
    import rasterio

    def read(path: Path) -> np.ndarray:
        with rasterio.open(path) as src:
            return src.read(1).astype("float64")

    topo = read(paths["topography"])
    # Offshore, crustflow also counts the water load; the hand script does not. Compare on cells
    # whose whole 3 x 3 neighbourhood is land, away from the grid edge.
    land = topo > 0
    inner = np.zeros_like(land)
    inner[1:-1, 1:-1] = True
    for di in (-1, 0, 1):
        for dj in (-1, 0, 1):
            inner[1:-1, 1:-1] &= land[
                1 + di : land.shape[0] - 1 + di, 1 + dj : land.shape[1] - 1 + dj
            ]
    del topo, land
    parts = []
    for name in ("flux_east", "flux_north"):
        a, b = read(hand_out / f"{name}.tif"), read(crustflow_out / f"{name}.tif")
        ok = inner & np.isfinite(a) & np.isfinite(b)
        scale = np.abs(a[ok]).max() if ok.any() else 0.0
        rel = np.abs(a[ok] - b[ok]).max() / scale if scale else float("nan")
        parts.append(f"{name} {rel:.1e}")
    return (
        "max |hand - crustflow| / max |hand| on inland cells: "
        + ", ".join(parts)
        + f" ({int(inner.sum()):,} cells)"
    )


# --------------------------------------------------------------------------------------------------
# Report


@dataclass
class Row:
    name: str
    runs: list[Sample]

    @property
    def best(self) -> Sample:
        return min(self.runs, key=lambda s: s.wall_s)

    @property
    def peak_tree_mb(self) -> float:
        return max(s.peak_tree_mb for s in self.runs)

    @property
    def maxrss_mb(self) -> float:
        return max(s.maxrss_mb for s in self.runs)


def table(rows: list[Row], cells: int, repeat: int) -> list[str]:
    lines = [
        f"| run | wall time (s, best of {repeat}) | cells per second | peak memory (MB) "
        "| largest process max RSS (MB) | every repeat (s) |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for row in rows:
        best = row.best
        every = ", ".join(f"{s.wall_s:.2f}" for s in row.runs)
        lines.append(
            f"| {row.name} | {best.wall_s:.2f} | {cells / best.wall_s:,.0f} "
            f"| {row.peak_tree_mb:,.0f} | {row.maxrss_mb:,.0f} | {every} |"
        )
    return lines


def targets(hand: Row, three: Row) -> list[str]:
    t_ratio = three.best.wall_s / hand.best.wall_s
    m_ratio = three.peak_tree_mb / hand.peak_tree_mb
    return [
        f"- crustflow three-variable run no slower than the hand script: "
        f"**{'met' if t_ratio <= 1 else 'not met'}** ({three.best.wall_s:.2f} s vs "
        f"{hand.best.wall_s:.2f} s, {t_ratio:.2f} x)",
        f"- crustflow three-variable run at most half the hand script's peak memory: "
        f"**{'met' if m_ratio <= 0.5 else 'not met'}** ({three.peak_tree_mb:,.0f} MB vs "
        f"{hand.peak_tree_mb:,.0f} MB, {m_ratio:.2f} x)",
    ]


def stage_line(row: Row) -> str:
    stages = row.best.stages
    if not stages:
        return f"{row.name}: no stage times in run.json"
    total = sum(stages.values())
    parts = ", ".join(f"{k} {v:.2f}" for k, v in stages.items())
    return (
        f"{row.name}: {parts} s (sum {total:.2f} s of {row.best.wall_s:.2f} s wall; the rest "
        "is start-up, imports and whatever run.json does not time)"
    )


def section(
    label: str,
    size: int,
    repeat: int,
    info: dict,
    rows: list[Row],
    agree: str,
    note: str,
    source: Path,
) -> str:
    today = datetime.now(UTC).date().isoformat()
    command = f"python benchmarks/core_run.py --write-results --label {label}"
    if size != 4000:
        command += f" --size {size}"
    if repeat != 2:
        command += f" --repeat {repeat}"
    if source != REPO:
        command += f" --source {os.path.relpath(source, REPO)}"
    lines = [
        f"<!-- core_run:{label}:begin -->",
        f"## core_run: {label} ({size:,} x {size:,} cells, {size * size / 1e6:g} M)",
        "",
        f"Recorded {today} with `{command}`.",
        "",
    ]
    if note:
        lines += [note, ""]
    lines += ["Machine: " + "; ".join(f"{k} {v}" for k, v in info.items()) + ".", ""]
    lines += table(rows, size * size, repeat) + [""]
    lines += [
        "Peak memory: highest sum of RSS over the process tree, sampled with psutil every "
        f"{POLL_SECONDS * 1000:.0f} ms, largest of the repeats. Largest-process max RSS: the "
        "kernel's high-water mark (`os.wait4` rusage) of the biggest single process.",
        "",
    ]
    lines += ["Targets:", ""] + targets(rows[0], rows[1]) + [""]
    lines += ["Where the time goes (crustflow stage times from run.json, fastest repeat):", ""]
    lines += [f"- {stage_line(row)}" for row in rows[1:]] + [""]
    lines += [f"Outputs agree: {agree}.", f"<!-- core_run:{label}:end -->", ""]
    return "\n".join(lines)


def write_results(text: str, label: str) -> None:
    head = (
        "# Benchmark results\n\nWritten by the benchmark scripts in this folder with "
        "`--write-results`; see [README.md](README.md) for what each one measures.\n\n"
    )
    old = RESULTS.read_text() if RESULTS.is_file() else head
    pattern = re.compile(
        rf"<!-- core_run:{re.escape(label)}:begin -->.*?"
        rf"<!-- core_run:{re.escape(label)}:end -->\n?",
        re.S,
    )
    if pattern.search(old):
        new = pattern.sub(lambda _: text, old)
    else:
        new = old.rstrip("\n") + "\n\n" + text
    RESULTS.write_text(new)
    print(f"wrote section '{label}' to {RESULTS}")


# --------------------------------------------------------------------------------------------------


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__.split("\n\n")[0], formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--size", type=int, default=4000, help="cells per side (default 4000)")
    parser.add_argument("--repeat", type=int, default=2, help="runs of each command (default 2)")
    parser.add_argument(
        "--write-results", action="store_true", help="write the results into benchmarks/RESULTS.md"
    )
    parser.add_argument(
        "--label",
        default="latest",
        help="name of the RESULTS.md section; the same label replaces its section, "
        "a new one adds a section (default: latest)",
    )
    parser.add_argument("--note", default="", help="a sentence to put in the RESULTS.md section")
    parser.add_argument(
        "--source",
        type=Path,
        default=REPO,
        help="run crustflow from the package in this folder (through PYTHONPATH), "
        "e.g. a snapshot made with `git archive`; default: this repository",
    )
    args = parser.parse_args(argv)
    if args.size < 16 or args.repeat < 1:
        parser.error("--size must be at least 16 and --repeat at least 1")
    if not HAND_SCRIPT.is_file():
        parser.error(f"the reference script {HAND_SCRIPT} is missing")

    source = args.source.resolve()
    if not (source / "crustflow" / "__init__.py").is_file():
        parser.error(f"--source {source} holds no crustflow package")
    env = None
    if source != REPO:
        env = dict(
            os.environ,
            PYTHONPATH=os.pathsep.join(
                [str(source), *filter(None, [os.environ.get("PYTHONPATH")])]
            ),
        )
        # The editable install falls back to this repository for any module the source folder
        # lacks: import what a run imports and insist that every crustflow module comes from there.
        check = subprocess.run(
            [sys.executable, "-P", "-c", SOURCE_PROBE], env=env, capture_output=True, text=True
        )
        strays = [f for f in check.stdout.split() if not f.startswith(str(source) + os.sep)]
        if check.returncode != 0 or strays:
            parser.error(
                f"--source {source}: crustflow modules come from elsewhere or fail to "
                f"import: {' '.join(strays) or check.stderr.strip()[-500:]}"
            )
    digest_before = source_digest(source)
    info = machine(source)
    print("machine:")
    for key, value in info.items():
        print(f"  {key:<10} {value}")
    folder = WORK / f"n{args.size}"
    paths = build_scenario(args.size, folder)
    crustflow_cmd = Path(sys.executable).with_name("crustflow")
    if not crustflow_cmd.is_file():
        crustflow_cmd = "crustflow"
    outs = {"hand": folder / "out_hand", "three": folder / "out_three", "full": folder / "out_full"}
    commands = {
        "hand": [
            sys.executable,
            str(HAND_SCRIPT),
            str(paths["topography"]),
            str(paths["crust_thickness"]),
            str(outs["hand"]),
        ],
        "three": [
            str(crustflow_cmd),
            "run",
            str(paths["three"]),
            "--out",
            str(outs["three"]),
            "--quiet",
        ],
        "full": [
            str(crustflow_cmd),
            "run",
            str(paths["full"]),
            "--out",
            str(outs["full"]),
            "--quiet",
        ],
    }
    names = {
        "hand": "hand script (numpy + rasterio, 3 variables)",
        "three": "crustflow run, 3 variables, GeoTIFF",
        "full": "crustflow run, all variables, NetCDF + GeoTIFF + figure",
    }
    runs: dict[str, list[Sample]] = {key: [] for key in commands}
    for i in range(args.repeat):
        for key, cmd in commands.items():
            print(f"run {i + 1}/{args.repeat}: {names[key]} ...", end=" ", flush=True)
            sample = measure(cmd, env=env if key != "hand" else None)
            if key != "hand":
                sample.stages = _stages(outs[key])
            runs[key].append(sample)
            print(
                f"{sample.wall_s:.2f} s, peak {sample.peak_tree_mb:,.0f} MB "
                f"(max RSS {sample.maxrss_mb:,.0f} MB, {sample.samples} samples)",
                flush=True,
            )

    if source_digest(source) != digest_before:
        warning = (
            "crustflow sources changed while the benchmark ran: the runs may mix code versions"
        )
        print(f"WARNING: {warning}")
        args.note = " ".join(filter(None, [args.note, f"**Warning:** {warning}."]))
    rows = [Row(names[key], runs[key]) for key in commands]
    agree = agreement(paths, outs["hand"], outs["three"])
    print()
    print("\n".join(table(rows, args.size**2, args.repeat)))
    print()
    print("targets:")
    print("\n".join(targets(rows[0], rows[1])).replace("**", ""))
    print("stage times (fastest repeat):")
    for row in rows[1:]:
        print(f"  {stage_line(row)}")
    print(f"outputs: {agree}")
    if args.write_results:
        text = section(args.label, args.size, args.repeat, info, rows, agree, args.note, source)
        write_results(text, args.label)
    return 0


if __name__ == "__main__":
    sys.exit(main())
