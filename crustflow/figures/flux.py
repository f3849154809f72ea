"""The flux map: flux magnitude (log, power or linear scale) with arrows scaled by magnitude, over
elevation contours, the coastline and a hillshade, with a scale bar, an arrow key and CRS axes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from crustflow.figures.common import add_caution, pyplot, save_figure
from crustflow.figures.furniture import (
    add_arrows,
    add_elevation,
    add_image,
    add_scale_bar,
    elevation_caption,
    label_axes,
    map_frame,
)
from crustflow.io.colour_ramps import colour_scale
from crustflow.io.display import axis_label

__all__ = ["flux_map", "draw_flux_map", "FLUX_NORMS"]

#: Colour normalisations of the flux magnitude (see crustflow.io.colour_ramps.ColourScale).
FLUX_NORMS = ("log", "power", "linear")


def _values(ds: xr.Dataset, name: str) -> np.ndarray:
    return np.asarray(ds[name].transpose("y", "x").values, dtype=float)


def draw_flux_map(
    ds: xr.Dataset,
    *,
    title: str | None = None,
    norm: str = "log",
    gamma: float = 0.5,
    hillshade: bool = True,
):
    """Draw the flux map and return the matplotlib Figure.

    Parameters
    ----------
    ds : xarray.Dataset
        ``flux_magnitude``, ``flux_east`` and ``flux_north`` (m2 yr-1) on (y, x) with a CRS;
        optionally ``elevation`` (m) for contours, coastline and hillshade.
    title : str, optional
        Defaults to the dataset's ``title`` attribute.
    norm : {"log", "power", "linear"}
        Colour scale of the magnitude; log (default) shows flank flow of a few m²/yr beside a
        scarp's thousands.
    gamma : float
        Exponent of the power norm.
    hillshade : bool
        Shade the elevation under the colours.

    Returns
    -------
    matplotlib.figure.Figure
    """
    if norm not in FLUX_NORMS:
        raise ValueError(f"norm {norm!r} is not one of {', '.join(FLUX_NORMS)}")
    plt = pyplot()
    frame = map_frame(ds.x.values, ds.y.values, ds.rio.crs)
    mag = _values(ds, "flux_magnitude")
    scale = colour_scale("flux_magnitude", mag, norm=norm, gamma=gamma)
    fig, ax = plt.subplots(figsize=(8, 6.8), layout="constrained")
    label = axis_label("flux_magnitude") + ("" if norm == "linear" else f", {norm} scale")
    add_image(fig, ax, frame, mag, scale, label)
    context = {}
    if "elevation" in ds:
        context = add_elevation(ax, frame, _values(ds, "elevation"), hillshade=hillshade)
    _, key = add_arrows(ax, frame, _values(ds, "flux_east"), _values(ds, "flux_north"))
    add_scale_bar(ax, frame)
    label_axes(ax, frame)
    ax.set_title(title or ds.attrs.get("title", "crustflow"), loc="left", fontsize=11)
    add_caution(fig, _caption(context, key))
    return fig


def _caption(context: dict, key: float) -> str:
    parts = [f"Arrows: flux direction, length proportional to magnitude (key: {key:g} m²/yr)."]
    parts.append(elevation_caption(context))
    return " ".join(parts)


def flux_map(
    ds: xr.Dataset,
    path: str | Path,
    *,
    title: str | None = None,
    dpi: int = 150,
    formats=("png",),
    norm: str = "log",
    hillshade: bool = True,
) -> Path:
    """Draw the flux map (:func:`draw_flux_map`) and save it in each of ``formats``.

    ``path``'s suffix is replaced by each format's. Returns the path of the first file written.
    """
    path = Path(path)
    fig = draw_flux_map(ds, title=title, norm=norm, hillshade=hillshade)
    names = save_figure(fig, path.parent, path.stem, formats=formats, dpi=dpi)
    return path.parent / names[0]
