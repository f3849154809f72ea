"""Tests of crustflow.physics.rheology and crustflow.physics.flowlaws: flow laws, depth-varying and
power-law cells.

Physics first; the source of each check is named beside it. "value derived" marks numbers worked
out by hand from the formulas cited. The general-purpose second opinions are SciPy's
``integrate.solve_bvp``, ``integrate.quad``, ``integrate.solve_ivp`` and ``optimize.root``.
"""

from __future__ import annotations

import warnings
from math import factorial

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from scipy.integrate import IntegrationWarning, quad, solve_bvp, solve_ivp
from scipy.optimize import root

from crustflow.errors import CrustflowInputError
from crustflow.physics.channel import backflow_drive_threshold, channel_flow, flux_from_moments
from crustflow.physics.rheology import (
    FLOW_LAWS,
    GAS_CONSTANT,
    FlowLaw,
    PowerLawSolution,
    arrhenius_fluidity_moments,
    arrhenius_viscosity,
    axial_to_shear_factor,
    effective_viscosity,
    exponential_fluidity_moments,
    flow_law,
    flow_law_channel,
    fluidity_moments_gauss,
    linear_temperature_prefactor,
    newtonian_flow_law,
    power_law_channel,
    power_law_profile,
    simple_shear_prefactor,
    steady_geotherm,
    temperature_profile,
)

#: Julian year (s), the year of crustflow (SCIENCE.md).
YEAR = 365.25 * 86400.0
#: Exponents exercised: odd integers (exact polynomial path) and others (split quadrature).
EXPONENTS = (1.0, 3.0, 5.0, 2.5, 3.1, 4.0, 4.7)


def _rotate(east, north, angle):
    cos, sin = np.cos(angle), np.sin(angle)
    return cos * east - sin * north, sin * east + cos * north


def _cell(n, ratio, angle, *, thickness=15e3, drive=200.0, speed=1e-9):
    """A cell whose wall-driven stress is ``ratio`` times the pressure-driven one (|G| h / 2).

    The prefactor is chosen so that the pressure-driven velocity scale is ``speed`` (m/s).
    Returns drive (east, north), wall (east, north) and the prefactor.
    """
    s_p = drive * thickness / 2.0
    prefactor = speed / (thickness * s_p**n)
    wall_speed = prefactor * thickness * (ratio * s_p) ** n
    return (drive, 0.0), (wall_speed * np.cos(angle), wall_speed * np.sin(angle)), prefactor


# --------------------------------------------------------------------------------------------------
# Slow, independent references
# --------------------------------------------------------------------------------------------------


def _bvp_power_law(drive, wall, thickness, n, prefactor):
    """Solve u' = A(zeta) |tau|^(n-1) tau, tau' = G, u(0) = 0, u(h) = U with scipy solve_bvp.

    ``prefactor`` is a number or a function of zeta (m). Scaled to order one with
    S = max(|G| h / 2, (|U| / (A(0) h))^(1/n)) and V = A(0) h S^n. Returns tau(0) (Pa), the
    flux (m^2/s, by quad on the solution) and u(h) (m/s).
    """
    h = thickness
    a_of = prefactor if callable(prefactor) else (lambda zeta: prefactor + 0.0 * zeta)
    a0 = float(a_of(0.0))
    drive, wall = np.asarray(drive, float), np.asarray(wall, float)
    stress = max(np.hypot(*drive) * h / 2.0, (np.hypot(*wall) / (a0 * h)) ** (1.0 / n))
    speed = a0 * h * stress**n
    g = drive * h / stress

    def rhs(s, y):
        t = y[2:]
        size = np.sqrt(t[0] ** 2 + t[1] ** 2)
        factor = a_of(s * h) / a0 * size ** (n - 1.0)
        return np.vstack(
            [factor * t[0], factor * t[1], np.full_like(s, g[0]), np.full_like(s, g[1])]
        )

    def boundary(y0, y1):
        return np.array([y0[0], y0[1], y1[0] - wall[0] / speed, y1[1] - wall[1] / speed])

    mesh = np.linspace(0.0, 1.0, 41)
    t0 = wall / speed - g / 2.0  # Newtonian start, viscosity 1 / (A S^(n-1))
    guess = np.vstack(
        [
            np.outer(wall / speed, mesh),
            t0[0] + g[0] * mesh,
            t0[1] + g[1] * mesh,
        ]
    )
    sol = solve_bvp(rhs, boundary, mesh, guess, tol=1e-10, max_nodes=200_000)
    assert sol.status == 0, sol.message
    flux = np.array(
        [
            h * speed * quad(lambda s, k=k: sol.sol(s)[k], 0, 1, epsabs=0, epsrel=1e-11)[0]
            for k in (0, 1)
        ]
    )
    return stress * sol.sol(0.0)[2:], flux, speed * sol.sol(1.0)[:2], speed


def _quad_wall_velocity(tau0, drive, thickness, n, prefactor):
    """u(h) and q = integral (h - zeta) du/dzeta by scipy quad, split where |tau| is least."""
    tau0, drive = np.asarray(tau0, float), np.asarray(drive, float)
    a_of = prefactor if callable(prefactor) else (lambda zeta: prefactor)
    gg = drive @ drive
    star = -(tau0 @ drive) / gg if gg > 0 else 0.0
    points = [star] if 0.0 < star < thickness else None

    def rate(zeta, k):
        tau = tau0 + drive * zeta
        return a_of(zeta) * np.hypot(*tau) ** (n - 1.0) * tau[k]

    def integral(f):
        with warnings.catch_warnings():  # QUADPACK may flag round-off at 1e-12; still accurate
            warnings.simplefilter("ignore", IntegrationWarning)
            return quad(f, 0.0, thickness, points=points, epsabs=0.0, epsrel=1e-12, limit=200)[0]

    u_top = np.array([integral(lambda z, k=k: rate(z, k)) for k in (0, 1)])
    flux = np.array([integral(lambda z, k=k: (thickness - z) * rate(z, k)) for k in (0, 1)])
    return u_top, flux


def _root_reference(drive, wall, thickness, n, prefactor):
    """tau(0) per cell with scipy.optimize.root on the quad-integrated wall condition."""
    drive, wall = np.asarray(drive, float), np.asarray(wall, float)
    a0 = prefactor(0.0) if callable(prefactor) else prefactor
    stress = max(np.hypot(*drive) * thickness / 2, (np.hypot(*wall) / (a0 * thickness)) ** (1 / n))
    speed = a0 * thickness * stress**n

    def residual(t):
        u_top, _ = _quad_wall_velocity(t * stress, drive, thickness, n, prefactor)
        return (u_top - wall) / speed

    start = wall / speed - drive * thickness / (2.0 * stress)
    sol = root(residual, start, method="hybr", tol=1e-13)
    assert sol.success, sol.message
    return sol.x * stress


# --------------------------------------------------------------------------------------------------
# Flow laws
# --------------------------------------------------------------------------------------------------


def test_unknown_preset_lists_the_known_names():
    with pytest.raises(
        CrustflowInputError,
        match=r"unknown flow law 'wet-granite'; known flow laws: dry-diabase, felsic-granulite, "
        r"wet-anorthite, wet-quartzite",
    ):
        flow_law("wet-granite")
    assert flow_law(" Wet_Quartzite ") is FLOW_LAWS["wet-quartzite"]


def test_presets_hold_the_published_values():
    # SCIENCE.md check values; units MPa^-n s^-1 as published.
    quartzite = flow_law("wet-quartzite")  # Gleason & Tullis 1995 (as tabulated; secondary table)
    assert (quartzite.axial_prefactor, quartzite.stress_exponent) == (1.1e-4, 4.0)
    assert quartzite.activation_energy == 223e3 and quartzite.read_from == "secondary table"
    anorthite = flow_law("wet-anorthite")  # Rybacki & Dresen 2000, JGR 105(B11)
    assert anorthite.axial_prefactor == pytest.approx(10**2.6) and anorthite.stress_exponent == 3
    diabase = flow_law("dry-diabase")  # Mackwell et al. 1998, JGR 103
    assert (diabase.axial_prefactor, diabase.stress_exponent) == (8.0, 4.7)
    granulite = flow_law("felsic-granulite")  # Ranalli 1995 table 10.3 (a compilation)
    assert (granulite.axial_prefactor, granulite.stress_exponent) == (8.0e-3, 3.1)
    assert granulite.read_from == "secondary table"
    # 1 MPa^-n = 10^(-6 n) Pa^-n (unit definition).
    assert quartzite.axial_prefactor_si == pytest.approx(1.1e-28, rel=1e-15)
    assert GAS_CONSTANT == pytest.approx(8.314462618, rel=1e-10)  # CODATA 2018


@pytest.mark.parametrize(
    "name, expected",
    [
        # eta = A^(-1/n) gamma_dot^((1-n)/n), A = 3^((n+1)/2) A_ax 10^(-6 n) exp(-Q/(R T)) at
        # T = 1000 K, gamma_dot = 1e-14 s^-1, R = 8.31446261815324 J/(mol K); each value derived
        # by hand (40-digit decimal arithmetic) from the published parameters:
        ("wet-quartzite", 1.2690401607e20),  # Gleason & Tullis 1995, secondary table values
        ("wet-anorthite", 2.2231840492e20),  # Rybacki & Dresen 2000
        ("dry-diabase", 8.5089630422e21),  # Mackwell et al. 1998
        ("felsic-granulite", 8.6940016724e19),  # Ranalli 1995 table 10.3, secondary table
    ],
)
def test_effective_viscosity_of_each_preset(name, expected):
    eta = effective_viscosity(flow_law(name), 1000.0, 1e-14)
    assert float(eta) == pytest.approx(expected, rel=1e-9)
    # eta = tau / gamma_dot with gamma_dot = A tau^n (definition of the simple-shear law).
    tau = eta * 1e-14
    assert float(
        simple_shear_prefactor(flow_law(name), 1000.0) * tau ** flow_law(name).stress_exponent
    ) == (pytest.approx(1e-14, rel=1e-12))


def test_trouton_ratio_at_n_one():
    # n = 1: eta = 1 / (3 A_ax), the Trouton ratio (SCIENCE.md; Ranalli 1995 chapter 4).
    law = FlowLaw("linear", 2e-20, "Pa^-n s^-1", 1.0, 0.0)
    assert float(effective_viscosity(law, 900.0, 1e-15)) == pytest.approx(1.0 / 6e-20, rel=1e-14)
    assert float(arrhenius_viscosity(law, 900.0)) == pytest.approx(1.0 / 6e-20, rel=1e-14)
    assert axial_to_shear_factor(1.0) == 3.0


@pytest.mark.parametrize("n", [1.0, 2.0, 3.5, 4.7])
def test_axial_to_shear_conversion_from_tensor_invariants(n):
    # Value derived with explicit tensors: one isotropic law edot_ij = B tau_II^(n-1) tau_ij
    # (second invariants J2 = tau_ij tau_ij / 2) fitted to an axial test must give the
    # simple-shear rate gamma_dot = 2 edot_xz = 3^((n+1)/2) A_ax tau^n.
    a_axial, sigma, tau = 1e-30, 3e7, 2e7

    def invariant(t):
        return np.sqrt(0.5 * np.sum(t * t))

    axial = np.diag([-sigma, 0.0, 0.0])
    deviator = axial - np.trace(axial) / 3.0 * np.eye(3)
    # The axial strain rate, compression positive, is B tau_II^(n-1) |deviator_xx|:
    b_coefficient = a_axial * sigma**n / (invariant(deviator) ** (n - 1.0) * abs(deviator[0, 0]))
    shear = np.zeros((3, 3))
    shear[0, 2] = shear[2, 0] = tau
    gamma_dot = 2.0 * b_coefficient * invariant(shear) ** (n - 1.0) * tau
    assert gamma_dot == pytest.approx(axial_to_shear_factor(n) * a_axial * tau**n, rel=1e-12)


def test_newtonian_flow_law_reproduces_its_reference_viscosity():
    law = newtonian_flow_law(1e19, 1000.0, 250e3)
    assert float(arrhenius_viscosity(law, 1000.0)) == pytest.approx(1e19, rel=1e-13)
    # Arrhenius: eta(T) / eta(T_ref) = exp(Q/R (1/T - 1/T_ref)) (value derived).
    ratio = np.exp(250e3 / GAS_CONSTANT * (1 / 1100.0 - 1 / 1000.0))
    assert float(arrhenius_viscosity(law, 1100.0)) == pytest.approx(1e19 * ratio, rel=1e-13)


def test_flow_law_input_errors():
    with pytest.raises(CrustflowInputError, match=r"stress exponent of flow law 'soft' is 0\.5; "):
        FlowLaw("soft", 1e-3, "MPa^-n s^-1", 0.5, 1e5)
    with pytest.raises(
        CrustflowInputError, match=r"units 'MPa\^-n/s' of flow law 'x' are not known"
    ):
        FlowLaw("x", 1e-3, "MPa^-n/s", 3.0, 1e5)
    with pytest.raises(CrustflowInputError, match=r"read_from of flow law 'x' is 'memory'"):
        FlowLaw("x", 1e-3, "MPa^-n s^-1", 3.0, 1e5, read_from="memory")
    with pytest.raises(CrustflowInputError, match=r"axial prefactor of flow law 'x' is -4"):
        FlowLaw("x", -4.0, "MPa^-n s^-1", 3.0, 1e5)
    with pytest.raises(CrustflowInputError, match=r"needs a Newtonian law \(n = 1\) but 'wet-q"):
        arrhenius_viscosity(flow_law("wet-quartzite"), 900.0)
    with pytest.raises(CrustflowInputError, match=r"strain_rate has negative values"):
        effective_viscosity(flow_law("wet-quartzite"), 900.0, -1e-14)


def test_temperatures_out_of_range_raise_one_line_errors():
    law = flow_law("wet-anorthite")
    with pytest.raises(
        CrustflowInputError, match=r"temperature_K has values above 2000 K \(max 2300\)"
    ):
        simple_shear_prefactor(law, np.array([900.0, 2300.0]))
    with pytest.raises(CrustflowInputError, match=r"temperature_K has values <= 0 K \(min -5\)"):
        effective_viscosity(law, -5.0, 1e-14)
    with pytest.raises(CrustflowInputError, match=r"base_K has values above 2000 K") as info:
        temperature_profile(0.0, 10e3, 900.0, 5000.0)
    assert "\n" not in str(info.value)
    # NaN passes as nodata.
    assert np.isnan(simple_shear_prefactor(law, np.array([np.nan, 900.0]))[0])


def test_temperature_profile_is_linear_between_the_walls():
    zeta = np.linspace(0.0, 20e3, 5)
    assert_allclose(temperature_profile(zeta, 20e3, 800.0, 1000.0), [1000, 950, 900, 850, 800])


# --------------------------------------------------------------------------------------------------
# Geotherm
# --------------------------------------------------------------------------------------------------


def test_geotherm_solves_the_heat_equation_and_its_boundary_conditions():
    # Turcotte & Schubert 2002 section 4-8: k T'' = -H0 exp(-z/h_r), T(0) = T0, k T'(0) = q_s.
    # Second opinion: scipy solve_ivp on the same initial-value problem.
    q_s, k, h0, h_r, t0 = 0.065, 2.5, 2.0e-6, 10e3, 283.15
    depth = np.linspace(0.0, 60e3, 13)

    def rhs(z, y):
        return [y[1], -h0 * np.exp(-z / h_r) / k]

    ivp = solve_ivp(rhs, (0.0, 60e3), [t0, q_s / k], t_eval=depth, rtol=1e-12, atol=1e-10)
    geotherm = steady_geotherm(depth, q_s, k, h0, h_r, t0)
    assert_allclose(geotherm, ivp.y[0], rtol=1e-10)
    # Closed form of T&S eq. 4-31 (equation number from memory), written out here.
    q_m = q_s - h0 * h_r
    by_hand = t0 + q_m * depth / k + h0 * h_r**2 / k * (1 - np.exp(-depth / h_r))
    assert_allclose(geotherm, by_hand, rtol=1e-14)
    # Surface heat flow k dT/dz = q_s (central difference, 1 m).
    slope = steady_geotherm(1.0, q_s, k, h0, h_r, t0) - steady_geotherm(0.0, q_s, k, h0, h_r, t0)
    assert k * slope == pytest.approx(q_s - 0.5 * h0, rel=1e-7)  # k T'(0.5 m) = q_s - H0 0.5 m
    # Deep below the radiogenic layer the gradient tends to q_m / k.
    deep = steady_geotherm(np.array([300e3, 300e3 + 1.0]), q_s, k, h0, h_r, t0)
    assert k * np.diff(deep)[0] == pytest.approx(q_m, rel=1e-9)


def test_geotherm_without_heat_production_is_linear():
    depth = np.array([0.0, 10e3, 35e3])
    assert_allclose(steady_geotherm(depth, 0.06, 3.0, 0.0, 10e3, 273.15), 273.15 + 0.02 * depth)


def test_geotherm_input_errors():
    with pytest.raises(CrustflowInputError, match=r"heat_production \* length_scale exceeds"):
        steady_geotherm(1e3, 0.02, 2.5, 3e-6, 10e3, 283.0)
    with pytest.raises(CrustflowInputError, match=r"conductivity \(W/\(m K\)\) and length_scale"):
        steady_geotherm(1e3, 0.06, 0.0, 1e-6, 10e3, 283.0)
    with pytest.raises(CrustflowInputError, match=r"must not be negative"):
        steady_geotherm(-1e3, 0.06, 2.5, 1e-6, 10e3, 283.0)


# --------------------------------------------------------------------------------------------------
# Newtonian channel with viscosity varying across it
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("length", [4e3, -2.5e3, 1.1e6, -7e4, np.inf])
def test_exponential_moments_closed_form_against_quad(length):
    # Exact integrals (value derived) against scipy quad, covering the series (|h/L| < 2) and the
    # closed forms.
    h, eta0 = 20e3, 1e20
    moments = exponential_fluidity_moments(h, eta0, length)
    for k, value in enumerate(moments):
        reference = quad(lambda z, k=k: z**k * np.exp(z / length) / eta0, 0, h, epsrel=1e-13)[0]
        assert float(value) == pytest.approx(reference, rel=1e-13)


@pytest.mark.parametrize("contrast", [1e3, 1e6, 1e-6])
def test_gauss_moments_against_the_exponential_closed_form(contrast):
    # Gauss-Legendre error bound (Abramowitz & Stegun 1964, eq. 25.4.30, from memory): below
    # 1.4e-17 for N = 16 and a viscosity contrast of 1e6; checked at rounding level.
    h = np.array([10e3, 30e3])
    length = h / np.log(contrast)
    eta0 = 1e21

    def viscosity(zeta):
        return eta0 * np.exp(-zeta / length)

    gauss = fluidity_moments_gauss(viscosity, h)
    exact = exponential_fluidity_moments(h, eta0, length)
    for g, e in zip(gauss, exact, strict=True):
        assert_allclose(g, e, rtol=1e-13)
    *_, error = fluidity_moments_gauss(viscosity, h, return_error=True)
    # The estimate is the 8-node rule's error: above the 16-node error, below the 8-node bound
    # c_8 (ln C)^17 C / (C - 1), c_8 = (8!)^4 / (17 (16!)^3) (value derived, same reference).
    true_error = max(np.max(np.abs(g / e - 1)) for g, e in zip(gauss, exact, strict=True))
    log_c = abs(np.log(contrast))
    c = max(contrast, 1 / contrast)
    bound = factorial(8) ** 4 / (17 * factorial(16) ** 3) * log_c**17 * c / (c - 1)
    assert np.all(error >= true_error) and np.all(error <= 3 * bound)  # I1, I2: Leibniz terms


def _bvp_newtonian(drive, wall, h, viscosity):
    """(eta u')' = G, u(0) = 0, u(h) = U by scipy solve_bvp (scaled); tau(0) and flux."""
    eta_ref = viscosity(0.0)
    speed = abs(wall) + abs(drive) * h**2 / (2 * eta_ref)

    def rhs(s, y):
        return np.vstack(
            [eta_ref / viscosity(s * h) * y[1], np.full_like(s, drive * h**2 / (eta_ref * speed))]
        )

    def boundary(y0, y1):
        return np.array([y0[0], y1[0] - wall / speed])

    mesh = np.linspace(0, 1, 41)
    sol = solve_bvp(rhs, boundary, mesh, np.zeros((2, mesh.size)), tol=1e-10, max_nodes=100_000)
    assert sol.status == 0
    flux = h * speed * quad(lambda s: sol.sol(s)[0], 0, 1, epsrel=1e-12)[0]
    return eta_ref * speed / h * sol.sol(0.0)[1], flux


@pytest.mark.parametrize(
    "profile",
    [
        lambda z: 1e20 * np.exp(-z / 3e3),  # exponential, contrast e^5
        lambda z: 1e19 * (1.0 + 50.0 * np.exp(-(((z - 9e3) / 2.5e3) ** 2))),  # Gaussian bump
    ],
    ids=["exponential", "gaussian-bump"],
)
def test_gauss_moments_flux_against_solve_bvp(profile):
    # flux_from_moments is exact given the moments (channel.py); second opinion scipy solve_bvp.
    h, drive, wall = 15e3, 150.0, 3e-10
    i0, i1, i2 = fluidity_moments_gauss(profile, h, order=32)
    q, _, tau0, _ = flux_from_moments(drive, 0.0, h, i0, i1, i2, wall_east=wall)
    tau_ref, q_ref = _bvp_newtonian(drive, wall, h, profile)
    assert float(q) == pytest.approx(q_ref, rel=1e-8)
    assert float(tau0) == pytest.approx(tau_ref, rel=1e-7, abs=1e-7 * drive * h)


def test_arrhenius_moments_match_an_explicit_viscosity_function():
    law = newtonian_flow_law(1e19, 1000.0, 300e3)
    h, top, base = np.array([10e3, 20e3]), np.array([900.0, 950.0]), np.array([1100.0, 1000.0])
    moments = arrhenius_fluidity_moments(law, h, top, base)
    explicit = fluidity_moments_gauss(
        lambda z: arrhenius_viscosity(law, temperature_profile(z, h, top, base)), h
    )
    for a, b in zip(moments, explicit, strict=True):
        assert_allclose(a, b, rtol=1e-14)
    with pytest.raises(CrustflowInputError, match=r"order must be at least 2 Gauss nodes, got 1"):
        fluidity_moments_gauss(lambda z: 1e19 + 0 * z, h, order=1)


# --------------------------------------------------------------------------------------------------
# Power-law channel: closed forms
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("n", EXPONENTS)
def test_poiseuille_flow_between_fixed_walls(n):
    # SCIENCE.md: q = -2 A |G|^(n-1) G (h/2)^(n+2) / (n+2), wall stress |G| h / 2,
    # peak / mean speed (n+2)/(n+1), peak at mid-channel (symmetry).
    h, angles = 12e3, np.array([0.0, 0.7, 2.0, 4.1])
    drive = 180.0
    prefactor = 1e-9 / (h * (drive * h / 2) ** n)
    g_e, g_n = _rotate(drive, 0.0, angles)
    sol = power_law_channel(g_e, g_n, h, prefactor, n)
    expected = -2 * prefactor * drive**n * (h / 2) ** (n + 2) / (n + 2)
    rtol = 1e-12 if n in (1.0, 3.0, 5.0) else 5e-9  # quadrature error (rheology Notes)
    assert_allclose(sol.flux_east, expected * np.cos(angles), rtol=rtol, atol=rtol * abs(expected))
    assert_allclose(sol.flux_north, expected * np.sin(angles), rtol=rtol, atol=rtol * abs(expected))
    assert_allclose(np.hypot(sol.lower_wall_drag_east, sol.lower_wall_drag_north), drive * h / 2)
    assert_allclose(np.hypot(sol.upper_wall_drag_east, sol.upper_wall_drag_north), drive * h / 2)
    mean = np.hypot(sol.mean_velocity_east, sol.mean_velocity_north)
    assert_allclose(sol.peak_speed / mean, (n + 2) / (n + 1), rtol=rtol)
    assert_allclose(sol.peak_speed_height, h / 2, rtol=1e-9)
    assert not sol.backflow.any() and np.all(sol.wall_driven_share == 0.0)
    assert sol.converged.all() and np.all(sol.iterations == 0)  # the start is exact here


def test_newtonian_limit_equals_channel_flow():
    # n = 1 with A = 1/eta is the closed-form channel (Turcotte & Schubert 2002, section 6.2).
    rng = np.random.default_rng(7)
    shape = (40, 25)
    g_e, g_n = rng.uniform(-400, 400, (2, *shape))
    h = rng.uniform(5e3, 40e3, shape)
    eta = 10 ** rng.uniform(18, 21, shape)
    u_e, u_n = rng.uniform(-0.05 / YEAR, 0.05 / YEAR, (2, *shape))
    sol = power_law_channel(g_e, g_n, h, 1 / eta, 1.0, wall_east=u_e, wall_north=u_n)
    ref = channel_flow(g_e, g_n, h, eta, wall_east=u_e, wall_north=u_n)
    for name, value in ref.as_dict().items():
        got = getattr(sol, name)
        if value.dtype == bool:
            assert_array_equal(got, value, err_msg=name)
        else:
            scale = np.max(np.abs(value))
            # A smooth maximum fixes its height only to ~sqrt(rounding) (flat top).
            rtol = 1e-7 if name == "peak_speed_height" else 1e-11
            assert_allclose(got, value, rtol=rtol, atol=1e-12 * scale, err_msg=name)
    assert_allclose(sol.effective_viscosity, eta, rtol=1e-13)
    assert isinstance(sol, PowerLawSolution)


def test_pure_couette_flow():
    # G = 0: uniform stress tau = (|U| / (A h))^(1/n) along U, linear profile, q = U h / 2;
    # effective viscosity |tau| / gamma_dot = tau h / |U| (definition).
    n, h, a = 3.0, 20e3, 1e-30
    u_e, u_n = 3e-10, -4e-10
    sol = power_law_channel(0.0, 0.0, h, a, n, wall_east=u_e, wall_north=u_n)
    tau = (5e-10 / (a * h)) ** (1 / n)
    assert float(sol.lower_wall_drag_east) == pytest.approx(tau * 0.6, rel=1e-13)
    assert float(sol.flux_north) == pytest.approx(u_n * h / 2, rel=1e-13)
    assert float(sol.effective_viscosity) == pytest.approx(tau * h / 5e-10, rel=1e-13)
    assert float(sol.wall_driven_share) == pytest.approx(1.0, abs=1e-12)
    assert float(sol.peak_speed) == pytest.approx(5e-10) and float(sol.peak_speed_height) == h


def test_channel_at_rest():
    sol = power_law_channel(0.0, 0.0, 10e3, 1e-30, 3.0)
    assert float(sol.flux_east) == 0.0 and float(sol.peak_speed) == 0.0
    assert float(sol.peak_speed_height) == 0.0 and sol.converged
    assert float(sol.effective_viscosity) == np.inf  # n > 1 at zero stress (documented)


# --------------------------------------------------------------------------------------------------
# Power-law channel with wall motion: independent integration and general-purpose solvers
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("n", [3.0, 5.0, 2.5, 4.0, 4.7])
@pytest.mark.parametrize(
    "ratio, angle",
    [
        (0.5, 0.0),
        (2.0, np.pi),
        (0.9, np.pi),
        (0.9, np.pi + 1e-7),
        (0.7, 1e-4),
        (1.0, 1.1),
        (0.3, 2.5),
        (3.0, 4.0),
    ],
    ids=[
        "along",
        "against",
        "against-backflow",
        "nearly-against",
        "nearly-along",
        "oblique",
        "oblique-weak",
        "oblique-strong",
    ],
)
def test_wall_conditions_hold_to_1e9(n, ratio, angle):
    # Both wall conditions, integrating du/dzeta = A |tau|^(n-1) tau from the returned tau(0)
    # with scipy quad (independent of the solver's integrals).
    drive, wall, a = _cell(n, ratio, angle)
    h = 15e3
    sol = power_law_channel(*drive, h, a, n, wall_east=wall[0], wall_north=wall[1])
    tau0 = np.array([float(sol.lower_wall_drag_east), float(sol.lower_wall_drag_north)])
    u_top, flux = _quad_wall_velocity(tau0, drive, h, n, a)
    scale = np.hypot(*wall) + a * h * (np.hypot(*drive) * h / 2) ** n
    assert np.hypot(*(u_top - wall)) <= 1e-9 * scale * 1.0001
    assert float(sol.wall_velocity_residual) <= 1e-9 * scale
    assert_allclose([sol.flux_east, sol.flux_north], flux, rtol=2e-9, atol=2e-9 * scale * h)
    # Force balance: tau(h) = tau(0) + G h, so the two drags differ by G h.
    assert_allclose(-sol.upper_wall_drag_east - sol.lower_wall_drag_east, drive[0] * h, rtol=1e-12)


# Randomised cells: channel 5-50 km, drive 1-1000 Pa/m at any angle, wall stress 1e-2 to 1e2
# times the pressure stress |G| h / 2 at any angle, n from EXPONENTS.
cells_strategy = st.tuples(
    st.sampled_from(EXPONENTS),
    st.floats(5e3, 50e3),
    st.floats(0.0, 3.0).map(lambda e: 10.0**e),
    st.floats(0.0, 2 * np.pi),
    st.floats(-2.0, 2.0).map(lambda e: 10.0**e),
    st.floats(0.0, 2 * np.pi),
)


@settings(max_examples=30, deadline=None)
@given(cells_strategy)
def test_against_solve_bvp(cell):
    # General-purpose second opinion: scipy.integrate.solve_bvp on the nonlinear two-point
    # problem u' = A |tau|^(n-1) tau, tau' = G (SCIENCE.md asks for it).
    n, h, drive, drive_angle, ratio, wall_angle = cell
    g = _rotate(drive, 0.0, drive_angle)
    s_p = drive * h / 2
    a = 1e-9 / (h * s_p**n)
    wall = _rotate(a * h * (ratio * s_p) ** n, 0.0, wall_angle)
    sol = power_law_channel(*g, h, a, n, wall_east=wall[0], wall_north=wall[1])
    assert sol.converged
    tau_ref, flux_ref, _, speed = _bvp_power_law(g, wall, h, n, a)
    stress = max(s_p, ratio * s_p)
    assert_allclose(
        [sol.lower_wall_drag_east, sol.lower_wall_drag_north], tau_ref, atol=1e-6 * stress
    )
    assert_allclose([sol.flux_east, sol.flux_north], flux_ref, atol=1e-6 * speed * h)


@pytest.mark.parametrize("seed", range(6))
def test_against_a_slow_root_reference(seed):
    # Slow reference: scipy.optimize.root per cell on quad-integrated wall conditions.
    rng = np.random.default_rng(seed)
    n = (3.0, 4.0, 4.7, 2.5, 5.0, 3.1)[seed]
    drives, walls, prefactors = [], [], []
    for _ in range(3):
        drive, wall, a = _cell(n, 10 ** rng.uniform(-1, 1), rng.uniform(0, 2 * np.pi))
        drives.append(_rotate(*drive, rng.uniform(0, 2 * np.pi)))
        walls.append(wall)
        prefactors.append(a)
    drives, walls, prefactors = np.array(drives), np.array(walls), np.array(prefactors)
    sol = power_law_channel(
        drives[:, 0],
        drives[:, 1],
        15e3,
        prefactors,
        n,
        wall_east=walls[:, 0],
        wall_north=walls[:, 1],
    )
    for k in range(3):
        reference = _root_reference(drives[k], walls[k], 15e3, n, prefactors[k])
        got = [sol.lower_wall_drag_east[k], sol.lower_wall_drag_north[k]]
        assert_allclose(got, reference, rtol=1e-8, atol=1e-9 * np.hypot(*drives[k]) * 15e3)


@pytest.mark.parametrize("n", [3.0, 4.0])
def test_temperature_across_the_channel_against_references(n):
    # A(zeta) from a linear temperature (Arrhenius); references: solve_bvp and root per cell.
    law = FlowLaw("test", 1e-4 if n == 4 else 10**2.6, "MPa^-n s^-1", n, 250e3)
    h, top, base = 20e3, 850.0, 1050.0
    profile = linear_temperature_prefactor(law)

    def a_of(zeta):
        return profile(zeta, h, top, base)

    drive, wall = (120.0, -40.0), (2e-10, 6e-10)
    sol = flow_law_channel(*drive, h, law, top, base, wall_east=wall[0], wall_north=wall[1])
    assert sol.converged
    tau0 = np.array([float(sol.lower_wall_drag_east), float(sol.lower_wall_drag_north)])
    u_top, flux = _quad_wall_velocity(tau0, drive, h, n, a_of)
    scale = np.hypot(*wall)
    assert np.hypot(*(u_top - wall)) <= 2e-9 * scale
    assert_allclose([sol.flux_east, sol.flux_north], flux, rtol=1e-8)
    assert_allclose(tau0, _root_reference(drive, wall, h, n, a_of), rtol=1e-8)
    tau_bvp, flux_bvp, _, speed = _bvp_power_law(drive, wall, h, n, a_of)
    assert_allclose(tau0, tau_bvp, rtol=1e-6)
    assert_allclose([sol.flux_east, sol.flux_north], flux_bvp, atol=1e-6 * speed * h)
    # Equal wall temperatures give the uniform channel.
    same = flow_law_channel(*drive, h, law, top, top, wall_east=wall[0], wall_north=wall[1])
    uniform = flow_law_channel(*drive, h, law, top, wall_east=wall[0], wall_north=wall[1])
    assert_allclose(same.flux_east, uniform.flux_east, rtol=1e-12)


# --------------------------------------------------------------------------------------------------
# Power-law channel: profile, peak, backflow, invariants, bookkeeping
# --------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("n", [3.0, 4.0])
def test_profile_agrees_with_the_cell_solution(n):
    drive, wall, a = _cell(n, 1.2, 2.2)
    h = 15e3
    zeta = np.linspace(0.0, h, 2001)
    kw = dict(wall_east=wall[0], wall_north=wall[1])
    u_e, u_n, t_e, t_n, eta = power_law_profile(zeta, *drive, h, a, n, **kw)
    sol = power_law_channel(*drive, h, a, n, **kw)
    assert (u_e[0], u_n[0]) == (0.0, 0.0)
    assert_allclose([u_e[-1], u_n[-1]], wall, rtol=1e-9)
    assert_allclose([t_e[0], t_n[0]], [sol.lower_wall_drag_east, sol.lower_wall_drag_north])
    # viscosity = tau / gamma_dot (definition), gamma_dot = A |tau|^(n-1) tau.
    assert_allclose(eta, 1.0 / (a * np.hypot(t_e, t_n) ** (n - 1)), rtol=1e-12)
    # Flux and peak speed against the sampled profile (composite Simpson, SciPy's rule).
    from scipy.integrate import simpson

    assert float(sol.flux_east) == pytest.approx(simpson(u_e, x=zeta), rel=1e-8)
    speed = np.hypot(u_e, u_n)
    assert float(sol.peak_speed) >= speed.max() * (1 - 1e-12)
    assert float(sol.peak_speed) == pytest.approx(speed.max(), rel=1e-6)
    # Broadcasting: (nz, 1) heights against two cells.
    both = power_law_profile(zeta[:, None], *drive, h, np.array([a, 2 * a]), n, **kw)
    assert both[0].shape == (zeta.size, 2)
    assert_allclose(both[0][:, 0], u_e, rtol=1e-12)


def test_peak_speed_against_dense_sampling_for_random_cells():
    rng = np.random.default_rng(3)
    for n in (3.0, 4.0):
        drives, walls, prefactors = [], [], []
        for _ in range(20):
            drive, wall, a = _cell(n, 10 ** rng.uniform(-1, 1), rng.uniform(0, 2 * np.pi))
            drives.append(drive), walls.append(wall), prefactors.append(a)
        d, w, a = np.array(drives), np.array(walls), np.array(prefactors)
        kw = dict(wall_east=w[:, 0], wall_north=w[:, 1])
        sol = power_law_channel(d[:, 0], d[:, 1], 15e3, a, n, **kw)
        zeta = np.linspace(0, 15e3, 4001)[:, None]
        u_e, u_n, *_ = power_law_profile(zeta, d[:, 0], d[:, 1], 15e3, a, n, **kw)
        dense = np.hypot(u_e, u_n).max(axis=0)
        assert np.all(sol.peak_speed >= dense * (1 - 1e-9))
        assert_allclose(sol.peak_speed, dense, rtol=2e-7)


def test_backflow_threshold_of_the_newtonian_limit_and_power_law():
    # n = 1: backflow once G along U exceeds 2 eta |U| / h^2 (Turcotte & Schubert 2002, 6.2).
    h, eta, wall = 10e3, 1e19, 1e-9
    threshold = float(backflow_drive_threshold(h, eta, wall))
    drives = threshold * np.array([0.9, 1.1])
    sol = power_law_channel(drives, 0.0, h, 1 / eta, 1.0, wall_east=wall)
    assert_array_equal(sol.backflow, [False, True])
    # Power law: backflow iff du/dzeta < 0 at the fixed wall, i.e. tau(0) . U < 0 (definition).
    drive, wall, a = _cell(3.0, 0.6, 0.0)  # drive along U, weak wall
    sol = power_law_channel(*drive, 15e3, a, 3.0, wall_east=wall[0], wall_north=wall[1])
    assert bool(sol.backflow) == (float(sol.lower_wall_drag_east) * wall[0] < 0)
    assert bool(sol.backflow)


@pytest.mark.parametrize("n", [3.0, 4.0])
def test_rotation_and_reflection_invariance(n):
    drive, wall, a = _cell(n, 0.8, 1.3)
    base = power_law_channel(*drive, 15e3, a, n, wall_east=wall[0], wall_north=wall[1])
    angle = 0.9
    g, u = _rotate(*drive, angle), _rotate(*wall, angle)
    turned = power_law_channel(*g, 15e3, a, n, wall_east=u[0], wall_north=u[1])
    assert_allclose(
        [turned.flux_east, turned.flux_north],
        _rotate(base.flux_east, base.flux_north, angle),
        rtol=1e-10,
    )
    assert float(turned.peak_speed) == pytest.approx(float(base.peak_speed), rel=1e-10)
    flipped = power_law_channel(
        -drive[0], -drive[1], 15e3, a, n, wall_east=-wall[0], wall_north=-wall[1]
    )
    assert float(flipped.flux_east) == pytest.approx(-float(base.flux_east), rel=1e-12)


def test_failures_are_reported_not_hidden():
    drive, wall, a = _cell(5.0, 1.0, 2.0)
    with pytest.warns(
        RuntimeWarning, match=r"power-law channel: 1 of 2 cells did not converge in 1 "
    ):
        sol = power_law_channel(
            np.array([drive[0], 0.0]),
            drive[1],
            15e3,
            a,
            5.0,
            wall_east=np.array([wall[0], 0.0]),
            wall_north=wall[1],
            max_iterations=1,
        )
    assert_array_equal(sol.converged, [False, True])
    assert sol.wall_velocity_residual[0] > 0 and np.isfinite(sol.flux_east[0])


def test_nan_cells_are_nodata_and_inputs_are_untouched():
    g_e = np.array([100.0, np.nan, 50.0])
    a = np.array([1e-30, 1e-30, np.nan])
    copies = g_e.copy(), a.copy()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        sol = power_law_channel(g_e, 0.0, 10e3, a, 3.0, wall_north=1e-10)
    assert_array_equal(g_e, copies[0]) and assert_array_equal(a, copies[1])
    assert np.isfinite(sol.flux_east[0]) and np.isnan(sol.flux_east[1:]).all()
    assert_array_equal(sol.converged, [True, False, False])
    assert_array_equal(sol.backflow, [False, False, False])
    assert sol.flux_east.shape == (3,)


def test_power_law_input_errors():
    with pytest.raises(
        CrustflowInputError, match=r"stress_exponent is 0\.8; power-law creep needs n >= 1"
    ):
        power_law_channel(1.0, 0.0, 10e3, 1e-30, 0.8)
    with pytest.raises(
        CrustflowInputError, match=r"stress_exponent must be one number for all cells"
    ):
        power_law_channel(1.0, 0.0, 10e3, 1e-30, np.array([3.0, 4.0]))
    with pytest.raises(CrustflowInputError, match=r"thickness must be positive"):
        power_law_channel(1.0, 0.0, -10e3, 1e-30, 3.0)
    with pytest.raises(CrustflowInputError, match=r"prefactor must be positive"):
        power_law_channel(1.0, 0.0, 10e3, 0.0, 3.0)
    with pytest.raises(CrustflowInputError, match=r"inputs do not broadcast together"):
        power_law_channel(np.ones(3), 0.0, np.ones(2) * 1e4, 1e-30, 3.0)
    with pytest.raises(CrustflowInputError, match=r"quadrature_nodes must be at least 2, got 1"):
        power_law_channel(1.0, 0.0, 10e3, 1e-30, 4.0, quadrature_nodes=1)
    with pytest.raises(CrustflowInputError, match=r"prefactor_profile must be a function"):
        power_law_channel(1.0, 0.0, 10e3, 1e-30, 4.0, prefactor_profile=3.0)
    with pytest.raises(CrustflowInputError, match=r"drive_east must be a number or an array"):
        power_law_channel("steep", 0.0, 10e3, 1e-30, 3.0)


def test_newtonian_law_across_the_channel_equals_the_fluidity_moments():
    # n = 1 through the power-law path (exact polynomial integrals over Gauss moments of A(zeta))
    # against fluidity moments and flux_from_moments (SCIENCE.md, exact for any eta(zeta)).
    law = newtonian_flow_law(1e19, 1000.0, 300e3)
    h, top, base = np.array([12e3, 25e3]), np.array([850.0, 900.0]), np.array([1050.0, 1150.0])
    g_e, g_n, u_e, u_n = np.array([80.0, -20.0]), 35.0, 4e-10, np.array([-1e-10, 6e-10])
    sol = flow_law_channel(g_e, g_n, h, law, top, base, wall_east=u_e, wall_north=u_n)
    q_e, q_n, t_e, t_n = flux_from_moments(
        g_e, g_n, h, *arrhenius_fluidity_moments(law, h, top, base), wall_east=u_e, wall_north=u_n
    )
    assert_allclose(sol.flux_east, q_e, rtol=1e-12)
    assert_allclose(sol.flux_north, q_n, rtol=1e-12)
    assert_allclose(sol.lower_wall_drag_east, t_e, rtol=1e-12)
    # Effective viscosity: harmonic mean h / I0 (definition, PowerLawSolution).
    i0 = arrhenius_fluidity_moments(law, h, top, base)[0]
    assert_allclose(sol.effective_viscosity, h / i0, rtol=1e-12)


@pytest.mark.parametrize("n", [3.0, 4.0])
def test_peak_speed_with_temperature_across_the_channel(n):
    law = FlowLaw("test", 1e-4, "MPa^-n s^-1", n, 230e3)
    h = 18e3
    top, base = np.array([800.0, 870.0, 900.0]), np.array([1000.0, 1000.0, 1100.0])
    g_e, g_n = np.array([150.0, 60.0, -90.0]), np.array([20.0, -140.0, 10.0])
    u_e, u_n = np.array([5e-10, -2e-10, 1e-9]), np.array([3e-10, 8e-10, -4e-10])
    sol = flow_law_channel(g_e, g_n, h, law, top, base, wall_east=u_e, wall_north=u_n)
    zeta = np.linspace(0.0, h, 3001)[:, None]
    u = power_law_profile(
        zeta,
        g_e,
        g_n,
        h,
        1.0,
        n,
        wall_east=u_e,
        wall_north=u_n,
        prefactor_profile=linear_temperature_prefactor(law),
        profile_args=(h, top, base),
    )
    dense = np.hypot(u[0], u[1]).max(axis=0)
    assert np.all(sol.peak_speed >= dense * (1 - 1e-9))
    assert_allclose(sol.peak_speed, dense, rtol=1e-6)
    assert_allclose(np.hypot(u[0][-1], u[1][-1]), np.hypot(u_e, u_n), rtol=1e-8)
