# psutil: benchmark-only dependency (pip install psutil); crustflow itself does not need it.
"""Benchmark of the ensemble engine: a 1000-member ensemble on a 1000 x 1000 grid, and the fallback.

    python benchmarks/ensemble_run.py                     # the cases below, best of 1
    python benchmarks/ensemble_run.py --members 100       # a quick look
    python benchmarks/ensemble_run.py --write-results     # also update benchmarks/RESULTS.md

Cases (each run as a fresh subprocess that builds nothing, only runs ``run_ensemble``):

1. **fast path**: ``--members`` (1000) members on a ``--size`` x ``--size`` (1000 x 1000) projected
   grid, with viscosity (log-uniform 1e18-1e20 Pa s), channel thickness (normal 15 +- 3 km, min
   5 km) and channel density (uniform 2750-2900 kg/m^3) varied; the default report (flux
   magnitude, thickening and uplift rate; 5, 50, 95th percentiles) plus the exceedance of 0.5 and
   1 mm/yr uplift; NetCDF, GeoTIFFs and the figure.
2. **fallback** (``fast=False``, every member through ``fields_si``) with ``--fallback-members``
   (20) members on a ``--fallback-size`` (300) grid, and
3. the fast path on that same small case, so the cost per member of both engines can be compared.

The grids are the invented plateau of :mod:`crustflow.samples.plateau` (800 x 600 km) stretched onto the
grid's extent (800 m cells at 1000 x 1000), float32 tiled DEFLATE GeoTIFFs in EPSG:32625, built in
``benchmarks/_work/ensemble_n<SIZE>/`` (git-ignored) and reused. Wall time (start to exit, imports
included) and peak memory of the process tree (psutil, summed RSS every 20 ms) are measured with
``benchmarks/core_run.py``'s ``measure``; stage times come from the summary ``run_ensemble`` returns.
Targets for case 1: under 2 minutes and under 4 GB. Nothing asserts on timing.
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from core_run import REPO, WORK, machine, measure  # noqa: E402  (the same harness, not a copy)

RESULTS = HERE / "RESULTS.md"
BEGIN, END = "<!-- ensemble_run:begin -->", "<!-- ensemble_run:end -->"
CRS = "EPSG:32625"
#: Grid extent, m: the sample plateau's 800 km width, square (its 600 km height is stretched).
EXTENT = 800e3
WEST, NORTH = 100e3, 3900e3
GRID_VERSION = 1
TARGET_SECONDS, TARGET_MB = 120.0, 4096.0

SCENARIO = {
    "title": "ensemble_run benchmark: invented plateau",
    "grids": {"topography": "topography.tif", "crust_thickness": "crust_thickness.tif"},
    "channel": {"thickness": "15 km", "viscosity": "1e19 Pa*s"},
}

ENSEMBLE = {
    "sampling": "latin-hypercube",
    "vary": {
        "channel.viscosity": {
            "distribution": "log-uniform",
            "low": "1e18 Pa*s",
            "high": "1e20 Pa*s",
        },
        "channel.thickness": {
            "distribution": "normal",
            "mean": "15 km",
            "sd": "3 km",
            "min": "5 km",
        },
        "densities.channel": {
            "distribution": "uniform",
            "low": "2750 kg/m^3",
            "high": "2900 kg/m^3",
        },
    },
    "report": {
        "percentiles": [5, 50, 95],
        "variables": ["flux_magnitude", "thickening_rate", "uplift_rate"],
        "exceedance": {"variable": "uplift_rate", "thresholds": ["0.5 mm/yr", "1 mm/yr"]},
    },
}

#: The child process: load the scenario, parse the ensemble, run it, report the summary as JSON.
CHILD = """
import json, sys, time
began = time.perf_counter()
from pathlib import Path
import crustflow
from crustflow.analyses.ensemble.run import parse_ensemble, run_ensemble
job = json.loads(Path(sys.argv[1]).read_text())
scenario = crustflow.scenario_from_dict(job["scenario"], base_dir=job["folder"])
spec = parse_ensemble(job["ensemble"], scenario.parameters)
summary = run_ensemble(scenario, spec, job["out"], fast=job["fast"])
Path(job["report"]).write_text(json.dumps({"timings": summary["timings"],
    "fast_path": summary["fast_path"], "chunk_cells": summary["chunk_cells"],
    "strip_rows": summary["strip_rows"], "written": summary["written"],
    "seconds_in_python": time.perf_counter() - began}))
"""


def build_grids(size: int) -> Path:
    """Write (or reuse) the topography and crust grids for a ``size`` x ``size`` grid."""
    import rasterio
    from rasterio.transform import from_origin

    from crustflow.samples.plateau import SAMPLE_BOUNDS, plateau_crust_thickness, plateau_elevation

    folder = WORK / f"ensemble_n{size}"
    folder.mkdir(parents=True, exist_ok=True)
    stamp = {"version": GRID_VERSION, "size": size, "extent_m": EXTENT, "crs": CRS}
    stamp_path = folder / "grids.json"
    if stamp_path.is_file() and json.loads(stamp_path.read_text()) == stamp:
        return folder
    cell = EXTENT / size
    xs = WEST + cell * (np.arange(size) + 0.5)
    ys = NORTH - cell * (np.arange(size) + 0.5)
    west, south, east, north = SAMPLE_BOUNDS
    u = (xs - WEST) / EXTENT
    v = (NORTH - ys) / EXTENT
    sx, sy = np.meshgrid(west + u * (east - west), north - v * (north - south))
    block = 256 if size >= 256 else 16
    profile = dict(
        driver="GTiff",
        width=size,
        height=size,
        count=1,
        dtype="float32",
        crs=CRS,
        transform=from_origin(WEST, NORTH, cell, cell),
        nodata=float("nan"),
        compress="deflate",
        predictor=3,
        tiled=True,
        blockxsize=block,
        blockysize=block,
    )
    for name, func in (
        ("topography", plateau_elevation),
        ("crust_thickness", plateau_crust_thickness),
    ):
        with rasterio.open(folder / f"{name}.tif", "w", **profile) as dst:
            dst.write(func(sx, sy).astype("float32"), 1)
    stamp_path.write_text(json.dumps(stamp) + "\n")
    return folder


def run_case(size: int, members: int, fast: bool, seed: int = 20261201) -> dict:
    """Run one case in a fresh subprocess; return its measurement and summary."""
    folder = build_grids(size)
    with tempfile.TemporaryDirectory(dir=WORK) as tmp:
        tmp = Path(tmp)
        out = tmp / "out"
        out.mkdir()
        job = {
            "scenario": SCENARIO,
            "folder": str(folder),
            "out": str(out),
            "fast": fast,
            "ensemble": dict(ENSEMBLE, members=members, seed=seed),
            "report": str(tmp / "summary.json"),
        }
        (tmp / "job.json").write_text(json.dumps(job))
        sample = measure([sys.executable, "-c", CHILD, str(tmp / "job.json")])
        summary = json.loads((tmp / "summary.json").read_text())
    return {
        "size": size,
        "members": members,
        "fast": fast,
        "wall_s": sample.wall_s,
        "peak_mb": sample.peak_tree_mb,
        "maxrss_mb": sample.maxrss_mb,
        **summary,
    }


def table(rows: list[dict]) -> list[str]:
    lines = [
        "| case | grid | members | wall time (s) | maps per member (s) "
        "| maps per member and million cells (s) | peak memory (MB) "
        "| largest process max RSS (MB) | stages (s) |",
        "|---|---|---:|---:|---:|---:|---:|---:|---|",
    ]
    for r in rows:
        stages = ", ".join(f"{k} {v:.2f}" for k, v in r["timings"].items())
        per_member = r["timings"]["maps"] / r["members"]
        lines.append(
            f"| {r['name']} | {r['size']:,} x {r['size']:,} | {r['members']:,} "
            f"| {r['wall_s']:.2f} | {per_member:.4f} | {per_member / (r['size'] ** 2 / 1e6):.4f} "
            f"| {r['peak_mb']:,.0f} | {r['maxrss_mb']:,.0f} | {stages} |"
        )
    return lines


def comparison(rows: list[dict]) -> str:
    """Cost per member and cell of the fallback against the fast path at full size."""

    def unit(r):
        return r["timings"]["maps"] / r["members"] / r["size"] ** 2

    return (
        f"Per member and cell (maps stage), the fallback costs {unit(rows[1]) / unit(rows[0]):.1f} "
        f"times the fast path at full size, and {unit(rows[1]) / unit(rows[2]):.1f} times the "
        "fast path on its own small case (where reading, base maps and writing, which do not grow "
        "with the members, weigh more)."
    )


def targets(row: dict) -> list[str]:
    t_ok, m_ok = row["wall_s"] <= TARGET_SECONDS, row["peak_mb"] <= TARGET_MB
    return [
        f"- {row['name']} under {TARGET_SECONDS:.0f} s: **{'met' if t_ok else 'not met'}** "
        f"({row['wall_s']:.1f} s)",
        f"- {row['name']} under {TARGET_MB / 1024:.0f} GB peak memory: "
        f"**{'met' if m_ok else 'not met'}** ({row['peak_mb']:,.0f} MB)",
    ]


def section(rows: list[dict], info: dict, command: str) -> str:
    today = datetime.now(UTC).date().isoformat()
    lines = [
        BEGIN,
        "## ensemble_run: ensemble engine (fast path and fallback)",
        "",
        f"Recorded {today} with `{command}`.",
        "",
        "Machine: " + "; ".join(f"{k} {v}" for k, v in info.items()) + ".",
        "",
    ]
    lines += table(rows) + [""]
    lines += [
        "Wall time: subprocess start to exit (imports included). Peak memory: highest sum of "
        "RSS over the process tree, sampled with psutil every 20 ms. Per member: the 'maps' "
        "stage (statistics and writing included) divided by the members. Varied: viscosity "
        "(log-uniform), channel thickness "
        "(truncated normal), channel density (uniform); reported: flux magnitude, "
        "thickening and uplift rate (5, 50, 95th percentiles, mean, sd) and the exceedance "
        "of 0.5 and 1 mm/yr uplift.",
        "",
    ]
    lines += [comparison(rows), ""]
    lines += ["Targets:", ""] + targets(rows[0]) + ["", END, ""]
    return "\n".join(lines)


def write_results(text: str) -> None:
    old = RESULTS.read_text() if RESULTS.is_file() else "# Benchmark results\n"
    pattern = re.compile(re.escape(BEGIN) + ".*?" + re.escape(END) + r"\n?", re.S)
    new = (
        pattern.sub(lambda _: text, old)
        if pattern.search(old)
        else (old.rstrip("\n") + "\n\n" + text)
    )
    RESULTS.write_text(new)
    print(f"wrote the ensemble_run section of {RESULTS}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__.split("\n\n")[0], formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--size", type=int, default=1000, help="cells per side (default 1000)")
    parser.add_argument("--members", type=int, default=1000, help="members (default 1000)")
    parser.add_argument(
        "--fallback-size",
        type=int,
        default=300,
        help="cells per side of the fallback case (default 300)",
    )
    parser.add_argument(
        "--fallback-members", type=int, default=20, help="members of the fallback case (default 20)"
    )
    parser.add_argument(
        "--write-results", action="store_true", help="write the results into benchmarks/RESULTS.md"
    )
    args = parser.parse_args(argv)
    if min(args.size, args.fallback_size) < 16 or min(args.members, args.fallback_members) < 2:
        parser.error("sizes must be at least 16 and members at least 2")
    info = machine(REPO)
    print("machine:")
    for key, value in info.items():
        print(f"  {key:<10} {value}")
    cases = [
        ("fast path", args.size, args.members, True),
        ("fallback (fields_si per member)", args.fallback_size, args.fallback_members, False),
        ("fast path, same small case", args.fallback_size, args.fallback_members, True),
    ]
    rows = []
    for name, size, members, fast in cases:
        print(f"{name}: {members} members on {size} x {size} ...", end=" ", flush=True)
        began = time.perf_counter()
        row = run_case(size, members, fast)
        row["name"] = name
        rows.append(row)
        print(
            f"{row['wall_s']:.2f} s, peak {row['peak_mb']:,.0f} MB "
            f"({time.perf_counter() - began:.1f} s with grid building)",
            flush=True,
        )
    print()
    print("\n".join(table(rows)))
    print("\n".join(targets(rows[0])).replace("**", ""))
    print(comparison(rows))
    if args.write_results:
        command = "python benchmarks/ensemble_run.py --write-results"
        for flag, default in (
            ("size", 1000),
            ("members", 1000),
            ("fallback_size", 300),
            ("fallback_members", 20),
        ):
            if getattr(args, flag) != default:
                command += f" --{flag.replace('_', '-')} {getattr(args, flag)}"
        write_results(section(rows, info, command))
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main())
    except subprocess.CalledProcessError as exc:  # pragma: no cover - told to the user
        sys.exit(str(exc))
