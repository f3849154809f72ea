"""Throughput of the per-cell rheology kernels on one core (cells per second).

    python benchmarks/rheology_cells.py                  # 1,000,000 cells, best of 3
    python benchmarks/rheology_cells.py --cells 200000   # a quick look

Cases (synthetic cells, invented for timing only; SI inside):

1. Newtonian channel, temperature linear across it: Gauss-Legendre fluidity moments of an Arrhenius
   law (16 nodes) and the flux and wall stress from ``crustflow.physics.channel.flux_from_moments``.
2. Power-law channel, n = 3 (wet anorthite, Rybacki & Dresen 2000), uniform temperature, upper
   wall moving at 60-120 degrees to the drive: exact polynomial integrals and Newton.
3. The same with the temperature linear across the channel (prefactor profile).
4. Power-law channel, n = 4 (wet quartzite, Gleason & Tullis 1995), uniform temperature and with
   the temperature across the channel: the split Gauss-Legendre path.

Channels 10-30 km thick, drive 10-500 Pa/m in any direction, wall speed 5-20 mm/yr, wall
temperatures 850-1150 K. The Newtonian case computes flux and lower-wall stress (all that
``flux_from_moments`` gives); the power-law cases the full solution (flux, mean velocity, wall
drags, peak speed and height, backflow, wall-driven share, effective viscosity, convergence
mask). The process is pinned to one core and BLAS to one thread. Nothing here asserts on
timing: the targets are reported, not enforced. Prints a table; it writes nothing.
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"  # before NumPy loads BLAS
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse  # noqa: E402
import platform  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from crustflow.physics.channel import flux_from_moments  # noqa: E402
from crustflow.physics.flowlaws import flow_law, newtonian_flow_law, simple_shear_prefactor  # noqa: E402
from crustflow.physics.rheology import (
    arrhenius_fluidity_moments,
    flow_law_channel,
    power_law_channel,
)

#: Julian year (s).
YEAR = 365.25 * 86400.0
#: Targets of the task (cells per second on one core).
TARGET_UNIFORM = 1_000_000
TARGET_ACROSS = 200_000


def make_cells(count: int, seed: int = 20261201) -> dict[str, np.ndarray]:
    """Synthetic cells: drive, wall velocity at 60-120 degrees to it, thickness, temperatures."""
    rng = np.random.default_rng(seed)
    drive = rng.uniform(10.0, 500.0, count)
    azimuth = rng.uniform(0.0, 2 * np.pi, count)
    turn = np.deg2rad(rng.uniform(60.0, 120.0, count)) * rng.choice([-1.0, 1.0], count)
    speed = rng.uniform(5e-3, 20e-3, count) / YEAR
    top = rng.uniform(850.0, 950.0, count)
    return {
        "drive_east": drive * np.cos(azimuth),
        "drive_north": drive * np.sin(azimuth),
        "wall_east": speed * np.cos(azimuth + turn),
        "wall_north": speed * np.sin(azimuth + turn),
        "thickness": rng.uniform(10e3, 30e3, count),
        "top": top,
        "base": top + rng.uniform(100.0, 200.0, count),
    }


def newtonian_across(c):
    law = newtonian_flow_law(1e19, 1000.0, 300e3)  # invented reference viscosity, Q 300 kJ/mol
    moments = arrhenius_fluidity_moments(law, c["thickness"], c["top"], c["base"])
    return flux_from_moments(
        c["drive_east"],
        c["drive_north"],
        c["thickness"],
        *moments,
        wall_east=c["wall_east"],
        wall_north=c["wall_north"],
    )


def power_uniform(c, name):
    law = flow_law(name)
    prefactor = simple_shear_prefactor(law, 0.5 * (c["top"] + c["base"]))
    return power_law_channel(
        c["drive_east"],
        c["drive_north"],
        c["thickness"],
        prefactor,
        law.stress_exponent,
        wall_east=c["wall_east"],
        wall_north=c["wall_north"],
    )


def power_across(c, name):
    return flow_law_channel(
        c["drive_east"],
        c["drive_north"],
        c["thickness"],
        flow_law(name),
        c["top"],
        c["base"],
        wall_east=c["wall_east"],
        wall_north=c["wall_north"],
    )


CASES = [
    ("Newtonian, T across channel (Gauss moments)", newtonian_across, TARGET_ACROSS),
    (
        "power law n=3, uniform T (polynomial)",
        lambda c: power_uniform(c, "wet-anorthite"),
        TARGET_UNIFORM,
    ),
    ("power law n=3, T across channel", lambda c: power_across(c, "wet-anorthite"), TARGET_ACROSS),
    (
        "power law n=4, uniform T (split quadrature)",
        lambda c: power_uniform(c, "wet-quartzite"),
        None,
    ),
    ("power law n=4, T across channel", lambda c: power_across(c, "wet-quartzite"), None),
]


def pin_to_one_core() -> str:
    """Pin this process to one core where the OS allows; return a description."""
    if hasattr(os, "sched_setaffinity"):
        core = min(os.sched_getaffinity(0))
        os.sched_setaffinity(0, {core})
        return f"pinned to core {core}"
    return "not pinned (no sched_setaffinity)"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=int, default=1_000_000, help="cells per case")
    parser.add_argument("--repeat", type=int, default=3, help="runs per case; the best counts")
    args = parser.parse_args()

    pinned = pin_to_one_core()
    cells = make_cells(args.cells)
    print(
        f"{platform.processor() or platform.machine()}, Python {platform.python_version()}, "
        f"NumPy {np.__version__}, {pinned}, {args.cells:,} cells, best of {args.repeat}"
    )
    header = f"| {'case':<46} | {'best s':>7} | {'cells/s':>11} | {'target':>9} | met |"
    print(header)
    print("|" + "|".join("-" * (len(part)) for part in header.split("|")[1:-1]) + "|")
    for label, run, target in CASES:
        best = np.inf
        for _ in range(args.repeat):
            start = time.perf_counter()
            result = run(cells)
            best = min(best, time.perf_counter() - start)
        if hasattr(result, "converged") and not np.all(result.converged):
            label += f" [{np.count_nonzero(~result.converged)} not converged]"
        rate = args.cells / best
        goal = f"{target:,}" if target else "-"
        met = ("yes" if rate >= target else "NO") if target else "-"
        print(f"| {label:<46} | {best:7.3f} | {rate:11,.0f} | {goal:>9} | {met:>3} |")
        if hasattr(result, "iterations"):
            counts = np.bincount(result.iterations.ravel())
            print(
                f"|   Newton iterations: mean {result.iterations.mean():.2f}, histogram {counts.tolist()}"
            )


if __name__ == "__main__":
    main()
