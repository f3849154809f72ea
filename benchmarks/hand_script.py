"""Hand-written reference for the core benchmark: channel flux and thickening with numpy + rasterio.

This is the script a researcher would write by hand for the simplest case crustflow covers: a
uniform crust, a channel of the crust's density, walls at rest, a projected grid in metres. It reads
both grids whole (float64), takes the driving gradient ``G = rho_c g grad(H)``, the pressure-driven
channel flux ``q = -h^3 G / (12 eta)`` and the thickening rate ``-(dq_e/dx + dq_n/dy)``, all with
``np.gradient`` (central differences inside, one-sided at the edges), and writes three float32
tiled DEFLATE GeoTIFFs. No checks, no water load, no metadata beyond CRS, transform and nodata.

    python benchmarks/hand_script.py TOPOGRAPHY.tif CRUST.tif OUT_DIR
"""

import sys
from pathlib import Path

import numpy as np
import rasterio

RHO_C = 2800.0  # kg/m^3, crust and channel
G_ACC = 9.81  # m/s^2
H_CHANNEL = 15e3  # m
ETA = 1e19  # Pa s
YEAR = 365.25 * 86400.0  # s (Julian year)


def read(path):
    with rasterio.open(path) as src:
        data = src.read(1).astype("float64")
        if src.nodata is not None:
            data[data == src.nodata] = np.nan
        return data, src.profile


def write(path, data, profile):
    profile = dict(
        profile,
        dtype="float32",
        count=1,
        nodata=float("nan"),
        compress="deflate",
        predictor=3,
        tiled=True,
        blockxsize=256,
        blockysize=256,
    )
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data.astype("float32"), 1)


def main(topo_path, crust_path, out_dir):
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    topo, profile = read(topo_path)
    crust, _ = read(crust_path)
    topo[np.isnan(crust)] = np.nan

    # Row spacing is negative (rows run north to south), so axis 0 gives d/d(northing) directly.
    dy, dx = profile["transform"].e, profile["transform"].a
    dH_dy, dH_dx = np.gradient(topo, dy, dx)

    k = -(H_CHANNEL**3) / (12.0 * ETA) * RHO_C * G_ACC * YEAR  # m^2/yr per unit slope
    q_east = k * dH_dx
    q_north = k * dH_dy
    del dH_dx, dH_dy

    dqn_dy = np.gradient(q_north, dy, axis=0)
    dqe_dx = np.gradient(q_east, dx, axis=1)
    thickening = -(dqe_dx + dqn_dy) * 1e3  # m/yr -> mm/yr
    del dqe_dx, dqn_dy

    write(out / "flux_east.tif", q_east, profile)
    write(out / "flux_north.tif", q_north, profile)
    write(out / "thickening_rate.tif", thickening, profile)


if __name__ == "__main__":
    if len(sys.argv) != 4:
        sys.exit(__doc__.strip().splitlines()[-1].strip())
    main(*sys.argv[1:])
