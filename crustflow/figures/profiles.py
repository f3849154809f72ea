"""Figure of a velocity and shear-stress profile across the channel at one site."""

from __future__ import annotations

from pathlib import Path

from crustflow.figures.common import add_caution, pyplot, save_figure

__all__ = ["profile_figure"]

#: Line colours of the east and north components (colour-blind safe pair; common practice, no
#: source).
EAST_COLOUR, NORTH_COLOUR = "#1b9e77", "#7570b3"


def profile_figure(site, path: str | Path, *, dpi: int = 120, formats=("png",)) -> Path:
    """Draw velocity and shear stress against height for one site of
    :func:`crustflow.analyses.profiles.velocity_profiles` (``ds.sel(site=...)``) and save it in
    each of ``formats`` (``path``'s suffix replaced); returns the first file's path."""
    plt = pyplot()
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(8, 5), sharey=True, layout="constrained")
    hk = site.height.values / 1e3
    a1.plot(site.velocity_east.values, hk, label="east", color=EAST_COLOUR)
    a1.plot(site.velocity_north.values, hk, label="north", color=NORTH_COLOUR)
    a1.set_xlabel("velocity (mm/yr)")
    a1.set_ylabel("height above the lower wall (km)")
    a2.plot(site.shear_stress_east.values, hk, label="east", color=EAST_COLOUR)
    a2.plot(site.shear_stress_north.values, hk, label="north", color=NORTH_COLOUR)
    a2.set_xlabel("shear stress (MPa)")
    for ax in (a1, a2):
        for wall in (0.0, hk[-1]):
            ax.axhline(wall, color="0.3", lw=1.5)
        ax.axvline(0.0, color="0.7", lw=0.8)
        ax.legend(loc="best", fontsize=8)
    qe, qn = float(site.flux_east), float(site.flux_north)
    fig.suptitle(
        f"{site.site.item()}: flux ({qe:.4g}, {qn:.4g}) m²/yr east, north; "
        f"walls at 0 and {hk[-1]:.3g} km"
    )
    add_caution(fig)
    path = Path(path)
    return path.parent / save_figure(fig, path.parent, path.stem, formats=formats, dpi=dpi)[0]
