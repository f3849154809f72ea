"""Reading the input grids, checking them and aligning them onto the topography grid.

Only this module and :mod:`crustflow.io.writers` touch files. Grids leave here as ``xarray.DataArray`` objects
in SI units (m), float64, nodata as NaN, rows running north to south (``y`` descending), with the CRS
written through rioxarray, and the second grid on exactly the topography grid's cells.
"""

from __future__ import annotations

import hashlib
import warnings
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from crustflow.errors import CrustflowInputError

if TYPE_CHECKING:
    import xarray as xr

#: Values that real topography or thickness grids take, so a nodata tag equal to one of them hides
#: real cells (sea level, zero thickness; common practice, no source).
COMMON_REAL_VALUES = (0.0,)

#: Fill values written without a nodata tag by common software (-9999: ESRI ASCII grids' usual
#: NODATA_value; -32768: the int16 minimum used by SRTM voids; -3.4028235e38: the float32 lowest,
#: GDAL/ArcGIS float default; -99999; common practice, no source).
FILL_VALUES = (-9999.0, -32768.0, -99999.0, float(np.finfo(np.float32).min))

__all__ = [
    "GridSource",
    "open_sources",
    "close_sources",
    "file_checksum",
    "provenance",
    "as_dataarray",
]


def file_checksum(path: str | Path) -> str:
    """SHA-256 of a file, as hex text."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


class GridSource:
    """Reads rows of one input grid on the topography grid's cells (north up, float64, NaN nodata).

    The topography grid is read as it is (rows flipped if they run south to north). A second grid on
    another pixel grid or CRS is resampled bilinearly through a GDAL warped VRT, so reading any
    window gives the same numbers as reading the whole grid.

    Parameters
    ----------
    path : path
        The raster file.
    name : str
        Scenario key, for messages (``"grids.topography"``).
    crs : str, optional
        CRS to assume when the file carries none.
    target : GridSource, optional
        The topography grid to align onto (None: this is the topography grid).
    """

    def __init__(
        self, path, name: str, *, crs: str | None = None, target: GridSource | None = None
    ) -> None:
        import rasterio

        self.path, self.name = Path(path), name
        if not self.path.exists():
            raise CrustflowInputError(
                f"{name}: file not found: {self.path}; check the path in the scenario"
            )
        try:
            self._src = rasterio.open(self.path)
        except (rasterio.errors.RasterioIOError, rasterio.errors.RasterioError, OSError) as exc:
            first = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
            raise CrustflowInputError(
                f"{name}: {self.path} is not a raster GDAL can read ({first}); "
                "give a GeoTIFF or another single-band raster"
            ) from None
        src = self._src
        if src.count != 1:
            src.close()
            raise CrustflowInputError(
                f"{name}: {self.path} has {src.count} bands; give a single-band raster"
            )
        t = src.transform
        if t.b != 0 or t.d != 0:
            src.close()
            raise CrustflowInputError(
                f"{name}: {self.path} is a rotated grid; warp it to a north-up "
                "grid first (e.g. with gdalwarp)"
            )
        if min(src.height, src.width) < 3:
            src.close()
            raise CrustflowInputError(
                f"{name}: {self.path} must be at least 3 x 3 cells "
                f"(it is {src.height} x {src.width})"
            )
        self.crs = src.crs if src.crs else (_scenario_crs(crs, src) if crs else None)
        self.nodata = src.nodata
        if src.nodata is not None and src.nodata in COMMON_REAL_VALUES:
            warnings.warn(
                f"{name}: {self.path.name} tags {src.nodata:g} as nodata, a value real data take "
                "(sea level, zero thickness); such cells are left out: check the nodata tag",
                stacklevel=2,
            )
        self.flipped = t.e > 0
        north_up = (
            t
            if not self.flipped
            else rasterio.Affine(t.a, 0.0, t.c, 0.0, -t.e, t.f + t.e * src.height)
        )
        self.method = "read"
        self.record: dict = {"path": str(self.path), "shape": [src.height, src.width]}
        self._reader = src
        if target is None:
            self.transform, self.height, self.width = north_up, src.height, src.width
        else:
            self._align(target, north_up)

    def read_error(self, exc: Exception) -> CrustflowInputError:
        """One line for a raster that opened but cannot be read (truncated or corrupt)."""
        first = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        first = first.replace(" See previous exception for details.", "").rstrip(".")
        return CrustflowInputError(
            f"{self.name}: {self.path} cannot be read ({first}); the file is truncated or corrupt: "
            "copy or export it again"
        )

    def _align(self, target: GridSource, north_up) -> None:
        from rasterio.enums import Resampling
        from rasterio.vrt import WarpedVRT
        from rasterio.warp import transform_bounds

        src = self._src
        same = (src.height, src.width) == (target.height, target.width) and all(
            abs(p - q) <= 1e-6 * abs(north_up.a)
            for p, q in zip(tuple(north_up)[:6], tuple(target.transform)[:6], strict=True)
        )
        if self.crs is None:
            if not same:
                raise CrustflowInputError(
                    f"{self.name} carries no CRS and is not on the topography's pixel grid; save it "
                    "with a CRS, or resample it onto the topography grid"
                )
            self.crs = target.crs
        self.transform, self.height, self.width = target.transform, target.height, target.width
        if same and self.crs == target.crs:
            self.method = "none (same pixel grid)"
            self.record["method"] = self.method
            return
        self.flipped = False
        b = src.bounds
        left, bottom, right, top = transform_bounds(
            self.crs, target.crs, b.left, b.bottom, b.right, b.top, densify_pts=21
        )
        tl, tb, tr, tt = target.bounds
        if left >= tr or right <= tl or bottom >= tt or top <= tb:
            raise CrustflowInputError(
                f"{self.name} does not overlap the topography grid (bounds {left:.6g}, {bottom:.6g}, "
                f"{right:.6g}, {top:.6g} vs {tl:.6g}, {tb:.6g}, {tr:.6g}, {tt:.6g} in the "
                "topography's CRS); check both files cover the same region"
            )
        self._reader = WarpedVRT(
            src,
            src_crs=self.crs,
            crs=target.crs,
            transform=target.transform,
            width=target.width,
            height=target.height,
            resampling=Resampling.bilinear,
            src_nodata=src.nodata,
            nodata=np.nan,
            dtype="float64",
        )
        self.method = "bilinear resampling onto the topography grid (GDAL warped VRT)"
        self.record.update(
            method=self.method,
            source_crs=self.crs.to_string(),
            source_resolution=[abs(src.transform.a), abs(src.transform.e)],
        )

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(left, bottom, right, top) of the north-up grid, in its CRS."""
        t = self.transform
        return t.c, t.f + t.e * self.height, t.c + t.a * self.width, t.f

    def coords(self) -> tuple[np.ndarray, np.ndarray]:
        """Cell-centre x and y coordinates (y descending), from the transform."""
        t = self.transform
        return t.c + t.a * (np.arange(self.width) + 0.5), t.f + t.e * (np.arange(self.height) + 0.5)

    def read(self, row0: int = 0, row1: int | None = None) -> np.ndarray:
        """Rows ``row0:row1`` (north-up numbering) as float64 with NaN for nodata."""
        from rasterio.windows import Window

        row1 = self.height if row1 is None else row1
        if self.flipped:
            window = Window(0, self.height - row1, self.width, row1 - row0)
        else:
            window = Window(0, row0, self.width, row1 - row0)
        from rasterio.errors import RasterioError

        try:
            data = self._reader.read(1, window=window, masked=True)
        except (RasterioError, OSError) as exc:
            raise self.read_error(exc) from None
        out = np.ma.filled(data.astype("float64"), np.nan)
        return out[::-1] if self.flipped else out

    def close(self) -> None:
        """Close the files."""
        if self._reader is not self._src:
            self._reader.close()
        self._src.close()


def _scenario_crs(crs: str, src):
    """The ``[grids] crs`` of the scenario as a rasterio CRS, or one line naming it."""
    from rasterio.crs import CRS
    from rasterio.errors import CRSError

    try:
        return CRS.from_user_input(crs)
    except (CRSError, ValueError, TypeError) as exc:
        src.close()
        first = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        raise CrustflowInputError(
            f"grids.crs = {crs!r} is not a CRS PROJ knows ({first}); give a valid code, e.g. "
            'crs = "EPSG:32633"'
        ) from None


def open_sources(scenario) -> dict[str, GridSource]:
    """Open the grids a scenario names, the second aligned on the topography grid.

    Returns
    -------
    dict
        ``{"topography": GridSource, "crust_thickness" or "moho_depth": GridSource}``; close them
        with :func:`close_sources`.
    """
    topo = GridSource(scenario.topography, "grids.topography", crs=scenario.crs)
    sources = {"topography": topo}
    try:
        if topo.crs is None:
            raise CrustflowInputError(
                f"grids.topography ({scenario.topography.name}) carries no CRS; add it to the file "
                'or set [grids] crs = "EPSG:...", naming the CRS of the grid'
            )
        for key in ("crust_thickness", "moho_depth"):
            path = getattr(scenario, key)
            if path is not None:
                sources[key] = GridSource(path, f"grids.{key}", crs=scenario.crs, target=topo)
        labels = {
            "channel_thickness": "channel.thickness",
            "viscosity": "channel.viscosity",
            "temperature_top": "channel.temperature.top",
            "temperature_base": "channel.temperature.base",
            "surface_heat_flow": "channel.temperature.surface_heat_flow",
        }
        for key, grid in {**scenario.channel.grids, **scenario.load.grids}.items():
            sources[key] = GridSource(
                grid.path, labels.get(key, key), crs=scenario.crs, target=topo
            )
    except BaseException:
        close_sources(sources)
        raise
    return sources


def close_sources(sources: dict[str, GridSource]) -> None:
    """Close every source."""
    for src in sources.values():
        src.close()


def provenance(sources: dict[str, GridSource]) -> dict:
    """How each grid was read and aligned, for the run manifest."""
    out = {}
    for key, src in sources.items():
        record = dict(src.record)
        if key == "topography":
            record["crs"] = src.crs.to_string()
            record["rows_flipped_to_north_up"] = bool(src.flipped)
        out[key] = record
    return out


def as_dataarray(values: np.ndarray, source: GridSource, name: str) -> xr.DataArray:
    """Wrap rows read from ``source`` (whole grid) as a DataArray with coordinates and CRS."""
    import rioxarray  # noqa: F401  (registers the .rio accessor)
    import xarray as xr

    x, y = source.coords()
    da = xr.DataArray(values, dims=("y", "x"), coords={"y": y, "x": x}, name=name)
    da = da.rio.write_crs(source.crs).rio.write_transform(source.transform)
    return da
