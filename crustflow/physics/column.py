"""Layered density columns: the overburden on a channel under water and roof layers, its placement,
and where the thin-channel approximation fails.

Pure functions on numpy arrays in SI units (m, kg/m^3, Pa). Conventions as in the README: ``H``
surface elevation (m above sea level, negative offshore, where water lies on top), ``T`` crustal
thickness from the surface (or sea floor) to the Moho, ``z`` depth below sea level (positive down),
Moho depth ``z_M = T - H``. The column above a channel top at depth ``z_top`` is, from the top down:
water (offshore, from the sea surface to the sea floor at depth ``-H``), the roof layers in the order
given (each with its own thickness and density; sediments, volcanic piles, ...), then the crust's own
material down to ``z_top``. The roof layers are part of the crust: ``T`` still runs from the surface
(or sea floor) to the Moho, and the crust's material fills what the roof layers leave.

The driving gradient of the channel is :func:`crustflow.physics.isostasy.driving_gradient` applied to the
overburden of :func:`roof_overburden` and the top depth of :func:`channel_geometry`; it is re-exported
here as :func:`driving_gradient_general` (the same function, not a copy).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import GridGeometry, gradient
from crustflow.physics.flexure import gaussian_smoothing
from crustflow.physics.isostasy import driving_gradient

__all__ = [
    "PLACEMENTS",
    "DEPTH_TOLERANCE",
    "THIN_CHANNEL_FACTOR",
    "RoofLayer",
    "Overburden",
    "ChannelGeometry",
    "roof_overburden",
    "channel_geometry",
    "driving_gradient_general",
    "short_wavelength_mask",
    "short_wavelength_limit",
    "wavelength_gradients",
    "short_wavelength_flag",
]

#: Channel placements :func:`channel_geometry` accepts (the scenario's ``channel.placement``).
PLACEMENTS = ("crust-base", "depths", "fixed-depth")

#: Tolerance on comparisons of depths and thicknesses taken from different grids, m. Project
#: choice: float32 grids round depths of up to 100 km to about 0.004 m; 1 m is far above that and
#: far below any geological resolution.
DEPTH_TOLERANCE = 1.0

#: Default ratio of the shortest acceptable load wavelength to the channel thickness,
#: dimensionless. Project choice: McKenzie et al. (2000) need load wavelengths much longer than
#: the channel thickness; the number 3 is ours.
THIN_CHANNEL_FACTOR = 3.0

#: Ratio ``|grad P_short| / |grad P_long|`` above which a cell is flagged by
#: :func:`short_wavelength_mask`, dimensionless. Value derived: for a single sinusoidal load of
#: wavelength L = factor h and a Gaussian of sigma = L / (2 pi), the ratio is
#: ``(1 - e^(-1/2)) / e^(-1/2) = e^(1/2) - 1``, so a sinusoid is flagged exactly when its
#: wavelength is shorter than factor h.
SHORT_WAVE_RATIO = math.expm1(0.5)

#: Standard deviation of the local average of both gradients in :func:`short_wavelength_mask`, in
#: wavelengths L, dimensionless. Project choice: about one wavelength across (+-sigma = L).
SHORT_WAVE_AVERAGING = 0.5

#: Gradient below which a cell is never flagged by :func:`short_wavelength_mask`, as a fraction of
#: the larger of the largest (locally averaged) long-wavelength load gradient and ``max|P| / L``,
#: dimensionless. Project choice: flow driven by a millionth of the largest drive is invisible on
#: the map, ripples of a millionth of the load are a few cm of rock, and the ratio of two
#: rounding-level gradients (a uniform load) means nothing.
SHORT_WAVE_FLOOR = 1e-6


@dataclass(frozen=True)
class RoofLayer:
    """One layer of the roof over the crust's own material.

    Parameters
    ----------
    thickness : float or array_like
        Vertical thickness, m, >= 0 (NaN: nodata).
    density : float or array_like
        kg/m^3, > 0.
    name : str
        Name used in messages (the scenario's ``roof.layers.name``).
    """

    thickness: object
    density: object
    name: str = "roof layer"


class Overburden(NamedTuple):
    """Result of :func:`roof_overburden`."""

    #: Lithostatic pressure at the channel top, Pa; NaN where an input is NaN.
    pressure: np.ndarray
    #: True where the column makes sense: finite, the roof layers end above the channel top, the
    #: channel top lies below the surface (or sea floor) and not below the Moho.
    valid: np.ndarray


class ChannelGeometry(NamedTuple):
    """Result of :func:`channel_geometry`."""

    #: Depth of the channel top below sea level, m.
    top_depth: np.ndarray
    #: Channel thickness, m (base depth minus top depth).
    thickness: np.ndarray
    #: True where the channel has a positive thickness and lies within the crust.
    valid: np.ndarray
    #: Number of cells with data that are not valid.
    invalid_cells: int


#: The driving gradient for any column: :func:`crustflow.physics.isostasy.driving_gradient` itself.
driving_gradient_general = driving_gradient


def roof_overburden(
    elevation,
    crust_thickness,
    top_depth,
    *,
    layers: Sequence,
    rho_crust,
    rho_water: float,
    gravity: float,
    strict: bool = True,
) -> Overburden:
    """Lithostatic pressure at depth ``top_depth`` under water, roof layers and crust.

    Parameters
    ----------
    elevation : array_like
        H, m above sea level; negative offshore, where water of density ``rho_water`` lies on top.
    crust_thickness : array_like
        T, surface (or sea floor) to Moho, m, roof layers included. Used to flag channel tops
        below the Moho.
    top_depth : array_like
        z_top, depth below sea level of the point where the pressure is wanted (the channel
        top), m, positive down.
    layers : sequence
        Roof layers from the top down, each a :class:`RoofLayer`, a ``(thickness, density)`` or
        ``(name, thickness, density)`` tuple, or a mapping with keys ``thickness``, ``density`` and
        optionally ``name``; thickness in m and density in kg/m^3, scalars or arrays. May be empty.
    rho_crust : float or array_like
        Density of the crust's own material, kg/m^3 (a grid allowed).
    rho_water : float
        kg/m^3.
    gravity : float
        m/s^2.
    strict : bool, optional
        If True (default), raise where the roof layers reach below the channel top; if False,
        only flag those cells in ``valid``.

    Returns
    -------
    Overburden
        ``(pressure, valid)``: pressure in Pa (arrays broadcast from the inputs), valid mask.

    Raises
    ------
    CrustflowInputError
        Negative layer thickness, non-positive density, or (``strict``) roof layers thicker than
        the column above the channel top in some cell; the message names the first such layer
        from the top and counts the cells.

    Notes
    -----
    With water depth ``w = max(0, -H)``, sea-floor (or land-surface) depth ``z_s = -H``, layer
    thicknesses ``t_i`` and densities ``rho_i`` from the top down, and roof thickness
    ``S = sum t_i``:

    ``P_top = g (rho_w w + sum_i rho_i t_i + rho_c (z_top - z_s - S))``

    (Each slab is clipped to the part above ``z_top``, so the pressure stays the lithostatic
    integral of the stacked column down to ``z_top`` even where the roof is too thick; those cells
    are flagged.) With no layers this is ``crustflow.physics.isostasy.overburden_pressure`` with
    ``z_top = T - H - h``. A cell is valid where the pressure is finite,
    ``S <= z_top - z_s + DEPTH_TOLERANCE``, ``z_top > z_s`` and
    ``z_top <= T - H + DEPTH_TOLERANCE`` (below the Moho the crust's density would stand in for the
    mantle's).

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002). Geodynamics, 2nd ed. Cambridge University Press,
    section 2.2 (lithostatic pressure of a layered column).
    """
    roof = _as_layers(layers)
    _check_positive_density(rho_crust, "densities.crust")
    if not (math.isfinite(rho_water) and rho_water >= 0):
        raise CrustflowInputError(
            f'densities.water is {rho_water!r}; give a density >= 0, e.g. "1030 kg/m^3"'
        )
    if not (math.isfinite(gravity) and gravity > 0):
        raise CrustflowInputError(f'constants.gravity is {gravity!r}; give e.g. "9.81 m/s^2"')
    arrays = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (elevation, crust_thickness, top_depth, rho_crust)),
        *(np.asarray(a, dtype=float) for layer in roof for a in (layer.thickness, layer.density)),
    )
    h_surf, t_crust, z_top, rho_c = arrays[:4]
    stack = list(zip(arrays[4::2], arrays[5::2], strict=True))
    for layer, (thick, rho) in zip(roof, stack, strict=True):
        negative = np.isfinite(thick) & (thick < 0)
        if negative.any():
            raise CrustflowInputError(
                f"roof layer '{layer.name}' has negative thickness in {int(negative.sum())} "
                f"cells (down to {float(thick[negative].min()):.4g} m); give thicknesses >= 0 "
                "in m"
            )
        _check_positive_density(rho, f"roof layer '{layer.name}' density")

    surface = -h_surf  # depth of the land surface or sea floor, m below sea level
    column = z_top - surface  # solid column above the channel top, m
    water = np.maximum(0.0, -h_surf)
    with np.errstate(invalid="ignore"):
        weight = rho_water * np.minimum(np.maximum(z_top, 0.0), water)  # kg/m^2
        base = surface.copy()  # running depth of the base of the roof so far
        first_excess = None
        for layer, (thick, rho) in zip(roof, stack, strict=True):
            weight = weight + rho * np.minimum(np.maximum(z_top - base, 0.0), thick)
            base = base + thick
            crossed = (base - surface > column + DEPTH_TOLERANCE) & (base > surface)
            if first_excess is None and crossed.any():
                first_excess = layer.name
        weight = weight + rho_c * np.maximum(z_top - base, 0.0)
        excess = (base - surface > column + DEPTH_TOLERANCE) & (base > surface)
        pressure = gravity * weight
        valid = (
            np.isfinite(pressure)
            & ~excess
            & (column > 0.0)
            & (z_top <= t_crust - h_surf + DEPTH_TOLERANCE)
        )
    if strict and excess.any():
        cells = int(excess.sum())
        worst = np.argmax(np.where(excess, base - surface - column, -np.inf))
        raise CrustflowInputError(
            f"roof layer '{first_excess}' reaches below the channel top in {cells} cells (roof "
            f"{float((base - surface).flat[worst]) / 1e3:.4g} km thick where the column above the "
            f"channel top is {float(column.flat[worst]) / 1e3:.4g} km); thin the roof layers or "
            "place the channel deeper (channel.thickness, channel.top_depth)"
        )
    return Overburden(pressure, valid)


def channel_geometry(
    elevation,
    crust_thickness,
    *,
    placement: str = "crust-base",
    thickness=None,
    top_depth=None,
    base_depth=None,
) -> ChannelGeometry:
    """Depth of the channel top and the channel's thickness for each placement.

    Parameters
    ----------
    elevation : array_like
        H, m above sea level, negative offshore.
    crust_thickness : array_like
        T, surface (or sea floor) to Moho, m.
    placement : {"crust-base", "depths", "fixed-depth"}
        ``"crust-base"`` (default): the lowest ``thickness`` of the crust, from ``z_M - h`` to the
        Moho. ``"depths"``: from ``top_depth`` to ``base_depth``. ``"fixed-depth"``: from
        ``top_depth`` to the Moho.
    thickness : float or array_like, optional
        h, m; for "crust-base" only (required there).
    top_depth : float or array_like, optional
        Depth of the channel top below sea level, m, positive down; for "depths" and
        "fixed-depth" (required there).
    base_depth : float or array_like, optional
        Depth of the channel base below sea level, m; for "depths" only (required there).

    Returns
    -------
    ChannelGeometry
        ``(top_depth, thickness, valid, invalid_cells)``: top depth and thickness in m as computed
        (not masked), the mask of cells where the channel has positive thickness and lies within
        the crust, and the number of cells with data that fail.

    Raises
    ------
    CrustflowInputError
        Unknown placement (the message lists the allowed ones), a missing or superfluous option,
        or a channel base not below its top in any cell with data.

    Notes
    -----
    Surface (or sea-floor) depth ``z_s = -H``, Moho depth ``z_M = T - H``.

    - crust-base: ``z_top = z_M - h``, base ``z_M``, thickness ``h``.
    - depths: thickness ``z_base - z_top``.
    - fixed-depth: base ``z_M``, thickness ``z_M - z_top``.

    A cell with data is invalid (flagged, not raised) where the thickness is not positive, the top
    is not below the surface (``z_top <= z_s``: the channel would have no roof), or the base lies
    more than :data:`DEPTH_TOLERANCE` below the Moho.
    """
    if placement not in PLACEMENTS:
        raise CrustflowInputError(
            f"channel.placement '{placement}' is not known; choose one of "
            + ", ".join(f"'{p}'" for p in PLACEMENTS)
        )
    wanted = {
        "crust-base": ("thickness",),
        "depths": ("top_depth", "base_depth"),
        "fixed-depth": ("top_depth",),
    }[placement]
    given = {"thickness": thickness, "top_depth": top_depth, "base_depth": base_depth}
    for key, value in given.items():
        if key in wanted and value is None:
            raise CrustflowInputError(
                f"channel.placement '{placement}' needs channel.{key}; add it (m, positive down "
                "for depths)"
            )
        if key not in wanted and value is not None:
            raise CrustflowInputError(
                f"channel.{key} is not used with channel.placement '{placement}'; remove it or "
                "change the placement"
            )
    h_surf, t_crust, *options = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (elevation, crust_thickness)),
        *(np.asarray(given[key], dtype=float) for key in wanted),
    )
    surface, moho = -h_surf, t_crust - h_surf
    if placement == "crust-base":
        (h,) = options
        z_top, base = moho - h, moho
    elif placement == "depths":
        z_top, base = options
    else:
        (z_top,) = options
        base = moho
    h = base - z_top
    data = np.isfinite(h) & np.isfinite(surface) & np.isfinite(moho)
    with np.errstate(invalid="ignore"):
        valid = data & (h > 0) & (z_top > surface) & (base <= moho + DEPTH_TOLERANCE)
        if data.any() and not (h[data] > 0).any():
            raise CrustflowInputError(_no_thickness_message(placement))
    return ChannelGeometry(z_top, h, valid, int(data.sum() - valid.sum()))


def short_wavelength_mask(
    load_pressure,
    geometry: GridGeometry,
    channel_thickness,
    *,
    factor: float = THIN_CHANNEL_FACTOR,
) -> np.ndarray:
    """Cells where the load varies on wavelengths too short for the thin-channel approximation.

    Parameters
    ----------
    load_pressure : array_like, shape (nrow, ncol)
        The load driving the channel (e.g. the overburden at the channel top), Pa; NaN nodata.
    geometry : crustflow.geometry.grid.GridGeometry
    channel_thickness : float or array_like
        h, m; for a grid, its largest finite value is used (the cautious choice).
    factor : float, optional
        Shortest acceptable wavelength in channel thicknesses (default
        :data:`THIN_CHANNEL_FACTOR`), > 0.

    Returns
    -------
    numpy.ndarray of bool, shape (nrow, ncol)
        True where the load's short-wavelength part carries too much of its gradient; False on
        nodata.

    Notes
    -----
    The load is split at the wavelength ``L = factor h`` with a Gaussian of standard deviation
    ``sigma = L / (2 pi)`` (:func:`crustflow.physics.flexure.gaussian_smoothing`; it passes a fraction
    ``exp(-k^2 sigma^2 / 2)`` of wavenumber k, ``e^(-1/2) = 0.61`` at ``k = 2 pi / L``):
    ``P_long = smooth(P)``, ``P_short = P - P_long``. The drive is the load's gradient; its two
    parts' magnitudes are averaged locally, ``<.>`` being a Gaussian of standard deviation ``L / 2``
    (:data:`SHORT_WAVE_AVERAGING`; a pointwise ratio would flag every crest and trough of a smooth
    load, where ``grad P_long`` passes through zero). A cell is flagged where

    ``<|grad P_short|> > (e^(1/2) - 1) <|grad P_long|> + 1e-6 max(max <|grad P_long|>, max |P| / L)``

    The ratio ``e^(1/2) - 1`` flags a single sinusoidal load exactly when its wavelength is below
    L: both parts are then in phase, in the ratio ``(1 - R) / R`` of the Gaussian's response R at
    every cell, and stay so after averaging. The floor :data:`SHORT_WAVE_FLOOR` keeps rounding
    ripples on flat loads unflagged. Smooth loads whose features are much wider than L (linear
    ramps, tanh steps, Gaussian bumps) are not flagged, next to the grid edges included
    (``tests/test_column.py``). Gradients by :func:`crustflow.geometry.grid.gradient` (on the ellipsoid for
    geographic grids), smoothing in the local frame of :func:`crustflow.physics.flexure.local_frame`.

    The thin-channel (lubrication) equations neglect horizontal derivatives of the flow compared with
    vertical ones, an error of relative order ``(k h)^2`` for a load of wavenumber k; they need load
    wavelengths much longer than the channel thickness (McKenzie et al. 2000). How much longer is a
    matter of judgement: ``factor`` sets it.

    References
    ----------
    McKenzie, D., Nimmo, F., Jackson, J. A., Gans, P. B. & Miller, E. L. (2000). Characteristics
    and consequences of flow in the lower crust. Journal of Geophysical Research 105(B5),
    11029-11046 (page range from memory).
    """
    wavelength = short_wavelength_limit(channel_thickness, factor)
    p = np.array(load_pressure, dtype=float)
    if not np.isfinite(p).any():
        return np.zeros(p.shape, dtype=bool)
    p_long = gaussian_smoothing(p, geometry, sigma=wavelength / (2.0 * math.pi))
    short, long = wavelength_gradients(p, p_long, geometry)
    # Local averages over about one wavelength L: the ratio at a single cell is meaningless where
    # the long-wavelength gradient passes through zero (at the load's crests and troughs).
    average = SHORT_WAVE_AVERAGING * wavelength
    short = gaussian_smoothing(short, geometry, sigma=average)
    long = gaussian_smoothing(long, geometry, sigma=average)
    with np.errstate(invalid="ignore"):
        long_max, p_max = float(np.nanmax(long)), float(np.nanmax(np.abs(p)))
    return short_wavelength_flag(
        short, long, long_max=long_max, load_max=p_max, wavelength=wavelength
    ) & np.isfinite(p)


def short_wavelength_limit(channel_thickness, factor: float = THIN_CHANNEL_FACTOR) -> float:
    """The shortest acceptable load wavelength ``L = factor max(h)`` of
    :func:`short_wavelength_mask`, m (inputs checked as there)."""
    if not (math.isfinite(factor) and factor > 0):
        raise CrustflowInputError(
            f"factor is {factor!r}; give the shortest acceptable wavelength in channel "
            "thicknesses, a number > 0 (e.g. 3)"
        )
    h = np.asarray(channel_thickness, dtype=float)
    finite = h[np.isfinite(h)]
    if finite.size == 0 or not finite.max() > 0:
        raise CrustflowInputError(
            "channel thickness has no positive value; give the channel thickness in m"
        )
    return factor * float(finite.max())


def wavelength_gradients(p, p_long, geometry: GridGeometry) -> tuple[np.ndarray, np.ndarray]:
    """Magnitudes of the gradients of the short and long parts of a load,
    ``|grad(P - P_long)|`` and ``|grad P_long|``, Pa/m (see :func:`short_wavelength_mask`)."""
    short = np.hypot(*gradient(p - p_long, geometry))
    long = np.hypot(*gradient(p_long, geometry))
    return short, long


def short_wavelength_flag(short, long, *, long_max: float, load_max: float, wavelength: float):
    """The comparison of :func:`short_wavelength_mask` on locally averaged gradient magnitudes.

    ``short > (e^(1/2) - 1) long + 1e-6 max(long_max, load_max / wavelength)``, with ``long_max``
    the largest averaged long-wavelength gradient over the whole grid (Pa/m) and ``load_max`` the
    largest ``|P|`` (Pa); both are whole-grid maxima, so a piece of the grid needs them passed in.
    """
    with np.errstate(invalid="ignore"):
        scale = max(long_max, load_max / wavelength)
        floor = SHORT_WAVE_FLOOR * scale
        return short > SHORT_WAVE_RATIO * long + floor


# ----------------------------------------------------------------------------------------------
# helpers


def _as_layers(layers) -> list[RoofLayer]:
    if layers is None or isinstance(layers, (str, bytes)) or not isinstance(layers, Sequence):
        raise CrustflowInputError(
            "roof layers must be a list (from the top down) of (thickness, density) pairs, "
            "RoofLayer objects or tables with thickness and density"
        )
    out = []
    for i, item in enumerate(layers, start=1):
        default = f"layer {i}"
        if isinstance(item, RoofLayer):
            out.append(item)
        elif isinstance(item, Mapping) and {"thickness", "density"} <= set(item):
            out.append(RoofLayer(item["thickness"], item["density"], item.get("name", default)))
        elif isinstance(item, tuple | list) and len(item) == 2:
            out.append(RoofLayer(item[0], item[1], default))
        elif isinstance(item, tuple | list) and len(item) == 3 and isinstance(item[0], str):
            out.append(RoofLayer(item[1], item[2], item[0]))
        else:
            raise CrustflowInputError(
                f"roof layer {i} is {type(item).__name__}; give (thickness, density), "
                "(name, thickness, density), a RoofLayer or a table with thickness and density"
            )
    return out


def _check_positive_density(rho, name: str) -> None:
    values = np.asarray(rho, dtype=float)
    bad = np.isfinite(values) & (values <= 0)
    if bad.any() or np.isinf(values).any():
        raise CrustflowInputError(
            f'{name} must be positive and finite (kg/m^3), e.g. "2800 kg/m^3"; '
            f"{int(bad.sum() + np.isinf(values).sum())} values are not"
        )


def _no_thickness_message(placement: str) -> str:
    if placement == "depths":
        return (
            "channel.base_depth is not below channel.top_depth in any cell; depths are in m "
            "below sea level, positive down: check that the two grids are not swapped"
        )
    if placement == "fixed-depth":
        return (
            "channel.top_depth lies below the Moho in every cell; give a shallower top depth "
            "(m below sea level, positive down)"
        )
    return 'channel.thickness is not positive in any cell; give a positive thickness, e.g. "15 km"'
