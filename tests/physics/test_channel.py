"""Tests of crustflow.physics.channel: one channel cell, physics first.

Sources are named beside each check. "value derived" marks numbers worked out by hand from the
formulas of Turcotte & Schubert (2002), *Geodynamics* 2nd ed., section 6.2. The general-purpose
reference library is SciPy (scipy.integrate.solve_bvp, quad, simpson).
"""

from __future__ import annotations

import dask.array as da
import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from scipy.integrate import quad, simpson, solve_bvp

from crustflow.errors import CrustflowInputError
from crustflow.physics.channel import (
    BACKFLOW_RTOL,
    ChannelSolution,
    backflow_drive_threshold,
    channel_flow,
    fluidity_moments,
    flux_from_moments,
    velocity_profile,
    zero_flux_drive,
)

#: Julian year (s): 365.25 d of 86400 s, the year used throughout crustflow (SCIENCE.md).
YEAR = 365.25 * 86400.0

FIELDS = (
    "flux_east",
    "flux_north",
    "mean_velocity_east",
    "mean_velocity_north",
    "peak_speed",
    "peak_speed_height",
    "upper_wall_drag_east",
    "upper_wall_drag_north",
    "lower_wall_drag_east",
    "lower_wall_drag_north",
    "backflow",
    "wall_driven_share",
)

# Parameter ranges of the randomised checks: channel 1-50 km thick, viscosity 1e17-1e22 Pa s,
# drive components up to 1e3 Pa/m, wall velocity components up to 0.1 m/yr.
thicknesses = st.floats(1e3, 50e3)
viscosities = st.floats(17.0, 22.0).map(lambda exponent: 10.0**exponent)
# Subnormal magnitudes are excluded: below ~1e-300 the comparison tolerance itself underflows.
drives = st.floats(-1e3, 1e3, allow_subnormal=False).map(lambda g: 0.0 if abs(g) < 1e-12 else g)
wall_speeds = st.floats(-0.1 / YEAR, 0.1 / YEAR, allow_subnormal=False).map(
    lambda u: 0.0 if abs(u) < 1e-25 else u
)
angles = st.floats(0.0, 2.0 * np.pi)

FAST = settings(max_examples=40, deadline=None)


def _bvp_reference(drive, thickness, viscosity, wall, decay_length=np.inf):
    """Solve (eta u')' = G, u(0) = 0, u(h) = U with scipy.integrate.solve_bvp (reference library).

    ``eta(zeta) = viscosity * exp(-zeta / decay_length)`` (uniform for an infinite length). The
    problem is scaled to order one: s = zeta / h, w = u / V, t = tau / (viscosity V / h), so
    dw/ds = (viscosity / eta) t and dt/ds = G h^2 / (viscosity V).

    Returns the velocity (m/s) as a function of zeta, the flux (m^2/s, by quad on the solution)
    and the stresses at both walls (Pa), each as (east, north) arrays.
    """
    drive = np.asarray(drive, dtype=float)
    wall = np.asarray(wall, dtype=float)
    h = thickness
    scale = np.hypot(*wall) + np.hypot(*drive) * h**2 / (2.0 * viscosity)
    if scale == 0.0:
        scale = 1.0
    stress_scale = viscosity * scale / h
    forcing = drive * h**2 / (viscosity * scale)
    ratio = h / decay_length

    def rhs(s, y):
        fluidity = np.exp(ratio * s)
        return np.vstack(
            [fluidity * y[2], fluidity * y[3], np.full((2, s.size), 1.0) * forcing[:, None]]
        )

    def boundary(y0, y1):
        return np.array([y0[0], y0[1], y1[0] - wall[0] / scale, y1[1] - wall[1] / scale])

    mesh = np.linspace(0.0, 1.0, 21)
    sol = solve_bvp(rhs, boundary, mesh, np.zeros((4, mesh.size)), tol=1e-10, max_nodes=100_000)
    assert sol.status == 0, sol.message

    def velocity(zeta):
        return scale * sol.sol(np.asarray(zeta) / h)[:2]

    flux = np.array(
        [
            h * scale * quad(lambda s, k=k: sol.sol(s)[k], 0.0, 1.0, epsabs=0.0, epsrel=1e-12)[0]
            for k in (0, 1)
        ]
    )
    tau_bottom = stress_scale * sol.sol(0.0)[2:]
    tau_top = stress_scale * sol.sol(1.0)[2:]
    return velocity, flux, tau_bottom, tau_top, scale


def _rotate(east, north, angle):
    cos, sin = np.cos(angle), np.sin(angle)
    return cos * east - sin * north, sin * east + cos * north


# --------------------------------------------------------------------------------------------------
# Closed form against a general-purpose solver (SciPy)
# --------------------------------------------------------------------------------------------------


@FAST
@given(thicknesses, viscosities, drives, drives, wall_speeds, wall_speeds)
def test_closed_form_matches_solve_bvp(h, eta, g_e, g_n, u_e, u_n):
    # Reference: scipy.integrate.solve_bvp on eta u'' = G, u(0) = 0, u(h) = U.
    velocity, flux, tau_bottom, tau_top, scale = _bvp_reference((g_e, g_n), h, eta, (u_e, u_n))
    zeta = np.linspace(0.0, h, 37)
    u_east, u_north, tau_east, tau_north = velocity_profile(
        zeta, g_e, g_n, h, eta, wall_east=u_e, wall_north=u_n
    )
    reference = velocity(zeta)
    assert_allclose(u_east, reference[0], rtol=0, atol=1e-6 * scale)
    assert_allclose(u_north, reference[1], rtol=0, atol=1e-6 * scale)

    sol = channel_flow(g_e, g_n, h, eta, wall_east=u_e, wall_north=u_n)
    assert_allclose([sol.flux_east, sol.flux_north], flux, rtol=0, atol=1e-6 * scale * h)
    stress = eta * scale / h
    assert_allclose(
        [sol.lower_wall_drag_east, sol.lower_wall_drag_north], tau_bottom, atol=1e-6 * stress
    )
    assert_allclose(
        [sol.upper_wall_drag_east, sol.upper_wall_drag_north], -tau_top, atol=1e-6 * stress
    )
    assert_allclose([tau_east[0], tau_north[0]], tau_bottom, rtol=0, atol=1e-6 * stress)
    assert_allclose([tau_east[-1], tau_north[-1]], tau_top, rtol=0, atol=1e-6 * stress)


def test_profile_meets_wall_conditions():
    # No slip at the fixed lower wall, the wall velocity at the upper wall (boundary conditions of
    # Turcotte & Schubert 2002, section 6.2).
    u_e, u_n, _, _ = velocity_profile(
        np.array([0.0, 12e3]), 150.0, -40.0, 12e3, 5e19, wall_east=1e-9, wall_north=-2e-9
    )
    assert_allclose(u_e, [0.0, 1e-9], rtol=1e-14, atol=0)
    assert_allclose(u_n, [0.0, -2e-9], rtol=1e-14, atol=0)


# --------------------------------------------------------------------------------------------------
# Textbook results: Turcotte & Schubert (2002), section 6.2
# --------------------------------------------------------------------------------------------------


def test_mean_velocity_textbook_formula():
    # Mean velocity U/2 - h^2 G / (12 eta): Turcotte & Schubert (2002) eq. 6-17, as cited by
    # Grujic (2006), Geol. Soc. Spec. Publ. 268. h = 20 km, eta = 1e19 Pa s, G = 100 Pa/m,
    # U = 3e-10 m/s: 1.5e-10 - 4e8 * 100 / 1.2e20 = -1.8333...e-10 m/s (value derived).
    sol = channel_flow(100.0, 0.0, 20e3, 1e19, wall_east=3e-10)
    assert_allclose(sol.mean_velocity_east, 1.5e-10 - 4e8 * 100.0 / 1.2e20, rtol=1e-14)
    assert_allclose(sol.mean_velocity_east, -1.0 / 6.0 * 1e-9 - 1.0 / 60.0 * 1e-9, rtol=1e-14)
    assert_allclose(sol.flux_east, 20e3 * sol.mean_velocity_east, rtol=1e-14)
    assert sol.mean_velocity_north == 0.0


@pytest.mark.parametrize("angle", [0.0, 0.7, np.pi / 2, 2.5, np.pi, 4.0])
@pytest.mark.parametrize(("h", "eta", "speed"), [(15e3, 2e18, 0.02 / YEAR), (40e3, 3e21, 1e-10)])
def test_backflow_threshold(angle, h, eta, speed):
    # Turcotte & Schubert (2002) section 6.2: with the drive along the wall velocity, material at
    # the fixed wall flows backwards once |G| > 2 eta |U| / h^2.
    threshold = backflow_drive_threshold(h, eta, speed)
    assert_allclose(threshold, 2.0 * eta * speed / h**2, rtol=1e-15)
    direction = np.array([np.cos(angle), np.sin(angle)])
    wall = speed * direction

    def flow(factor):
        g = factor * threshold * direction
        return channel_flow(g[0], g[1], h, eta, wall_east=wall[0], wall_north=wall[1])

    assert not flow(1.0 - 1e-6).backflow
    assert not flow(1.0).backflow  # exactly on the threshold: stagnant, not backwards
    assert flow(1.0 + 1e-6).backflow
    # On the threshold the shear stress at the fixed wall vanishes (du/dzeta = 0; value derived).
    at = flow(1.0)
    assert (
        abs(np.hypot(at.lower_wall_drag_east, at.lower_wall_drag_north)) <= 1e-12 * eta * speed / h
    )
    # The opposite drive helps the wall: no backflow at any strength.
    g = -10.0 * threshold * direction
    assert not channel_flow(g[0], g[1], h, eta, wall_east=wall[0], wall_north=wall[1]).backflow


@pytest.mark.parametrize("angle", [0.0, 1.1, np.pi, 5.0])
def test_zero_net_flux_drive(angle):
    # Turcotte & Schubert (2002) section 6.2: q = U h / 2 - h^3 G / (12 eta) vanishes at
    # |G| = 6 eta |U| / h^2 with G along U.
    h, eta, speed = 25e3, 1e20, 0.01 / YEAR
    drive = zero_flux_drive(h, eta, speed)
    assert_allclose(drive, 6.0 * eta * speed / h**2, rtol=1e-15)
    assert_allclose(drive, 3.0 * backflow_drive_threshold(h, eta, speed), rtol=1e-15)
    direction = np.array([np.cos(angle), np.sin(angle)])
    wall = speed * direction

    def flow(factor):
        g = factor * drive * direction
        return channel_flow(g[0], g[1], h, eta, wall_east=wall[0], wall_north=wall[1])

    zero = flow(1.0)
    assert np.hypot(zero.flux_east, zero.flux_north) <= 1e-14 * speed * h
    assert not zero.backflow  # no net flux, so nothing flows "against" it
    below, above = flow(1.0 - 1e-6), flow(1.0 + 1e-6)
    assert below.backflow and above.backflow
    # The net flux reverses across the zero-flux drive.
    assert below.flux_east * wall[0] + below.flux_north * wall[1] > 0
    assert above.flux_east * wall[0] + above.flux_north * wall[1] < 0


def test_threshold_functions_ignore_sign_and_broadcast():
    speeds = np.array([-1e-9, 0.0, 1e-9])
    assert_allclose(backflow_drive_threshold(1e4, 1e19, speeds), [200.0, 0.0, 200.0], rtol=1e-15)
    assert_allclose(zero_flux_drive(1e4, 1e19, speeds), [600.0, 0.0, 600.0], rtol=1e-15)


# --------------------------------------------------------------------------------------------------
# Published parameter set: Clark, Bush & Royden (2005), GJI 162
# --------------------------------------------------------------------------------------------------


def test_clark_bush_royden_channel_drive():
    # Parameters of Clark, Bush & Royden (2005, GJI 162): h = 15 km, eta = 2e18 Pa s, mean speed
    # 80 mm/yr in a pure pressure-driven channel. Drive 270.4 Pa/m (value derived in SCIENCE.md:
    # 12 eta v / h^2).
    h, eta = 15e3, 2e18
    mean_speed = 80e-3 / YEAR
    per_unit_drive = -channel_flow(1.0, 0.0, h, eta).mean_velocity_east  # m/s per Pa/m, linear
    drive = mean_speed / per_unit_drive
    assert float(f"{drive:.4g}") == 270.4
    sol = channel_flow(-270.4, 0.0, h, eta)  # gradient to the west drives flow to the east
    assert float(f"{sol.mean_velocity_east * YEAR * 1e3:.4g}") == 80.0  # mm/yr
    assert sol.wall_driven_share == 0.0


# --------------------------------------------------------------------------------------------------
# End members: pure pressure-driven (Poiseuille) and pure wall-driven (Couette) flow
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("angle", [0.0, 0.3, 2.0, 4.5])
def test_poiseuille_peak_is_three_halves_of_mean(angle):
    # Parabolic profile: peak speed at mid-height, 3/2 of the mean speed (value derived from
    # Turcotte & Schubert 2002, section 6.2: u_max = h^2 |G| / (8 eta), mean h^2 |G| / (12 eta)).
    h, eta, g = 18e3, 4e19, 350.0
    sol = channel_flow(g * np.cos(angle), g * np.sin(angle), h, eta)
    mean_speed = np.hypot(sol.mean_velocity_east, sol.mean_velocity_north)
    assert_allclose(sol.peak_speed, 1.5 * mean_speed, rtol=1e-13)
    assert_allclose(sol.peak_speed, h**2 * g / (8.0 * eta), rtol=1e-13)
    assert_allclose(sol.peak_speed_height, h / 2.0, rtol=1e-12)
    # Flow goes down the gradient.
    assert sol.flux_east * np.cos(angle) + sol.flux_north * np.sin(angle) < 0
    # Walls dragged equally, in the flow direction: tau(0) = -G h/2 = -tau(h).
    assert_allclose(sol.lower_wall_drag_east, -g * np.cos(angle) * h / 2.0, rtol=1e-13, atol=1e-9)
    assert_allclose(sol.upper_wall_drag_east, sol.lower_wall_drag_east, rtol=1e-13, atol=1e-9)
    assert_allclose(sol.upper_wall_drag_north, sol.lower_wall_drag_north, rtol=1e-13, atol=1e-9)
    assert sol.wall_driven_share == 0.0
    assert not sol.backflow


@pytest.mark.parametrize("angle", [0.0, 1.0, 3.5])
def test_couette_flow(angle):
    # Linear profile: peak speed |U| at the moving wall, shear stress eta |U| / h throughout, the
    # two walls dragged equally and oppositely (Turcotte & Schubert 2002, section 6.2).
    h, eta, speed = 30e3, 1e21, 0.05 / YEAR
    u_e, u_n = speed * np.cos(angle), speed * np.sin(angle)
    sol = channel_flow(0.0, 0.0, h, eta, wall_east=u_e, wall_north=u_n)
    assert_allclose(sol.peak_speed, speed, rtol=1e-14)
    assert_allclose(sol.peak_speed_height, h, rtol=1e-14)
    assert_allclose(
        [sol.mean_velocity_east, sol.mean_velocity_north], [u_e / 2, u_n / 2], rtol=1e-14
    )
    assert_allclose(sol.lower_wall_drag_east, eta * u_e / h, rtol=1e-14)
    assert_allclose(sol.lower_wall_drag_north, eta * u_n / h, rtol=1e-14)
    assert_array_equal(sol.upper_wall_drag_east, -sol.lower_wall_drag_east)
    assert_array_equal(sol.upper_wall_drag_north, -sol.lower_wall_drag_north)
    assert sol.wall_driven_share == 1.0
    assert not sol.backflow


def test_channel_at_rest():
    sol = channel_flow(0.0, 0.0, 10e3, 1e19)
    for name in FIELDS:
        assert getattr(sol, name) == 0, name
    assert sol.peak_speed_height == 0.0  # documented tie-break: the lower wall


def test_wall_driven_share_mixed():
    # q_wall = U h / 2 and q_pressure = -h^3 G / (12 eta) of equal size give a share of 1/2:
    # G = 6 eta U / h^2 (value derived).
    h, eta, speed = 10e3, 1e19, 1e-9
    sol = channel_flow(0.0, 6.0 * eta * speed / h**2, h, eta, wall_east=speed)
    assert_allclose(sol.wall_driven_share, 0.5, rtol=1e-14)


# --------------------------------------------------------------------------------------------------
# Peak speed and backflow against brute-force sampling
# --------------------------------------------------------------------------------------------------


def _sampled_speed(zeta, g_e, g_n, h, eta, u_e, u_n):
    v_e, v_n, _, _ = velocity_profile(zeta, g_e, g_n, h, eta, wall_east=u_e, wall_north=u_n)
    return np.hypot(v_e, v_n), v_e, v_n


@FAST
@given(thicknesses, viscosities, drives, angles, wall_speeds, angles)
def test_peak_speed_against_sampling(h, eta, g, g_angle, speed, u_angle):
    # Non-parallel drive and wall velocity; slow reference: |u| sampled at 20001 heights.
    assume(abs(np.sin(g_angle - u_angle)) > 1e-3)
    g_e, g_n = g * np.cos(g_angle), g * np.sin(g_angle)
    u_e, u_n = speed * np.cos(u_angle), speed * np.sin(u_angle)
    sol = channel_flow(g_e, g_n, h, eta, wall_east=u_e, wall_north=u_n)
    sampled, _, _ = _sampled_speed(np.linspace(0.0, h, 20001), g_e, g_n, h, eta, u_e, u_n)
    brute = sampled.max()
    assert sol.peak_speed >= brute * (1.0 - 1e-12)
    assert sol.peak_speed <= brute * (1.0 + 1e-7) + 1e-300
    at_height, _, _ = _sampled_speed(sol.peak_speed_height, g_e, g_n, h, eta, u_e, u_n)
    assert_allclose(at_height, sol.peak_speed, rtol=1e-10, atol=1e-300)
    assert 0.0 <= sol.peak_speed_height <= h


@FAST
@given(thicknesses, viscosities, drives, drives, wall_speeds, wall_speeds)
def test_backflow_agrees_with_sampled_profile(h, eta, g_e, g_n, u_e, u_n):
    # Slow reference: sign of u(zeta) . q at 20001 interior heights, plus heights 1e-10 h from each
    # wall (the flag's tolerance, BACKFLOW_RTOL = 1e-9, keeps a flagged region at least that wide).
    assert BACKFLOW_RTOL <= 1e-9
    sol = channel_flow(g_e, g_n, h, eta, wall_east=u_e, wall_north=u_n)
    s = np.concatenate([[1e-10], np.linspace(0.0, 1.0, 20001)[1:-1], [1.0 - 1e-10]])
    speed, v_e, v_n = _sampled_speed(s * h, g_e, g_n, h, eta, u_e, u_n)
    along = v_e * sol.flux_east + v_n * sol.flux_north
    size = speed.max() * np.hypot(sol.flux_east, sol.flux_north)
    if np.any(along < -1e-6 * size):
        assert sol.backflow
    if sol.backflow:
        assert np.any(along < 0.0)


# --------------------------------------------------------------------------------------------------
# Viscosity varying with height: fluidity moments
# --------------------------------------------------------------------------------------------------


def _exponential_moments(h, eta0, length):
    # I_k = (1/eta0) integral_0^h zeta^k exp(zeta / L) dzeta in closed form (value derived).
    c = 1.0 / length
    e = np.exp(c * h)
    i0 = (e - 1.0) / c
    i1 = e * (h / c - 1.0 / c**2) + 1.0 / c**2
    i2 = e * (h**2 / c - 2.0 * h / c**2 + 2.0 / c**3) - 2.0 / c**3
    return i0 / eta0, i1 / eta0, i2 / eta0


@pytest.mark.parametrize("n", [2, 3, 4, 11, 50])
def test_fluidity_moments_uniform_reproduce_closed_form(n):
    # Uniform eta: I0 = h/eta, I1 = h^2/(2 eta), I2 = h^3/(3 eta) (value derived); Simpson's rule is
    # exact for these polynomials, on irregular samples too (the trapezoid at n = 2 only for I0).
    h, eta = 20e3, 3e19
    rng = np.random.default_rng(n)
    zeta = np.concatenate([[0.0], np.sort(rng.uniform(0.0, h, n - 2)), [h]])
    i0, i1, i2 = fluidity_moments(zeta, np.full(n, eta))
    assert_allclose(i0, h / eta, rtol=1e-13)
    if n > 2:
        assert_allclose(i1, h**2 / (2 * eta), rtol=1e-12)
        assert_allclose(i2, h**3 / (3 * eta), rtol=1e-12)
    q_e, q_n, tau_e, tau_n = flux_from_moments(120.0, -30.0, h, i0, i1, i2, wall_east=2e-9)
    sol = channel_flow(120.0, -30.0, h, eta, wall_east=2e-9)
    if n > 2:
        assert_allclose([q_e, q_n], [sol.flux_east, sol.flux_north], rtol=1e-11)
        assert_allclose(
            [tau_e, tau_n], [sol.lower_wall_drag_east, sol.lower_wall_drag_north], rtol=1e-11
        )


@pytest.mark.parametrize("n", [5, 6, 17, 40])
def test_fluidity_moments_match_scipy_simpson(n):
    # Reference library: scipy.integrate.simpson on irregular samples, odd and even counts,
    # several profiles at once along the last axis.
    rng = np.random.default_rng(100 + n)
    h = 12e3
    zeta = np.concatenate([[0.0], np.sort(rng.uniform(0.0, h, n - 2)), [h]])
    eta = 10.0 ** rng.uniform(18.0, 21.0, size=(3, 2, n))
    moments = fluidity_moments(zeta, eta)
    for k, moment in enumerate(moments):
        assert moment.shape == (3, 2)
        assert_allclose(moment, simpson(zeta**k / eta, x=zeta, axis=-1), rtol=1e-12)


def test_fluidity_moments_exponential_fourth_order():
    # Simpson's rule error falls as the fourth power of the spacing (Press et al. 2007, Numerical
    # Recipes 3rd ed., section 4.1): halving the spacing divides it by about 16.
    h, eta0, length = 20e3, 1e21, 6e3
    exact = np.array(_exponential_moments(h, eta0, length))
    errors = []
    for intervals in (20, 40, 80):
        zeta = np.linspace(0.0, h, intervals + 1)
        moments = np.array(fluidity_moments(zeta, eta0 * np.exp(-zeta / length)))
        errors.append(np.abs(moments / exact - 1.0))
    errors = np.array(errors)
    assert np.all(errors[-1] < 1e-6)
    assert np.all((errors[:-1] / errors[1:] > 14.0) & (errors[:-1] / errors[1:] < 18.0))


@settings(max_examples=25, deadline=None)
@given(
    thicknesses,
    viscosities,
    st.floats(0.25, 4.0),
    drives,
    drives,
    wall_speeds,
    wall_speeds,
)
def test_flux_from_moments_matches_solve_bvp_exponential(h, eta0, decay, g_e, g_n, u_e, u_n):
    # eta = eta0 exp(-zeta / L); reference: scipy.integrate.solve_bvp on (eta u')' = G.
    length = decay * h
    _, flux, tau_bottom, _, scale = _bvp_reference((g_e, g_n), h, eta0, (u_e, u_n), length)
    i0, i1, i2 = _exponential_moments(h, eta0, length)
    q_e, q_n, tau_e, tau_n = flux_from_moments(
        g_e, g_n, h, i0, i1, i2, wall_east=u_e, wall_north=u_n
    )
    flux_size = scale * h * np.exp(h / length)
    stress_size = eta0 * scale / h
    assert_allclose([q_e, q_n], flux, rtol=0, atol=1e-6 * flux_size)
    assert_allclose([tau_e, tau_n], tau_bottom, rtol=0, atol=1e-6 * stress_size)
    # Sampled moments (401 heights) give the same flux.
    zeta = np.linspace(0.0, h, 401)
    sampled = fluidity_moments(zeta, eta0 * np.exp(-zeta / length))
    q2_e, q2_n, _, _ = flux_from_moments(g_e, g_n, h, *sampled, wall_east=u_e, wall_north=u_n)
    assert_allclose([q2_e, q2_n], flux, rtol=0, atol=1e-6 * flux_size)


# --------------------------------------------------------------------------------------------------
# Invariants: rotation and linearity
# --------------------------------------------------------------------------------------------------


@FAST
@given(thicknesses, viscosities, drives, drives, wall_speeds, wall_speeds, angles)
def test_rotation_invariance(h, eta, g_e, g_n, u_e, u_n, angle):
    # The physics has no preferred horizontal direction: rotating G and U rotates q and the drags
    # by the same angle and leaves speeds and the wall-driven share unchanged.
    base = channel_flow(g_e, g_n, h, eta, wall_east=u_e, wall_north=u_n)
    rg_e, rg_n = _rotate(g_e, g_n, angle)
    ru_e, ru_n = _rotate(u_e, u_n, angle)
    turned = channel_flow(rg_e, rg_n, h, eta, wall_east=ru_e, wall_north=ru_n)
    velocity = abs(u_e) + abs(u_n) + (abs(g_e) + abs(g_n)) * h**2 / eta
    stress = eta * velocity / h
    pairs = [
        ("flux_east", "flux_north", velocity * h),
        ("upper_wall_drag_east", "upper_wall_drag_north", stress),
        ("lower_wall_drag_east", "lower_wall_drag_north", stress),
    ]
    for east, north, size in pairs:
        expected = _rotate(getattr(base, east), getattr(base, north), angle)
        got = (getattr(turned, east), getattr(turned, north))
        assert_allclose(got, expected, rtol=0, atol=1e-12 * size)
    assert_allclose(turned.peak_speed, base.peak_speed, rtol=0, atol=1e-12 * velocity)
    assert_allclose(turned.wall_driven_share, base.wall_driven_share, rtol=0, atol=1e-12)


@FAST
@given(
    thicknesses,
    viscosities,
    st.tuples(drives, drives, drives, drives),
    st.tuples(wall_speeds, wall_speeds, wall_speeds, wall_speeds),
    st.floats(-5.0, 5.0),
)
def test_linearity_in_drive_and_wall(h, eta, g, u, factor):
    # Stokes flow is linear: flux, drags and the profile add for summed drives and wall velocities
    # and scale with them.
    first = channel_flow(g[0], g[1], h, eta, wall_east=u[0], wall_north=u[1])
    second = channel_flow(g[2], g[3], h, eta, wall_east=u[2], wall_north=u[3])
    total = channel_flow(
        g[0] + g[2], g[1] + g[3], h, eta, wall_east=u[0] + u[2], wall_north=u[1] + u[3]
    )
    scaled = channel_flow(
        factor * g[0], factor * g[1], h, eta, wall_east=factor * u[0], wall_north=factor * u[1]
    )
    velocity = sum(map(abs, u)) + sum(map(abs, g)) * h**2 / eta
    for name, size in [
        ("flux_east", velocity * h),
        ("flux_north", velocity * h),
        ("upper_wall_drag_east", eta * velocity / h),
        ("lower_wall_drag_north", eta * velocity / h),
    ]:
        a, b = getattr(first, name), getattr(second, name)
        assert_allclose(getattr(total, name), a + b, rtol=0, atol=1e-12 * size)
        assert_allclose(getattr(scaled, name), factor * a, rtol=0, atol=5e-12 * size)
    assert_allclose(scaled.peak_speed, abs(factor) * first.peak_speed, rtol=1e-10, atol=1e-300)

    zeta = np.linspace(0.0, h, 9)
    p1 = velocity_profile(zeta, g[0], g[1], h, eta, wall_east=u[0], wall_north=u[1])
    p2 = velocity_profile(zeta, g[2], g[3], h, eta, wall_east=u[2], wall_north=u[3])
    pt = velocity_profile(
        zeta, g[0] + g[2], g[1] + g[3], h, eta, wall_east=u[0] + u[2], wall_north=u[1] + u[3]
    )
    for k, size in enumerate([velocity, velocity, eta * velocity / h, eta * velocity / h]):
        assert_allclose(pt[k], p1[k] + p2[k], rtol=0, atol=1e-12 * size)


# --------------------------------------------------------------------------------------------------
# Arrays: broadcasting, dask, NaN, inputs left alone, errors
# --------------------------------------------------------------------------------------------------


def _map_inputs():
    rng = np.random.default_rng(7)
    shape = (6, 5)
    return {
        "drive_east": rng.uniform(-500.0, 500.0, shape),
        "drive_north": rng.uniform(-500.0, 500.0, shape),
        "thickness": rng.uniform(5e3, 30e3, shape),
        "viscosity": 10.0 ** rng.uniform(18.0, 21.0, shape),
        "wall_east": rng.uniform(-3e-9, 3e-9, shape),
        "wall_north": rng.uniform(-3e-9, 3e-9, shape),
    }


def test_solution_fields_and_as_dict():
    sol = channel_flow(**_map_inputs())
    assert isinstance(sol, ChannelSolution)
    values = sol.as_dict()
    assert tuple(values) == FIELDS
    for name, value in values.items():
        assert value.shape == (6, 5), name
    assert sol.backflow.dtype == bool
    assert np.all((sol.wall_driven_share >= 0.0) & (sol.wall_driven_share <= 1.0))


def test_channel_flow_broadcasts_and_matches_cellwise():
    inputs = _map_inputs()
    sol = channel_flow(
        inputs["drive_east"], 10.0, inputs["thickness"][:1, :], 1e20, wall_east=inputs["wall_east"]
    )
    cell = channel_flow(
        inputs["drive_east"][2, 3],
        10.0,
        inputs["thickness"][0, 3],
        1e20,
        wall_east=inputs["wall_east"][2, 3],
    )
    for name in FIELDS:
        assert getattr(sol, name).shape == (6, 5)
        assert_allclose(getattr(sol, name)[2, 3], getattr(cell, name), rtol=1e-15)


def test_velocity_profile_broadcasts_heights_against_maps():
    inputs = _map_inputs()
    h = inputs["thickness"]
    s = np.linspace(0.0, 1.0, 7)[:, None, None]
    u_e, u_n, tau_e, tau_n = velocity_profile(
        s * h,
        inputs["drive_east"],
        inputs["drive_north"],
        h,
        inputs["viscosity"],
        wall_east=inputs["wall_east"],
        wall_north=inputs["wall_north"],
    )
    assert u_e.shape == u_n.shape == tau_e.shape == tau_n.shape == (7, 6, 5)
    assert_allclose(u_e[0], 0.0, atol=0)
    assert_allclose(u_e[-1], inputs["wall_east"], rtol=1e-13)
    # The mean of the profile is the mean velocity (Simpson exact for the parabola).
    mean = simpson(u_n, x=s[:, 0, 0], axis=0)
    sol = channel_flow(**inputs)
    assert_allclose(mean, sol.mean_velocity_north, rtol=1e-11, atol=1e-24)


def test_dask_arrays_give_numpy_values_lazily():
    inputs = _map_inputs()
    lazy = {name: da.from_array(value, chunks=(3, 2)) for name, value in inputs.items()}
    eager = channel_flow(**inputs)
    delayed = channel_flow(**lazy)
    for name in FIELDS:
        value = getattr(delayed, name)
        assert isinstance(value, da.Array), name
        assert_array_equal(value.compute(), getattr(eager, name))

    zeta = np.linspace(0.0, 1.0, 5)[:, None, None] * inputs["thickness"]
    args = (inputs["drive_east"], inputs["drive_north"], inputs["thickness"], inputs["viscosity"])
    lazy_args = tuple(lazy[k] for k in ("drive_east", "drive_north", "thickness", "viscosity"))
    for got, expected in zip(
        velocity_profile(
            da.from_array(zeta, chunks=(2, 3, 2)), *lazy_args, wall_east=lazy["wall_east"]
        ),
        velocity_profile(zeta, *args, wall_east=inputs["wall_east"]),
        strict=True,
    ):
        assert isinstance(got, da.Array)
        assert_array_equal(got.compute(), expected)

    heights = np.linspace(0.0, 10e3, 9)
    profile = 10.0 ** np.random.default_rng(3).uniform(18.0, 21.0, (6, 5, 9))
    moments = fluidity_moments(heights, profile)
    lazy_moments = fluidity_moments(
        da.from_array(heights, chunks=4), da.from_array(profile, chunks=(3, 2, 4))
    )
    for got, expected in zip(lazy_moments, moments, strict=True):
        assert isinstance(got, da.Array)
        assert_allclose(got.compute(), expected, rtol=1e-14)

    flux = flux_from_moments(*args[:2], 10e3, *moments, wall_north=inputs["wall_north"])
    lazy_flux = flux_from_moments(
        *lazy_args[:2], 10e3, *lazy_moments, wall_north=lazy["wall_north"]
    )
    for got, expected in zip(lazy_flux, flux, strict=True):
        assert isinstance(got, da.Array)
        assert_allclose(got.compute(), expected, rtol=1e-13)

    speed = da.from_array(inputs["wall_east"], chunks=(3, 2))
    threshold = backflow_drive_threshold(lazy["thickness"], lazy["viscosity"], speed)
    assert isinstance(threshold, da.Array)
    assert_array_equal(
        threshold.compute(),
        backflow_drive_threshold(inputs["thickness"], inputs["viscosity"], inputs["wall_east"]),
    )
    assert isinstance(zero_flux_drive(lazy["thickness"], 1e19, 1e-9), da.Array)


def test_inputs_not_modified():
    inputs = _map_inputs()
    before = {name: value.copy() for name, value in inputs.items()}
    channel_flow(**inputs)
    velocity_profile(inputs["thickness"] / 2, **inputs)
    backflow_drive_threshold(inputs["thickness"], inputs["viscosity"], inputs["wall_east"])
    zero_flux_drive(inputs["thickness"], inputs["viscosity"], inputs["wall_east"])
    zeta = np.linspace(0.0, 1e4, 6)
    profile = np.broadcast_to(inputs["viscosity"][..., None], (6, 5, 6)).copy()
    zeta_before, profile_before = zeta.copy(), profile.copy()
    moments = fluidity_moments(zeta, profile)
    moments_before = [m.copy() for m in moments]
    flux_from_moments(inputs["drive_east"], inputs["drive_north"], 1e4, *moments)
    for name, value in inputs.items():
        assert_array_equal(value, before[name])
    assert_array_equal(zeta, zeta_before)
    assert_array_equal(profile, profile_before)
    for m, m0 in zip(moments, moments_before, strict=True):
        assert_array_equal(m, m0)


def test_integer_inputs_are_promoted():
    sol = channel_flow(np.array([100, 200]), 0, 20_000, 10**19)
    assert sol.flux_east.dtype == np.float64
    assert_allclose(sol.flux_east, -np.array([100.0, 200.0]) * 20e3**3 / (12 * 1e19), rtol=1e-15)


def test_nan_propagates():
    sol = channel_flow(
        np.array([np.nan, 100.0]), 0.0, 10e3, np.array([1e19, 1e19]), wall_north=1e-9
    )
    assert np.isnan(sol.flux_east[0]) and np.isfinite(sol.flux_east[1])
    assert np.isfinite(sol.flux_north[0])  # components are independent
    for name in ("peak_speed", "peak_speed_height", "wall_driven_share"):
        assert np.isnan(getattr(sol, name)[0]) and np.isfinite(getattr(sol, name)[1]), name
    assert sol.backflow[0] is np.False_  # documented: backflow stays boolean, callers mask it


def test_error_inputs_do_not_broadcast():
    with pytest.raises(CrustflowInputError, match=r"do not broadcast together \(drive_east \(3,\)"):
        channel_flow(np.zeros(3), np.zeros(4), 1e4, 1e19)


def test_error_non_numeric_input():
    with pytest.raises(CrustflowInputError, match="viscosity has dtype <U4; give real numbers"):
        channel_flow(1.0, 0.0, 1e4, np.array(["1e19"]))
    with pytest.raises(CrustflowInputError, match="thickness must be a number or an array"):
        channel_flow(1.0, 0.0, "thick", 1e19)


def test_error_moment_sampling():
    with pytest.raises(CrustflowInputError, match="zeta has 4 samples .* viscosity_profile has 5"):
        fluidity_moments(np.linspace(0, 1, 4), np.ones(5))
    with pytest.raises(CrustflowInputError, match="viscosity_profile has 1 sample"):
        fluidity_moments(np.zeros(1), np.ones(1))
    with pytest.raises(CrustflowInputError, match="must be sampled along their last axis"):
        fluidity_moments(0.0, 1e19)
