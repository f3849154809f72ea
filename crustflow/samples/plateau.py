"""The bundled sample scenarios: an invented plateau, its margins and a strip of sea.

The Varnessa Plateau is fictional. Its grids are analytic functions evaluated in a projected frame
(UTM zone 25N, chosen only because it lies over open ocean: no real land is depicted). A steep
northern margin (the Varnessa Scarp), a gentle south-eastern flank that runs down to lowlands, and the
Lune Sea in the south-west. The crust is close to Airy balance with a 35 km reference crust, plus a
thickened keel under the plateau's north-east that isostasy alone would not predict. The crustal
thickness grid is coarser (10 km cells) than the topography (4 km), as Moho models usually are, so the
demo also exercises the alignment of the two grids.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np

from crustflow.errors import CrustflowInputError
from crustflow.samples.rasters import SAMPLE_CRS, ramp, write_raster
from crustflow.samples.wedge import write_wedge_sample

__all__ = [
    "plateau_elevation",
    "plateau_crust_thickness",
    "write_sample_grids",
    "demo_scenario",
    "SAMPLE_NAMES",
]

#: Sample scenario folders under sample_grids/.
SAMPLE_NAMES = ("plateau", "plateau-lonlat", "wedge")

#: Region bounds in SAMPLE_CRS, m: west, south, east, north.
SAMPLE_BOUNDS = (100e3, 3300e3, 900e3, 3900e3)

SCENARIO_TEXT = """\
title = "Varnessa Plateau (invented){suffix}"

[grids]
topography = "topography.tif"
crust_thickness = "crust_thickness.tif"

[densities]
crust = "2800 kg/m^3"
mantle = "3300 kg/m^3"
water = "1030 kg/m^3"
channel = "2800 kg/m^3"

[channel]
thickness = "15 km"
viscosity = "1e19 Pa*s"

[walls]
upper_velocity = ["2 mm/yr", "-5 mm/yr"]

[budgets]
sections = "{features}margins.geojson"
regions = "{features}basins.geojson"
"""


def plateau_elevation(x, y):
    """Elevation of the invented plateau, m, at projected coordinates ``x``, ``y`` (m)."""
    xk, yk = np.asarray(x) / 1e3, np.asarray(y) / 1e3
    plateau = (
        ramp(yk, 3470.0, 110.0)
        * (1.0 - ramp(yk, 3760.0, 18.0))
        * ramp(xk, 260.0, 45.0)
        * (1.0 - ramp(xk, 700.0, 90.0))
    )
    ridges = 180.0 * np.sin(2 * np.pi * (xk + 0.4 * yk) / 140.0) * plateau
    sea = (1.0 - ramp(xk, 330.0, 40.0)) * (1.0 - ramp(yk, 3480.0, 45.0))
    return 250.0 + 4300.0 * plateau + ridges - 2400.0 * sea


def plateau_crust_thickness(
    x, y, *, reference=35e3, rho_crust=2800.0, rho_mantle=3300.0, rho_water=1030.0
):
    """Crustal thickness of the invented plateau, m: Airy balance plus a north-eastern keel."""
    h = plateau_elevation(x, y)
    land = reference + h * rho_mantle / (rho_mantle - rho_crust)
    sea = reference + h * (rho_mantle - rho_water) / (rho_mantle - rho_crust)
    xk, yk = np.asarray(x) / 1e3, np.asarray(y) / 1e3
    keel = 4000.0 * np.exp(-((xk - 560.0) ** 2 + (yk - 3660.0) ** 2) / (2 * 90.0**2))
    return np.where(h >= 0, land, sea) + keel


def write_sample_grids(folder: str | Path) -> list[Path]:
    """Write the sample scenarios (projected and lon/lat) into ``folder``; return scenario paths."""
    from pyproj import Transformer
    from rasterio.transform import from_origin

    folder = Path(folder)
    west, south, east, north = SAMPLE_BOUNDS
    written = []
    # Projected: topography at 4 km, crustal thickness at 10 km.
    out = folder / "plateau"
    out.mkdir(parents=True, exist_ok=True)
    for name, cell, func, text in (
        ("topography.tif", 4e3, plateau_elevation, "surface elevation above sea level (m)"),
        (
            "crust_thickness.tif",
            10e3,
            plateau_crust_thickness,
            "crustal thickness, surface to Moho (m)",
        ),
    ):
        xs = np.arange(west + cell / 2, east, cell)
        ys = np.arange(north - cell / 2, south, -cell)
        xx, yy = np.meshgrid(xs, ys)
        write_raster(
            out / name, func(xx, yy), SAMPLE_CRS, from_origin(west, north, cell, cell), text
        )
    _write_features(out)
    (out / "scenario.toml").write_text(SCENARIO_TEXT.format(suffix="", features=""))
    written.append(out / "scenario.toml")
    # Geographic: the same analytic region on a 0.04 x 0.04 degree WGS84 grid (both grids).
    to_utm = Transformer.from_crs("EPSG:4326", SAMPLE_CRS, always_xy=True)
    to_geo = Transformer.from_crs(SAMPLE_CRS, "EPSG:4326", always_xy=True)
    lon0, lat0 = to_geo.transform(west + 40e3, south + 40e3)
    lon1, lat1 = to_geo.transform(east - 40e3, north - 40e3)
    step = 0.04
    lon_w, lat_n = np.floor(min(lon0, lon1) / step) * step, np.ceil(max(lat0, lat1) / step) * step
    ncol = int(round((max(lon0, lon1) - lon_w) / step))
    nrow = int(round((lat_n - min(lat0, lat1)) / step))
    lons = lon_w + step * (np.arange(ncol) + 0.5)
    lats = lat_n - step * (np.arange(nrow) + 0.5)
    px, py = to_utm.transform(*np.meshgrid(lons, lats))
    out = folder / "plateau-lonlat"
    out.mkdir(parents=True, exist_ok=True)
    transform = from_origin(lon_w, lat_n, step, step)
    write_raster(
        out / "topography.tif",
        plateau_elevation(px, py),
        "EPSG:4326",
        transform,
        "surface elevation above sea level (m)",
    )
    write_raster(
        out / "crust_thickness.tif",
        plateau_crust_thickness(px, py),
        "EPSG:4326",
        transform,
        "crustal thickness, surface to Moho (m)",
    )
    (out / "scenario.toml").write_text(
        SCENARIO_TEXT.format(suffix=", lon/lat grid", features="../plateau/")
    )
    written.append(out / "scenario.toml")

    written.append(write_wedge_sample(folder / "wedge"))
    return written


#: Sample sections (lines, projected km) and regions (polygons, projected km), as drawn by hand.
SAMPLE_SECTIONS = {
    # walked east to west: the positive (right-hand) side is north, out of the plateau
    "Varnessa Scarp": [(640.0, 3740.0), (300.0, 3740.0)],
    # walked south to north: the positive side is east, down the gentle flank
    "Eastern flank": [(700.0, 3480.0), (690.0, 3600.0), (700.0, 3720.0)],
}
SAMPLE_REGIONS = {
    "Plateau interior": [(330.0, 3520.0), (640.0, 3520.0), (640.0, 3720.0), (330.0, 3720.0)],
    "Lune Sea shelf": [(120.0, 3320.0), (300.0, 3320.0), (300.0, 3440.0), (120.0, 3440.0)],
}


def _write_features(folder: Path) -> None:
    """Write the sample sections and regions as GeoJSON in lon/lat (they are reprojected on use)."""
    import geopandas as gpd
    from shapely.geometry import LineString, Polygon

    for name, shapes, kind in (
        ("margins.geojson", SAMPLE_SECTIONS, LineString),
        ("basins.geojson", SAMPLE_REGIONS, Polygon),
    ):
        geoms = [kind([(x * 1e3, y * 1e3) for x, y in pts]) for pts in shapes.values()]
        frame = gpd.GeoDataFrame({"name": list(shapes)}, geometry=geoms, crs=SAMPLE_CRS)
        if kind is Polygon:
            frame["geometry"] = frame.geometry.segmentize(10e3)
        path = folder / name
        path.unlink(missing_ok=True)
        frame.to_crs("EPSG:4326").to_file(path, driver="GeoJSON")


def demo_scenario(name: str = "plateau") -> Path:
    """Path of a bundled sample scenario file, regenerating the grids if they are not at hand.

    The grids ship in the source tree's ``sample_grids/``; an installation without them regenerates
    identical grids into a cache folder.
    """

    if name not in SAMPLE_NAMES:
        raise CrustflowInputError(
            f"unknown sample scenario '{name}'; choose one of {', '.join(SAMPLE_NAMES)}"
        )
    bundled = Path(__file__).resolve().parents[1] / "sample_grids" / name / "scenario.toml"
    if bundled.is_file():
        return bundled
    cache = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "crustflow" / "samples"
    try:
        cache.mkdir(parents=True, exist_ok=True)
    except OSError:
        cache = Path(tempfile.mkdtemp(prefix="crustflow-samples-"))
    target = cache / name / "scenario.toml"
    if not target.is_file():
        write_sample_grids(cache)
    return target
