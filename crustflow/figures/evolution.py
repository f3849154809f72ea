"""Figures of a run through time: elevation profiles at each snapshot, and an animation with flux arrows."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from crustflow.figures.common import add_caution, arrow_stride, pyplot

__all__ = ["profile_figure", "elevation_animation"]

#: Frames per second of the animation (project choice: a 2 Myr run at 0.25 Myr steps lasts ~2 s).
FRAMES_PER_SECOND = 4

#: Largest image side of the animation frames, cells (project choice: bounds GIF size; coarser
#: grids are shown whole).
FRAME_CELLS = 400


def profile_figure(
    profiles: list[tuple[str, np.ndarray, np.ndarray]],
    labels,
    path: str | Path,
    *,
    title: str,
    dpi: int = 150,
) -> Path:
    """Elevation along lines through time: one panel per line, one curve per snapshot.

    Parameters
    ----------
    profiles : list of (name, distance, elevation)
        ``distance`` along the line, km (npts); ``elevation`` m, shape (ntime, npts).
    labels : sequence of str
        One label per snapshot (e.g. ``"0.5 Myr"``).
    path : path
        PNG file to write.
    title : str

    Returns
    -------
    Path
    """
    plt = pyplot()
    n = max(1, len(profiles))
    fig, axes = plt.subplots(n, 1, figsize=(8, 2.6 * n + 0.8), layout="constrained", squeeze=False)
    colours = plt.get_cmap("viridis")(np.linspace(0.0, 1.0, max(2, len(labels))))
    for ax, (name, dist, elev) in zip(axes[:, 0], profiles, strict=False):
        for k, text in enumerate(labels):
            ax.plot(dist, elev[k], color=colours[k], lw=1.2, label=text)
        ax.set_title(name, fontsize=9)
        ax.set_xlabel("distance along the line (km)")
        ax.set_ylabel("elevation (m)")
        ax.grid(alpha=0.3)
    axes[0, 0].legend(fontsize=7, ncol=min(6, len(labels)), loc="best")
    fig.suptitle(title, fontsize=10)
    add_caution(fig, "Elevation through time (Airy isostasy; no erosion).")
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return Path(path)


def elevation_animation(
    x: np.ndarray,
    y: np.ndarray,
    elevation: np.ndarray,
    flux_east: np.ndarray,
    flux_north: np.ndarray,
    labels,
    path: str | Path,
    *,
    title: str,
    dpi: int = 80,
) -> Path:
    """Animated GIF of elevation (one frame per snapshot) with channel-flux arrows.

    Parameters
    ----------
    x, y : numpy.ndarray
        Cell-centre coordinates of the grid (rows north to south).
    elevation : numpy.ndarray, shape (ntime, nrow, ncol)
        m.
    flux_east, flux_north : numpy.ndarray, shape (ntime, nrow, ncol)
        m2 yr-1.
    labels : sequence of str
        One label per frame (e.g. ``"0.5 Myr"``).
    path : path
        GIF file to write (matplotlib's Pillow writer).
    title : str

    Returns
    -------
    Path
    """
    from matplotlib.animation import FuncAnimation, PillowWriter

    plt = pyplot()
    step = max(1, int(np.ceil(max(elevation.shape[1:]) / FRAME_CELLS)))
    elev = elevation[:, ::step, ::step]
    finite = elev[np.isfinite(elev)]
    lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    extent = _extent(x, y)
    stride = arrow_stride(elevation.shape[1:])
    ax_x, ax_y = x[stride // 2 :: stride], y[stride // 2 :: stride]
    fig, ax = plt.subplots(figsize=(6.4, 5.4), layout="constrained")
    image = ax.imshow(elev[0], extent=extent, origin="upper", cmap="terrain", vmin=lo, vmax=hi)
    fig.colorbar(image, ax=ax, label="elevation (m)")
    pick = (slice(stride // 2, None, stride), slice(stride // 2, None, stride))
    arrows = ax.quiver(ax_x, ax_y, flux_east[0][pick], flux_north[0][pick], color="k", width=0.003)
    label = ax.set_title("")
    ax.set_xlabel("x")
    ax.set_ylabel("y")
    ax.tick_params(labelsize=7)
    ax.tick_params(axis="x", labelrotation=30)
    add_caution(fig, "Arrows: channel flux.")

    def frame(k):
        image.set_data(elev[k])
        arrows.set_UVC(flux_east[k][pick], flux_north[k][pick])
        label.set_text(f"{title}: t = {labels[k]}")
        return image, arrows, label

    anim = FuncAnimation(fig, frame, frames=len(labels), blit=False)
    anim.save(path, writer=PillowWriter(fps=FRAMES_PER_SECOND), dpi=dpi)
    plt.close(fig)
    return Path(path)


def _extent(x: np.ndarray, y: np.ndarray) -> tuple[float, float, float, float]:
    dx = (x[-1] - x[0]) / max(1, x.size - 1)
    dy = (y[-1] - y[0]) / max(1, y.size - 1)
    return (x[0] - dx / 2, x[-1] + dx / 2, y[-1] + dy / 2, y[0] - dy / 2)
