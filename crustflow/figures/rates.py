"""The rates map: where the crust thickens and where the surface rises, side by side.

Both panels use crustflow's diverging ramp centred on zero, with symmetric limits from a robust
percentile of |value| (:func:`crustflow.io.colour_ramps.colour_scale`), over elevation contours,
the coastline and a hillshade, with a scale bar and CRS axes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from crustflow.figures.common import add_caution, pyplot, save_figure
from crustflow.figures.furniture import (
    add_elevation,
    add_image,
    add_scale_bar,
    elevation_caption,
    label_axes,
    map_frame,
)
from crustflow.io.colour_ramps import ROBUST_PERCENTILE, colour_scale
from crustflow.io.display import axis_label

__all__ = ["rates_map", "draw_rates_map", "RATE_PANELS"]

#: The variables drawn, left to right, with their panel titles.
RATE_PANELS = (
    ("thickening_rate", "Crustal thickening"),
    ("uplift_rate", "Isostatic surface uplift"),
)


def draw_rates_map(ds: xr.Dataset, *, title: str | None = None, hillshade: bool = True):
    """Draw thickening and uplift rates side by side; return the matplotlib Figure.

    Parameters
    ----------
    ds : xarray.Dataset
        ``thickening_rate`` and ``uplift_rate`` (mm yr-1) on (y, x) with a CRS; optionally
        ``elevation`` (m).
    title : str, optional
        Defaults to the dataset's ``title`` attribute.
    hillshade : bool
        Shade the elevation under the colours.

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = pyplot()
    frame = map_frame(ds.x.values, ds.y.values, ds.rio.crs)
    fig, axes = plt.subplots(1, 2, figsize=(13, 5.8), layout="constrained")
    context = {}
    for ax, (name, panel) in zip(axes, RATE_PANELS, strict=True):
        values = np.asarray(ds[name].transpose("y", "x").values, dtype=float)
        scale = colour_scale(name, values)
        add_image(fig, ax, frame, values, scale, axis_label(name))
        if "elevation" in ds:
            elevation = np.asarray(ds["elevation"].transpose("y", "x").values, dtype=float)
            context = add_elevation(ax, frame, elevation, hillshade=hillshade)
        add_scale_bar(ax, frame)
        label_axes(ax, frame, crs_note=ax is axes[0])
        ax.set_title(panel, fontsize=10)
    fig.suptitle(title or ds.attrs.get("title", "crustflow"), x=0.01, ha="left", fontsize=11)
    note = (
        f"Colours centred on zero, limits ±{ROBUST_PERCENTILE:g}th percentile of |value| "
        "(cells beyond them take the end colours). Positive: thickening / rising."
    )
    note = f"{note} {elevation_caption(context)}".strip()
    add_caution(fig, note)
    return fig


def rates_map(
    ds: xr.Dataset,
    path: str | Path,
    *,
    title: str | None = None,
    dpi: int = 150,
    formats=("png",),
    hillshade: bool = True,
) -> Path:
    """Draw the rates map (:func:`draw_rates_map`) and save it in each of ``formats``.

    ``path``'s suffix is replaced by each format's. Returns the path of the first file written.
    """
    path = Path(path)
    fig = draw_rates_map(ds, title=title, hillshade=hillshade)
    names = save_figure(fig, path.parent, path.stem, formats=formats, dpi=dpi)
    return path.parent / names[0]
