"""Shared pieces of the sample generators: the samples' CRS, a smooth ramp and a GeoTIFF writer."""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = ["SAMPLE_CRS", "ramp", "write_raster"]


#: Projected frame of the invented region (UTM zone 25N over the open Atlantic; a frame only).
SAMPLE_CRS = "EPSG:32625"


def ramp(s, centre, width):
    return 0.5 * (1.0 + np.tanh((s - centre) / width))


def write_raster(path: Path, data: np.ndarray, crs: str, transform, description: str) -> None:
    import rasterio

    profile = dict(
        driver="GTiff",
        width=data.shape[1],
        height=data.shape[0],
        count=1,
        dtype="float32",
        crs=crs,
        transform=transform,
        nodata=-9999.0,
        compress="deflate",
        predictor=3,
        tiled=True,
        blockxsize=64,
        blockysize=64,
    )
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data.astype("float32"), 1)
        dst.set_band_description(1, description)
        dst.units = ("m",)
