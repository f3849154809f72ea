"""Implicit, conservative stepping of crustal thickness under channel flow (pure numpy/scipy, SI).

Mass balance of the crust, cell by cell in finite-volume form::

    A_i dT_i/dt = sum over faces of (flux into i) * length + S_i

with the flux per unit width across a face (from ``left`` to ``right``)::

    q = q_wall - C |G|^(n-1) g,    g = (phi_right - phi_left) / distance

``phi`` is the driving potential of the channel (``G = grad(phi)``, Pa), a function of the state T
given by the caller together with its slope ``dphi/dT`` per cell; ``C`` the face conductance (the
harmonic mean of the two cells' values), ``n`` the stress exponent (1: Newtonian), ``q_wall`` the
wall-driven flux and ``S`` volume sources (inflow through grid edges). ``|G|`` on a face combines the
two-point normal derivative with the mean tangential derivative of the two cells.

For a uniform Newtonian channel in Airy balance this is linear diffusion with
``kappa = (1 - rho_c/rho_m) rho_c g h^3 / (12 eta)``; a power-law channel gives the p-Laplacian
(p = n + 1). Explicit steps would need ``dt <= dx^2 / (4 kappa)``; here every step is implicit:
backward Euler to start, then variable-step BDF2, Newton's method for the nonlinear face law, and a
sparse symmetric positive-definite linear system per Newton iteration (a direct solve on small
grids, conjugate gradients preconditioned by smoothed-aggregation algebraic multigrid on large ones).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from crustflow.geometry.finite_volume import FaceNetwork, conductance_matrix, net_inflow

__all__ = [
    "ChannelTransport",
    "StepStats",
    "face_flux",
    "thickening_rate",
    "integrate",
    "steady_state",
    "bdf2_coefficients",
]

log = logging.getLogger(__name__)

#: Largest system solved directly (sparse LU); above it, AMG-preconditioned CG. Project choice.
DIRECT_LIMIT = 40_000

#: Relative residual of the conjugate-gradient solves, dimensionless (project choice).
KRYLOV_RTOL = 1e-10

#: Most CG iterations per solve before the multigrid hierarchy is rebuilt (project choice).
KRYLOV_MAXITER = 300

#: Newton iterations per step before the step is cut (project choice).
NEWTON_MAXITER = 25

#: Newton stops when the largest update is below this fraction of the step tolerance (project choice).
NEWTON_FRACTION = 1e-3

#: Largest ratio of consecutive steps; variable-step BDF2 is zero-stable below 1 + sqrt(2)
#: (Grigorieff 1983, Numer. Math. 42; from memory). Project choice below that bound.
MAX_STEP_RATIO = 2.0

#: Safety factor of the step-size controller (common practice, no source).
SAFETY = 0.9

#: Error constant ratio of BDF2 against the second-order explicit predictor at constant steps:
#: BDF2 local error -(2/9) h^3 y''', predictor error (5/12) h^3 y''', so the BDF2 error is
#: (2/9) / (2/9 + 5/12) = 8/23 of their difference (value derived by Taylor expansion).
BDF2_ERROR_WEIGHT = 8.0 / 23.0

#: Most pseudo-time steps towards a steady state (project choice).
STEADY_MAXITER = 80

#: Pseudo-time step beyond which a step that changes nothing is the steady state, s: 1e20 s
#: (3e12 yr) exceeds the relaxation time L^2 / kappa of any grid up to 1e4 km with kappa above
#: 1e-6 m^2/s (eta below ~1e23 Pa s at h 15 km; value derived). Project choice.
STEADY_STEP = 1e20

#: Growth of the pseudo-time step per steady iteration (project choice).
STEADY_GROWTH = 10.0


@dataclass(frozen=True, eq=False)
class ChannelTransport:
    """The conservative transport problem of the crust on a grid (flat arrays, SI).

    Attributes
    ----------
    network : FaceNetwork
        Faces between domain cells.
    conductance : numpy.ndarray
        Per face C: flux per unit width ``C |G|^(n-1) g`` for a drive G in Pa/m, m^2/s / (Pa/m)^n.
    exponent : float
        n (1 for a Newtonian channel).
    wall_flux : numpy.ndarray
        Per face, flux per unit width from ``left`` to ``right`` driven by the walls, m^2/s.
    source : numpy.ndarray
        Per grid cell, volume entering through grid edges, m^3/s.
    free : numpy.ndarray of int64
        Flat indices of the cells that evolve (domain cells that are not held fixed).
    potential : callable
        ``potential(T) -> (phi, slope)``: the driving potential (Pa) and ``dphi/dT`` (Pa/m) of the
        whole grid for crustal thickness T (m, flat); slope must be positive on free cells.
    tangential : callable or None
        ``tangential(phi) -> per-face tangential derivative`` (Pa/m), used when n != 1.
    """

    network: FaceNetwork
    conductance: np.ndarray
    exponent: float
    wall_flux: np.ndarray
    source: np.ndarray
    free: np.ndarray
    potential: Callable
    tangential: Callable | None = None


@dataclass
class StepStats:
    """Counters of an integration (for the run manifest and the summary)."""

    steps: int = 0
    rejected: int = 0
    newton_iterations: int = 0
    krylov_iterations: int = 0
    multigrid_setups: int = 0
    fixed_exchange: float = 0.0  #: volume gained from fixed cells, m^3
    step_sizes: list = field(default_factory=list)


def bdf2_coefficients(ratio: float | None) -> tuple[float, float, float]:
    """Coefficients ``(a0, a1, a2)`` of ``a0 y_n+1 - a1 y_n + a2 y_n-1 = h f(y_n+1)``.

    Parameters
    ----------
    ratio : float or None
        ``omega = h_n / h_n-1``; None gives backward Euler (1, 1, 0).

    Notes
    -----
    Variable-step BDF2: ``a0 = (1 + 2 w) / (1 + w)``, ``a1 = 1 + w``, ``a2 = w^2 / (1 + w)``; at
    ``w = 1`` the familiar ``3/2, 2, 1/2`` (Hairer & Wanner 1996, Solving Ordinary Differential
    Equations II, section III.5; formula re-derived by Lagrange interpolation, value derived).
    """
    if ratio is None:
        return 1.0, 1.0, 0.0
    w = float(ratio)
    return (1.0 + 2.0 * w) / (1.0 + w), 1.0 + w, w * w / (1.0 + w)


def _drive(problem: ChannelTransport, phi: np.ndarray):
    """Normal derivative g and magnitude |G| on every face."""
    net = problem.network
    g = (phi[net.right] - phi[net.left]) / net.distance
    if problem.exponent == 1.0 or problem.tangential is None:
        return g, np.abs(g)
    return g, np.hypot(g, problem.tangential(phi))


def face_flux(problem: ChannelTransport, phi: np.ndarray) -> np.ndarray:
    """Flux per unit width on every face, m^2/s, from ``left`` to ``right``.

    Notes
    -----
    ``q = q_wall - C |G|^(n-1) g``: the channel flux ``q = U h/2 - h^3 G / (12 eta)`` for a
    Newtonian channel (Turcotte & Schubert 2002, section 6.2) and
    ``q = -2 A |G|^(n-1) G (h/2)^(n+2) / (n+2)`` for a power-law channel between fixed walls.
    """
    g, mag = _drive(problem, phi)
    if problem.exponent == 1.0:
        return problem.wall_flux - problem.conductance * g
    return problem.wall_flux - problem.conductance * mag ** (problem.exponent - 1.0) * g


def thickening_rate(problem: ChannelTransport, phi: np.ndarray) -> np.ndarray:
    """dT/dt of every grid cell, m/s: net inflow through faces and edges over the cell area."""
    net = problem.network
    return (net_inflow(face_flux(problem, phi), net) + problem.source) / net.area


def _newton_weights(problem: ChannelTransport, phi: np.ndarray) -> np.ndarray:
    """``length / distance * dq/dg`` per face (the Jacobian of the face flux, tangential part lagged)."""
    net = problem.network
    if problem.exponent == 1.0:
        slope = problem.conductance
    else:
        g, mag = _drive(problem, phi)
        n = problem.exponent
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(mag > 0, (g / np.where(mag > 0, mag, 1.0)) ** 2, 0.0)
        slope = problem.conductance * mag ** (n - 1.0) * (1.0 + (n - 1.0) * share)
    return slope * net.length / net.distance


class _LinearSolver:
    """Solves the SPD systems of the Newton iterations; keeps an AMG hierarchy between solves."""

    def __init__(self, stats: StepStats) -> None:
        self.stats, self.hierarchy, self.key = stats, None, None

    def solve(self, matrix: sp.csr_matrix, rhs: np.ndarray, key: float) -> np.ndarray:
        if rhs.size <= DIRECT_LIMIT:
            return spla.spsolve(matrix.tocsc(), rhs)
        if self.hierarchy is None or not (1 / 3 < key / self.key < 3):
            self._setup(matrix, key)
        x, iterations = self._cg(matrix, rhs)
        if x is None:  # the kept hierarchy no longer fits the matrix: rebuild once
            self._setup(matrix, key)
            x, iterations = self._cg(matrix, rhs)
            if x is None:
                log.warning("conjugate gradients did not reach rtol %g", KRYLOV_RTOL)
                x = self.last
        self.stats.krylov_iterations += iterations
        return x

    def _setup(self, matrix, key) -> None:
        import pyamg  # heavy import, only for large grids

        self.hierarchy = pyamg.smoothed_aggregation_solver(matrix, symmetry="symmetric")
        self.key = key
        self.stats.multigrid_setups += 1

    def _cg(self, matrix, rhs):
        count = [0]

        def tick(_):
            count[0] += 1

        x, info = spla.cg(
            matrix,
            rhs,
            rtol=KRYLOV_RTOL,
            atol=0.0,
            maxiter=KRYLOV_MAXITER,
            M=self.hierarchy.aspreconditioner(cycle="V"),
            callback=tick,
        )
        self.last = x
        return (x if info == 0 else None), count[0]


def _implicit_solve(problem, history, h, coefficients, tol, solver, stats) -> np.ndarray | None:
    """One implicit step: Newton's method on ``a0 T - b = h dT/dt(T)`` over the free cells.

    Returns the new thickness (whole grid, flat) or None if Newton did not converge.
    """
    a0, a1, a2 = coefficients
    current, previous = history
    free, area = problem.free, problem.network.area[problem.free]
    base = a1 * current[free] - (a2 * previous[free] if a2 else 0.0)
    state = current.copy()
    for iteration in range(NEWTON_MAXITER):
        phi, slope = problem.potential(state)
        residual = a0 * state[free] - base - h * thickening_rate(problem, phi)[free]
        if iteration and problem.exponent == 1.0:
            if np.max(np.abs(residual)) / a0 < NEWTON_FRACTION * tol:
                return state  # linear law: one exact solve was enough
        weights = _newton_weights(problem, phi)
        matrix = conductance_matrix(h * weights, problem.network, free)
        matrix = matrix + sp.diags(a0 * area / slope[free])
        y = solver.solve(matrix.tocsr(), -area * residual, h / a0)
        update = y / slope[free]
        state[free] += update
        stats.newton_iterations += 1
        if np.max(np.abs(update)) < NEWTON_FRACTION * tol:
            return state
        if not np.all(np.isfinite(update)):
            return None
    return None


def _conserve(problem, state, history, h, coefficients, exchange) -> float:
    """Put the linear solver's net volume error back as a uniform shift; return the fixed-cell inflow.

    After the shift ``sum(A (a0 T - b)) = h (sources + inflow from fixed cells)`` over the free cells
    holds to rounding, so volume is conserved to rounding whatever the solver tolerance.
    """
    a0, a1, a2 = coefficients
    current, previous = history
    free, area = problem.free, problem.network.area[problem.free]
    phi, _ = problem.potential(state)
    gained = net_inflow(face_flux(problem, phi), problem.network)[free]
    fixed_in = float(np.sum(gained))  # interior faces cancel: only faces to fixed cells remain
    base = a1 * current[free] - (a2 * previous[free] if a2 else 0.0)
    mismatch = float(np.sum(area * (a0 * state[free] - base))) - h * (
        fixed_in + float(np.sum(problem.source[free]))
    )
    state[free] -= mismatch / (a0 * float(np.sum(area)))
    return (h * fixed_in + a1 * exchange[0] - a2 * exchange[1]) / a0


def _first_step(problem: ChannelTransport, rate0: np.ndarray, tol: float, limit: float) -> float:
    fastest = float(np.max(np.abs(rate0[problem.free]))) if problem.free.size else 0.0
    return min(limit, tol / fastest) if fastest > 0 else limit


def integrate(
    problem: ChannelTransport,
    thickness: np.ndarray,
    times,
    *,
    tolerance: float,
    max_step: float | None = None,
    step: float | None = None,
    snapshot: Callable[[float, np.ndarray], None] | None = None,
    on_step: Callable[[float], None] | None = None,
) -> StepStats:
    """Step crustal thickness through time; call ``snapshot(t, T)`` at each of ``times``.

    Parameters
    ----------
    problem : ChannelTransport
    thickness : numpy.ndarray
        T at t = 0, m, flat over the grid (NaN off the domain; not modified).
    times : sequence of float
        Increasing snapshot times from 0, s.
    tolerance : float
        Local error allowed per step, m (max norm over free cells).
    max_step : float, optional
        Longest step, s.
    step : float, optional
        A fixed step, s, without error control (for convergence studies); steps are cut to land
        on the snapshot times.
    snapshot : callable, optional
    on_step : callable, optional
        Called with the model time (s) after every accepted step (progress display).

    Returns
    -------
    StepStats

    Notes
    -----
    Backward Euler for the first step, then variable-step BDF2 (:func:`bdf2_coefficients`). The
    local error of a BDF2 step is estimated as ``8/23 |T - T_p|`` with the explicit second-order
    predictor ``T_p = T_n + h f_n + h^2 (f_n - f_n-1) / (2 h_n-1)`` (f = dT/dt from the BDF
    relation); of the first step as ``h |f_1 - f_0| / 2``. A step whose estimate exceeds the
    tolerance is repeated with a smaller step; the next step is scaled by
    ``0.9 (tol / err)^(1/3)``, at most doubled (Hairer, Norsett & Wanner 1993, Solving Ordinary
    Differential Equations I, section II.4, for the controller).
    """
    stats = StepStats()
    solver = _LinearSolver(stats)
    times = [float(t) for t in times]
    current = np.array(thickness, dtype=float).ravel()
    if snapshot is not None:
        snapshot(0.0, current.copy())
    phi, _ = problem.potential(current)
    rate = thickening_rate(problem, phi)
    h = step or _first_step(problem, rate, tolerance, max_step or times[-1] or 1.0)
    previous, prev_rate, h_prev, t = None, None, None, 0.0
    exchange = (0.0, 0.0)
    for target in times[1:]:
        while t < target * (1 - 1e-12):
            h = min(h, max_step or h, target - t)
            if t + h < target and t + 2 * h > target:  # avoid a sliver before the snapshot
                h = 0.5 * (target - t)
            if h_prev is not None and step is None:
                h = min(h, MAX_STEP_RATIO * h_prev)
            coeffs = bdf2_coefficients(None if previous is None else h / h_prev)
            hist = (current, previous if previous is not None else current)
            new = _implicit_solve(problem, hist, h, coeffs, tolerance, solver, stats)
            if new is None:
                stats.rejected += 1
                h *= 0.25
                continue
            gained = _conserve(problem, new, hist, h, coeffs, exchange)
            a0, a1, a2 = coeffs
            new_rate = np.zeros_like(rate)
            base = a1 * current - (a2 * hist[1] if a2 else 0.0)
            new_rate[problem.free] = (a0 * new[problem.free] - base[problem.free]) / h
            if previous is None:
                err, order = 0.5 * h * np.max(np.abs(new_rate - rate)[problem.free]), 2.0
            else:
                pred = current + h * rate + h * h / (2 * h_prev) * (rate - prev_rate)
                err, order = BDF2_ERROR_WEIGHT * np.max(np.abs(new - pred)[problem.free]), 3.0
            if step is None and err > tolerance:
                stats.rejected += 1
                h *= max(0.2, SAFETY * (tolerance / err) ** (1 / order))
                continue
            exchange = (gained, exchange[0])
            stats.fixed_exchange = gained
            previous, current, prev_rate, rate, h_prev = current, new, rate, new_rate, h
            t += h
            stats.steps += 1
            stats.step_sizes.append(h)
            if on_step is not None:
                on_step(t)
            if step is None:
                grow = MAX_STEP_RATIO if err == 0 else SAFETY * (tolerance / err) ** (1 / order)
                h = h * min(MAX_STEP_RATIO, max(0.5, grow))
            else:
                h = step
        t = target
        if snapshot is not None:
            snapshot(target, current.copy())
    return stats


def steady_state(
    problem: ChannelTransport, thickness: np.ndarray, *, tolerance: float
) -> tuple[np.ndarray, StepStats]:
    """The state that no longer changes, by implicit pseudo-time steps of growing length.

    Parameters
    ----------
    problem : ChannelTransport
    thickness : numpy.ndarray
        Initial T, m, flat (the starting guess; with all edges closed it also fixes the volume).
    tolerance : float
        m; the iteration stops when a step of at least :data:`STEADY_STEP` changes T by less
        than ``1e-3 * tolerance``.

    Returns
    -------
    T : numpy.ndarray
        Steady crustal thickness, m, flat.
    stats : StepStats

    Notes
    -----
    Backward Euler steps with the step multiplied by 10 each time (pseudo-transient continuation;
    Kelley & Keyes 1998, SIAM J. Numer. Anal. 35). Volume is conserved at every step, so with all
    edges closed the steady state keeps the initial volume. Raises RuntimeError when no steady
    state is reached (e.g. inflow with no fixed edge to leave by).
    """
    stats = StepStats()
    solver = _LinearSolver(stats)
    state = np.array(thickness, dtype=float).ravel()
    phi, _ = problem.potential(state)
    h = _first_step(problem, thickening_rate(problem, phi), tolerance, STEADY_STEP)
    exchange = (0.0, 0.0)
    for _ in range(STEADY_MAXITER):
        new = _implicit_solve(problem, (state, state), h, (1.0, 1.0, 0.0), tolerance, solver, stats)
        if new is None:
            h *= 0.25
            stats.rejected += 1
            continue
        exchange = (_conserve(problem, new, (state, state), h, (1.0, 1.0, 0.0), exchange), 0.0)
        stats.fixed_exchange = exchange[0]
        change = float(np.max(np.abs(new - state)[problem.free])) if problem.free.size else 0.0
        state = new
        stats.steps += 1
        if h >= STEADY_STEP and change < 1e-3 * tolerance:
            return state, stats
        h *= STEADY_GROWTH if math.isfinite(change) else 1.0
    raise RuntimeError("no steady state reached")
