"""Evolution through time against analytic solutions (heat-conduction forms, potential flow, Barenblatt).

Every run goes through the same path as ``crustflow evolve``: ``build_setup`` (the maps' column and
one-cell channel solution, faces on the grid's geometry) and the implicit stepper. Elevation on land
with channel density = crust density obeys ``ds/dt = kappa lap(s)`` with
``kappa = (1 - rho_c/rho_m) rho_c g h^3 / (12 eta)`` (SCIENCE.md "Through time"; derived from the
channel flux of Turcotte & Schubert 2002, section 6.2, and Airy balance, section 2.2).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import rioxarray  # noqa: F401
import xarray as xr
from scipy.special import erfc

from crustflow.analyses.evolution.model import SECONDS_PER_MYR, build_setup
from crustflow.geometry.finite_volume import edge_faces
from crustflow.geometry.grid import grid_geometry
from crustflow.physics.diffusion import integrate, steady_state
from crustflow.scenario.channel import ChannelSetup
from crustflow.scenario.evolution import EDGES, EdgeCondition, EvolutionSpec
from crustflow.scenario.parameters import ModelParameters

RHO_C, RHO_M, G, H_CH, ETA = 2800.0, 3300.0, 9.81, 15e3, 1e19
F_LAND = 1.0 - RHO_C / RHO_M
#: Transmissivity of the elevation, K_s = rho_c g h^3 / (12 eta), m^2/s (Turcotte & Schubert 6.2).
K_S = RHO_C * G * H_CH**3 / (12.0 * ETA)
#: kappa = f K_s = 1.1705e-4 m^2/s at eta 1e19 (SCIENCE.md check value, value derived).
KAPPA = F_LAND * K_S
BASE = 2000.0  # m: every test keeps the surface on land


#: A transverse Mercator with scale 1 on its central meridian; grids are centred on it, so ground
#: distances equal projected ones to within x^2 / (2 R^2) (under 1.2e-3 at 300 km; Snyder 1987, USGS
#: PP 1395, ch. 8, transverse Mercator scale factor, from memory). The analytic solutions below are
#: in ground metres; crustflow uses the projection's true scale (geometry/projection.py).
UNIT_SCALE_TM = "+proj=tmerc +lat_0=45 +lon_0=15 +k=1 +x_0=0 +y_0=0 +datum=WGS84 +units=m"


def grid(elevation, dx, *, x0=0.0, crs=UNIT_SCALE_TM):
    """Projected grid (rows north to south) centred on the projection's origin, with Airy-balanced
    crust under ``elevation``."""
    ny, nx = elevation.shape
    x = x0 + (np.arange(nx) + 0.5 - nx / 2) * dx
    y = -(np.arange(ny) + 0.5 - ny / 2) * dx
    topo = xr.DataArray(elevation, dims=("y", "x"), coords={"y": y, "x": x}).rio.write_crs(crs)
    topo = topo.rio.write_transform(topo.rio.transform(recalc=True))
    return topo, topo.copy(data=35e3 + elevation * RHO_C / (RHO_M - RHO_C))


def spec(**edges):
    bounds = {e: edges.get(e, EdgeCondition()) for e in EDGES}
    return EvolutionSpec(duration=1.0, save_every=1.0, boundaries=bounds, tolerance=0.01)


def setup_for(
    elevation,
    dx,
    edges=None,
    *,
    cell=None,
    channel=None,
    params=None,
    mode="transient",
    crs=UNIT_SCALE_TM,
):
    topo, thick = grid(elevation, dx, crs=crs)
    p = params or ModelParameters(channel_thickness=H_CH, viscosity=ETA)
    s = spec(**(edges or {}))
    s = EvolutionSpec(
        mode=mode, duration=1.0, save_every=1.0, boundaries=s.boundaries, tolerance=0.01
    )
    cells = None if cell is None else {k: topo.copy(data=v) for k, v in cell.items()}
    return build_setup(
        topo, parameters=p, spec=s, crust_thickness=thick, channel=channel, cell=cells
    )


def run(setup, times, tolerance=0.01, step=None):
    out = {}
    integrate(
        setup.problem,
        setup.thickness0.ravel(),
        times,
        tolerance=tolerance,
        step=step,
        snapshot=lambda t, T: out.__setitem__(t, T.reshape(setup.geometry.shape)),
    )
    return {t: setup.elevation(T) for t, T in out.items()}, out


def test_cosine_modes_decay_at_kappa_k2():
    # Two wavelengths in one run, closed edges: each Neumann mode cos(k x) decays as
    # exp(-kappa k^2 t) (Carslaw & Jaeger 1959, ch. 3, Fourier series solution). Check values:
    # e-folding 68.57 kyr at 100 km and 1.714 Myr at 500 km (SCIENCE.md, value derived).
    dx, nx = 2000.0, 250
    x = (np.arange(nx) + 0.5) * dx
    k1, k2 = 2 * np.pi / 100e3, 2 * np.pi / 500e3
    line = BASE + 100 * np.cos(k1 * x) + 100 * np.cos(k2 * x)
    setup = setup_for(np.tile(line, (3, 1)), dx)
    assert KAPPA == pytest.approx(1.1705e-4, rel=1e-4)
    t1, t2 = 1 / (KAPPA * k1**2), 1 / (KAPPA * k2**2)
    assert t1 / SECONDS_PER_MYR == pytest.approx(0.06857, rel=1e-3)
    assert t2 / SECONDS_PER_MYR == pytest.approx(1.714, rel=1e-3)
    elev, _ = run(setup, [0.0, t1, t2], tolerance=1e-3)
    for t, k in ((t1, k1), (t2, k2)):
        s = elev[t][1] - elev[t][1].mean()
        amplitude = np.sum(s * np.cos(k * x)) / np.sum(np.cos(k * x) ** 2)
        rate = -math.log(amplitude / 100.0) / t
        assert rate == pytest.approx(KAPPA * k**2, rel=0.01)


def test_step_relaxes_as_erfc():
    # Elevation step held at the fixed west edge: s = s0 erfc(x / (2 sqrt(kappa t)))
    # (Carslaw & Jaeger 1959, section 2.4), x from the fixed cell's centre.
    dx, nx, s0 = 2000.0, 300, 500.0
    line = np.full(nx, BASE)
    line[0] += s0
    setup = setup_for(np.tile(line, (3, 1)), dx, {"west": EdgeCondition("fixed")})
    t = 1.0 * SECONDS_PER_MYR
    elev, _ = run(setup, [0.0, t], tolerance=0.05)
    x = np.arange(nx) * dx
    expected = s0 * erfc(x / (2 * math.sqrt(KAPPA * t)))
    assert np.max(np.abs(elev[t][1] - BASE - expected)) < 0.01 * s0


def test_constant_inflow_follows_ierfc():
    # Constant volume flux q0 into a half-space through the west edge:
    # s = (2 q0 / K_s) sqrt(kappa t) ierfc(x / (2 sqrt(kappa t))), ierfc z = exp(-z^2)/sqrt(pi) - z erfc z
    # (Carslaw & Jaeger 1959, section 2.9, constant flux at the surface).
    dx, nx = 2000.0, 300
    q0 = 300.0 / (SECONDS_PER_MYR / 1e6)  # 300 m^2/yr
    setup = setup_for(np.full((3, nx), BASE), dx, {"west": EdgeCondition("inflow", q0)})
    t = 1.0 * SECONDS_PER_MYR
    elev, _ = run(setup, [0.0, t], tolerance=0.05)
    x = (np.arange(nx) + 0.5) * dx
    z = x / (2 * math.sqrt(KAPPA * t))
    ierfc = np.exp(-(z**2)) / math.sqrt(math.pi) - z * erfc(z)
    expected = 2 * q0 / K_S * math.sqrt(KAPPA * t) * ierfc
    assert np.max(np.abs(elev[t][1] - BASE - expected)) < 0.01 * expected[0]


def test_gaussian_spreads_with_sigma2_plus_2kappa_t():
    # 2-D Gaussian load: sigma^2 = sigma0^2 + 2 kappa t, volume conserved (Carslaw & Jaeger 1959,
    # section 10.2, instantaneous source; the variance of the heat kernel grows by 2 kappa t).
    dx, n, sigma0 = 5000.0, 120, 30e3
    c = (np.arange(n) + 0.5) * dx - n * dx / 2
    r2 = c[None, :] ** 2 + c[:, None] ** 2
    setup = setup_for(BASE + 300 * np.exp(-r2 / (2 * sigma0**2)), dx)
    t = sigma0**2 / (2 * KAPPA)  # variance doubles
    elev, thick = run(setup, [0.0, t], tolerance=0.01)
    s = elev[t] - BASE
    variance = np.sum(s * c[None, :] ** 2) / np.sum(s)
    assert variance == pytest.approx(sigma0**2 + 2 * KAPPA * t, rel=0.01)
    assert setup.volume(thick[t]) == pytest.approx(setup.volume(thick[0.0]), rel=1e-12)


def test_volume_closed_and_with_inflow():
    # Invariants of the finite-volume form: each face flux enters one cell and leaves the other.
    rng = np.random.default_rng(3)
    elevation = BASE + 200 * rng.random((20, 30))
    setup = setup_for(elevation, 5000.0)
    _, thick = run(setup, [0.0, 0.5 * SECONDS_PER_MYR], tolerance=1.0)
    v0, v1 = setup.volume(thick[0.0]), setup.volume(thick[0.5 * SECONDS_PER_MYR])
    assert abs(v1 - v0) <= 1e-9 * v0
    q0 = 300.0 / (SECONDS_PER_MYR / 1e6)
    setup = setup_for(elevation, 5000.0, {"south": EdgeCondition("inflow", q0)})
    t = 0.5 * SECONDS_PER_MYR
    _, thick = run(setup, [0.0, t], tolerance=1.0)
    # flux x true edge length x time (the projection's scale factor makes the ground length of the
    # southern edge differ from 30 x 5 km of projected metres)
    topo, _ = grid(elevation, 5000.0)
    geom = grid_geometry(topo.x.values, topo.y.values, topo.rio.crs, spacing=(5000.0, -5000.0))
    _, south = edge_faces(geom, np.ones(elevation.shape, bool), "south")
    inflow = q0 * south.sum() * t
    change = setup.volume(thick[t]) - setup.volume(thick[0.0])
    assert change == pytest.approx(inflow, rel=1e-9)


def test_steady_flow_past_a_strong_block_is_a_dipole():
    # Inclusion of transmissivity K_i in a matrix K_m under a uniform slope E: outside
    # s' = beta E a^2 cos(theta) / r, inside a uniform slope (1 + beta) E, beta = (K_m - K_i)/(K_m + K_i)
    # (the dielectric cylinder in a uniform field: Griffiths, Introduction to Electrodynamics,
    # problem 4.22; signs here for a background s = E x). The exact solution is imposed on all
    # four (fixed) edges; the interior starts from the uniform slope alone.
    n, dx, a, slope, ratio = 120, 1000.0, 15e3, 2e-3, 100.0
    c = (np.arange(n) + 0.5) * dx - n * dx / 2
    X, Y = np.meshgrid(c, -c)
    r, theta = np.hypot(X, Y), np.arctan2(Y, X)
    beta = (1 - 1 / ratio) / (1 + 1 / ratio)
    exact = np.where(
        r >= a,
        slope * (r + beta * a**2 / np.maximum(r, 1.0)) * np.cos(theta),
        slope * (1 + beta) * X,
    )
    start = BASE + 1000 + slope * X
    edge = np.zeros((n, n), dtype=bool)
    edge[[0, -1], :] = edge[:, [0, -1]] = True
    start[edge] = BASE + 1000 + exact[edge]
    viscosity = np.where(r < a, ETA * ratio, ETA)
    fixed = {e: EdgeCondition("fixed") for e in EDGES}
    setup = setup_for(start, dx, fixed, cell={"viscosity": viscosity}, mode="steady")
    T, _ = steady_state(setup.problem, setup.thickness0.ravel(), tolerance=0.01)
    s = setup.elevation(T.reshape(n, n)) - BASE - 1000
    ring = (r > 1.5 * a) & (r < 3 * a)
    dipole = (s - slope * X)[ring]
    expected = (exact - slope * X)[ring]
    assert np.max(np.abs(dipole - expected)) < 0.05 * beta * slope * a
    inside = r < 0.6 * a
    fit = np.polyfit(X[inside], s[inside], 1)[0]
    assert fit == pytest.approx((1 + beta) * slope, rel=0.03)


def _power_law(prefactor):
    params = ModelParameters(channel_thickness=H_CH, viscosity=None)
    return params, ChannelSetup(rheology="power-law", stress_exponent=3.0, prefactor=prefactor)


def _c_n(prefactor, n=3.0):
    """C_n of q = -C_n |s_x|^(n-1) s_x: the power-law channel flux between fixed walls,
    q = -2 A |G|^(n-1) G (h/2)^(n+2) / (n+2) (SCIENCE.md, power-law fluid; value derived by
    integrating du/dzeta = A |tau|^(n-1) tau), with G = rho_c g s_x."""
    return 2 * prefactor * (H_CH / 2) ** (n + 2) / (n + 2) * (RHO_C * G) ** n


def test_power_law_steady_slope():
    # Steady 1-D state with constant inflow q0 and a fixed far edge: the flux is q0 everywhere,
    # so the slope is (q0 / C_n)^(1/n) (SCIENCE.md "Through time"; Bird 1991, JGR 96, flux ~ slope^n).
    prefactor, q0, nx, dx = 2.5e-32, 300.0 / (SECONDS_PER_MYR / 1e6), 80, 2000.0
    params, channel = _power_law(prefactor)
    edges = {"west": EdgeCondition("inflow", q0), "east": EdgeCondition("fixed")}
    setup = setup_for(
        np.full((3, nx), BASE), dx, edges, channel=channel, params=params, mode="steady"
    )
    T, _ = steady_state(setup.problem, setup.thickness0.ravel(), tolerance=0.01)
    s = setup.elevation(T.reshape(3, nx))[1]
    measured = -np.diff(s[5:-5]) / dx
    np.testing.assert_allclose(measured, (q0 / _c_n(prefactor)) ** (1 / 3), rtol=1e-3)


def test_power_law_spreads_as_barenblatt():
    # Self-similar solution of u_t = a (|u_x|^(p-2) u_x)_x (Barenblatt 1952, Prikl. Mat. Mekh. 16;
    # form from memory, checked here by differentiation in tests/physics/test_diffusion.py):
    # u = tau^-alpha [C - k (|x| tau^-beta)^(p/(p-1))]_+^((p-1)/(p-2)), alpha = beta = 1/(2p - 2) in
    # 1-D, k = ((p-2)/p) beta^(1/(p-1)), tau = a t. Here p = n + 1 = 4, a = f C_n.
    prefactor, dx, nx = 2.5e-32, 1000.0, 700
    params, channel = _power_law(prefactor)
    p = 4.0
    alpha = beta = 1 / (2 * p - 2)
    k = (p - 2) / p * beta ** (1 / (p - 1))
    a = F_LAND * _c_n(prefactor)
    x = (np.arange(nx) + 0.5) * dx - nx * dx / 2
    C = 2330.0  # gives a load ~1 km high and ~100 km wide (value derived)
    tau0 = 2.15e12

    def barenblatt(tau):
        core = np.maximum(C - k * (np.abs(x) * tau**-beta) ** (p / (p - 1)), 0.0)
        return tau**-alpha * core ** ((p - 1) / (p - 2))

    setup = setup_for(np.tile(BASE + barenblatt(tau0), (3, 1)), dx, channel=channel, params=params)
    t = 7 * tau0 / a  # tau grows eightfold: the front moves out by 8^(1/6)
    elev, _ = run(setup, [0.0, t], tolerance=0.5)
    s = elev[t][1] - BASE
    expected = barenblatt(8 * tau0)
    assert np.sum(np.abs(s - expected)) < 0.03 * np.sum(expected)
    front = lambda u: np.max(np.abs(x[u > 1.0]))  # noqa: E731
    assert front(s) / front(barenblatt(tau0)) == pytest.approx(8 ** (1 / 6), rel=0.03)


def test_time_step_convergence_is_second_order():
    # Fixed steps h, h/2, h/4 against the exact solution of the space-discrete problem: a Neumann
    # cosine mode decays as exp(-kappa_h t), kappa_h = kappa (2 sin(k dx / 2) / dx)^2 (the
    # eigenvalue of the 3-point Laplacian; value derived). BDF2 errors fall by ~4 per halving.
    dx, nx = 5000.0, 100
    x = (np.arange(nx) + 0.5) * dx
    k = 2 * np.pi / 100e3
    # An equidistant cylindrical projection on the equator: grid east is true east at true scale
    # (x = a lambda, the equator's radius of curvature N = a; NIMA TR8350.2 for a), so the discrete
    # cosine mode is exact along x whatever the step.
    equator = "+proj=eqc +lat_ts=0 +lat_0=0 +lon_0=0 +datum=WGS84 +units=m"
    setup = setup_for(np.tile(BASE + 100 * np.cos(k * x), (3, 1)), dx, crs=equator)
    t = 1 / (KAPPA * k**2)
    exact = 100 * math.exp(-KAPPA * (2 * math.sin(k * dx / 2) / dx) ** 2 * t)
    errors = []
    for m in (8, 16, 32, 64):
        elev, _ = run(setup, [0.0, t], step=t / m)
        s = elev[t][1] - BASE
        errors.append(abs(np.sum(s * np.cos(k * x)) / np.sum(np.cos(k * x) ** 2) - exact))
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    assert np.all(ratios > 3.5) and np.all(ratios < 4.6), (errors, ratios)


def test_time_step_convergence_on_a_geographic_grid():
    # Geographic grid (WGS84, 0.1 degree, 40-45 N): a Gaussian load; successive differences of
    # solutions with steps h, h/2, h/4, h/8 shrink by ~4 (second order; Richardson, no exact solution).
    lon = 10 + (np.arange(60) + 0.5) * 0.1
    lat = 45 - (np.arange(50) + 0.5) * 0.1
    r2 = ((lon[None, :] - 13) * 0.72) ** 2 + (lat[:, None] - 42.5) ** 2
    elevation = BASE + 500 * np.exp(-r2 / (2 * 0.5**2))
    topo = xr.DataArray(elevation, dims=("y", "x"), coords={"y": lat, "x": lon})
    topo = topo.rio.write_crs("EPSG:4326")
    topo = topo.rio.write_transform(topo.rio.transform(recalc=True))
    thick = topo.copy(data=35e3 + elevation * RHO_C / (RHO_M - RHO_C))
    setup = build_setup(
        topo,
        parameters=ModelParameters(channel_thickness=H_CH, viscosity=ETA),
        spec=spec(),
        crust_thickness=thick,
    )
    t = 0.2 * SECONDS_PER_MYR
    finals = [run(setup, [0.0, t], step=t / m)[0][t] for m in (4, 8, 16, 32)]
    diffs = [np.max(np.abs(finals[i] - finals[i + 1])) for i in range(3)]
    ratios = np.array(diffs[:-1]) / np.array(diffs[1:])
    assert np.all(ratios > 3.3) and np.all(ratios < 4.8), (diffs, ratios)


def test_stepping_rate_agrees_with_the_maps_rate_on_smooth_loads():
    # The stepper's compact two-point face gradients and the maps' central differences with face
    # means are both second-order forms of -div(q) (LeVeque 2002, ch. 4): on a load resolved by
    # many cells they agree to O(dx^2) (value derived: a few 1e-3 here).
    from crustflow.physics.diffusion import thickening_rate

    dx, n, sigma0 = 5000.0, 120, 60e3
    c = (np.arange(n) + 0.5) * dx - n * dx / 2
    r2 = c[None, :] ** 2 + c[:, None] ** 2
    setup = setup_for(BASE + 300 * np.exp(-r2 / (2 * sigma0**2)), dx)
    phi, _ = setup.problem.potential(setup.thickness0.ravel())
    stepping = thickening_rate(setup.problem, phi).reshape(n, n) * 1e3 * SECONDS_PER_MYR / 1e6
    maps = setup.fields(setup.thickness0, ["thickening_rate"])["thickening_rate"]  # mm/yr
    inner = np.s_[2:-2, 2:-2]
    scale = np.max(np.abs(maps[inner]))
    assert np.max(np.abs(stepping[inner] - maps[inner])) < 0.01 * scale


def test_multigrid_path_matches_the_direct_solves(monkeypatch):
    # Large grids solve by AMG-preconditioned CG instead of sparse LU: same states within the
    # solver tolerance (a fraction of the step tolerance), volume conserved to rounding.
    import crustflow.physics.diffusion as diffusion

    dx, n, sigma0 = 5000.0, 60, 30e3
    c = (np.arange(n) + 0.5) * dx - n * dx / 2
    r2 = c[None, :] ** 2 + c[:, None] ** 2
    setup = setup_for(BASE + 300 * np.exp(-r2 / (2 * sigma0**2)), dx)
    t = 0.1 * SECONDS_PER_MYR
    direct, _ = run(setup, [0.0, t], tolerance=0.1)
    monkeypatch.setattr(diffusion, "DIRECT_LIMIT", 0)
    iterative, thick = run(setup, [0.0, t], tolerance=0.1)
    assert np.max(np.abs(direct[t] - iterative[t])) < 0.01
    assert setup.volume(thick[t]) == pytest.approx(setup.volume(thick[0.0]), rel=1e-12)
