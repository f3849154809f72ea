"""Figures of a fit: observed against predicted with error bars, a map of normalised residuals, and
a corner plot of the posterior (matplotlib only).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from crustflow.figures.common import add_caution, pyplot

__all__ = ["residual_figure", "corner_figure"]

#: Histogram bins of the corner plot. Common practice, no source.
CORNER_BINS = 40


def residual_figure(observations, crs, path, *, title: str = "", dpi: int = 150) -> Path:
    """Observed against predicted (with 1-sigma error bars and the 5-95 % predictive range) and a
    map of normalised residuals.

    Parameters
    ----------
    observations : pandas.DataFrame
        :attr:`crustflow.analyses.fitting.run.FitResult.observations` (values in the sets' units).
    crs : rasterio.crs.CRS or None
        CRS of ``x`` and ``y`` (axes in km on projected grids, degrees on geographic ones).
    path : path
        Destination PNG.
    title : str
    dpi : int

    Returns
    -------
    Path
    """
    plt = pyplot()
    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 5), layout="constrained")
    for (label, units), part in observations.groupby(["set", "units"], sort=False):
        yerr = np.vstack(
            [part["predicted"] - part["predicted_p05"], part["predicted_p95"] - part["predicted"]]
        )
        left.errorbar(
            part["observed"],
            part["predicted"],
            xerr=part["sigma"],
            yerr=np.clip(yerr, 0, None),
            fmt="o",
            ms=3,
            capsize=2,
            label=f"{label} ({units})",
        )
    lo = float(np.nanmin(observations[["observed", "predicted"]].to_numpy()))
    hi = float(np.nanmax(observations[["observed", "predicted"]].to_numpy()))
    left.plot([lo, hi], [lo, hi], color="0.4", lw=1, label="1:1")
    left.set_xlabel("observed (error bars: 1 sigma)")
    left.set_ylabel("predicted: posterior median (bars: 5-95 %)")
    left.legend(fontsize=7)
    geographic = bool(crs is not None and crs.is_geographic)
    scale = 1.0 if geographic else 1e-3
    unit = "degrees" if geographic else "km"
    r = observations["normalised_residual"].to_numpy()
    limit = max(3.0, float(np.nanmax(np.abs(r))) if r.size else 3.0)
    dots = right.scatter(
        observations["x"] * scale,
        observations["y"] * scale,
        c=r,
        cmap="RdBu_r",
        vmin=-limit,
        vmax=limit,
        s=18,
        edgecolors="0.2",
        linewidths=0.3,
    )
    fig.colorbar(dots, ax=right, shrink=0.85).set_label("(observed - predicted) / sigma")
    right.set_aspect("equal" if not geographic else "auto")
    right.set_xlabel(f"x ({unit})")
    right.set_ylabel(f"y ({unit})")
    right.set_title("normalised residuals")
    fig.suptitle(f"{title}: fit to observations".strip(": "))
    add_caution(fig, "A fit of a simplified model is a consistency test, not a measurement.")
    path = Path(path)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path


def corner_figure(samples, labels, path, *, best=None, log=None, dpi: int = 120) -> Path:
    """A corner plot: histograms of each quantity and 2-D histograms of each pair.

    Parameters
    ----------
    samples : ndarray, shape (samples, quantities)
    labels : sequence of str
        Axis label of each quantity (with units).
    path : path
        Destination PNG.
    best : ndarray, optional
        A point to mark (the MAP).
    log : sequence of bool, optional
        Quantities drawn on logarithmic axes (viscosity, transmissivity).
    dpi : int

    Returns
    -------
    Path
    """
    plt = pyplot()
    samples = np.asarray(samples, dtype=float)
    k = samples.shape[1]
    log = list(log) if log is not None else [False] * k
    shown = np.where(np.array(log)[None, :], np.log10(np.abs(samples)), samples)
    marks = None
    if best is not None:
        best = np.asarray(best, dtype=float)
        marks = np.where(np.array(log), np.log10(np.abs(best)), best)
    size = max(2.2 * k, 4.0)
    fig, axes = plt.subplots(k, k, figsize=(size, size), layout="constrained", squeeze=False)
    for i in range(k):
        for j in range(k):
            ax = axes[i, j]
            if j > i:
                ax.set_visible(False)
                continue
            if i == j:
                ax.hist(shown[:, i], bins=CORNER_BINS, color="0.3", histtype="step")
                ax.set_yticks([])
                if marks is not None:
                    ax.axvline(marks[i], color="tab:red", lw=1)
            else:
                ax.hist2d(shown[:, j], shown[:, i], bins=CORNER_BINS, cmap="Greys")
                if marks is not None:
                    ax.plot(marks[j], marks[i], "+", color="tab:red", ms=8)
            if i == k - 1:
                ax.set_xlabel(_axis_label(labels[j], log[j]), fontsize=7)
            else:
                ax.set_xticklabels([])
            if j == 0 and i > 0:
                ax.set_ylabel(_axis_label(labels[i], log[i]), fontsize=7)
            ax.tick_params(labelsize=6)
    add_caution(fig, "Posterior samples; red: MAP.")
    path = Path(path)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path


def _axis_label(label: str, logged: bool) -> str:
    return f"log10 {label}" if logged else label
