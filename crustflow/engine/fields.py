"""Output variables and the physics of one block of rows, free of xarray and files.

:data:`VARIABLES` is the single table of output names, long names and practical units. :func:`fields_si`
assembles load, channel and divergence for a whole grid or a strip of rows; both
:func:`crustflow.compute_fields` (the API, whole grids) and :mod:`crustflow.engine.strips` (the command,
strips) call it, so they agree bit for bit.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from crustflow.engine.cells import solve_cells
from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import azimuth, divergence
from crustflow.physics import isostasy as load
from crustflow.physics.channel import ChannelSolution
from crustflow.physics.column import channel_geometry, roof_overburden, short_wavelength_mask
from crustflow.physics.flexure import flexural_filter, gaussian_smoothing
from crustflow.scenario.channel import ChannelSetup
from crustflow.scenario.parameters import ModelParameters
from crustflow.variables import VARIABLES

__all__ = [
    "fields_si",
    "column_si",
    "crust_thickness_of",
    "CELL_EXTRAS",
    "whole_grid_load",
]


#: Variables that need the full one-cell solution, not just the flux.
CELL_EXTRAS = {
    f.name for f in dataclasses.fields(ChannelSolution) if not f.name.startswith("flux_")
} | {"effective_viscosity", "solver_converged"}


def crust_thickness_of(
    elevation, parameters: ModelParameters, *, crust_thickness=None, moho_depth=None
):
    """Crustal thickness T (m) from whichever input the run has: T itself, Moho depth, or Airy."""
    p = parameters
    if crust_thickness is not None:
        return crust_thickness
    if moho_depth is not None:
        return load.crust_thickness_from_moho(elevation, moho_depth)
    if p.reference_thickness is None:
        raise CrustflowInputError(
            "no crust_thickness or moho_depth grid and no "
            "reference_thickness for Airy isostasy; give one of them"
        )
    return load.crust_thickness_airy(
        elevation, p.reference_thickness, p.rho_crust, p.rho_mantle, p.rho_water
    )


def column_si(
    elevation,
    crust_thickness,
    parameters: ModelParameters,
    *,
    load_setup=None,
    cell: dict | None = None,
) -> dict:
    """The density column of a block of cells: channel placement and load at the channel top (SI).

    Returns
    -------
    dict
        ``H``, ``T`` (m, NaN where invalid), ``z_top`` (m below sea level), ``h`` (m),
        ``p_top`` (Pa), ``valid`` (cells with a usable column and channel), ``roof_bad`` (roof
        reaches below the channel top, or None) and ``excluded`` (placed channel has no thickness
        or leaves the crust, or None).

    Notes
    -----
    Uniform crust under water: ``P_top = g (rho_w max(0, -H) + rho_c (z_top + H))``; with roof
    layers or a crust density grid, g times the integral of density from the sea surface down to
    ``z_top`` (crustflow.physics.column.roof_overburden).
    """

    p = parameters
    cell = cell or {}
    ls = load_setup
    valid = np.isfinite(elevation) & np.isfinite(crust_thickness)
    excluded = roof_bad = None
    if ls is None or ls.placement == "crust-base":
        h = cell.get("channel_thickness", p.channel_thickness)
        if np.ndim(h):
            valid = valid & np.isfinite(h)
        H = np.where(valid, elevation, np.nan)
        T = np.where(valid, crust_thickness, np.nan)
        z_top = load.channel_top_depth(H, T, h)
    else:
        top = cell.get("top_depth", ls.top_depth)
        base = cell.get("base_depth", ls.base_depth)
        geo = channel_geometry(
            elevation,
            crust_thickness,
            placement=ls.placement,
            top_depth=top,
            base_depth=base if ls.placement == "depths" else None,
        )
        data = valid & np.isfinite(geo.thickness)
        excluded = data & ~geo.valid
        valid = data & geo.valid
        H = np.where(valid, elevation, np.nan)
        T = np.where(valid, crust_thickness, np.nan)
        z_top, h = np.where(valid, geo.top_depth, np.nan), np.where(valid, geo.thickness, np.nan)
    if ls is not None and (ls.layered or ls.placement != "crust-base"):
        rho_c = cell.get("rho_crust", p.rho_crust)
        layers = [(t, d) for _, t, d in ls.layers_for(cell)]
        col = roof_overburden(
            H,
            T,
            z_top,
            layers=layers,
            rho_crust=rho_c,
            rho_water=p.rho_water,
            gravity=p.gravity,
            strict=False,
        )
        roof_bad = valid & ~col.valid
        valid = valid & col.valid
        p_top = np.where(valid, col.pressure, np.nan)
    else:
        p_top = load.overburden_pressure(
            H, T, h, rho_crust=p.rho_crust, rho_water=p.rho_water, gravity=p.gravity
        )
    return {
        "H": H,
        "T": T,
        "z_top": z_top,
        "h": h,
        "p_top": p_top,
        "valid": valid,
        "roof_bad": roof_bad,
        "excluded": excluded,
    }


def whole_grid_load(
    elevation,
    crust_thickness,
    geometry,
    parameters: ModelParameters,
    *,
    load_setup=None,
    cell: dict | None = None,
    filtered: bool = True,
    mask: bool = True,
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Load at the channel top after the whole-grid filters, and the thin-channel warning flag.

    Parameters
    ----------
    elevation, crust_thickness : ndarray
        The whole grid, m.
    geometry : crustflow.geometry.grid.GridGeometry
    parameters : ModelParameters
    load_setup : crustflow.scenario.load.LoadSetup, optional
    cell : dict, optional
        Parameter grids, SI.
    filtered : bool
        Apply the scenario's smoothing and elastic-crust filter.
    mask : bool
        Compute the thin-channel warning flag.

    Returns
    -------
    p_top : ndarray or None
        Filtered load, Pa (None when ``filtered`` is False or no filter is set).
    warning : ndarray or None
        1.0 where the driving potential varies on wavelengths shorter than 3 channel thicknesses
        (crustflow.physics.column.short_wavelength_mask; McKenzie et al. 2000), 0.0 elsewhere.

    Notes
    -----
    The filters act on the driving potential ``phi = P_top - rho_ch g z_top`` (``G = grad(phi)``;
    ``rho_c g H`` for a uniform crust in Airy balance), and the filtered load is
    ``phi_f + rho_ch g z_top``. Smoothing (a Gaussian of standard deviation ``sigma``) is applied
    first, then the thin elastic crust: the load reaches the channel scaled at wavenumber k by
    ``1 / (1 + D k^4 / (drho g))`` with ``D = E Te^3 / (12 (1 - nu^2))`` and, by default,
    ``drho = rho_mantle - rho_crust`` (compensation at the Moho; Turcotte & Schubert 2002,
    chapter 3). Both act on the whole grid.
    """

    p = parameters
    ls = load_setup
    col = column_si(elevation, crust_thickness, p, load_setup=ls, cell=cell)
    # The driving potential: the load at the channel top referred to sea level through channel
    # material, phi = P_top - rho_ch g z_top, so that G = grad(phi) exactly. Filters act on phi:
    # filtering P_top alone would break the cancellation of the two terms of G.
    reference = p.rho_channel * p.gravity * col["z_top"]
    load_p = col["p_top"] - reference
    out_p = None
    if filtered and ls is not None and ls.filtered:
        if ls.smoothing:
            load_p = gaussian_smoothing(load_p, geometry, sigma=ls.smoothing)
        if ls.elastic_thickness:
            contrast = ls.density_contrast or (p.rho_mantle - p.rho_crust)
            load_p = flexural_filter(
                load_p,
                geometry,
                elastic_thickness=ls.elastic_thickness,
                density_contrast=contrast,
                gravity=p.gravity,
                youngs_modulus=ls.youngs_modulus,
                poissons_ratio=ls.poissons_ratio,
            )
        out_p = np.where(col["valid"], load_p + reference, np.nan)
    warning = None
    if mask:
        h = col["h"]
        flag = short_wavelength_mask(
            np.where(col["valid"], load_p, np.nan), geometry, np.nanmax(h) if np.ndim(h) else h
        )
        warning = np.where(col["valid"], flag.astype(float), np.nan)
    return out_p, warning


def fields_si(
    elevation: np.ndarray,
    crust_thickness: np.ndarray,
    geometry,
    parameters: ModelParameters,
    *,
    wanted=None,
    setup=None,
    cell: dict | None = None,
    load_setup=None,
    p_top_filtered: np.ndarray | None = None,
    thin_channel: np.ndarray | None = None,
    diagnostics: dict | None = None,
) -> dict[str, np.ndarray]:
    """Every output variable in SI units on one block of rows (numpy arrays).

    Parameters
    ----------
    elevation, crust_thickness : ndarray
        H and T, m, NaN for nodata, on ``geometry``'s cells (a whole grid, or a strip of rows with
        two halo rows on each inner side).
    geometry : crustflow.geometry.grid.GridGeometry
    parameters : ModelParameters
    wanted : set of str, optional
        Variables to compute (default: all of :data:`VARIABLES`); others are left out.
    setup : crustflow.scenario.channel.ChannelSetup, optional
        Rheology (default: Newtonian with ``parameters.viscosity``).
    cell : dict, optional
        Parameter grids on the same cells, SI (``channel_thickness``, ``viscosity``,
        ``temperature_top``, ``temperature_base``, ``surface_heat_flow``, roof and placement
        grids); they replace the scalars.
    load_setup : crustflow.scenario.load.LoadSetup, optional
        Roof layers, density grids and channel placement (default: uniform crust, crust-base).
    p_top_filtered : ndarray, optional
        The load at the channel top after the whole-grid filters (smoothing, elastic crust), Pa;
        replaces the local lithostatic value.
    thin_channel : ndarray, optional
        The thin-channel warning flag of these cells (computed over the whole grid).
    diagnostics : dict, optional
        Filled with ``roof_bad`` and ``excluded`` masks (cells whose roof reaches below the channel
        top; cells excluded because the placed channel has no thickness or leaves the crust).

    Returns
    -------
    dict
        Name -> array in SI (m, Pa, Pa/m, m^2/s, m/s, degrees, 1), NaN where the cell depends on
        nodata.
    """
    p = parameters
    wanted = set(VARIABLES) if wanted is None else set(wanted)
    cell = cell or {}
    setup = setup if setup is not None else ChannelSetup()
    col = column_si(elevation, crust_thickness, p, load_setup=load_setup, cell=cell)
    H, z_top, h, valid = col["H"], col["z_top"], col["h"], col["valid"]
    p_top = col["p_top"] if p_top_filtered is None else np.where(valid, p_top_filtered, np.nan)
    for key in ("viscosity", "temperature_top", "temperature_base", "surface_heat_flow"):
        if key in cell:  # a cell without a parameter value depends on nodata
            valid = valid & np.isfinite(cell[key])
    g_east, g_north = load.driving_gradient(
        p_top, z_top, geometry, rho_channel=p.rho_channel, gravity=p.gravity
    )
    live = valid & np.isfinite(g_east) & np.isfinite(g_north)
    out = {
        "crust_thickness": col["T"],
        "channel_top_depth": z_top,
        "overburden_pressure": p_top,
        "drive_east": g_east,
        "drive_north": g_north,
    }
    if thin_channel is not None:
        out["thin_channel_warning"] = thin_channel
    out.update(
        solve_cells(
            np.where(live, g_east, np.nan),
            np.where(live, g_north, np.nan),
            h,
            setup,
            viscosity=p.viscosity,
            wall_east=p.wall_east,
            wall_north=p.wall_north,
            cell=cell,
            elevation=H,
            top_depth=z_top,
            full=bool(wanted & CELL_EXTRAS),
        )
    )
    out["channel_thickness"] = np.broadcast_to(np.asarray(h, dtype=float), np.shape(H))
    if diagnostics is not None:
        diagnostics.update(roof_bad=col["roof_bad"], excluded=col["excluded"])
    out.update(_flux_derived(out, H, geometry, p, wanted))
    return _masked(out, wanted, valid, live, np.shape(H))


#: Variables defined wherever the column is (not only where the channel flows).
_ON_COLUMN = (
    "crust_thickness",
    "channel_top_depth",
    "overburden_pressure",
    "channel_thickness",
    "thin_channel_warning",
)


def _flux_derived(out: dict, elevation, geometry, p: ModelParameters, wanted: set) -> dict:
    """Thickening and uplift rates (finite-volume divergence), flux magnitude and azimuth."""
    q_east, q_north = out["flux_east"], out["flux_north"]
    derived = {}
    if wanted & {"thickening_rate", "uplift_rate"}:
        thickening = -divergence(q_east, q_north, geometry)
        derived["thickening_rate"] = thickening
        derived["uplift_rate"] = load.uplift_rate(
            thickening,
            elevation,
            rho_channel=p.rho_channel,
            rho_mantle=p.rho_mantle,
            rho_water=p.rho_water,
        )
    if "flux_magnitude" in wanted:
        derived["flux_magnitude"] = np.hypot(q_east, q_north)
    if "flux_azimuth" in wanted:
        derived["flux_azimuth"] = azimuth(q_east, q_north, geometry)
    return derived


def _masked(out: dict, wanted: set, valid, live, shape) -> dict[str, np.ndarray]:
    """The wanted variables, in table order, NaN where their cells depend on nodata."""
    result = {}
    for name in VARIABLES:
        if name not in wanted:
            continue
        if name not in out:  # asked for but not computed here (needs the whole grid)
            result[name] = np.full(shape, np.nan)
            continue
        values = np.asarray(out[name])
        if VARIABLES[name].flag:
            values = values.astype("float64")
        result[name] = np.where(valid if name in _ON_COLUMN else live, values, np.nan)
    return result
