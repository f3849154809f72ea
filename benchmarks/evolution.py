"""Benchmark of the evolution through time (``crustflow.evolve``): cells per second and peak memory.

    python benchmarks/evolution.py                       # 1000 x 1000, Newtonian, 10 Myr, 11 snapshots
    python benchmarks/evolution.py --law power-law       # the same with a power-law channel, n = 3
    python benchmarks/evolution.py --size 300            # a quick look

The grid is synthetic and projected (EPSG:32625, 1 km cells): an invented round plateau 4 km high and
600 km across with smooth margins (tanh, 60 km wide), crust in Airy balance (35 km at sea level), a
15 km channel, all edges closed. Newtonian: eta = 1e19 Pa s (kappa = 1.17e-4 m^2/s). Power law:
n = 3 with the simple-shear prefactor A = 2.5e-32 Pa^-3 s^-1: an effective viscosity 1/(A tau^2) of
1e19 Pa s at 2 MPa shear stress, so the two runs are of the same order (project choice, no
source). The run goes through :func:`crustflow.analyses.evolution.evolve.evolve_grids` in this
process (the command adds the writing of files). Peak memory is the process's resident high-water
mark (``ru_maxrss``); CPU time is printed too, as the machine is shared.
Nothing here asserts on timing; the targets (<= 120 s and <= 3 GB for Newtonian, <= 10 min for the
power law) are reported, not enforced.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

#: Targets of issue 11.
TARGET_SECONDS = {"newtonian": 120.0, "power-law": 600.0}
TARGET_PEAK_GB = 3.0


def plateau(size: int, cell: float = 1000.0):
    """The invented plateau on a size x size projected grid (xarray, EPSG:32625)."""
    import rioxarray  # noqa: F401
    import xarray as xr

    x = 500_000.0 + (np.arange(size) + 0.5) * cell
    y = 5_000_000.0 - (np.arange(size) + 0.5) * cell
    cx, cy = x.mean(), y.mean()
    r = np.hypot(x[None, :] - cx, y[:, None] - cy)
    radius = 0.3 * size * cell
    elevation = 4000.0 * 0.5 * (1.0 - np.tanh((r - radius) / (0.06 * size * cell)))
    thickness = 35_000.0 + elevation * 2800.0 / (3300.0 - 2800.0)
    topo = xr.DataArray(elevation, dims=("y", "x"), coords={"y": y, "x": x})
    topo = topo.rio.write_crs("EPSG:32625")
    topo = topo.rio.write_transform(topo.rio.transform(recalc=True))
    return topo, topo.copy(data=thickness)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--law", choices=("newtonian", "power-law"), default="newtonian")
    parser.add_argument("--duration-myr", type=float, default=10.0)
    parser.add_argument("--snapshots", type=int, default=11)
    parser.add_argument("--tolerance-m", type=float, default=5.0)
    parser.add_argument(
        "--extent-km",
        type=float,
        default=None,
        help="side of the square grid, km (default: 1 km cells); e.g. --size 250 --extent-km 1000 "
        "gives the 1000 x 1000 landscape at 4 km cells",
    )
    args = parser.parse_args()

    from crustflow.analyses.evolution.evolve import evolve_grids
    from crustflow.analyses.evolution.model import SECONDS_PER_MYR
    from crustflow.scenario.channel import ChannelSetup
    from crustflow.scenario.evolution import EvolutionSpec
    from crustflow.scenario.parameters import ModelParameters

    cell = 1000.0 if args.extent_km is None else args.extent_km * 1e3 / args.size
    topo, thickness = plateau(args.size, cell)
    if args.law == "newtonian":
        params, channel = ModelParameters(channel_thickness=15e3, viscosity=1e19), None
    else:
        params = ModelParameters(channel_thickness=15e3, viscosity=None)
        channel = ChannelSetup(rheology="power-law", stress_exponent=3.0, prefactor=2.5e-32)
    duration = args.duration_myr * SECONDS_PER_MYR
    spec = EvolutionSpec(
        duration=duration,
        save_every=duration / (args.snapshots - 1),
        tolerance=args.tolerance_m,
    )
    before = resource.getrusage(resource.RUSAGE_SELF)
    cpu_before = before.ru_utime + before.ru_stime
    began = time.perf_counter()
    ds = evolve_grids(
        topo, parameters=params, spec=spec, crust_thickness=thickness, channel=channel
    )
    wall = time.perf_counter() - began
    usage = resource.getrusage(resource.RUSAGE_SELF)
    cpu = usage.ru_utime + usage.ru_stime - cpu_before
    peak_gb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e9
    cells = args.size * args.size
    stepping = json.loads(ds.attrs["stepping"])
    balance = json.loads(ds.attrs["volume_balance"])
    print(
        f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
        f"load average {os.getloadavg()[0]:.1f}"
    )
    print(
        f"grid {args.size} x {args.size} ({cells:,} cells), {args.law}, "
        f"{args.duration_myr:g} Myr, {ds.sizes['time']} snapshots"
    )
    print(
        f"wall time {wall:.1f} s; cells x steps per second {cells * stepping['steps'] / wall:,.0f}; "
        f"cells per second (cells / wall time) {cells / wall:,.0f}"
    )
    print(
        f"CPU time {cpu:.1f} s ({cpu / wall:.2f} cores busy on average; other jobs share the machine)"
    )
    print(f"peak memory (ru_maxrss) {peak_gb:.2f} GB")
    print(
        f"steps {stepping['steps']}, repeated {stepping['rejected_steps']}, Newton iterations "
        f"{stepping['newton_iterations']}, CG iterations {stepping['krylov_iterations']}, "
        f"multigrid set-ups {stepping['multigrid_setups']}"
    )
    print(f"volume mismatch {balance['imbalance_relative']:.1e} of the volume")
    target = TARGET_SECONDS[args.law]
    if args.size == 1000:
        print(
            f"target wall time <= {target:g} s: {'met' if wall <= target else 'not met'}; "
            f"peak <= {TARGET_PEAK_GB:g} GB: {'met' if peak_gb <= TARGET_PEAK_GB else 'not met'}"
        )


if __name__ == "__main__":
    main()
