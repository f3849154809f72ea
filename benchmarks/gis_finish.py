"""What the GIS finishing of a GeoTIFF costs: statistics, overviews and the .qml sidecar.

Writes one float32 variable of ``--size`` x ``--size`` cells strip by strip with
``crustflow.io.writers.GeotiffWriter`` (strips generated on the fly, so no whole grid is ever held),
then times the finishing step (``crustflow.io.styles.finish_geotiff``: statistics and the colour
sample gathered by the writer as rows went by, overviews built by GDAL from the file with average
resampling, the style). Each size runs in a fresh
process that reports its wall times and its peak resident memory (``ru_maxrss``).

    python benchmarks/gis_finish.py                 # 1000, 2000 and 4000 cells a side
    python benchmarks/gis_finish.py --write-results # also update benchmarks/RESULTS.md
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent

#: Rows per strip written (as the strip engine does for a grid of this width).
STRIP_ROWS = 256


def _child(size: int) -> dict:
    import resource

    import numpy as np
    from rasterio.transform import Affine

    from crustflow.io.styles import finish_geotiff
    from crustflow.io.writers import GeotiffWriter
    from crustflow.variables import CAUTION, variable_attrs

    attrs = dict(variable_attrs("thickening_rate"), caution=CAUTION)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "thickening_rate.tif"
        writer = GeotiffWriter(
            path,
            crs="EPSG:32633",
            transform=Affine(1000.0, 0, 300e3, 0, -1000.0, 5200e3),
            height=size,
            width=size,
            attrs=attrs,
        )
        x = np.linspace(-3, 3, size)
        began = time.perf_counter()
        for r0 in range(0, size, STRIP_ROWS):
            y = np.linspace(-3, 3, size)[r0 : r0 + STRIP_ROWS, None]
            writer.write_rows(r0, (np.sin(3 * x) * np.cos(2 * y) * 40.0).astype("float32"))
        writer.dst.close()  # close without finishing, to time the two parts apart
        written = time.perf_counter() - began
        rss_written = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        began = time.perf_counter()
        finish_geotiff(path, variable="thickening_rate", attrs=attrs, statistics=writer.statistics)
        finished = time.perf_counter() - began
        size_mb = path.stat().st_size / 2**20
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {
        "size": size,
        "write_s": written,
        "finish_s": finished,
        "file_MB": size_mb,
        "grid_MB": size * size * 4 / 2**20,
        "peak_rss_MB": rss,
        "rss_after_write_MB": rss_written,
    }


def _table(rows: list[dict]) -> str:
    lines = [
        "| cells | write (s) | finish: statistics, overviews, .qml (s) | finish / write | "
        "float32 grid (MB) | peak RSS after writing (MB) | peak RSS after finishing (MB) |",
        "|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(
            f"| {r['size']:,} x {r['size']:,} | {r['write_s']:.2f} | {r['finish_s']:.2f} | "
            f"{r['finish_s'] / r['write_s']:.2f} | {r['grid_MB']:.0f} | "
            f"{r['rss_after_write_MB']:.0f} | {r['peak_rss_MB']:.0f} |"
        )
    return "\n".join(lines)


def _write_results(rows: list[dict]) -> None:
    import platform

    section = (
        "<!-- gis_finish:begin -->\n## gis_finish: statistics, overviews and style of a GeoTIFF\n\n"
        f"Recorded {time.strftime('%Y-%m-%d')} with `python benchmarks/gis_finish.py "
        f"--write-results` (Python {platform.python_version()}, shared 2-core machine).\n\n"
        f"{_table(rows)}\n\n"
        "Peak RSS includes the interpreter, numpy, rasterio and GDAL's block cache (default size: "
        "5 % of RAM); the finishing step holds no whole band: the writer gathers the statistics "
        "strip by strip and GDAL builds the overviews from the file.\n<!-- gis_finish:end -->\n"
    )
    results = HERE / "RESULTS.md"
    text = results.read_text()
    pattern = re.compile(r"<!-- gis_finish:begin -->.*?<!-- gis_finish:end -->\n", re.S)
    text = pattern.sub(section, text) if pattern.search(text) else text.rstrip() + "\n\n" + section
    results.write_text(text)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[1000, 2000, 4000])
    parser.add_argument("--write-results", action="store_true")
    parser.add_argument("--child", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(_child(args.child)))
        return
    rows = []
    for size in args.sizes:
        out = subprocess.run(
            [sys.executable, __file__, "--child", str(size)],
            capture_output=True,
            text=True,
            check=True,
        )
        rows.append(json.loads(out.stdout.strip().splitlines()[-1]))
    print(_table(rows))
    if args.write_results:
        _write_results(rows)


if __name__ == "__main__":
    main()
