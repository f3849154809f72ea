"""What every figure shares: matplotlib without a display, the caution footer, the magnitude image,
the arrow spacing, and saving a figure in every requested format. Colours are crustflow's own ramps
(:mod:`crustflow.io.colour_ramps`); map furniture is in :mod:`crustflow.figures.furniture`.
"""

from __future__ import annotations

from pathlib import Path

from crustflow._version import __version__
from crustflow.figures.furniture import colour_map
from crustflow.io.colour_ramps import ColourScale
from crustflow.variables import CAUTION

__all__ = ["arrow_stride", "magnitude_image", "pyplot", "add_caution", "save_figure", "FORMATS"]

#: Figure file formats crustflow writes (matplotlib backends: Agg, SVG, PDF).
FORMATS = ("png", "svg", "pdf")

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

    fig.get_layout_engine().set(rect=(0.0, foot, 1.0, 1.0 - foot))
    fig.text(
        0.01, 0.005, f"{text} {CAUTION}".strip(), fontsize=6, ha="left", va="bottom", wrap=True
    )


def magnitude_image(fig, ax, x, y, magnitude, label="channel flux per unit width (m²/yr)"):
    """Draw a map of flux magnitude (crustflow's sequential ramp, linear, cell-exact extent) with its
    colour bar. Kept for scripts; the run's maps use :mod:`crustflow.figures.furniture`.

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
        cmap=colour_map(ColourScale("sequential", 0.0, 1.0)),
        interpolation="nearest",
    )
    fig.colorbar(image, ax=ax, shrink=0.85).set_label(label)
    return image, extent


def save_figure(fig, folder, stem: str, *, formats=("png",), dpi: int = 150) -> list[str]:
    """Write a figure in every requested format and close it.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    folder : path
        Destination folder.
    stem : str
        File name without suffix (``flux_map`` -> ``flux_map.png``, ``flux_map.svg``, ...).
    formats : sequence of str
        Any of :data:`FORMATS`, in the order written.
    dpi : int
        Resolution of raster output (PNG; also of images embedded in SVG and PDF). PNG files
        carry it in their ``pHYs`` chunk.

    Returns
    -------
    list of str
        The file names written, in the order of ``formats``.
    """
    plt = pyplot()
    names = []
    try:
        for fmt in dict.fromkeys(formats):
            if fmt not in FORMATS:
                raise ValueError(f"figure format {fmt!r} is not one of {', '.join(FORMATS)}")
            name = f"{stem}.{fmt}"
            fig.savefig(Path(folder) / name, dpi=dpi, format=fmt, metadata=_metadata(fmt))
            names.append(name)
    finally:
        plt.close(fig)
    return names


def _metadata(fmt: str) -> dict:
    """File metadata: creator only, and no creation date in SVG/PDF (reproducible files)."""

    creator = f"crustflow {__version__}"
    if fmt == "png":
        return {"Software": creator}
    if fmt == "svg":
        return {"Creator": creator, "Date": None}
    return {"Creator": creator, "CreationDate": None}
