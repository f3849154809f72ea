# psutil: benchmark-only dependency (pip install psutil); crustflow itself does not need it.
"""Benchmark of ``crustflow fit``: 500 observations on a 1000 x 1000 grid, 3 parameters, 64 walkers
x 5000 steps, on the fast path.

    python benchmarks/fit.py                     # the case below
    python benchmarks/fit.py --steps 500         # a quick look
    python benchmarks/fit.py --write-results     # also update benchmarks/RESULTS.md

The grids are those of ``benchmarks/ensemble_run.py`` (the invented plateau stretched onto a
``--size`` x ``--size`` grid of 800 km, EPSG:32625), built in ``benchmarks/_work/`` and reused. The
observations are invented: ``--observations`` cells drawn with a fixed seed among those with an
uplift rate above 10 % of the largest, their model uplift rate at h = 15 km, eta = 1e19 Pa s and a
channel density of 2800 kg/m^3 (``crustflow.solve``), plus Gaussian noise of 10 % of the mean
absolute uplift, written as a GeoPackage of points. Priors: viscosity log-uniform 1e18-1e21 Pa s,
channel thickness uniform 8-25 km, channel density uniform 2700-2900 kg/m^3.

One fresh subprocess runs :func:`crustflow.analyses.fitting.run.run_fit` (the body of
``crustflow fit``: observations, base maps at the sites, MAP, sampling, summary, posterior-predictive
maps over 200 draws, residual layer, figures). Wall time (start to exit, imports included) and peak
memory of the process tree come from ``benchmarks/core_run.py``'s ``measure``; stage times from the
fit's manifest. Target: under 2 minutes. Nothing asserts on timing.
"""

from __future__ import annotations

import argparse
import json
import os
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
from ensemble_run import SCENARIO, build_grids  # noqa: E402  (the same grids)

RESULTS = HERE / "RESULTS.md"
BEGIN, END = "<!-- fit:begin -->", "<!-- fit:end -->"
TARGET_SECONDS = 120.0

PRIORS = {
    "channel.viscosity": {"distribution": "log-uniform", "low": "1e18 Pa*s", "high": "1e21 Pa*s"},
    "channel.thickness": {"distribution": "uniform", "low": "8 km", "high": "25 km"},
    "densities.channel": {"distribution": "uniform", "low": "2700 kg/m^3", "high": "2900 kg/m^3"},
}

#: The child process: load the scenario, run the fit into a folder, report the manifest as JSON.
CHILD = """
import json, sys, time
began = time.perf_counter()
from pathlib import Path
import crustflow
from crustflow.analyses.fitting.run import run_fit
job = json.loads(Path(sys.argv[1]).read_text())
scenario = crustflow.scenario_from_dict(job["scenario"], base_dir=job["folder"])
done = run_fit(scenario, job["out"])
m = done["manifest"]
Path(job["report"]).write_text(json.dumps({"stages": m["stage_seconds"],
    "evaluations": m["likelihood_evaluations"], "fast_path": m["fast_path"],
    "kept": m["observations_kept"], "line": done["summary_line"],
    "summary": m["summary"], "seconds_in_python": time.perf_counter() - began}))
"""


def observations(folder: Path, count: int, seed: int = 7) -> Path:
    """Invented observation points: model uplift at the truth plus noise (GeoPackage)."""
    import geopandas as gpd

    import crustflow

    path = folder / f"uplift_invented_{count}.gpkg"
    if path.is_file():
        return path
    scenario = crustflow.scenario_from_dict(SCENARIO, base_dir=folder)
    ds = crustflow.solve(scenario)
    u = ds["uplift_rate"].values  # mm/yr
    rows, cols = np.nonzero(np.abs(u) > 0.1 * np.nanmax(np.abs(u)))
    rng = np.random.default_rng(seed)
    pick = rng.choice(rows.size, count, replace=False)
    r, c = rows[pick], cols[pick]
    sd = 0.1 * np.abs(u[r, c]).mean()
    gpd.GeoDataFrame(
        {
            "name": [f"invented {i}" for i in range(count)],
            "rate": u[r, c] + rng.normal(0.0, sd, count),
            "rate_sd": np.full(count, sd),
        },
        geometry=gpd.points_from_xy(ds.x.values[c], ds.y.values[r]),
        crs=ds.rio.crs,
    ).to_file(path, driver="GPKG")
    return path


def run_case(size: int, count: int, walkers: int, steps: int) -> dict:
    folder = build_grids(size)
    points = observations(folder, count)
    with tempfile.TemporaryDirectory(dir=WORK) as tmp:
        tmp = Path(tmp)
        out = tmp / "out"
        out.mkdir()
        scenario = dict(
            SCENARIO,
            fit={
                "observations": [
                    {
                        "file": points.name,
                        "variable": "uplift_rate",
                        "value": "rate",
                        "sigma": "rate_sd",
                        "units": "mm/yr",
                    }
                ],
                "parameters": PRIORS,
                "sampler": {
                    "seed": 11,
                    "walkers": walkers,
                    "steps": steps,
                    "burn_in": steps // 5,
                    "thin": 10,
                },
            },
        )
        job = {"scenario": scenario, "folder": str(folder), "out": str(out)}
        job["report"] = str(tmp / "summary.json")
        (tmp / "job.json").write_text(json.dumps(job))
        sample = measure([sys.executable, "-c", CHILD, str(tmp / "job.json")])
        summary = json.loads((tmp / "summary.json").read_text())
    return {
        "size": size,
        "observations": count,
        "walkers": walkers,
        "steps": steps,
        "wall_s": sample.wall_s,
        "peak_mb": sample.peak_tree_mb,
        "maxrss_mb": sample.maxrss_mb,
        **summary,
    }


def table(row: dict) -> list[str]:
    stages = ", ".join(f"{k} {v:.2f}" for k, v in row["stages"].items())
    sampling = row["stages"]["MAP and sampling"]
    return [
        "| grid | observations | parameters | walkers x steps | wall time (s) | likelihood "
        "evaluations | evaluations per second (sampling stage) | peak memory (MB) | stages (s) |",
        "|---|---:|---:|---|---:|---:|---:|---:|---|",
        f"| {row['size']:,} x {row['size']:,} | {row['kept']} | {len(PRIORS)} "
        f"| {row['walkers']} x {row['steps']:,} | {row['wall_s']:.1f} | {row['evaluations']:,} "
        f"| {row['evaluations'] / sampling:,.0f} | {row['peak_mb']:,.0f} | {stages} |",
    ]


def posterior_lines(row: dict) -> list[str]:
    lines = [
        "| parameter | units | median | p05 | p95 | ess | r_hat | flags |",
        "|---|---|---:|---:|---:|---:|---:|---|",
    ]
    for s in row["summary"]:
        lines.append(
            f"| {s['parameter']} | {s['units']} | {s['median']:.4g} | {s['p05']:.4g} "
            f"| {s['p95']:.4g} | {s['ess']:.0f} | {s['r_hat']:.3f} | {s['flags'] or 'none'} |"
        )
    return lines


def target(row: dict) -> str:
    ok = row["wall_s"] <= TARGET_SECONDS
    return (
        f"- fast path, whole command under {TARGET_SECONDS:.0f} s: "
        f"**{'met' if ok else 'not met'}** ({row['wall_s']:.1f} s)"
    )


def section(row: dict, info: dict, command: str) -> str:
    today = datetime.now(UTC).date().isoformat()
    lines = [
        BEGIN,
        "## fit: `crustflow fit` on the fast path (500 observations, 3 parameters)",
        "",
        f"Recorded {today} with `{command}`.",
        "",
        "Machine: " + "; ".join(f"{k} {v}" for k, v in info.items()) + ".",
        f"One-minute load average {row['load'][0]:.1f} before and {row['load'][1]:.1f} after the "
        "run (2 cores shared with other work: times are longer under load).",
        "",
        *table(row),
        "",
        "Wall time: subprocess start to exit (imports included), the whole body of `crustflow "
        "fit`: reading the observations and the base maps at their cells, the MAP start, "
        "sampling, the summary, the posterior-predictive maps (200 posterior draws over the "
        "whole grid), the residual layer and the figures. Peak memory: highest sum of RSS over "
        "the process tree (psutil, every 20 ms). Invented observations (model values plus 10 % "
        "noise); priors: viscosity log-uniform 1e18-1e21 Pa s, thickness uniform 8-25 km, "
        "channel density uniform 2700-2900 kg/m^3. Truth: 15 km, 1e19 Pa s, 2800 kg/m^3 "
        "(transmissivity 2.81e-8 m^3/(Pa s)).",
        "",
        f"Fit: {row['line']}.",
        "",
        *posterior_lines(row),
        "",
        "This is a timing case, not a demonstration of convergence. h and eta trade off along "
        "h^3/eta = const (a straight line in the sampler's logarithmic coordinates); with the "
        "channel density free as well, the transmissivity trades off against the density (both "
        "the drive and the isostatic uplift factor depend on it), so it is not tight here, and "
        "64 x 5,000 steps are short of 50 autocorrelation times: the summary flags it.",
        "",
        "Targets:",
        "",
        target(row),
        "",
        END,
        "",
    ]
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
    print(f"wrote the fit section of {RESULTS}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__.split("\n\n")[0], formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--size", type=int, default=1000, help="cells per side (default 1000)")
    parser.add_argument("--observations", type=int, default=500, help="points (default 500)")
    parser.add_argument("--walkers", type=int, default=64, help="walkers (default 64)")
    parser.add_argument("--steps", type=int, default=5000, help="steps (default 5000)")
    parser.add_argument(
        "--write-results", action="store_true", help="write the results into benchmarks/RESULTS.md"
    )
    args = parser.parse_args(argv)
    info = machine(REPO)
    print("machine:")
    for key, value in info.items():
        print(f"  {key:<10} {value}")
    print(
        f"fit: {args.observations} observations on {args.size} x {args.size}, "
        f"{args.walkers} walkers x {args.steps} steps ...",
        end=" ",
        flush=True,
    )
    began = time.perf_counter()
    load = os.getloadavg()[0]
    row = run_case(args.size, args.observations, args.walkers, args.steps)
    row["load"] = (load, os.getloadavg()[0])
    print(f"{row['wall_s']:.1f} s ({time.perf_counter() - began:.1f} s with grid building)")
    print(f"load average {row['load'][0]:.1f} before, {row['load'][1]:.1f} after")
    print()
    print("\n".join(table(row)))
    print()
    print("\n".join(posterior_lines(row)))
    print(f"fit: {row['line']}")
    print(target(row).replace("**", ""))
    if args.write_results:
        command = "python benchmarks/fit.py --write-results"
        for flag, default in (
            ("size", 1000),
            ("observations", 500),
            ("walkers", 64),
            ("steps", 5000),
        ):
            if getattr(args, flag) != default:
                command += f" --{flag} {getattr(args, flag)}"
        write_results(section(row, info, command))
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main())
    except subprocess.CalledProcessError as exc:  # pragma: no cover - told to the user
        sys.exit(str(exc))
