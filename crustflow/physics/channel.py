"""One channel cell: flow of a viscous lower-crustal channel between two walls.

The channel is a layer of thickness ``h`` whose lower wall is fixed and whose upper wall moves with
velocity ``U = (U_e, U_n)`` relative to it. A horizontal pressure gradient ``G = (G_e, G_n)`` (the
*drive*, Pa/m) acts inside it; pressure is hydrostatic across the thin layer, so ``G`` does not vary
with height. The flow is a sum of simple shear driven by the wall (Couette flow) and pressure-driven
flow (Poiseuille flow).

Everything here is a pure function of SI arrays: no files, grids or coordinates. Each function works
elementwise with broadcasting on NumPy arrays and on dask arrays (results stay lazy; nothing is
computed here) and never modifies its inputs.

Conventions
-----------
- ``zeta``: height above the lower wall, m, from 0 to ``h``.
- Vectors are (east, north) components.
- ``G`` is the pressure gradient itself, so pressure-driven flow goes *down* the gradient, along -G.
- Shear stress ``tau = eta du/dzeta`` (Pa). The channel drags its upper wall with ``-tau(h)`` and
  its lower wall with ``+tau(0)``.
- Thickness and viscosity must be positive. They are not checked here, because checking values
  would force dask arrays to compute; the scenario layer checks them.

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   section 6.2.
.. [2] Grujic, D. (2006). Channel flow and continental collision tectonics: an overview. In
   Law, R. D. et al. (eds.), *Channel Flow, Ductile Extrusion and Exhumation in Continental
   Collision Zones*, Geological Society, London, Special Publications 268, 25-37.
.. [3] Clark, M. K., Bush, J. W. M. & Royden, L. H. (2005). Dynamic topography produced by lower
   crustal flow against rheological strength heterogeneities bordering the Tibetan Plateau.
   *Geophysical Journal International* 162, 575-590.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import TYPE_CHECKING

import numpy as np

from crustflow.errors import CrustflowInputError
from crustflow.physics.channel_kernels import (
    Array,
    ArrayLike,
    as_float_array,
    broadcast_inputs,
    mean_velocity,
    peak_speed_kernel,
    simpson_last_axis,
    unit_ratio,
)

if TYPE_CHECKING:
    pass

__all__ = [
    "BACKFLOW_RTOL",
    "ChannelSolution",
    "backflow_drive_threshold",
    "channel_flow",
    "flux_from_moments",
    "fluidity_moments",
    "velocity_profile",
    "zero_flux_drive",
]


#: Relative tolerance (dimensionless) of the backflow test. A numerical choice, not physical data:
#: about 10^7 times the float64 rounding unit, so rounding in cases that sit exactly on the
#: backflow threshold or at exactly zero net flux never flips the flag.
BACKFLOW_RTOL = 1e-9


@dataclass(frozen=True)
class ChannelSolution:
    """Flow in one or many channel cells (all fields share one broadcast shape).

    Attributes
    ----------
    flux_east, flux_north : Array
        Volume flux per unit width, integral of u over the channel height (m^2/s).
    mean_velocity_east, mean_velocity_north : Array
        Flux divided by channel thickness (m/s).
    peak_speed : Array
        Largest speed ``|u(zeta)|`` over ``0 <= zeta <= h`` (m/s).
    peak_speed_height : Array
        Height above the lower wall where the peak speed occurs (m). Where several heights share
        the peak (for example where the flow vanishes), the lowest candidate of (lower wall, upper
        wall, interior stationary points) in that order is reported: 0 for a channel at rest.
    upper_wall_drag_east, upper_wall_drag_north : Array
        Shear traction the channel exerts on its upper wall, ``-tau(h)`` (Pa).
    lower_wall_drag_east, lower_wall_drag_north : Array
        Shear traction the channel exerts on its lower wall, ``+tau(0)`` (Pa).
    backflow : Array
        Boolean: some height ``0 < zeta < h`` moves against the net flux (``u(zeta) . q < 0``).
        False where the net flux vanishes (there is no direction to move against) and False where
        any input is NaN; callers mask it with ``isnan(peak_speed)``.
    wall_driven_share : Array
        ``|q_wall| / (|q_wall| + |q_pressure|)`` with ``q_wall = U h / 2`` and
        ``q_pressure = -h^3 G / (12 eta)``; dimensionless, 0 to 1; 0 where both vanish.
    """

    flux_east: Array
    flux_north: Array
    mean_velocity_east: Array
    mean_velocity_north: Array
    peak_speed: Array
    peak_speed_height: Array
    upper_wall_drag_east: Array
    upper_wall_drag_north: Array
    lower_wall_drag_east: Array
    lower_wall_drag_north: Array
    backflow: Array
    wall_driven_share: Array

    def as_dict(self) -> dict[str, Array]:
        """Return the fields as a ``{name: array}`` dictionary, in declaration order.

        Returns
        -------
        dict of str to Array
            The same arrays (not copies), keyed by field name; units as in the class docstring.
        """
        return {field.name: getattr(self, field.name) for field in fields(self)}


# --------------------------------------------------------------------------------------------------
# Uniform viscosity
# --------------------------------------------------------------------------------------------------


def channel_flow(
    drive_east: ArrayLike,
    drive_north: ArrayLike,
    thickness: ArrayLike,
    viscosity: ArrayLike,
    *,
    wall_east: ArrayLike = 0.0,
    wall_north: ArrayLike = 0.0,
) -> ChannelSolution:
    """Flux, peak speed and wall drags of a channel of uniform Newtonian viscosity.

    Parameters
    ----------
    drive_east, drive_north : array_like
        Horizontal pressure gradient ``G`` inside the channel (Pa/m). Flow driven by it goes down
        the gradient.
    thickness : array_like
        Channel thickness ``h`` (m); must be positive.
    viscosity : array_like
        Dynamic viscosity ``eta`` of the channel (Pa s); must be positive.
    wall_east, wall_north : array_like, optional
        Velocity ``U`` of the upper wall relative to the fixed lower wall (m/s). Default 0 (both
        walls fixed).

    Returns
    -------
    ChannelSolution
        All fields broadcast to the common shape of the inputs; dask arrays in, dask arrays out.
        See :class:`ChannelSolution` for the fields and their units.

    Raises
    ------
    CrustflowInputError
        If an input is not numeric or the inputs do not broadcast together.

    Notes
    -----
    With ``zeta`` the height above the lower wall, force balance ``d tau / d zeta = G`` and
    ``tau = eta du/dzeta``, ``u(0) = 0``, ``u(h) = U``, componentwise ([1]_, section 6.2):

    .. math::

        u(\\zeta) = U \\zeta / h + G (\\zeta^2 - h \\zeta) / (2 \\eta)

        q = U h / 2 - h^3 G / (12 \\eta), \\qquad \\bar u = q / h = U / 2 - h^2 G / (12 \\eta)

        \\tau(\\zeta) = \\eta U / h + G (\\zeta - h / 2)

    The mean velocity is eq. 6-17 of [1]_ as cited by [2]_. Upper-wall drag is ``-tau(h)``,
    lower-wall drag ``+tau(0)``.

    *Peak speed.* With ``s = zeta / h``, ``u = A s + B s^2`` where ``B = G h^2 / (2 eta)`` and
    ``A = U - B`` (both m/s), so
    ``|u|^2 = |A|^2 s^2 + 2 (A.B) s^3 + |B|^2 s^4``, whose derivative vanishes at ``s = 0`` and at
    the roots of ``c2 s^2 + c1 s + c0 = 0`` with ``c2 = 2 |B|^2``, ``c1 = 3 (A.B)``,
    ``c0 = |A|^2``. The roots are computed in the cancellation-free form ``r1 = Q / c2``,
    ``r2 = c0 / Q`` with ``Q = -(c1 + sign(c1) sqrt(c1^2 - 4 c2 c0)) / 2``, kept where they lie in
    [0, 1] (any candidate is a point of the channel, so it never overstates the maximum) and
    compared with both walls.

    *Backflow.* ``u(s) . q = s [(A.q) + (B.q) s]``: for ``0 < s < 1`` the bracket is linear in
    ``s``, so some height flows against the net flux iff ``A.q < 0`` (near the fixed wall) or
    ``U.q = (A + B).q < 0`` (near the moving wall). Both tests carry a tolerance
    ``BACKFLOW_RTOL * (|A| + |B|) |q|``, and the net flux counts as zero where
    ``|q| <= BACKFLOW_RTOL (|q_wall| + |q_pressure|)``; so a drive exactly on the threshold
    ``2 eta |U| / h^2``, a zero net flux (drive ``6 eta |U| / h^2``) and a zero drive all give
    False. For ``G`` along ``U`` (pressure-driven flow against the wall), backflow appears near the
    fixed wall once ``|G| > 2 eta |U| / h^2`` and the net flux reverses at ``6 eta |U| / h^2``.

    NaN propagates to every float field that depends on it (east and north components of flux,
    mean velocity and drag depend only on their own component of drive and wall velocity);
    ``backflow`` is False where an input is NaN.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    .. [2] Grujic, D. (2006). Geological Society, London, Special Publications 268, 25-37.

    Examples
    --------
    >>> year = 365.25 * 86400.0
    >>> sol = channel_flow(270.4, 0.0, 15e3, 2e18)
    >>> round(float(-sol.mean_velocity_east) * year * 1e3, 2)  # mm/yr, westward
    80.0
    """
    drive_e, drive_n, h, eta, wall_e, wall_n = broadcast_inputs(
        drive_east=drive_east,
        drive_north=drive_north,
        thickness=thickness,
        viscosity=viscosity,
        wall_east=wall_east,
        wall_north=wall_north,
    )
    return _uniform_channel(drive_e, drive_n, h, eta, wall_e, wall_n)


def channel_flux(
    drive_east: ArrayLike,
    drive_north: ArrayLike,
    thickness: ArrayLike,
    viscosity: ArrayLike,
    *,
    wall_east: ArrayLike = 0.0,
    wall_north: ArrayLike = 0.0,
) -> tuple[Array, Array]:
    """Flux per unit width only, the cheap part of :func:`channel_flow`.

    Parameters
    ----------
    drive_east, drive_north : array_like
        Driving pressure gradient G, Pa/m.
    thickness : array_like
        Channel thickness h, m.
    viscosity : array_like
        Viscosity eta, Pa s.
    wall_east, wall_north : array_like
        Upper-wall velocity U relative to the lower wall, m/s.

    Returns
    -------
    (q_east, q_north) : tuple of arrays
        ``q = U h / 2 - h^3 G / (12 eta)``, m^2/s; identical, bit for bit, to the flux of
        :func:`channel_flow` for the same inputs.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002), Geodynamics, 2nd ed., section 6.2.
    """
    _, _, mean_e, mean_n = mean_velocity(
        drive_east, drive_north, thickness, viscosity, wall_east, wall_north
    )
    return thickness * mean_e, thickness * mean_n


def _uniform_channel(
    drive_e: Array, drive_n: Array, h: Array, eta: Array, wall_e: Array, wall_n: Array
) -> ChannelSolution:
    """Kernel of :func:`channel_flow` on float arrays of one shape."""
    b_e, b_n, mean_e, mean_n = mean_velocity(drive_e, drive_n, h, eta, wall_e, wall_n)
    a_e = wall_e - b_e
    a_n = wall_n - b_n

    # Wall stresses: tau(0) = eta U / h - G h / 2, tau(h) = eta U / h + G h / 2.
    couette_e = eta * wall_e / h
    couette_n = eta * wall_n / h
    half_e = 0.5 * drive_e * h
    half_n = 0.5 * drive_n * h

    peak, peak_height = peak_speed_kernel(a_e, a_n, b_e, b_n, h)

    # Backflow: sign of u(s).q along the channel (see channel_flow Notes).
    wall_part = 0.5 * np.hypot(wall_e, wall_n)
    pressure_part = np.hypot(b_e, b_n) / 6.0
    mean_speed = np.hypot(mean_e, mean_n)
    tolerance = BACKFLOW_RTOL * (np.hypot(a_e, a_n) + np.hypot(b_e, b_n)) * mean_speed
    net_flux = mean_speed > BACKFLOW_RTOL * (wall_part + pressure_part)
    against_near_fixed = (a_e * mean_e + a_n * mean_n) < -tolerance
    against_near_moving = (wall_e * mean_e + wall_n * mean_n) < -tolerance
    backflow = net_flux & (against_near_fixed | against_near_moving)

    parts = wall_part + pressure_part
    share = np.where(np.isnan(parts), np.nan, unit_ratio(wall_part, parts, 0.0))

    return ChannelSolution(
        flux_east=h * mean_e,
        flux_north=h * mean_n,
        mean_velocity_east=mean_e,
        mean_velocity_north=mean_n,
        peak_speed=peak,
        peak_speed_height=peak_height,
        upper_wall_drag_east=-(couette_e + half_e),
        upper_wall_drag_north=-(couette_n + half_n),
        lower_wall_drag_east=couette_e - half_e,
        lower_wall_drag_north=couette_n - half_n,
        backflow=backflow,
        wall_driven_share=share,
    )


def velocity_profile(
    zeta: ArrayLike,
    drive_east: ArrayLike,
    drive_north: ArrayLike,
    thickness: ArrayLike,
    viscosity: ArrayLike,
    *,
    wall_east: ArrayLike = 0.0,
    wall_north: ArrayLike = 0.0,
) -> tuple[Array, Array, Array, Array]:
    """Velocity and shear stress at heights ``zeta`` in a channel of uniform viscosity.

    Parameters
    ----------
    zeta : array_like
        Height above the lower wall (m), normally in ``[0, h]``; outside that range the values are
        the analytic continuation and have no physical meaning. Broadcasts against the other
        arguments: e.g. shape ``(nz,)`` with scalar cell values, or ``(nz, 1, 1)`` against maps of
        shape ``(ny, nx)``.
    drive_east, drive_north : array_like
        Horizontal pressure gradient ``G`` inside the channel (Pa/m).
    thickness : array_like
        Channel thickness ``h`` (m); must be positive.
    viscosity : array_like
        Dynamic viscosity ``eta`` (Pa s); must be positive.
    wall_east, wall_north : array_like, optional
        Velocity ``U`` of the upper wall relative to the lower wall (m/s). Default 0.

    Returns
    -------
    u_east, u_north : Array
        Horizontal velocity at ``zeta`` relative to the lower wall (m/s).
    tau_east, tau_north : Array
        Shear stress ``eta du/dzeta`` at ``zeta`` (Pa).

    Raises
    ------
    CrustflowInputError
        If an input is not numeric or the inputs do not broadcast together.

    Notes
    -----
    Componentwise ([1]_, section 6.2):

    .. math::

        u(\\zeta) = U \\zeta / h + G (\\zeta^2 - h \\zeta) / (2 \\eta), \\qquad
        \\tau(\\zeta) = \\eta U / h + G (\\zeta - h / 2)

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    """
    zeta, drive_e, drive_n, h, eta, wall_e, wall_n = broadcast_inputs(
        zeta=zeta,
        drive_east=drive_east,
        drive_north=drive_north,
        thickness=thickness,
        viscosity=viscosity,
        wall_east=wall_east,
        wall_north=wall_north,
    )
    shape = zeta / h
    parabola = (zeta * zeta - h * zeta) / (2.0 * eta)
    u_e = wall_e * shape + drive_e * parabola
    u_n = wall_n * shape + drive_n * parabola
    offset = zeta - 0.5 * h
    tau_e = eta * wall_e / h + drive_e * offset
    tau_n = eta * wall_n / h + drive_n * offset
    return u_e, u_n, tau_e, tau_n


def backflow_drive_threshold(
    thickness: ArrayLike, viscosity: ArrayLike, wall_speed: ArrayLike
) -> Array:
    """Drive above which part of a wall-driven channel flows backwards.

    Parameters
    ----------
    thickness : array_like
        Channel thickness ``h`` (m); must be positive.
    viscosity : array_like
        Dynamic viscosity ``eta`` (Pa s); must be positive.
    wall_speed : array_like
        Speed ``|U|`` of the upper wall relative to the lower wall (m/s); the sign is ignored.

    Returns
    -------
    Array
        ``2 eta |U| / h^2`` (Pa/m).

    Notes
    -----
    With the pressure gradient ``G`` pointing along ``U`` (so that pressure-driven flow opposes the
    wall), ``du/dzeta`` at the fixed wall is ``|U| / h - |G| h / (2 eta)``; it turns negative, and
    material next to the fixed wall flows backwards, once

    .. math:: |G| > 2 \\eta |U| / h^2

    ([1]_, section 6.2).

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    """
    h, eta, speed = broadcast_inputs(
        thickness=thickness, viscosity=viscosity, wall_speed=wall_speed
    )
    return 2.0 * eta * np.abs(speed) / np.square(h)


def zero_flux_drive(thickness: ArrayLike, viscosity: ArrayLike, wall_speed: ArrayLike) -> Array:
    """Drive at which pressure-driven flow cancels the wall-driven flux.

    Parameters
    ----------
    thickness : array_like
        Channel thickness ``h`` (m); must be positive.
    viscosity : array_like
        Dynamic viscosity ``eta`` (Pa s); must be positive.
    wall_speed : array_like
        Speed ``|U|`` of the upper wall relative to the lower wall (m/s); the sign is ignored.

    Returns
    -------
    Array
        ``6 eta |U| / h^2`` (Pa/m).

    Notes
    -----
    From ``q = U h / 2 - h^3 G / (12 eta)`` with ``G`` along ``U``, the net flux vanishes at

    .. math:: |G| = 6 \\eta |U| / h^2

    ([1]_, section 6.2).

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    """
    h, eta, speed = broadcast_inputs(
        thickness=thickness, viscosity=viscosity, wall_speed=wall_speed
    )
    return 6.0 * eta * np.abs(speed) / np.square(h)


# --------------------------------------------------------------------------------------------------
# Viscosity varying with height
# --------------------------------------------------------------------------------------------------


def fluidity_moments(zeta: ArrayLike, viscosity_profile: ArrayLike) -> tuple[Array, Array, Array]:
    """Moments of fluidity ``1/eta`` across a channel whose viscosity varies with height.

    Parameters
    ----------
    zeta : array_like
        Heights above the lower wall (m), strictly increasing along the last axis, from 0 at the
        lower wall to ``h`` at the upper wall. Shape ``(nz,)`` or anything that broadcasts against
        ``viscosity_profile``.
    viscosity_profile : array_like
        Viscosity sampled at ``zeta`` along the LAST axis (Pa s); positive. Shape ``(..., nz)``.

    Returns
    -------
    I0 : Array
        ``integral_0^h d zeta / eta`` (m / (Pa s)).
    I1 : Array
        ``integral_0^h zeta d zeta / eta`` (m^2 / (Pa s)).
    I2 : Array
        ``integral_0^h zeta^2 d zeta / eta`` (m^3 / (Pa s)).
        Each has the shape of the broadcast inputs without the last axis.

    Raises
    ------
    CrustflowInputError
        If an input is not numeric, is a scalar, the last axes differ in length or hold fewer than
        two samples.

    Notes
    -----
    .. math:: I_k = \\int_0^h \\zeta^k / \\eta(\\zeta) \\, d\\zeta, \\qquad k = 0, 1, 2

    The integrals use the composite Simpson rule on the (possibly irregular) samples, with the
    same weights as ``scipy.integrate.simpson`` (SciPy >= 1.11; for an odd number of intervals the
    last one uses the parabola through the last three samples, [1]_), written with array
    operations so that dask arrays stay lazy. For smooth profiles the error falls as the fourth
    power of the sample spacing (for uniform spacing ``dz`` it is at most
    ``h dz^4 max|f''''| / 180``, [2]_). Across a jump in viscosity any sampled rule is only first
    order: for layered channels, sum the exact layer integrals instead and pass them to
    :func:`flux_from_moments`. Two samples fall back to the trapezoid rule.

    References
    ----------
    .. [1] Cartwright, K. V. (2017). Simpson's rule cumulative integration with MS Excel and
       irregularly-spaced data. *Journal of Mathematical Sciences and Mathematics Education*
       12(2), 1-9 (from memory).
    .. [2] Press, W. H., Teukolsky, S. A., Vetterling, W. T. & Flannery, B. P. (2007).
       *Numerical Recipes*, 3rd ed., Cambridge University Press, section 4.1.
    """
    zeta = as_float_array(zeta, "zeta")
    eta = as_float_array(viscosity_profile, "viscosity_profile")
    if zeta.ndim == 0 or eta.ndim == 0:
        raise CrustflowInputError(
            "zeta and viscosity_profile must be sampled along their last axis (got a scalar); "
            "give heights of shape (nz,) and viscosities of shape (..., nz)"
        )
    n_zeta, n_eta = zeta.shape[-1], eta.shape[-1]
    if n_zeta != n_eta:
        raise CrustflowInputError(
            f"zeta has {n_zeta} samples on its last axis but viscosity_profile has {n_eta}; "
            "sample the viscosity at every height, along the last axis"
        )
    if n_eta < 2:
        raise CrustflowInputError(
            f"viscosity_profile has {n_eta} sample on its last axis; give at least 2 (3 or more "
            "for Simpson's rule)"
        )
    fluidity = 1.0 / eta
    weighted = zeta * fluidity
    return (
        simpson_last_axis(fluidity, zeta),
        simpson_last_axis(weighted, zeta),
        simpson_last_axis(zeta * weighted, zeta),
    )


def flux_from_moments(
    drive_east: ArrayLike,
    drive_north: ArrayLike,
    thickness: ArrayLike,
    I0: ArrayLike,
    I1: ArrayLike,
    I2: ArrayLike,
    *,
    wall_east: ArrayLike = 0.0,
    wall_north: ArrayLike = 0.0,
) -> tuple[Array, Array, Array, Array]:
    """Flux and lower-wall stress of a Newtonian channel of any viscosity profile ``eta(zeta)``.

    Parameters
    ----------
    drive_east, drive_north : array_like
        Horizontal pressure gradient ``G`` inside the channel (Pa/m).
    thickness : array_like
        Channel thickness ``h`` (m); must be positive.
    I0, I1, I2 : array_like
        Fluidity moments ``integral_0^h zeta^k / eta d zeta`` for k = 0, 1, 2, in m/(Pa s),
        m^2/(Pa s), m^3/(Pa s); see :func:`fluidity_moments`.
    wall_east, wall_north : array_like, optional
        Velocity ``U`` of the upper wall relative to the lower wall (m/s). Default 0.

    Returns
    -------
    q_east, q_north : Array
        Volume flux per unit width (m^2/s).
    tau0_east, tau0_north : Array
        Shear stress at the lower wall, ``tau(0)`` (Pa): the drag the channel exerts on the lower
        wall. The stress at the upper wall is ``tau(0) + G h``, and the upper-wall drag its
        negative.

    Raises
    ------
    CrustflowInputError
        If an input is not numeric or the inputs do not broadcast together.

    Notes
    -----
    The force balance gives ``tau(zeta) = tau(0) + G zeta`` and ``du/dzeta = tau / eta``. Then
    ``u(h) = U`` fixes ``tau(0)``, and integrating by parts,
    ``q = integral_0^h (h - zeta) du/dzeta d zeta``:

    .. math::

        \\tau(0) = (U - G I_1) / I_0, \\qquad q = h U - \\tau(0) I_1 - G I_2

    exact for any profile ``eta(zeta)`` (value derived). With uniform viscosity, ``I0 = h/eta``,
    ``I1 = h^2/(2 eta)``, ``I2 = h^3/(3 eta)`` and this reduces to :func:`channel_flow` ([1]_).

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    """
    drive_e, drive_n, h, i0, i1, i2, wall_e, wall_n = broadcast_inputs(
        drive_east=drive_east,
        drive_north=drive_north,
        thickness=thickness,
        I0=I0,
        I1=I1,
        I2=I2,
        wall_east=wall_east,
        wall_north=wall_north,
    )
    tau0_e = (wall_e - drive_e * i1) / i0
    tau0_n = (wall_n - drive_n * i1) / i0
    q_e = h * wall_e - tau0_e * i1 - drive_e * i2
    q_n = h * wall_n - tau0_n * i1 - drive_n * i2
    return q_e, q_n, tau0_e, tau0_n
