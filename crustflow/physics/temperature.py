"""Temperature across the crust and across the channel, and the range check of temperatures.

Part of :mod:`crustflow.physics.flowlaws`, which re-exports :data:`MAX_TEMPERATURE`,
:func:`temperature_profile` and :func:`steady_geotherm`; import them from there. Pure functions of
SI NumPy arrays (K, m, W/m^2, W/(m K), W/m^3) that broadcast elementwise and never modify their
inputs. Values are checked (positive temperatures, none above :data:`MAX_TEMPERATURE`); NaN passes
through as nodata.

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   section 4-8 (continental geotherms; section number from memory).
"""

from __future__ import annotations

import numpy as np

from crustflow.errors import CrustflowInputError

#: Highest temperature accepted anywhere in crustflow.physics.flowlaws, K. A sanity limit, no source: hotter
#: than any crustal geotherm and than the solidus of crustal rocks; values above it are unit mistakes.
MAX_TEMPERATURE = 2000.0


def check_temperature(temperature: np.ndarray | float, name: str) -> np.ndarray:
    """Return ``temperature`` as a float array after checking 0 < T <= MAX_TEMPERATURE (NaN ok)."""
    t = np.asarray(temperature, dtype=np.float64)
    if np.any(t <= 0.0):
        raise CrustflowInputError(
            f"{name} has values <= 0 K (min {np.nanmin(t):g}); give kelvin (add 273.15 to "
            "degrees Celsius)"
        )
    if np.any(t > MAX_TEMPERATURE):
        raise CrustflowInputError(
            f"{name} has values above {MAX_TEMPERATURE:g} K (max {np.nanmax(t):g}), hotter than "
            "any crust; check the units (kelvin) and the geotherm"
        )
    return t


def temperature_profile(
    zeta: np.ndarray | float,
    thickness: np.ndarray | float,
    top_K: np.ndarray | float,
    base_K: np.ndarray | float,
) -> np.ndarray:
    """Temperature varying linearly across the channel.

    Parameters
    ----------
    zeta : array_like
        Height above the channel's lower wall (m), 0 to ``thickness``.
    thickness : array_like
        Channel thickness ``h`` (m).
    top_K, base_K : array_like
        Temperature at the upper wall (``zeta = h``) and at the lower wall (``zeta = 0``), K.

    Returns
    -------
    numpy.ndarray
        ``T = base_K + (top_K - base_K) zeta / h`` (K), broadcast over the inputs.

    Raises
    ------
    CrustflowInputError
        If a wall temperature is out of range.

    Notes
    -----
    A conductive geotherm is close to linear over a channel a few km to a few tens of km thick;
    :func:`steady_geotherm` gives the two wall temperatures ([1]_).

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 4-8.
    """
    top = check_temperature(top_K, "top_K")
    base = check_temperature(base_K, "base_K")
    return base + (top - base) * (np.asarray(zeta) / np.asarray(thickness))


def steady_geotherm(
    depth: np.ndarray | float,
    surface_heat_flow: np.ndarray | float,
    conductivity: np.ndarray | float,
    heat_production: np.ndarray | float,
    length_scale: np.ndarray | float,
    surface_temperature: np.ndarray | float,
) -> np.ndarray:
    """Steady conductive geotherm with radiogenic heat production decreasing exponentially.

    Parameters
    ----------
    depth : array_like
        Depth below the ground surface (m), >= 0.
    surface_heat_flow : array_like
        Surface heat flow ``q_s`` (W/m^2), positive upwards out of the ground.
    conductivity : array_like
        Thermal conductivity ``k`` (W/(m K)), positive.
    heat_production : array_like
        Volumetric heat production at the surface ``H0`` (W/m^3), >= 0; it decays with depth as
        ``H0 exp(-z / h_r)``.
    length_scale : array_like
        Decay length ``h_r`` of the heat production (m), positive.
    surface_temperature : array_like
        Temperature at the surface ``T0`` (K).

    Returns
    -------
    numpy.ndarray
        ``T(z)`` in K.

    Raises
    ------
    CrustflowInputError
        If conductivity or length scale is not positive, heat production or depth negative, the
        surface temperature out of range, or ``H0 h_r > q_s`` (negative mantle heat flow).

    Notes
    -----
    With ``q_m = q_s - H0 h_r`` the heat flow from below the radiogenic layer ([1]_, section 4-8,
    eqs. 4-30 and 4-31, section and equation numbers from memory; there ``rho H0`` with ``H0``
    per unit mass, here ``H0`` per unit volume):

    .. math::

        T(z) = T_0 + q_m z / k + (H_0 h_r^2 / k) (1 - e^{-z / h_r})

    so that ``k dT/dz = q_s`` at the surface and ``k dT/dz -> q_m`` at depth; ``H0 = 0`` gives the
    linear geotherm ``T0 + q_s z / k``.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University
       Press, section 4-8 (continental geotherms).
    """
    z = np.asarray(depth, dtype=np.float64)
    q_s = np.asarray(surface_heat_flow, dtype=np.float64)
    k = np.asarray(conductivity, dtype=np.float64)
    h0 = np.asarray(heat_production, dtype=np.float64)
    h_r = np.asarray(length_scale, dtype=np.float64)
    t0 = check_temperature(surface_temperature, "surface_temperature")
    if np.any(k <= 0.0) or np.any(h_r <= 0.0):
        raise CrustflowInputError(
            "conductivity (W/(m K)) and length_scale (m) must be positive; typical crust: 2.5 "
            "W/(m K) and 10e3 m"
        )
    if np.any(h0 < 0.0) or np.any(z < 0.0):
        raise CrustflowInputError(
            "heat_production (W/m^3) and depth (m, below the surface) must not be negative"
        )
    mantle_flow = q_s - h0 * h_r
    if np.any(mantle_flow < 0.0):
        raise CrustflowInputError(
            "heat_production * length_scale exceeds surface_heat_flow (negative heat flow from "
            "the mantle); lower H0 or h_r, or check that heat flow is in W/m^2"
        )
    return t0 + mantle_flow * z / k - (h0 * h_r * h_r / k) * np.expm1(-z / h_r)
