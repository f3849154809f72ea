"""Figures of the volume budgets: the normal flux along a section, and a map of all budgets.

crustflow's own colour ramps (:mod:`crustflow.io.colour_ramps`: log-scaled sequential ramp for the
flux magnitude, the diverging ramp's ends for the two sides of a section),
units on every axis and colour bar, matplotlib's Agg backend (no display needed).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import rioxarray  # noqa: F401  (registers the .rio accessor)
import shapely
import xarray as xr

from crustflow.figures.common import add_caution, arrow_stride, pyplot, save_figure
from crustflow.figures.furniture import add_image, add_scale_bar, label_axes, map_frame
from crustflow.io.colour_ramps import colour_scale, ramp_colours
from crustflow.io.display import axis_label

__all__ = ["section_figure", "budget_map"]

#: Length of the arrow marking a section's positive side, as a share of the map's wider side.
#: Common practice, no source.
SIDE_ARROW_SHARE = 0.07

#: Shares of a line's length on either side of its middle used for the local direction there.
#: Project choice.
TANGENT_HALF_SHARE = 0.01

#: Position of a section's label along it, as a share of its length. Project choice (clear of the
#: side arrow at the middle).
LABEL_SHARE = 0.9

#: Height of the figure's foot kept free for the caution, as a share of the figure. Project choice.
FOOT_SHARE = 0.06

#: Label font size, points. Common practice, no source.
LABEL_SIZE = 7


def _pyplot():

    return pyplot()


def _caution(fig, text: str) -> None:

    add_caution(fig, text, foot=FOOT_SHARE)


def volume_label(value: float) -> str:
    """A signed volume rate to three significant figures, without exponents for large values."""
    if not np.isfinite(value):
        return "no data"
    if value == 0 or 1e-2 <= abs(value) < 1e4:
        return f"{value:+.3g}"
    if abs(value) >= 1e4:
        digits = int(np.floor(np.log10(abs(value)))) - 2
        return f"{round(value, -digits):+,.0f}"
    return f"{value:+.2e}"


def section_figure(
    profile: pd.DataFrame,
    path: str | Path,
    *,
    name: str,
    title: str = "",
    dpi: int = 150,
    formats=("png",),
) -> Path:
    """Plot the normal flux along a section against distance and save it as PNG.

    Parameters
    ----------
    profile : pandas.DataFrame
        From :func:`crustflow.analyses.budgets.section_profile` (``distance_km``, ``normal_flux_m2_per_yr``,
        totals in ``.attrs``).
    path : path
        Destination; its suffix is replaced by each of ``formats``.
    name : str
        Section name, for the title.
    title : str
        First title line (e.g. the scenario title).
    dpi : int
        Resolution.
    formats : sequence of str
        Figure file formats (``png``, ``svg``, ``pdf``).

    Returns
    -------
    Path
        The first file written.
    """

    plt = _pyplot()
    ends = ramp_colours("diverging", 256)[[0, -1]]  # blue: to the left, orange: to the right
    dist = profile["distance_km"].to_numpy()
    flux = profile["normal_flux_m2_per_yr"].to_numpy()
    fig, ax = plt.subplots(figsize=(8, 4.5), layout="constrained")
    ax.axhline(0.0, color="0.5", linewidth=0.8)
    ax.fill_between(dist, flux, 0, where=flux >= 0, color=ends[1], alpha=0.7, label="to the right")
    ax.fill_between(dist, flux, 0, where=flux < 0, color=ends[0], alpha=0.7, label="to the left")
    ax.plot(dist, flux, color="black", linewidth=1.0)
    ax.set_xlim(0.0, profile.attrs.get("length_km", np.nanmax(dist)))
    ax.set_xlabel("distance along the section from its first vertex (km)")
    ax.set_ylabel("normal flux q·n (m²/yr)")
    ax.legend(loc="best", fontsize=LABEL_SIZE, title="flux crossing", title_fontsize=LABEL_SIZE)
    total = profile.attrs.get("volume_flux_km3_per_Myr", np.nan)
    total_si = profile.attrs.get("volume_flux_m3_per_yr", np.nan)
    covered = profile.attrs.get("covered_fraction", 1.0)
    head = f"{title}\n" if title else ""
    extra = f", {covered:.0%} covered by data" if covered < 1 else ""
    ax.set_title(
        f"{head}section {name}: total {volume_label(total)} km³/Myr "
        f"({volume_label(total_si)} m³/yr){extra}",
        fontsize=10,
    )
    _caution(
        fig, "Positive: towards the right-hand side walking from the first to the last vertex."
    )
    return _save(fig, path, formats, dpi)


def _save(fig, path, formats, dpi) -> Path:
    """Save in every format (``path``'s suffix replaced); the path of the first file."""

    path = Path(path)
    return path.parent / save_figure(fig, path.parent, path.stem, formats=formats, dpi=dpi)[0]


def budget_map(
    fields: xr.Dataset,
    path: str | Path,
    *,
    sections=None,
    regions=None,
    title: str = "",
    dpi: int = 150,
    formats=("png",),
) -> Path:
    """Map the flux magnitude with the sections and regions labelled with their budgets.

    Parameters
    ----------
    fields : xarray.Dataset
        Fields with ``flux_east`` and ``flux_north`` (m2/yr), as for the budgets.
    path : path
        Destination PNG.
    sections, regions : geopandas.GeoDataFrame, optional
        From :func:`crustflow.analyses.budgets.section_budgets` / :func:`crustflow.analyses.budgets.region_budgets`
        (grid CRS, with ``name`` and ``volume_flux_km3_per_Myr``).
    title : str
        Title (default: the fields' ``title`` attribute).
    dpi : int
        Resolution.

    Returns
    -------
    Path

    Notes
    -----
    Each section carries an arrow at its middle pointing to its positive (right-hand) side and a
    label with its volume flux; each region a label with its net inflow.
    """

    plt = _pyplot()
    frame = map_frame(fields.x.values, fields.y.values, fields.rio.crs)
    geographic = frame.geographic
    scale = 1.0 if geographic else 1e-3
    x, y = frame.x, frame.y
    qe = np.asarray(fields["flux_east"].transpose("y", "x").values, dtype=float)
    qn = np.asarray(fields["flux_north"].transpose("y", "x").values, dtype=float)
    mag = np.hypot(qe, qn)
    fig, ax = plt.subplots(figsize=(8, 6.5), layout="constrained")
    flux_scale = colour_scale("flux_magnitude", mag)
    add_image(fig, ax, frame, mag, flux_scale, axis_label("flux_magnitude") + ", log scale")
    extent = frame.extent
    step = arrow_stride(mag.shape)
    sl = (slice(step // 2, None, step), slice(step // 2, None, step))
    norm = mag[sl]
    with np.errstate(invalid="ignore", divide="ignore"):
        ue, un = np.where(norm > 0, qe[sl] / norm, 0.0), np.where(norm > 0, qn[sl] / norm, 0.0)
    xx, yy = np.meshgrid(x[sl[1]], y[sl[0]])
    ax.quiver(xx, yy, ue, un, color="white", alpha=0.5, pivot="middle", scale=35, width=0.002)
    size = max(extent[1] - extent[0], extent[3] - extent[2]) * SIDE_ARROW_SHARE
    label = {"fontsize": LABEL_SIZE, "bbox": {"facecolor": "white", "alpha": 0.8, "pad": 1.5}}
    if regions is not None:
        for name, geom, value in zip(
            regions["name"], regions.geometry, regions["volume_flux_km3_per_Myr"], strict=True
        ):
            for ring in _rings(geom):
                ax.plot(ring[:, 0] * scale, ring[:, 1] * scale, "w--", linewidth=1.2)
            px, py = shapely.get_coordinates(geom.representative_point())[0] * scale
            ax.text(px, py, f"{name}: net {volume_label(value)} km³/Myr", ha="center", **label)
    if sections is not None:
        for name, geom, value in zip(
            sections["name"], sections.geometry, sections["volume_flux_km3_per_Myr"], strict=True
        ):
            for part in shapely.get_parts(geom):
                xy = shapely.get_coordinates(part) * scale
                ax.plot(xy[:, 0], xy[:, 1], color="black", linewidth=2.4)
                ax.plot(xy[:, 0], xy[:, 1], color="white", linewidth=1.2)
            (mx, my), (ex, ey) = _side_arrow(geom, scale, size, geographic)
            ax.annotate(
                "",
                xy=(ex, ey),
                xytext=(mx, my),
                arrowprops={"arrowstyle": "-|>", "color": "white", "lw": 2, "mutation_scale": 14},
            )
            lx, ly = shapely.get_coordinates(
                _long_part(geom).interpolate(LABEL_SHARE, normalized=True)
            )[0]
            ax.text(
                lx * scale,
                ly * scale,
                f"{name}: {volume_label(value)} km³/Myr",
                ha="center",
                va="bottom",
                clip_on=True,
                **label,
            )
    add_scale_bar(ax, frame, corner="right")  # region labels tend to sit lower left
    label_axes(ax, frame)
    ax.set_title(title or fields.attrs.get("title", "crustflow volume budgets"))
    _caution(
        fig,
        "Sections: volume flux, positive towards the arrow (right-hand side walking from the first "
        "to the last vertex). Regions: net inflow (positive = volume gained).",
    )
    return _save(fig, path, formats, dpi)


def _rings(geom) -> list[np.ndarray]:
    out = []
    for part in shapely.get_parts(geom):
        out.append(np.asarray(part.exterior.coords))
        out.extend(np.asarray(r.coords) for r in part.interiors)
    return out


def _long_part(geom):
    """A section as one LineString: merged if possible, else its longest part."""
    line = shapely.line_merge(geom) if geom.geom_type == "MultiLineString" else geom
    if line.geom_type == "MultiLineString":
        line = max(line.geoms, key=lambda g: g.length)
    return line


def _side_arrow(geom, scale: float, size: float, geographic: bool):
    """Start and end (plot units) of an arrow from a line's middle towards its right-hand side."""
    line = _long_part(geom)
    a, b = (
        shapely.get_coordinates(line.interpolate(f, normalized=True))[0]
        for f in (0.5 - TANGENT_HALF_SHARE, 0.5 + TANGENT_HALF_SHARE)
    )
    mid = shapely.get_coordinates(line.interpolate(0.5, normalized=True))[0]
    stretch = np.cos(np.deg2rad(mid[1])) if geographic else 1.0  # degrees east -> ground
    te, tn = (b[0] - a[0]) * stretch, b[1] - a[1]
    length = np.hypot(te, tn) or 1.0
    ne, nn = tn / length, -te / length  # right-hand normal
    start = mid * scale
    end = start + size * np.array([ne / stretch, nn])
    return start, end
