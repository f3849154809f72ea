"""Figures of an ensemble: median and spread of every reported variable, exceedance probabilities,
and histograms of the members' volume budgets.

Same map furniture as the run's maps (:mod:`crustflow.figures.furniture`): crustflow's colour
ramps, CRS axes, scale bar, readable names and units.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from crustflow.figures.common import add_caution, pyplot, save_figure
from crustflow.figures.furniture import add_image, add_scale_bar, label_axes, map_frame
from crustflow.io.colour_ramps import ColourScale, colour_scale
from crustflow.io.display import display_name, display_units
from crustflow.variables import VARIABLES

__all__ = [
    "draw_ensemble_map",
    "draw_exceedance_map",
    "draw_budget_histograms",
    "ensemble_map",
    "budget_histograms",
]

#: Share of the figure's height kept free at the foot for the caution line. Project choice.
FOOT_SHARE = 0.07

#: Histogram bins at most. Common practice, no source.
MAX_BINS = 40

#: m^3/yr in one km^3/Myr: 1e9 m^3 / 1e6 yr (definition).
M3_PER_YR_PER_KM3_PER_MYR = 1e3

#: Bar and line colours of the histograms: the sequential ramp's dark end and the diverging
#: ramp's orange end (crustflow.io.colour_ramps). Project choice.
BAR_COLOUR, MARK_COLOUR = "#353a63", "#8e4d26"


def _unit_suffix(name: str) -> str:
    units = display_units(VARIABLES[name].units)
    return f" ({units})" if units else ""


def draw_ensemble_map(median, spread, x, y, crs, name: str, *, title: str = ""):
    """Median and 5-95 % spread (p95 - p5) of one variable side by side; returns the Figure.

    Parameters
    ----------
    median, spread : ndarray, shape (len(y), len(x))
        In the practical unit of ``name``.
    x, y : ndarray
        Cell-centre coordinates (m or degrees).
    crs
        The grid's CRS (pyproj or rasterio).
    name : str
        Variable name (a key of :data:`crustflow.variables.VARIABLES`).
    title : str
    """
    plt = pyplot()
    frame = map_frame(x, y, crs)
    fig, axes = plt.subplots(1, 2, figsize=(12.5, 5.6), layout="constrained")
    spread_scale = colour_scale("spread", spread, norm="linear")
    panels = (
        (median, colour_scale(name, median), "Median over the members"),
        (spread, spread_scale, "Spread: 95th minus 5th percentile"),
    )
    for ax, (values, scale, label) in zip(axes, panels, strict=True):
        add_image(fig, ax, frame, values, scale, f"{label}{_unit_suffix(name)}")
        add_scale_bar(ax, frame)
        label_axes(ax, frame, crs_note=ax is axes[0])
        ax.set_title(label, fontsize=10)
    fig.suptitle(title or display_name(name), x=0.01, ha="left", fontsize=11)
    add_caution(fig, "Percentiles over ensemble members.", foot=FOOT_SHARE)
    return fig


def draw_exceedance_map(probabilities, thresholds, x, y, crs, name: str, *, title: str = ""):
    """One panel per threshold: the share of members in which ``name`` exceeds it.

    Parameters
    ----------
    probabilities : ndarray, shape (len(thresholds), len(y), len(x))
        0 to 1.
    thresholds : sequence of float
        In the practical unit of ``name``.
    x, y, crs
        As for :func:`draw_ensemble_map`.
    name : str
    title : str

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = pyplot()
    frame = map_frame(x, y, crs)
    n = len(thresholds)
    cols = min(3, n)
    rows = -(-n // cols)
    fig, axes = plt.subplots(
        rows, cols, figsize=(5.4 * cols, 4.6 * rows + 0.6), layout="constrained", squeeze=False
    )
    scale = ColourScale("sequential", 0.0, 1.0)
    units = display_units(VARIABLES[name].units)
    for k, ax in enumerate(axes.ravel()):
        if k >= n:
            ax.set_visible(False)
            continue
        add_image(fig, ax, frame, probabilities[k], scale, "Probability (share of members)")
        add_scale_bar(ax, frame)
        label_axes(ax, frame, crs_note=k == 0)
        ax.set_title(f"Above {thresholds[k]:g} {units}".strip(), fontsize=10)
    head = title or f"Probability that {VARIABLES[name].long_name} exceeds a threshold"
    fig.suptitle(head, x=0.01, ha="left", fontsize=11)
    add_caution(fig, "Share of ensemble members strictly above each threshold.", foot=FOOT_SHARE)
    return fig


def draw_budget_histograms(member_budgets, stats, *, percentiles=(5, 50, 95), note: str = ""):
    """One histogram of the members' volume flux per budget feature, km³/Myr; returns the Figure.

    Parameters
    ----------
    member_budgets : pandas.DataFrame
        One column per feature, m^3/yr (``attrs`` ``names`` and ``kinds``).
    stats : pandas.DataFrame
        ``mean_km3_per_Myr`` and ``<pNN>_km3_per_Myr`` per feature (row order as the columns).
    percentiles : sequence of float
    note : str
        The sign convention, for the foot of the figure.
    """
    plt = pyplot()
    n = member_budgets.shape[1]
    cols = min(3, n)
    rows = -(-n // cols)
    fig, axes = plt.subplots(
        rows, cols, figsize=(4.2 * cols, 3.2 * rows + 0.6), layout="constrained", squeeze=False
    )
    values = member_budgets.to_numpy(dtype=float) / M3_PER_YR_PER_KM3_PER_MYR
    for j, ax in enumerate(axes.ravel()):
        if j >= n:
            ax.set_visible(False)
            continue
        v = values[:, j][np.isfinite(values[:, j])]
        name, kind = member_budgets.attrs["names"][j], member_budgets.attrs["kinds"][j]
        if v.size:
            ax.hist(v, bins=min(MAX_BINS, max(5, int(np.sqrt(v.size)))), color=BAR_COLOUR)
            row = stats.iloc[j]
            ax.axvline(row["mean_km3_per_Myr"], color="black", lw=1.2, label="mean")
            for p in percentiles:
                ax.axvline(row[f"{_label(p)}_km3_per_Myr"], color=MARK_COLOUR, lw=1, ls="--")
            ax.plot(
                [],
                [],
                color=MARK_COLOUR,
                ls="--",
                label="percentiles " + ", ".join(f"{p:g}" for p in percentiles),
            )
            ax.legend(fontsize=6, loc="upper right")
        else:
            ax.text(0.5, 0.5, "no data", ha="center", va="center", transform=ax.transAxes)
        ax.set_title(f"{kind.capitalize()} {name}", fontsize=9)
        ax.set_xlabel("Volume flux (km³/Myr)")
        ax.set_ylabel("Members")
    fig.suptitle(f"Volume budgets over {member_budgets.shape[0]} ensemble members")
    add_caution(fig, f"Signs: {note}." if note else "", foot=FOOT_SHARE)
    return fig


def _label(p: float) -> str:
    """Column label of a percentile: 5 -> ``p05``, 2.5 -> ``p2_5`` (as the ensemble tables)."""
    return f"p{int(p):02d}" if float(p).is_integer() else "p" + f"{p:g}".replace(".", "_")


def _save(fig, path, formats, dpi) -> Path:
    path = Path(path)
    return path.parent / save_figure(fig, path.parent, path.stem, formats=formats, dpi=dpi)[0]


def ensemble_map(
    median, spread, x, y, crs, name: str, path, *, title: str = "", dpi=150, formats=("png",)
) -> Path:
    """Draw :func:`draw_ensemble_map` and save it in each of ``formats``; the first file's path."""
    fig = draw_ensemble_map(median, spread, x, y, crs, name, title=title)
    return _save(fig, path, formats, dpi)


def budget_histograms(
    member_budgets, stats, path, *, percentiles=(5, 50, 95), dpi=150, formats=("png",), note=""
) -> Path:
    """Draw :func:`draw_budget_histograms` and save it in each of ``formats``."""
    fig = draw_budget_histograms(member_budgets, stats, percentiles=percentiles, note=note)
    return _save(fig, path, formats, dpi)
