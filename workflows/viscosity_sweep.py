"""Sweep the channel viscosity on the bundled sample scenario and compare the flux maps.

The invented Varnessa Plateau scenario (see ``sample_grids/README.md``) is solved once for each
viscosity, everything else as in its ``scenario.toml``. The script prints a table of the largest
flux and thickening rate per viscosity, checks that the pressure-driven flux scales as
1/viscosity, and saves one figure: the flux-magnitude maps side by side on one shared colour
scale, and profiles across the steep northern margin (the Varnessa Scarp).

Run it as::

    python workflows/viscosity_sweep.py --out workflows_out

Notes
-----
The flux per unit width of the channel is ``q = U h / 2 - h^3 G / (12 eta)`` (Turcotte & Schubert
2002, section 6.2): the pressure-driven part varies as 1/eta, the wall-driven part ``U h / 2`` not
at all. The sample scenario moves its upper wall, so the check subtracts ``U h / 2`` first. The
thickening rate is ``-div(q)``: once the wall term's own (small) divergence is subtracted, it too
scales as 1/eta. (Uniform components in the map's frame are not divergence-free on the ground
where the projection's scale factor varies across the grid.)

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   section 6.2.
"""

from __future__ import annotations

import argparse
import dataclasses
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import xarray as xr

import crustflow
from crustflow.constants import SECONDS_PER_YEAR
from crustflow.geometry.grid import divergence, grid_geometry
from crustflow.samples import plateau as samples
from crustflow.variables import CAUTION

#: Channel viscosities of the sweep, Pa s.
VISCOSITIES = (1e18, 1e19, 1e20, 1e21)
#: Viscosity the scaling check is referred to, Pa s (the sample scenario's own value).
REFERENCE_VISCOSITY = 1e19
#: North-south profile across the Varnessa Scarp: easting, then southern and northern ends, m.
PROFILE_X, PROFILE_SOUTH, PROFILE_NORTH = 480e3, 3560e3, 3900e3
#: Largest relative departure from 1/viscosity scaling accepted by the check. The fields are
#: float64, so only rounding should remain; a numerical choice, not physical data.
SCALING_RTOL = 1e-6


def sweep(
    scenario_path: Path, viscosities: Sequence[float] = VISCOSITIES
) -> dict[float, xr.Dataset]:
    """Solve the scenario once per viscosity.

    Parameters
    ----------
    scenario_path : Path
        A scenario file (TOML).
    viscosities : sequence of float
        Channel viscosities, Pa s.

    Returns
    -------
    dict
        Viscosity (Pa s) -> fields (:func:`crustflow.solve` output, practical units).
    """
    scenario = crustflow.load_scenario(scenario_path)
    results = {}
    for eta in viscosities:
        params = dataclasses.replace(scenario.parameters, viscosity=eta)
        results[eta] = crustflow.solve(dataclasses.replace(scenario, parameters=params))
    return results


def pressure_driven_flux(ds: xr.Dataset, params: crustflow.ModelParameters) -> np.ndarray:
    """Magnitude of the pressure-driven flux ``|q - U h / 2|``, m^2/yr."""
    wall_e = params.wall_east * params.channel_thickness / 2 * SECONDS_PER_YEAR  # m^2/yr
    wall_n = params.wall_north * params.channel_thickness / 2 * SECONDS_PER_YEAR
    return np.hypot(ds["flux_east"].values - wall_e, ds["flux_north"].values - wall_n)


def wall_thickening(ds: xr.Dataset, params: crustflow.ModelParameters) -> np.ndarray:
    """Thickening rate of the wall-driven flux ``U h / 2`` alone, ``-div(U h / 2)``, mm/yr."""
    geom = grid_geometry(ds["x"].values, ds["y"].values, ds.rio.crs)
    valid = np.isfinite(ds["flux_east"].values)
    q_e = np.where(
        valid, params.wall_east * params.channel_thickness / 2 * SECONDS_PER_YEAR, np.nan
    )
    q_n = np.where(
        valid, params.wall_north * params.channel_thickness / 2 * SECONDS_PER_YEAR, np.nan
    )
    return -divergence(q_e, q_n, geom) * 1e3  # m/yr -> mm/yr


def draw(results: dict[float, xr.Dataset], path: Path, title: str, wall_flux: float) -> Path:
    """Save the comparison figure: maps on one shared log colour scale, and scarp profiles.

    ``wall_flux`` is the magnitude of the wall-driven flux ``U h / 2``, m^2/yr (for the labels).
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import LogNorm

    magnitudes = [ds["flux_magnitude"].values for ds in results.values()]
    low = min(np.nanmin(m[m > 0]) for m in magnitudes)
    high = max(np.nanmax(m) for m in magnitudes)
    # Flux spans orders of magnitude across the sweep: a log scale keeps every map readable.
    norm = LogNorm(vmin=max(low, high * 1e-5), vmax=high)
    colours = matplotlib.colormaps["viridis"]
    shades = {eta: colours(i / max(1, len(results) - 1) * 0.8) for i, eta in enumerate(results)}
    # Thick to thin, so that coinciding curves all stay visible.
    widths = {
        eta: 1.2 + 2.4 * (len(results) - 1 - i) / max(1, len(results) - 1)
        for i, eta in enumerate(results)
    }

    fig = plt.figure(figsize=(15, 8.6), layout="constrained")
    fig.get_layout_engine().set(rect=(0.0, 0.02, 1.0, 0.98))  # room for the caution line
    top, bottom = fig.subfigures(2, 1, height_ratios=(1.1, 1.0))
    maps = top.subplots(1, len(results), sharex=True, sharey=True)
    for ax, (eta, ds) in zip(np.atleast_1d(maps), results.items(), strict=True):
        x_km, y_km = ds.x.values / 1e3, ds.y.values / 1e3
        half = (x_km[1] - x_km[0]) / 2
        extent = (x_km[0] - half, x_km[-1] + half, y_km[-1] - half, y_km[0] + half)
        image = ax.imshow(
            ds["flux_magnitude"].values,
            extent=extent,
            origin="upper",
            cmap="cividis",
            norm=norm,
            interpolation="nearest",
        )
        ax.plot(
            [PROFILE_X / 1e3] * 2,
            [PROFILE_SOUTH / 1e3, PROFILE_NORTH / 1e3],
            color="white",
            linestyle="--",
            linewidth=1.2,
        )
        ax.set_title(f"viscosity {eta:.0e} Pa s", fontsize=10)
        ax.set_xlabel("easting (km)")
        ax.set_aspect("equal")
    np.atleast_1d(maps)[0].set_ylabel("northing (km)")
    bar = top.colorbar(image, ax=maps, shrink=0.85, location="right")
    bar.set_label("channel flux per unit width (m²/yr)")
    top.suptitle(
        "Flux magnitude on one colour scale; dashed: profile across the scarp. The even "
        f"~{wall_flux:.0f} m²/yr floor is the wall-driven flux U h/2, the same for every "
        "viscosity",
        fontsize=10,
    )

    ax_flux, ax_rate = bottom.subplots(1, 2)
    for eta, ds in results.items():
        line = ds.sel(x=PROFILE_X, method="nearest").sel(y=slice(PROFILE_NORTH, PROFILE_SOUTH))
        y_km = line.y.values / 1e3
        ax_flux.plot(
            y_km, line["flux_magnitude"].values, color=shades[eta], label=f"{eta:.0e} Pa s"
        )
        ax_rate.plot(
            y_km,
            line["thickening_rate"].values * eta / REFERENCE_VISCOSITY,
            color=shades[eta],
            linewidth=widths[eta],
            label=f"{eta:.0e} Pa s",
        )
    ax_flux.set_yscale("log")
    ax_flux.set_xlabel("northing (km); the scarp is near 3760 km")
    ax_flux.set_ylabel("flux magnitude (m²/yr)")
    ax_flux.axhline(wall_flux, color="0.5", linestyle=":", linewidth=1.0)
    ax_flux.annotate(
        "wall-driven flux U h/2",
        (PROFILE_NORTH / 1e3, wall_flux),
        fontsize=8,
        ha="right",
        va="bottom",
        xytext=(0, 3),
        textcoords="offset points",
        color="0.35",
    )
    ax_flux.set_title("Flux along the profile", fontsize=10)
    ax_flux.legend(fontsize=8, title="viscosity", title_fontsize=8)
    ax_rate.axhline(0.0, color="0.6", linewidth=0.8)
    ax_rate.set_xlabel("northing (km); the scarp is near 3760 km")
    ax_rate.set_ylabel(f"thickening rate x viscosity / {REFERENCE_VISCOSITY:.0e} Pa s (mm/yr)")
    ax_rate.set_title(
        "Thickening rate scaled by viscosity: the curves coincide (1/viscosity)", fontsize=10
    )
    ax_rate.legend(fontsize=8, title="viscosity", title_fontsize=8)

    fig.suptitle(f"Viscosity sweep on the sample scenario: {title}")
    fig.text(0.005, 0.002, "Invented demo data. " + CAUTION, fontsize=6, ha="left", va="bottom")
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def main(argv: list[str] | None = None) -> int:
    """Run the sweep, print the table and the scaling check, and save the figure."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--out",
        type=Path,
        default=Path("workflows_out"),
        help="folder for the figure (default: workflows_out/)",
    )
    args = parser.parse_args(argv)

    path = samples.demo_scenario("plateau")
    params = crustflow.load_scenario(path).parameters
    results = sweep(path)

    print(f"{'viscosity (Pa s)':>17} {'max flux (m2/yr)':>17} {'max thickening (mm/yr)':>23}")
    for eta, ds in results.items():
        print(
            f"{eta:>17.0e} {float(ds['flux_magnitude'].max()):>17.1f} "
            f"{float(ds['thickening_rate'].max()):>23.2f}"
        )

    # Pressure-driven channel flux scales as 1/viscosity (Turcotte & Schubert 2002, section 6.2);
    # the wall-driven part U h / 2 does not depend on viscosity, so it is removed before the check.
    wall_flux = float(
        np.hypot(params.wall_east, params.wall_north)
        * params.channel_thickness
        / 2
        * SECONDS_PER_YEAR
    )  # m^2/yr
    print(f"wall-driven flux U h / 2 = {wall_flux:.1f} m2/yr at every viscosity")
    reference = results[REFERENCE_VISCOSITY]
    q_ref = pressure_driven_flux(reference, params)
    wall_rate = wall_thickening(reference, params)
    rate_ref = reference["thickening_rate"].values - wall_rate
    print(
        f"1/viscosity check against {REFERENCE_VISCOSITY:.0e} Pa s "
        "(pressure-driven flux and thickening rate times viscosity, ratio to the reference):"
    )
    worst = 0.0
    for eta, ds in results.items():
        scale = eta / REFERENCE_VISCOSITY
        q_ratio = np.nanmax(pressure_driven_flux(ds, params)) * scale / np.nanmax(q_ref)
        with np.errstate(invalid="ignore", divide="ignore"):
            cells = np.abs((ds["thickening_rate"].values - wall_rate) * scale / rate_ref - 1.0)
        rate_dev = float(
            np.nanmax(
                np.where(np.abs(rate_ref) > 1e-3 * np.nanmax(np.abs(rate_ref)), cells, np.nan)
            )
        )
        worst = max(worst, abs(q_ratio - 1.0), rate_dev)
        print(
            f"  {eta:.0e} Pa s: max flux ratio {q_ratio:.9f}, thickening largest cell "
            f"departure {rate_dev:.1e}"
        )
    verdict = "holds" if worst < SCALING_RTOL else "FAILS"
    print(f"1/viscosity scaling {verdict} (largest relative departure {worst:.1e})")

    args.out.mkdir(parents=True, exist_ok=True)
    figure = draw(
        results, args.out / "viscosity_sweep.png", reference.attrs.get("title", ""), wall_flux
    )
    print(f"figure: {figure}")
    return 0 if verdict == "holds" else 1


if __name__ == "__main__":
    raise SystemExit(main())
