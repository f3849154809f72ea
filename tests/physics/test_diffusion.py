"""The implicit stepper and the isostatic elevation path (pure numpy, SI)."""

from __future__ import annotations

import numpy as np
import pytest

from crustflow.geometry.finite_volume import face_network, harmonic_mean
from crustflow.geometry.grid import GridGeometry
from crustflow.physics.diffusion import ChannelTransport, bdf2_coefficients, integrate
from crustflow.physics.isostasy import isostatic_elevation, uplift_rate

DENS = dict(rho_channel=2800.0, rho_mantle=3300.0, rho_water=1030.0)


def test_bdf2_coefficients_reduce_to_the_constant_step_formula():
    # Constant-step BDF2: 3/2 y_n+1 - 2 y_n + 1/2 y_n-1 = h f (Hairer & Wanner 1996, III.1).
    assert bdf2_coefficients(1.0) == pytest.approx((1.5, 2.0, 0.5))
    assert bdf2_coefficients(None) == (1.0, 1.0, 0.0)
    # Exact for quadratics at any step ratio (value derived): y = t^2, steps 1 then w.
    for w in (0.5, 2.0, 0.3):
        a0, a1, a2 = bdf2_coefficients(w)
        t0, t1, t2 = -1.0, 0.0, w
        assert a0 * t2**2 - a1 * t1**2 + a2 * t0**2 == pytest.approx(w * 2 * t2)


def test_isostatic_elevation_integrates_the_uplift_rate():
    # Path integral of the maps' uplift rate, switching factor at sea level (Turcotte & Schubert
    # 2002, section 2.2; value derived): compare with small explicit increments.
    h0 = np.array([500.0, -300.0, 100.0, -50.0])
    t0 = np.full(4, 35e3)
    change = np.array([2000.0, 3000.0, -1500.0, -500.0])
    h = h0.copy()
    for _ in range(20000):
        h = h + uplift_rate(change / 20000, h, **DENS)
    exact = isostatic_elevation(t0 + change, h0, t0, **DENS)
    np.testing.assert_allclose(exact, h, atol=0.05)
    land = 1 - 2800 / 3300
    assert exact[0] == pytest.approx(500 + land * 2000)


def test_harmonic_mean_of_a_strength_jump():
    # Two half-cells in series: 2 a b / (a + b) (Patankar 1980, section 4.2-3, from memory).
    assert harmonic_mean(1.0, 0.01) == pytest.approx(2 * 0.01 / 1.01)
    assert harmonic_mean(np.array([0.0]), np.array([1.0]))[0] == 0.0


def _toy(n=40, dx=1000.0, conductance=1e-6, slope=1.0):
    geom = GridGeometry(kind="projected", x=(np.arange(n) + 0.5) * dx, y=np.array([1.5, 0.5]) * dx)
    net = face_network(geom, np.ones(geom.shape, dtype=bool))

    def potential(t):
        return slope * t, np.full(t.size, slope)

    return ChannelTransport(
        network=net,
        conductance=np.full(net.size, conductance),
        exponent=1.0,
        wall_flux=np.zeros(net.size),
        source=np.zeros(2 * n),
        free=np.arange(2 * n),
        potential=potential,
    )


def test_error_control_meets_the_tolerance():
    # A Neumann cosine mode of the toy problem decays as exp(-lambda t), lambda the 3-point
    # eigenvalue (value derived); the controlled run stays within a few tolerances of it.
    n, dx, kappa = 40, 1000.0, 1e-6
    problem = _toy(n, dx, kappa)
    x = (np.arange(n) + 0.5) * dx
    k = 2 * np.pi / (n * dx)
    start = np.tile(10 * np.cos(k * x), 2)
    lam = kappa * (2 * np.sin(k * dx / 2) / dx) ** 2
    t = 2 / lam
    seen = {}
    stats = integrate(problem, start, [0.0, t], tolerance=1e-3, snapshot=seen.__setitem__)
    exact = start * np.exp(-lam * t)
    assert np.max(np.abs(seen[t] - exact)) < 1e-2
    assert stats.steps > 5 and stats.rejected >= 0


def test_barenblatt_profile_solves_the_p_laplacian():
    # The self-similar solution used in tests/analyses/test_evolution_analytic.py, from memory
    # (Barenblatt 1952, Prikl. Mat. Mekh. 16): check by finite differences that it satisfies
    # u_t = (|u_x|^(p-2) u_x)_x inside its support (1-D, p = 4).
    p = 4.0
    alpha = beta = 1 / (2 * p - 2)
    k = (p - 2) / p * beta ** (1 / (p - 1))

    def u(x, t, c=1.0):
        core = np.maximum(c - k * (np.abs(x) * t**-beta) ** (p / (p - 1)), 0.0)
        return t**-alpha * core ** ((p - 1) / (p - 2))

    e = 1e-4
    for x0, t0 in ((0.3, 1.0), (0.5, 2.0), (0.1, 3.0)):
        u_t = (u(x0, t0 + e) - u(x0, t0 - e)) / (2 * e)

        def flux(x, t=t0):
            u_x = (u(x + e, t) - u(x - e, t)) / (2 * e)
            return abs(u_x) ** (p - 2) * u_x

        div = (flux(x0 + e) - flux(x0 - e)) / (2 * e)
        assert u_t == pytest.approx(div, rel=1e-5)


def _power_law_toy(nrow=9, ncol=11, dx=2000.0, exponent=3.0):
    """A power-law transport problem on a small projected grid, with the tangential derivative of
    the evolution model (mean of the two cells' cross derivatives from ``gradient``)."""
    from crustflow.geometry.grid import gradient

    x, y = (np.arange(ncol) + 0.5) * dx, (np.arange(nrow)[::-1] + 0.5) * dx
    geom = GridGeometry(kind="projected", x=x, y=y)
    net = face_network(geom, np.ones(geom.shape, dtype=bool))

    def tangential(phi):
        d_east, d_north = gradient(phi.reshape(geom.shape), geom)
        d_east, d_north = d_east.ravel(), d_north.ravel()
        across = np.where(
            net.axis == 0,
            d_north[net.left] + d_north[net.right],
            d_east[net.left] + d_east[net.right],
        )
        return 0.5 * across

    rng = np.random.default_rng(7)
    return ChannelTransport(
        network=net,
        conductance=rng.uniform(0.5, 2.0, net.size) * 1e-16,
        exponent=exponent,
        wall_flux=np.zeros(net.size),
        source=np.zeros(nrow * ncol),
        free=np.arange(nrow * ncol)[ncol:],  # the first row held fixed
        potential=lambda t: (3e3 * t, np.full(t.size, 3e3)),
        tangential=tangential,
    )


@pytest.mark.parametrize("exponent", [3.0, 2.0, 4.5])
def test_newton_matrix_is_the_derivative_of_the_net_outflow(exponent):
    # The Newton matrix of a step applied to a potential change y equals the change of the net
    # outflow of the free cells with the tangential derivative held at its current value, by
    # central differences (value derived: first-order Taylor expansion of the face law).
    import dataclasses

    from crustflow.geometry.finite_volume import ConductanceAssembly, net_inflow
    from crustflow.physics.diffusion import _face_law

    problem = _power_law_toy(exponent=exponent)
    rng = np.random.default_rng(3)
    cells = problem.network.area.size
    phi = 1e8 * rng.standard_normal(cells)
    _, weights = _face_law(problem, phi, jacobian=True)
    y = 1e3 * rng.standard_normal(problem.free.size)
    newton = ConductanceAssembly(problem.network, problem.free).matrix(weights) @ y

    held = problem.tangential(phi)
    lagged = dataclasses.replace(problem, tangential=lambda p: held)
    step = np.zeros(cells)
    step[problem.free] = y * 0.1  # round-off, not truncation, limits smaller steps

    def outflow(p, law):
        return -net_inflow(_face_law(law, p)[0], law.network)[law.free]

    numeric = (outflow(phi + step, lagged) - outflow(phi - step, lagged)) / 0.2
    assert np.abs(newton - numeric).max() < 1e-8 * np.abs(numeric).max()
    # ... and the tangential part is not negligible: the full derivative differs.
    full = (outflow(phi + step, problem) - outflow(phi - step, problem)) / 0.2
    assert np.abs(full - numeric).max() > 1e-3 * np.abs(numeric).max()


def test_power_law_steps_follow_the_error_not_powers_of_two():
    # A nonlinear law takes the steps its error allows, not the snapshot interval / 2^j that let a
    # linear law reuse factorizations (project choice); Newton needs few iterations per step.
    problem = _power_law_toy(nrow=16, ncol=16, dx=4000.0)
    rng = np.random.default_rng(5)
    start = 40e3 + 500.0 * rng.standard_normal(16 * 16)
    year = 3.15576e7
    stats = integrate(problem, start, [0.0, 2e5 * year, 4e5 * year], tolerance=1.0)
    assert stats.steps >= 4 and stats.newton_iterations <= 6 * stats.steps
    ratios = np.log2(2e5 * year / np.array(stats.step_sizes))
    assert np.any(np.abs(ratios - np.round(ratios)) > 1e-6)
