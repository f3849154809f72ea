"""The load model: crustal column, overburden at the channel top and the driving pressure gradient.

Pure functions on arrays (numpy or dask), SI units. Conventions (see the README):
``H`` surface elevation (m above sea level, negative offshore), ``T`` crustal thickness surface to Moho
(m), ``z`` depth below sea level (positive down), Moho depth ``z_M = T - H``, the channel is the lowest
``h`` of the crust, from ``z_top = z_M - h`` to ``z_M``.
"""

from __future__ import annotations

import numpy as np

from crustflow.geometry.grid import gradient

__all__ = [
    "airy_root",
    "crust_thickness_airy",
    "crust_thickness_from_moho",
    "channel_top_depth",
    "overburden_pressure",
    "driving_gradient",
    "uplift_rate",
]


def airy_root(elevation, rho_crust: float, rho_mantle: float):
    """Depth of the Airy crustal root under land of elevation ``H``.

    Parameters
    ----------
    elevation : array_like
        H, m above sea level (>= 0).
    rho_crust, rho_mantle : float
        Densities, kg/m^3.

    Returns
    -------
    array_like
        Root thickness below the reference Moho, m.

    Notes
    -----
    ``r = H rho_c / (rho_m - rho_c)``; for 2800 and 3300 kg/m^3 the ratio is 5.6.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002), Geodynamics, 2nd ed., section 2.2.
    """
    return elevation * rho_crust / (rho_mantle - rho_crust)


def crust_thickness_airy(
    elevation, reference_thickness: float, rho_crust: float, rho_mantle: float, rho_water: float
):
    """Crustal thickness (surface to Moho) in Airy isostatic balance with the topography.

    Parameters
    ----------
    elevation : array_like
        H, m above sea level, negative offshore.
    reference_thickness : float
        Crustal thickness where H = 0, m.
    rho_crust, rho_mantle, rho_water : float
        Densities, kg/m^3.

    Returns
    -------
    array_like
        T, m.

    Notes
    -----
    On land ``T = T0 + H + H rho_c / (rho_m - rho_c) = T0 + H rho_m / (rho_m - rho_c)``; under water of
    depth ``d = -H`` the balance with the reference column down to its Moho,
    ``rho_w d + rho_c T + rho_m (T0 - d - T) = rho_c T0``, gives ``T = T0 + H (rho_m - rho_w) / (rho_m - rho_c)``.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002), Geodynamics, 2nd ed., section 2.2.
    """
    land = reference_thickness + elevation * rho_mantle / (rho_mantle - rho_crust)
    sea = reference_thickness + elevation * (rho_mantle - rho_water) / (rho_mantle - rho_crust)
    return np.where(elevation >= 0, land, sea)


def crust_thickness_from_moho(elevation, moho_depth):
    """Crustal thickness ``T = z_M + H`` from the Moho depth below sea level, m."""
    return moho_depth + elevation


def channel_top_depth(elevation, crust_thickness, channel_thickness):
    """Depth below sea level of the channel top, ``z_top = T - H - h``, m."""
    return crust_thickness - elevation - channel_thickness


def overburden_pressure(
    elevation,
    crust_thickness,
    channel_thickness,
    *,
    rho_crust: float,
    rho_water: float,
    gravity: float,
):
    """Lithostatic pressure at the channel top, Pa.

    Parameters
    ----------
    elevation : array_like
        H, m (negative offshore: water of density ``rho_water`` lies on top).
    crust_thickness : array_like
        T, surface (or sea floor) to Moho, m.
    channel_thickness : array_like
        h, m.
    rho_crust, rho_water : float
        kg/m^3.
    gravity : float
        m/s^2.

    Returns
    -------
    array_like
        ``P_top = g (rho_w max(0, -H) + rho_c (z_top + H))`` with ``z_top + H = T - h``, Pa.
    """
    water = np.maximum(0.0, -elevation)
    return gravity * (rho_water * water + rho_crust * (crust_thickness - channel_thickness))


def driving_gradient(overburden, top_depth, geometry, *, rho_channel: float, gravity: float):
    """Horizontal pressure gradient at fixed depth inside the channel (the drive), Pa/m.

    Parameters
    ----------
    overburden : ndarray
        P_top, Pa, on the grid.
    top_depth : ndarray
        z_top, m below sea level.
    geometry : crustflow.geometry.grid.GridGeometry
    rho_channel, gravity : float

    Returns
    -------
    (G_east, G_north) : tuple of ndarray
        Pa/m.

    Notes
    -----
    Pressure is hydrostatic across the thin channel, so at fixed depth
    ``G = grad(P_top) - rho_ch g grad(z_top)``. For a uniform crust with ``rho_ch = rho_c`` it reduces to
    ``rho_c g grad(H)``.

    References
    ----------
    Bird, P. (1991), JGR 96(B6), 10275-10286. Clark, M. K. & Royden, L. H. (2000), Geology 28(8), 703-706.
    """

    pe, pn = gradient(overburden, geometry)
    ze, zn = gradient(top_depth, geometry)
    return pe - rho_channel * gravity * ze, pn - rho_channel * gravity * zn


def uplift_rate(
    thickening_rate, elevation, *, rho_channel: float, rho_mantle: float, rho_water: float
):
    """Isostatic surface uplift rate from crustal thickening by channel inflow.

    Parameters
    ----------
    thickening_rate : array_like
        dT/dt, m/s (any rate unit; returned in the same).
    elevation : array_like
        H, m; below 0 the column is under water.
    rho_channel, rho_mantle, rho_water : float
        kg/m^3.

    Returns
    -------
    array_like
        Surface uplift rate, same units as ``thickening_rate``.

    Notes
    -----
    Airy compensation of added channel material: on land ``(1 - rho_ch/rho_m) dT/dt``; under water
    ``(rho_m - rho_ch)/(rho_m - rho_w) dT/dt``.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002), Geodynamics, 2nd ed., section 2.2 (Airy balance).
    """
    land = (1.0 - rho_channel / rho_mantle) * thickening_rate
    sea = (rho_mantle - rho_channel) / (rho_mantle - rho_water) * thickening_rate
    return np.where(elevation >= 0, land, sea)


def isostatic_elevation(
    crust_thickness,
    elevation0,
    crust_thickness0,
    *,
    rho_channel: float,
    rho_mantle: float,
    rho_water: float,
):
    """Surface elevation after the crust thickened (or thinned) from T0 to T by channel material.

    Parameters
    ----------
    crust_thickness : array_like
        T, m.
    elevation0, crust_thickness0 : array_like
        H and T of the same columns at the start, m.
    rho_channel, rho_mantle, rho_water : float
        kg/m^3.

    Returns
    -------
    array_like
        H, m.

    Notes
    -----
    The integral of :func:`uplift_rate` along the path from T0 to T: ``dH/dT`` is the land factor
    ``1 - rho_ch/rho_m`` above sea level and the water factor ``(rho_m - rho_ch)/(rho_m - rho_w)``
    below it, switching where the surface crosses sea level. Path-independent, so the elevation is
    a function of the thickness alone (value derived from Turcotte & Schubert 2002, section 2.2).
    """
    land = float(
        uplift_rate(1.0, 1.0, rho_channel=rho_channel, rho_mantle=rho_mantle, rho_water=rho_water)
    )
    sea = float(
        uplift_rate(1.0, -1.0, rho_channel=rho_channel, rho_mantle=rho_mantle, rho_water=rho_water)
    )
    change = np.asarray(crust_thickness, dtype=float) - crust_thickness0
    h0 = np.asarray(elevation0, dtype=float)
    start = np.where(h0 >= 0, land, sea)
    direct = h0 + start * change
    # thickness change that brings the surface to sea level, then the other factor beyond it
    with np.errstate(invalid="ignore", divide="ignore"):
        to_shore = -h0 / start
    other = np.where(h0 >= 0, sea, land)
    crossed = np.where(h0 >= 0, direct < 0, direct >= 0)
    return np.where(crossed, other * (change - to_shore), direct)
