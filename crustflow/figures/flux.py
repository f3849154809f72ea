"""The flux map: flux magnitude with direction arrows.

Perceptually uniform colour map (matplotlib's ``cividis``), arrows for the flux direction, a colour
bar with units, axes in the grid's own coordinates, the scenario title and a one-line caution.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from crustflow.figures.common import (
    ARROWS_ACROSS,
    add_caution,
    arrow_stride,
    magnitude_image,
    pyplot,
)

__all__ = ["flux_map"]


def flux_map(ds: xr.Dataset, path: str | Path, *, title: str | None = None, dpi: int = 150) -> Path:
    """Draw flux magnitude with direction arrows and save it as PNG.

    Parameters
    ----------
    ds : xarray.Dataset
        Holds ``flux_magnitude``, ``flux_east`` and ``flux_north`` (m2 yr-1) on (y, x).
    path : path
        Destination PNG.
    title : str, optional
        Defaults to the dataset's ``title`` attribute.
    dpi : int
        Resolution.

    Returns
    -------
    Path
    """
    plt = pyplot()

    crs = ds.rio.crs
    geographic = bool(crs is not None and crs.is_geographic)
    scale = 1.0 if geographic else 1e-3
    unit = "degrees" if geographic else "km"
    x = ds.x.values * scale
    y = ds.y.values * scale
    mag = ds["flux_magnitude"].values
    fig, ax = plt.subplots(figsize=(8, 6.5), layout="constrained")
    magnitude_image(fig, ax, x, y, mag)
    step = arrow_stride(mag.shape)
    sl = (slice(step // 2, None, step), slice(step // 2, None, step))
    qe, qn = ds["flux_east"].values[sl], ds["flux_north"].values[sl]
    xx, yy = np.meshgrid(x[sl[1]], y[sl[0]])
    norm = np.hypot(qe, qn)
    with np.errstate(invalid="ignore", divide="ignore"):
        ue, un = np.where(norm > 0, qe / norm, 0.0), np.where(norm > 0, qn / norm, 0.0)
    ax.quiver(
        xx,
        yy,
        ue,
        un,
        color="white",
        edgecolor="black",
        linewidth=0.3,
        pivot="middle",
        scale=ARROWS_ACROSS * 1.3,
        width=0.003,
    )
    ax.set_xlabel("longitude (degrees)" if geographic else f"x ({unit})")
    ax.set_ylabel("latitude (degrees)" if geographic else f"y ({unit})")
    ax.set_aspect(1.0 / np.cos(np.deg2rad(np.nanmean(y))) if geographic else "equal")
    ax.set_title(title or ds.attrs.get("title", "crustflow"))
    add_caution(fig, "Arrows: flux direction.")
    path = Path(path)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path
