"""Channel flow under a synthetic plateau, through crustflow's Python API.

An invented plateau with smooth tanh margins (steep in the west, gentle in the east) is built as
``xarray.DataArray`` grids in a projected frame (UTM zone 25N, which lies over open ocean: the grid
depicts no real place). Its crust is in Airy balance. :func:`crustflow.compute_fields` then gives
the channel-flow fields; the script prints the largest flux and the volume budget, draws one
cell's velocity profile with :func:`crustflow.velocity_profile`, and saves one figure: a flux map,
a west-east cross-section of the crust, flux, thickening and uplift, and the velocity profile.

Run it as::

    python workflows/synthetic_plateau.py --out workflows_out

Notes
-----
Airy balance on land (Turcotte & Schubert 2002, section 2.2): ``T = T0 + H rho_m / (rho_m - rho_c)``
with reference thickness ``T0``. The margins are 20 km (west) and 60 km (east) wide, longer than
the 15 km channel, as the thin-channel model asks; the west margin is near that limit.

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr
from scipy.integrate import simpson

import crustflow
from crustflow.constants import SECONDS_PER_YEAR
from crustflow.variables import CAUTION

#: Projected frame of the synthetic grid (UTM zone 25N, over open ocean; a frame only).
CRS = "EPSG:32625"
#: Grid cell size, m.
CELL = 5e3
#: Grid extent, m: west, south, east, north.
BOUNDS = (150e3, 3200e3, 900e3, 3900e3)
#: Plateau edges (centre of each tanh margin), m: west, south, east, north.
EDGES = (330e3, 3430e3, 640e3, 3670e3)
#: Half-widths of the tanh margins, m: west, south, east, north (invented).
MARGIN_WIDTHS = (20e3, 40e3, 60e3, 40e3)
#: Lowland elevation and plateau height above it, m (invented).
LOWLAND, PLATEAU_HEIGHT = 300.0, 4000.0
#: Crustal thickness where the surface is at sea level, m (common practice, no source).
REFERENCE_THICKNESS = 35e3
#: Densities of crust and mantle, kg/m^3. Common practice, no source (crustflow's defaults).
RHO_CRUST, RHO_MANTLE = 2800.0, 3300.0
#: Northing of the west-east cross-section, m (through the plateau's middle).
PROFILE_Y = 3550e3


def _ramp(s: np.ndarray, centre: float, width: float) -> np.ndarray:
    """Smooth step from 0 to 1 across ``centre`` over about ``width`` (same units as ``s``)."""
    return 0.5 * (1.0 + np.tanh((s - centre) / width))


def synthetic_grids() -> tuple[xr.DataArray, xr.DataArray]:
    """Topography and Airy crustal thickness of the synthetic plateau.

    Returns
    -------
    topography, crust_thickness : xarray.DataArray
        Elevation above sea level and crustal thickness (surface to Moho), m, on dims (y, x) with
        ``y`` descending and the CRS written through rioxarray.
    """
    west, south, east, north = BOUNDS
    x = np.arange(west + CELL / 2, east, CELL)
    y = np.arange(north - CELL / 2, south, -CELL)
    xx, yy = np.meshgrid(x, y)
    w_edge, s_edge, e_edge, n_edge = EDGES
    w_width, s_width, e_width, n_width = MARGIN_WIDTHS
    shape = (
        _ramp(xx, w_edge, w_width)
        * (1.0 - _ramp(xx, e_edge, e_width))
        * _ramp(yy, s_edge, s_width)
        * (1.0 - _ramp(yy, n_edge, n_width))
    )
    elevation = LOWLAND + PLATEAU_HEIGHT * shape
    thickness = REFERENCE_THICKNESS + elevation * RHO_MANTLE / (RHO_MANTLE - RHO_CRUST)
    coords = {
        "y": ("y", y, {"units": "m", "long_name": "northing"}),
        "x": ("x", x, {"units": "m", "long_name": "easting"}),
    }
    topography = xr.DataArray(
        elevation, coords=coords, dims=("y", "x"), name="topography", attrs={"units": "m"}
    ).rio.write_crs(CRS)
    crust = xr.DataArray(
        thickness, coords=coords, dims=("y", "x"), name="crust_thickness", attrs={"units": "m"}
    ).rio.write_crs(CRS)
    return topography, crust


def volume_budget(ds: xr.Dataset) -> tuple[float, float, float]:
    """Volume rates of the channel over the grid, km^3/yr.

    Returns
    -------
    inflow : float
        Volume rate into the cells where the crust thickens: ``thickening_rate`` times cell area,
        summed over those cells.
    net : float
        The same summed over every cell.
    outflow : float
        Net flux out through the grid's edges (the edge cells' own flux times the edge length).

    Notes
    -----
    The divergence is taken in finite-volume form, so ``net = -outflow`` to rounding: channel
    material is neither made nor lost inside the grid.
    """
    dx, dy = abs(float(ds.x[1] - ds.x[0])), abs(float(ds.y[1] - ds.y[0]))  # m, projected grid
    rate = ds["thickening_rate"].values * 1e-3 * dx * dy  # m^3/yr per cell
    q_e, q_n = ds["flux_east"].values, ds["flux_north"].values  # m^2/yr; row 0 is the north edge
    outflow = np.nansum(q_e[:, -1] - q_e[:, 0]) * dy + np.nansum(q_n[0, :] - q_n[-1, :]) * dx
    km3 = 1e9
    return (
        float(np.nansum(np.clip(rate, 0.0, None))) / km3,
        float(np.nansum(rate)) / km3,
        float(outflow) / km3,
    )


def cell_velocity(ds: xr.Dataset, params: crustflow.ModelParameters, iy: int, ix: int) -> dict:
    """Velocity profile across the channel in one cell, along the cell's flux direction.

    Parameters
    ----------
    ds : xarray.Dataset
        Output of :func:`crustflow.compute_fields`.
    params : crustflow.ModelParameters
        The SI parameters the fields were computed with.
    iy, ix : int
        Row and column of the cell.

    Returns
    -------
    dict
        ``zeta`` height above the channel base (m), ``u`` velocity along the flux direction
        (mm/yr), ``tau`` shear stress along it (MPa), and the cell's ``flux`` (m^2/yr).
    """
    drive_e = float(ds["drive_east"][iy, ix])  # Pa/m: practical unit is SI
    drive_n = float(ds["drive_north"][iy, ix])
    zeta = np.linspace(0.0, params.channel_thickness, 61)
    u_e, u_n, tau_e, tau_n = crustflow.velocity_profile(
        zeta,
        drive_e,
        drive_n,
        params.channel_thickness,
        params.viscosity,
        wall_east=params.wall_east,
        wall_north=params.wall_north,
    )
    q_e, q_n = float(ds["flux_east"][iy, ix]), float(ds["flux_north"][iy, ix])
    along = np.array([q_e, q_n]) / np.hypot(q_e, q_n)
    u = (u_e * along[0] + u_n * along[1]) * 1e3 * SECONDS_PER_YEAR
    tau = (tau_e * along[0] + tau_n * along[1]) * 1e-6
    return {"zeta": zeta, "u": u, "tau": tau, "flux": float(np.hypot(q_e, q_n))}


def draw(
    ds: xr.Dataset,
    topography: xr.DataArray,
    profile: dict,
    cell: tuple[int, int],
    params: crustflow.ModelParameters,
    path: Path,
) -> Path:
    """Save the figure: flux map, west-east cross-section and one cell's velocity profile.

    ``profile`` is the output of :func:`cell_velocity` for the cell ``(row, column)``; the PNG is
    written to ``path``, which is returned.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    colours = matplotlib.colormaps["viridis"]
    x_km, y_km = ds.x.values / 1e3, ds.y.values / 1e3
    row = ds.sel(y=PROFILE_Y, method="nearest")
    fig = plt.figure(figsize=(12.5, 8.4), layout="constrained")
    fig.get_layout_engine().set(rect=(0.0, 0.02, 1.0, 0.98))  # room for the caution line
    left, right = fig.subfigures(1, 2, width_ratios=(1.0, 1.25))
    ax_map, ax_vel = left.subplots(2, 1, height_ratios=(2.0, 1.0))
    ax_sec, ax_flux, ax_rate = right.subplots(3, 1, sharex=True)
    half = (x_km[1] - x_km[0]) / 2
    extent = (x_km[0] - half, x_km[-1] + half, y_km[-1] - half, y_km[0] + half)
    image = ax_map.imshow(
        ds["flux_magnitude"].values,
        extent=extent,
        origin="upper",
        cmap="cividis",
        interpolation="nearest",
    )
    levels = [1000.0, 2000.0, 3000.0, 4000.0]
    contours = ax_map.contour(
        x_km, y_km, topography.values, levels=levels, colors="white", linewidths=0.6, alpha=0.7
    )
    ax_map.clabel(contours, fmt=lambda v: f"{v / 1e3:g} km", fontsize=7)
    ax_map.axhline(float(row.y) / 1e3, color="white", linestyle="--", linewidth=1.2)
    iy, ix = cell
    ax_map.plot(
        x_km[ix],
        y_km[iy],
        marker="o",
        markerfacecolor="none",
        markeredgecolor="white",
        markersize=9,
        markeredgewidth=1.5,
    )
    ax_map.set_xlabel("easting (km)")
    ax_map.set_ylabel("northing (km)")
    ax_map.set_title(
        "Flux magnitude; elevation contours, section (dashed), cell (circle)", fontsize=9
    )
    bar = left.colorbar(image, ax=ax_map, shrink=0.8, location="bottom")
    bar.set_label("channel flux per unit width (m²/yr)")

    surface = topography.sel(y=PROFILE_Y, method="nearest").values / 1e3
    top = -row["channel_top_depth"].values
    moho = top - params.channel_thickness / 1e3
    ax_sec.fill_between(x_km, top, moho, color=colours(0.55), alpha=0.7, label="channel")
    ax_sec.plot(x_km, surface, color=colours(0.0), label="surface")
    ax_sec.plot(x_km, moho, color=colours(0.3), label="Moho")
    ax_sec.set_ylabel("height above sea level (km)")
    ax_sec.set_title(f"West-east section at northing {float(row.y) / 1e3:.0f} km", fontsize=9)
    ax_sec.set_ylim(-75.0, 10.0)
    ax_sec.legend(fontsize=8, loc="lower right", ncols=3)

    ax_flux.axhline(0.0, color="0.6", linewidth=0.8)
    ax_flux.plot(x_km, row["flux_east"].values, color=colours(0.15))
    ax_flux.set_ylabel("eastward flux (m²/yr)")

    ax_rate.axhline(0.0, color="0.6", linewidth=0.8)
    ax_rate.plot(
        x_km, row["thickening_rate"].values, color=colours(0.15), label="crustal thickening"
    )
    ax_rate.plot(x_km, row["uplift_rate"].values, color=colours(0.7), label="isostatic uplift")
    ax_rate.set_ylabel("rate (mm/yr)")
    ax_rate.set_xlabel("easting (km)")
    ax_rate.legend(fontsize=8)

    zeta_km = profile["zeta"] / 1e3
    ax_vel.plot(profile["u"], zeta_km, color=colours(0.15))
    ax_vel.axvline(
        profile["flux"] / params.channel_thickness * 1e3,
        color=colours(0.7),
        linestyle="--",
        label="mean velocity",
    )
    ax_vel.set_xlabel("velocity along the flux (mm/yr)")
    ax_vel.set_ylabel("height above channel base (km)")
    ax_vel.set_title(
        f"Channel velocity in the circled cell (flux {profile['flux']:.0f} m²/yr)", fontsize=9
    )
    ax_vel.legend(fontsize=8)

    fig.suptitle(
        "Synthetic tanh-margined plateau (invented grid): channel "
        f"{params.channel_thickness / 1e3:g} km thick, viscosity "
        f"{params.viscosity:.0e} Pa s"
    )
    fig.text(0.005, 0.002, CAUTION, fontsize=6, ha="left", va="bottom")
    fig.savefig(path, dpi=130)
    plt.close(fig)
    return path


def main(argv: list[str] | None = None) -> int:
    """Build the grids, compute the fields, print the numbers and save the figure."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--out",
        type=Path,
        default=Path("workflows_out"),
        help="folder for the figure (default: workflows_out/)",
    )
    args = parser.parse_args(argv)

    topography, crust = synthetic_grids()
    params = crustflow.ModelParameters(
        channel_thickness=15e3, viscosity=1e19, rho_crust=RHO_CRUST, rho_mantle=RHO_MANTLE
    )
    ds = crustflow.compute_fields(topography, crust_thickness=crust, parameters=params)

    flux = ds["flux_magnitude"]
    iy, ix = np.unravel_index(int(np.nanargmax(flux.values)), flux.shape)
    inflow, net, outflow = volume_budget(ds)
    print(f"grid: {ds.sizes['y']} x {ds.sizes['x']} cells of {CELL / 1e3:g} km, {CRS}")
    print(
        f"max flux: {float(flux.max()):.0f} m2/yr at easting {float(ds.x[ix]) / 1e3:.0f} km, "
        f"northing {float(ds.y[iy]) / 1e3:.0f} km"
    )
    print(
        f"max thickening rate: {float(ds['thickening_rate'].max()):.1f} mm/yr; "
        f"max uplift rate: {float(ds['uplift_rate'].max()):.1f} mm/yr"
    )
    print(f"total inflow (volume rate into thickening cells): {inflow:.3f} km3/yr")
    print(
        f"net volume rate over the grid: {net:.2e} km3/yr; outflow through its edges: "
        f"{outflow:.2e} km3/yr (conservation check: sum {net + outflow:.1e}, ~0)"
    )

    profile = cell_velocity(ds, params, iy, ix)
    # The depth integral of u is the flux; Simpson's rule is exact for the parabolic profile.
    integral = simpson(profile["u"], x=profile["zeta"]) * 1e-3  # mm/yr * m -> m2/yr
    print(
        f"velocity profile in that cell: peak {np.abs(profile['u']).max():.1f} mm/yr "
        f"(fields: {float(ds['peak_speed'][iy, ix]):.1f}), depth integral {integral:.0f} m2/yr "
        f"(fields: {profile['flux']:.0f})"
    )

    args.out.mkdir(parents=True, exist_ok=True)
    path = draw(
        ds, topography, profile, (int(iy), int(ix)), params, args.out / "synthetic_plateau.png"
    )
    print(f"figure: {path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
