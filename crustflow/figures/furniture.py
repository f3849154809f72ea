"""Map furniture every crustflow map shares: the frame in the grid's own coordinates, axis labels
from the CRS, a scale bar, elevation contours with the coastline and hillshade, the data image and
the flux arrows with their key.

Each helper draws onto a matplotlib ``Axes``; the map figures (flux, rates, budgets, ensembles)
and later ones (evolution, fits) compose them, so every map reads the same way.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crustflow.io.colour_ramps import ColourScale, ramp_colours

__all__ = [
    "MapFrame",
    "map_frame",
    "label_axes",
    "add_scale_bar",
    "add_elevation",
    "add_image",
    "add_arrows",
    "nice_number",
    "colour_map",
    "colour_norm",
    "elevation_caption",
]

#: Hillshade light: azimuth and altitude of the sun, degrees (the cartographic convention of a
#: light from the upper left). Common practice, no source.
SUN_AZIMUTH, SUN_ALTITUDE = 315.0, 45.0

#: Largest opacity of the hillshade drawn over the data image (steep slopes). Project choice.
HILLSHADE_ALPHA = 0.35

#: Contour lines of elevation drawn on a map at most. Project choice.
MAX_CONTOURS = 8

#: Length of the scale bar as a share of the map's width (before rounding). Common practice.
SCALE_BAR_SHARE = 0.2

#: Number of arrows across the wider side of the map. Common practice, no source.
ARROWS_ACROSS = 22

#: Longest arrow as a share of the spacing between arrows. Project choice.
ARROW_FILL = 0.9

#: Metres per kilometre (definition).
M_PER_KM = 1e3


@dataclass(frozen=True)
class MapFrame:
    """A grid's cells in plot coordinates (km on projected grids, degrees on geographic ones)."""

    x: np.ndarray  #: cell-centre x in plot units
    y: np.ndarray  #: cell-centre y in plot units
    extent: tuple[float, float, float, float]  #: left, right, bottom, top (cell edges)
    geographic: bool
    crs: object  #: pyproj.CRS or None

    @property
    def origin(self) -> str:
        """``imshow`` origin of arrays stored (y, x) in the grid's row order."""
        return "upper" if self.y[0] > self.y[-1] else "lower"

    @property
    def width(self) -> float:
        return self.extent[1] - self.extent[0]


def map_frame(x, y, crs) -> MapFrame:
    """The plot frame of a grid with cell centres ``x``, ``y`` (m or degrees) in ``crs``."""
    import pyproj

    crs = pyproj.CRS.from_user_input(crs) if crs is not None else None
    geographic = bool(crs is not None and crs.is_geographic)
    scale = 1.0 if geographic else 1.0 / M_PER_KM
    xs, ys = np.asarray(x, dtype=float) * scale, np.asarray(y, dtype=float) * scale
    dx = abs(xs[1] - xs[0]) if xs.size > 1 else 1.0
    dy = abs(ys[1] - ys[0]) if ys.size > 1 else 1.0
    extent = (xs.min() - dx / 2, xs.max() + dx / 2, ys.min() - dy / 2, ys.max() + dy / 2)
    return MapFrame(xs, ys, extent, geographic, crs)


def _degrees(axis: str):
    from matplotlib.ticker import FuncFormatter

    ends = {"x": ("°E", "°W"), "y": ("°N", "°S")}[axis]

    def fmt(value, _pos=None):
        if abs(value) < 1e-9:
            return "0°"
        return f"{abs(value):g}{ends[0] if value > 0 else ends[1]}"

    return FuncFormatter(fmt)


def label_axes(ax, frame: MapFrame, *, crs_note: bool = True) -> None:
    """Axis labels from the CRS (easting/northing in km, or a graticule in degrees), limits and
    the aspect ratio of ground distances."""
    ax.set_xlim(frame.extent[0], frame.extent[1])
    ax.set_ylim(frame.extent[2], frame.extent[3])
    name = frame.crs.name if frame.crs is not None else "grid without a CRS"
    if frame.geographic:
        ax.xaxis.set_major_formatter(_degrees("x"))
        ax.yaxis.set_major_formatter(_degrees("y"))
        ax.set_xlabel("Longitude" + (f" ({name})" if crs_note else ""))
        ax.set_ylabel("Latitude")
        ax.set_aspect(1.0 / np.cos(np.deg2rad(np.nanmean(frame.y))))
        ax.grid(True, color="0.4", linewidth=0.3, alpha=0.5)
        return
    xname, yname = "Easting", "Northing"
    if frame.crs is not None:
        info = {a.direction: a.name for a in frame.crs.axis_info}
        xname, yname = info.get("east", xname), info.get("north", yname)
    ax.set_xlabel(f"{xname} (km)" + (f", {name}" if crs_note else ""))
    ax.set_ylabel(f"{yname} (km)")
    ax.set_aspect("equal")


def nice_number(value: float) -> float:
    """The largest of 1, 2, 5 x 10^k not above ``value`` (> 0)."""
    if not np.isfinite(value) or value <= 0:
        return 1.0
    power = 10.0 ** np.floor(np.log10(value))
    for step in (5.0, 2.0, 1.0):
        if step * power <= value:
            return step * power
    return power


def _km_per_degree_east(frame: MapFrame) -> float:
    import pyproj

    lat = float(np.nanmean(frame.y))
    geod = frame.crs.get_geod() if frame.crs is not None else pyproj.Geod(ellps="WGS84")
    _, _, dist = geod.inv(0.0, lat, 1.0, lat)
    return dist / M_PER_KM


def add_scale_bar(ax, frame: MapFrame, *, corner: str = "left") -> float:
    """A scale bar in the lower ``corner`` (``"left"`` or ``"right"``); returns its length in km.

    On projected grids the bar measures grid distance (km of the CRS); on geographic grids the
    ground distance along the map's middle parallel on the CRS's ellipsoid (``pyproj.Geod``).
    """
    per_unit = _km_per_degree_east(frame) if frame.geographic else 1.0
    km = nice_number(SCALE_BAR_SHARE * frame.width * per_unit)
    length = km / per_unit
    x0 = frame.extent[0] + 0.05 * frame.width
    if corner == "right":
        x0 = frame.extent[1] - 0.05 * frame.width - length
    height = frame.extent[3] - frame.extent[2]
    y0 = frame.extent[2] + 0.06 * height
    for colour, lw in (("white", 5.0), ("black", 2.5)):
        ax.plot([x0, x0 + length], [y0, y0], color=colour, lw=lw, solid_capstyle="butt", zorder=6)
    ax.text(
        x0 + length / 2,
        y0 + 0.015 * height,
        f"{km:g} km",
        ha="center",
        va="bottom",
        fontsize=8,
        zorder=6,
        bbox={"facecolor": "white", "alpha": 0.75, "pad": 1.0, "linewidth": 0},
    )
    return km


def add_elevation(ax, frame: MapFrame, elevation, *, hillshade: bool = True) -> dict:
    """Elevation contours, the coastline (0 m contour) and, optionally, a hillshade.

    Returns
    -------
    dict
        ``interval`` (m between contours), ``coastline`` (bool: drawn), ``below_sea_level``
        (bool: dashed contours drawn) and ``hillshade`` (bool).
    """
    from matplotlib.colors import LightSource

    z = np.asarray(elevation, dtype=float)
    out = {"interval": None, "coastline": False, "hillshade": False}
    finite = z[np.isfinite(z)]
    if finite.size < 4:
        return out
    if hillshade:
        dx = abs(frame.x[1] - frame.x[0]) * (1.0 if frame.geographic else M_PER_KM)
        dy = abs(frame.y[1] - frame.y[0]) * (1.0 if frame.geographic else M_PER_KM)
        if frame.geographic:
            dx, dy = dx * _km_per_degree_east(frame) * M_PER_KM, dy * 111.0 * M_PER_KM
        light = LightSource(azdeg=SUN_AZIMUTH, altdeg=SUN_ALTITUDE)
        shade = light.hillshade(np.nan_to_num(z, nan=0.0), vert_exag=1.0, dx=dx, dy=dy)
        ax.imshow(
            _shade_overlay(shade, np.isfinite(z)),
            extent=frame.extent,
            origin=frame.origin,
            interpolation="bilinear",
            zorder=2,
        )
        out["hillshade"] = True
    low, high = float(finite.min()), float(finite.max())
    interval = nice_number(max((high - low) / MAX_CONTOURS, 1.0))
    levels = np.arange(np.ceil(low / interval), np.floor(high / interval) + 1) * interval
    levels = levels[levels != 0.0]
    if levels.size:
        ax.contour(
            frame.x, frame.y, z, levels=levels, colors="0.15", linewidths=0.4, alpha=0.6, zorder=3
        )
    out["interval"] = interval
    out["below_sea_level"] = bool(low < 0.0)
    if low < 0.0 < high:
        ax.contour(frame.x, frame.y, z, levels=[0.0], colors="black", linewidths=1.4, zorder=4)
        out["coastline"] = True
    return out


def _shade_overlay(shade: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """RGBA overlay of a hillshade that leaves flat ground untouched: black where a slope faces
    away from the light, white where it faces it, opacity growing with the difference from flat
    ground (whose intensity is sin(sun altitude)), up to :data:`HILLSHADE_ALPHA`."""
    flat = np.sin(np.deg2rad(SUN_ALTITUDE))
    diff = np.where(valid, shade - flat, 0.0)
    rgba = np.zeros(shade.shape + (4,))
    rgba[..., :3] = (diff > 0)[..., None]
    rgba[..., 3] = np.clip(np.abs(diff) / flat, 0.0, 1.0) * HILLSHADE_ALPHA * 2.0
    return rgba


def elevation_caption(context: dict) -> str:
    """The caption sentence for what :func:`add_elevation` drew ("" if nothing)."""
    if not context.get("interval"):
        return ""
    text = f"Grey lines: elevation every {context['interval']:g} m"
    if context.get("coastline"):
        text += "; black line: coastline (0 m)"
    if context.get("below_sea_level"):
        text += "; dashed: below sea level"
    return text + "."


def colour_map(scale: ColourScale, name: str = ""):
    """A matplotlib colour map of the scale's ramp (256 colours, NaN transparent)."""
    from matplotlib.colors import ListedColormap

    cmap = ListedColormap(ramp_colours(scale.ramp, 256), name=name or scale.ramp)
    return cmap.with_extremes(bad=(0, 0, 0, 0))


def colour_norm(scale: ColourScale):
    """The matplotlib normalisation of a :class:`ColourScale` (linear, log or power)."""
    from matplotlib.colors import LogNorm, Normalize, PowerNorm

    if scale.norm == "log":
        return LogNorm(vmin=scale.vmin, vmax=scale.vmax, clip=True)
    if scale.norm == "power":
        return PowerNorm(gamma=scale.gamma, vmin=scale.vmin, vmax=scale.vmax, clip=True)
    return Normalize(vmin=scale.vmin, vmax=scale.vmax, clip=True)


def add_image(fig, ax, frame: MapFrame, values, scale: ColourScale, label: str):
    """The data image (cell-exact) with its colour bar labelled ``label``; returns the colour bar."""
    image = ax.imshow(
        np.asarray(values, dtype=float),
        extent=frame.extent,
        origin=frame.origin,
        cmap=colour_map(scale),
        norm=colour_norm(scale),
        interpolation="nearest",
        zorder=1,
    )
    extend = "both" if scale.ramp == "diverging" else "neither"
    bar = fig.colorbar(image, ax=ax, shrink=0.85, extend=extend)
    bar.set_label(label)
    return bar


def add_arrows(ax, frame: MapFrame, east, north, *, units: str = "m²/yr", colour="black"):
    """Flux arrows with length proportional to magnitude, and a key with a round magnitude.

    Parameters
    ----------
    east, north : ndarray
        Components on the frame's cells, (y, x), in ``units`` (grid east/north on projected grids,
        true east/north on geographic ones).

    Returns
    -------
    tuple
        The quiver and the key's magnitude (in ``units``).

    Notes
    -----
    About :data:`ARROWS_ACROSS` arrows span the wider side; the largest is :data:`ARROW_FILL`
    times the spacing. The key's magnitude is a round number near the largest arrow's.
    """
    qe, qn = np.asarray(east, dtype=float), np.asarray(north, dtype=float)
    step = max(1, int(round(max(qe.shape) / ARROWS_ACROSS)))
    sl = (slice(step // 2, None, step), slice(step // 2, None, step))
    xx, yy = np.meshgrid(frame.x[sl[1]], frame.y[sl[0]])
    ue, un = qe[sl], qn[sl]
    mag = np.hypot(ue, un)
    biggest = float(np.nanmax(mag)) if np.isfinite(mag).any() else 0.0
    spacing = step * abs(frame.x[1] - frame.x[0]) if frame.x.size > 1 else 1.0
    per_unit = ARROW_FILL * spacing / biggest if biggest > 0 else 1.0  # plot units per flux unit
    stretch = np.cos(np.deg2rad(yy)) if frame.geographic else 1.0
    quiver = ax.quiver(
        xx,
        yy,
        ue / stretch,
        un,
        angles="xy",
        scale_units="xy",
        scale=1.0 / per_unit,
        color=colour,
        width=0.0025,
        headwidth=4,
        headlength=4.5,
        pivot="tail",
        zorder=5,
    )
    key = nice_number(biggest) if biggest > 0 else 1.0
    ax.quiverkey(
        quiver,
        0.80,
        1.015,
        key,
        f"{key:g} {units}",
        labelpos="E",
        coordinates="axes",
        fontproperties={"size": 8},
    )
    return quiver, key
