"""Figures: the flux map.

Perceptually uniform colour map (matplotlib's ``cividis``), arrows for the flux direction, a colour
bar with units, axes in the grid's own coordinates, the scenario title and a one-line caution.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr

__all__ = ["flux_map", "arrow_stride", "magnitude_image", "pyplot", "add_caution"]

#: Share of the figure's height kept free at the foot for the caution line.
FOOT_SHARE = 0.05

#: Number of arrows across the wider side of the map. Common practice, no source.
ARROWS_ACROSS = 25


def arrow_stride(shape: tuple[int, int], across: int = ARROWS_ACROSS) -> int:
    """Stride in cells between arrows so that about ``across`` arrows span the wider side."""
    return max(1, int(round(max(shape) / across)))


def pyplot():
    """matplotlib.pyplot on the non-interactive Agg backend (figures are written to files)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def add_caution(fig, text: str = "", *, foot: float = FOOT_SHARE) -> None:
    """Reserve the figure's foot and write ``text`` followed by the model caution there."""
    from crustflow.variables import CAUTION

    fig.get_layout_engine().set(rect=(0.0, foot, 1.0, 1.0 - foot))
    fig.text(
        0.01, 0.005, f"{text} {CAUTION}".strip(), fontsize=6, ha="left", va="bottom", wrap=True
    )


def magnitude_image(fig, ax, x, y, magnitude, label="channel flux per unit width (m²/yr)"):
    """Draw a map of flux magnitude (cividis, cell-exact extent) with its colour bar.

    Parameters
    ----------
    fig, ax
        Matplotlib figure and axes.
    x, y : ndarray
        Cell-centre coordinates in the units of the axes (km or degrees).
    magnitude : ndarray
        Values on (y, x).
    label : str
        Colour bar label with units.

    Returns
    -------
    tuple
        The image and the map extent (left, right, bottom, top).
    """
    dx, dy = abs(x[1] - x[0]), abs(y[1] - y[0])
    extent = (x.min() - dx / 2, x.max() + dx / 2, y.min() - dy / 2, y.max() + dy / 2)
    image = ax.imshow(
        magnitude,
        extent=extent,
        origin="upper" if y[0] > y[-1] else "lower",
        cmap="cividis",
        interpolation="nearest",
    )
    fig.colorbar(image, ax=ax, shrink=0.85).set_label(label)
    return image, extent


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
