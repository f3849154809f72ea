"""Benchmark: ``crustflow.solve(scenario, variables=[3 names], chunks=N)`` lazily, then computed.

Builds (or reuses) the 4000 x 4000 invented plateau grids of ``core_run.py``, then runs in a fresh
subprocess: the lazy solve with three variables, ``.compute()`` of the dask-backed Dataset, and a
comparison with the command's GeoTIFFs of the same three variables (``crustflow run`` on the same
scenario, also timed). Prints wall time, cells per second and the kernel's high-water resident memory
(``ru_maxrss``) of each subprocess. Target (issue: lazy API): at most 1 GB peak, equal to the command.

    python benchmarks/lazy_api.py [--size 4000] [--chunks 1024] [--write-results]
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from core_run import build_scenario  # noqa: E402

RESULTS = HERE / "RESULTS.md"

LAZY = """
import json, sys, time
import numpy as np, rasterio
import crustflow
began = time.perf_counter()
scenario = crustflow.load_scenario(sys.argv[1])
names = ["flux_east", "flux_north", "thickening_rate"]
ds = crustflow.solve(scenario, variables=names, chunks=int(sys.argv[2]))
lazy = all(type(ds[n].data).__module__.startswith("dask") for n in names)
built = time.perf_counter() - began
ds = ds.compute()
equal = True
for n in names:
    with rasterio.open(f"{sys.argv[3]}/{n}.tif") as src:
        equal &= bool(np.array_equal(src.read(1), ds[n].values, equal_nan=True))
print(json.dumps({"lazy": lazy, "graph_s": built, "equal_to_command": equal}))
"""


def _run(cmd: list[str]) -> tuple[float, float, str]:
    began = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - began
    out = proc.stdout.read()
    if status != 0:
        raise SystemExit(f"benchmark step failed: {' '.join(cmd)}")
    return wall, usage.ru_maxrss / 1024.0, out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=4000)
    parser.add_argument("--chunks", type=int, default=1024)
    parser.add_argument("--write-results", action="store_true")
    args = parser.parse_args(argv)
    paths = build_scenario(args.size, HERE / "_work" / f"n{args.size}")
    out = HERE / "_work" / f"lazy_run_{args.size}"
    cli = [
        sys.executable,
        "-m",
        "crustflow",
        "run",
        str(paths["three"]),
        "--out",
        str(out),
        "--quiet",
    ]
    run_wall, run_rss, _ = _run(cli)
    lazy_wall, lazy_rss, printed = _run(
        [sys.executable, "-c", LAZY, str(paths["three"]), str(args.chunks), str(out)]
    )
    info = json.loads(printed.strip().splitlines()[-1])
    cells = args.size * args.size
    lines = [
        f"<!-- lazy_api:begin -->\n## lazy_api: solve(..., variables=[3], chunks={args.chunks}) "
        f"at {args.size} x {args.size}\n",
        "| what | wall s | cells/s | peak RSS MB |",
        "|---|---|---|---|",
        f"| `crustflow run` (3 variables) | {run_wall:.1f} | {cells / run_wall:,.0f} | {run_rss:.0f} |",
        f"| `solve(chunks=...)` + `.compute()` | {lazy_wall:.1f} | {cells / lazy_wall:,.0f} "
        f"| {lazy_rss:.0f} |",
        "",
        f"Dask-backed before compute: {info['lazy']}; graph built in {info['graph_s']:.1f} s "
        f"(includes the streaming check of the grids); equal to the command's GeoTIFFs bit for "
        f"bit: {info['equal_to_command']}. Target: <= 1 GB peak.",
        "<!-- lazy_api:end -->",
    ]
    text = "\n".join(lines) + "\n"
    print(text)
    if args.write_results:
        old = RESULTS.read_text()
        pattern = re.compile(r"<!-- lazy_api:begin -->.*?<!-- lazy_api:end -->\n?", re.S)
        RESULTS.write_text(
            pattern.sub(lambda _: text, old)
            if pattern.search(old)
            else old.rstrip() + "\n\n" + text
        )
    return 0 if info["equal_to_command"] and info["lazy"] else 1


if __name__ == "__main__":
    sys.exit(main())
