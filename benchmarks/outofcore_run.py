"""Whole-grid steps out of core and the output codecs: the full run and a filtered run at scale.

Runs, each as a fresh subprocess measured like ``scale.py`` (wall time, peak RSS of the process
tree polled every 20 ms with psutil, CPU time of the tree and of the rest of the machine):

1. ``crustflow run`` of the default full output (every variable, thin-channel map included; NetCDF +
   GeoTIFF + figure) at ``--full-size`` (default 8000) cells a side, once per codec of
   ``[output] compression`` asked for (default: deflate, zstd, lerc_zstd, none). The run without
   compression is the floor: what computing and writing the bytes costs without any codec.
2. ``crustflow run`` of a filtered three-variable run (``[load] smoothing = "10 km"``,
   ``elastic_thickness = "20 km"``; flux_east, flux_north, thickening_rate as GeoTIFF) at
   ``--filtered-size`` (default 20000) cells a side: the load filters out of core above 1e8 cells.

The grids are those of ``scale.py`` (the invented plateau, 250 m cells, EPSG:32625; built when
missing). ``--write-results`` writes the ``outofcore`` section of RESULTS.md. Targets (issue on
whole-grid steps): the default full run at 8,000 x 8,000 in <= 2 GB peak and <= 150 s; the filters
work at 20,000 x 20,000.

    python benchmarks/outofcore_run.py --full-size 1000 --filtered-size 1000   # quick check
"""

from __future__ import annotations

import argparse
import os
import re
import sys
from datetime import UTC, datetime
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import scale  # noqa: E402 - the sibling benchmark script

CODECS = ("deflate", "zstd", "lerc_zstd", "none")
FILTERED = """
[load]
smoothing = "10 km"
elastic_thickness = "20 km"

[output]
variables = ["flux_east", "flux_north", "thickening_rate"]
formats = ["geotiff"]
"""
TARGET_FULL_MB, TARGET_FULL_S = 2048, 150.0


def scenarios(case: scale.Case, codecs) -> dict[str, Path]:
    paths = scale.build_scenario(case)
    grid = f"{case.label} cells"
    out = {}
    for codec in codecs:
        output = "" if codec == "deflate" else f'\n[output]\ncompression = "{codec}"\n'
        path = case.folder / f"full_{codec}.toml"
        path.write_text(
            scale.SCENARIO.format(grid=grid, suffix=f", full output, {codec}", output=output)
        )
        out[f"full, {codec}"] = path
    path = case.folder / "filtered.toml"
    path.write_text(scale.SCENARIO.format(grid=grid, suffix=", filtered", output=FILTERED))
    out["filtered"] = path
    del paths
    return out


def run(case: scale.Case, name: str, scenario: Path) -> dict:
    crustflow = Path(sys.executable).with_name("crustflow")
    out = case.folder / ("out_" + re.sub(r"\W+", "_", name))
    cmd = [str(crustflow), "run", str(scenario), "--out", str(out), "--quiet"]
    print(f"{case.label}, {name} ...", end=" ", flush=True)
    sample = scale.measure(cmd)
    stages, rows = scale._run_json(out)
    size = scale._folder_bytes(out)
    print(
        f"{sample.wall_s:.1f} s, peak {sample.peak_tree_mb:,.0f} MB, {sample.cores:.2f} cores "
        f"(others {sample.other_cores:.2f}), outputs {size / 2**20:,.0f} MB",
        flush=True,
    )
    return {"case": case, "name": name, "sample": sample, "stages": stages, "bytes": size}


def table(rows: list[dict]) -> list[str]:
    lines = [
        "| grid | run | wall time (s) | peak memory (MB, process tree) | CPU used (cores) | "
        "CPU time (s) | other processes' CPU (cores) | outputs (MB) | stages (s, run.json) |",
        "|---|---|---:|---:|---:|---:|---:|---:|---|",
    ]
    for r in rows:
        s = r["sample"]
        stages = ", ".join(f"{k} {v:.1f}" for k, v in r["stages"].items())
        lines.append(
            f"| {r['case'].label} | {r['name']} | {s.wall_s:.1f} | {s.peak_tree_mb:,.0f} | "
            f"{s.cores:.2f} | {s.cpu_s:.1f} | {s.other_cores:.2f} | {r['bytes'] / 2**20:,.0f} | "
            f"{stages} |"
        )
    return lines


def section(args, info, rows: list[dict], load0, load1) -> str:
    stamp = datetime.now(UTC).strftime("%Y-%m-%d")
    argv = " ".join(sys.argv[1:])
    lines = [
        "<!-- outofcore:begin -->",
        "## outofcore: whole-grid steps out of core, output codecs",
        "",
        f"Recorded {stamp} with `python benchmarks/outofcore_run.py {argv}`.",
        "",
    ]
    if args.note:
        lines += [args.note, ""]
    lines += ["Machine: " + "; ".join(f"{k} {v}" for k, v in info.items()) + ".", ""]
    lines += [
        f"Load average (1 / 5 / 15 min): {scale._load(load0)} at the start, "
        f"{scale._load(load1)} at the end.",
        "",
    ]
    lines += table(rows) + [""]
    lines += [
        "Wall time: subprocess start to exit, imports included. Peak memory: highest sum of RSS "
        "over the process tree, sampled with psutil every 20 ms. CPU time: user + system of the "
        "tree; other processes' CPU: busy CPU time of the machine minus the run's, per second of "
        "wall time (anything well above 0 means the run shared its two cores).",
        "",
    ]
    floor = next((r for r in rows if r["name"] == "full, none"), None)
    if floor is not None:
        lines.append("Compression against the floor (the same run without a codec):")
        lines.append("")
        for r in rows:
            if r["name"].startswith("full, ") and r is not floor:
                extra = r["sample"].cpu_s - floor["sample"].cpu_s
                lines.append(
                    f"- {r['name'][6:]}: {r['sample'].wall_s - floor['sample'].wall_s:+.1f} s "
                    f"wall, {extra:+.1f} s CPU, outputs {r['bytes'] / floor['bytes']:.0%} of "
                    "the uncompressed size"
                )
        lines.append("")
    lines.append("Targets:")
    lines.append("")
    for r in rows:
        s = r["sample"]
        if r["name"] == "full, deflate" and r["case"].width == 8000:
            ok_mb, ok_s = s.peak_tree_mb <= TARGET_FULL_MB, s.wall_s <= TARGET_FULL_S
            lines.append(
                f"- default full run at 8,000 x 8,000, peak <= 2 GB: "
                f"**{'met' if ok_mb else 'not met'}** ({s.peak_tree_mb:,.0f} MB)"
            )
            lines.append(
                f"- default full run at 8,000 x 8,000, <= 150 s: "
                f"**{'met' if ok_s else 'not met'}** ({s.wall_s:.1f} s, "
                f"{s.cpu_s:.1f} s of CPU on 2 cores)"
            )
        if r["name"] == "filtered":
            lines.append(
                f"- filters at {r['case'].label}: **works** ({s.wall_s:.1f} s, "
                f"{s.peak_tree_mb:,.0f} MB peak)"
            )
    lines += ["", "<!-- outofcore:end -->", ""]
    return "\n".join(lines)


def write_results(text: str) -> None:
    old = scale.RESULTS.read_text()
    pattern = re.compile(r"<!-- outofcore:begin -->.*?<!-- outofcore:end -->\n?", re.S)
    new = pattern.sub(lambda _: text, old) if pattern.search(old) else old.rstrip() + "\n\n" + text
    scale.RESULTS.write_text(new)
    print(f"wrote section 'outofcore' to {scale.RESULTS}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--full-size", type=int, default=8000, metavar="N")
    parser.add_argument("--filtered-size", type=int, default=20000, metavar="N")
    parser.add_argument("--codecs", nargs="+", default=list(CODECS), choices=CODECS)
    parser.add_argument("--skip-filtered", action="store_true")
    parser.add_argument("--write-results", action="store_true")
    parser.add_argument("--note", default="")
    args = parser.parse_args(argv)
    info = scale.machine()
    load0 = os.getloadavg()
    rows = []
    full = scale.projected(args.full_size)
    paths = scenarios(full, args.codecs)
    for codec in args.codecs:
        rows.append(run(full, f"full, {codec}", paths[f"full, {codec}"]))
    if not args.skip_filtered:
        case = scale.projected(args.filtered_size)
        rows.append(run(case, "filtered", scenarios(case, [])["filtered"]))
    load1 = os.getloadavg()
    text = section(args, info, rows, load0, load1)
    print(text)
    if args.write_results:
        write_results(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
