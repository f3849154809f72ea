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
grids, conjugate gradients preconditioned by classical Ruge-Stueben algebraic multigrid on large ones;
Ruge & Stueben 1987, in Multigrid Methods, SIAM Frontiers in Applied Mathematics 3). For a nonlinear
law the Newton solves are inexact and a multigrid hierarchy serves several iterations.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from crustflow.geometry.finite_volume import ConductanceAssembly, FaceNetwork, net_inflow

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

#: Relative residual of the conjugate-gradient solves, dimensionless (project choice); they also
#: stop at an absolute residual worth NEWTON_FRACTION of the step tolerance in every cell.
KRYLOV_RTOL = 1e-10

#: Factor by which the step (over a0) may move before the multigrid hierarchy is rebuilt; a kept
#: hierarchy still preconditions well, it only costs a few more CG iterations (project choice).
HIERARCHY_RANGE = 4.0

#: CG iterations of a Newton solve above which the kept multigrid hierarchy is rebuilt for the next
#: one: the conductances of a nonlinear law change every iteration, but a hierarchy set up a few
#: iterations earlier still preconditions well, and a set-up costs ~7 CG iterations (measured at
#: 62,500 cells; project choice).
STALE_ITERATIONS = 4

#: Chord iterations with a kept factorization before it is recomputed (project choice).
CHORD_LIMIT = 4

#: Fill-reducing ordering of the sparse LU factorizations: minimum degree on the symmetric
#: pattern suits these symmetric 5-point matrices (SuperLU users' guide; measured ~2x faster than
#: the default COLAMD here).
ORDERING = "MMD_AT_PLUS_A"

#: Absolute CG tolerance, as a fraction of the step tolerance in thickness per cell (project choice:
#: the solver's error stays two orders below the accepted local error).
KRYLOV_FRACTION = 1e-2

#: Sparse LU factorizations kept for reuse on small grids (project choice).
FACTOR_CACHE = 8

#: Most CG iterations per solve before the multigrid hierarchy is rebuilt (project choice).
KRYLOV_MAXITER = 300

#: Relative residual of the conjugate-gradient solves inside Newton's method for a nonlinear law:
#: an inexact Newton method, whose linear solves need only reduce the residual in proportion to
#: the Newton step's own contraction (Dembo, Eisenstat & Steihaug 1982, SIAM J. Numer. Anal. 19;
#: value a project choice, below the ~0.12 contraction of the lagged tangential part).
NEWTON_KRYLOV_RTOL = 0.1

#: Newton iterations per step before the step is cut (project choice).
NEWTON_MAXITER = 25

#: Newton stops when its estimated distance to the solution (largest cell) is below this fraction
#: of the step tolerance (project choice; implicit ODE codes commonly stop at ~0.1 of it, e.g.
#: Hairer & Wanner 1996, section IV.8, from memory).
NEWTON_FRACTION = 1e-2

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

#: Shortest pseudo-time step at which a step that changes almost nothing counts as the steady
#: state, s: 1e16 s (317 Myr) is at least a tenth of the relaxation time L^2 / kappa of grids up to
#: 1000 km with kappa above 1e-5 m^2/s (eta below ~1e20 Pa s at h 15 km; value derived).
STEADY_MIN_STEP = 1e16

#: Longest pseudo-time step, s (project choice: beyond ~1e20 s the rounding of h * dT/dt
#: exceeds a micrometre of thickness).
STEADY_MAX_STEP = 1e19

#: A step of at least STEADY_MIN_STEP that changes T by less than this fraction of the tolerance
#: ends the iteration (project choice).
STEADY_FRACTION = 1e-2

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


def _face_law(problem: ChannelTransport, phi: np.ndarray, *, jacobian: bool = False):
    """Flux per unit width on every face and (with ``jacobian``, else None) the Newton weights.

    Returns ``(q, w)``: ``w = length / distance * dq/dg`` per face. With
    ``q = q_wall - C |G|^(n-1) g`` and ``|G|^2 = g^2 + t^2`` (t the tangential derivative, held at
    its current value): ``dq/dg = -C |G|^(n-1) (1 + (n - 1) g^2 / |G|^2)``. Lagging t keeps the
    Newton matrix symmetric (conjugate gradients apply); the exact Jacobian, non-symmetric, cut
    the Newton iterations from ~3.0 to ~2.7 per step at 5 m tolerance but cost more in GMRES
    than it saved (measured on the power-law benchmark at 250 x 250 and 500 x 500).
    """
    net, n = problem.network, problem.exponent
    g, mag = _drive(problem, phi)
    if n == 1.0:
        flux, slope = problem.wall_flux - problem.conductance * g, problem.conductance
    else:
        scale = problem.conductance * mag ** (n - 1.0)
        flux = problem.wall_flux - scale * g
        if jacobian:
            with np.errstate(invalid="ignore", divide="ignore"):
                share = np.where(mag > 0, (g / np.where(mag > 0, mag, 1.0)) ** 2, 0.0)
            slope = scale * (1.0 + (n - 1.0) * share)
    return flux, (slope * net.length / net.distance if jacobian else None)


def face_flux(problem: ChannelTransport, phi: np.ndarray) -> np.ndarray:
    """Flux per unit width on every face, m^2/s, from ``left`` to ``right``.

    Notes
    -----
    ``q = q_wall - C |G|^(n-1) g``: the channel flux ``q = U h/2 - h^3 G / (12 eta)`` for a
    Newtonian channel (Turcotte & Schubert 2002, section 6.2) and
    ``q = -2 A |G|^(n-1) G (h/2)^(n+2) / (n+2)`` for a power-law channel between fixed walls.
    """
    return _face_law(problem, phi)[0]


def _rate(problem: ChannelTransport, flux: np.ndarray) -> np.ndarray:
    net = problem.network
    return (net_inflow(flux, net) + problem.source) / net.area


def thickening_rate(problem: ChannelTransport, phi: np.ndarray) -> np.ndarray:
    """dT/dt of every grid cell, m/s: net inflow through faces and edges over the cell area."""
    return _rate(problem, face_flux(problem, phi))


class _LinearSolver:
    """Solves the SPD systems of the Newton iterations, reusing what it can between solves.

    Small systems: sparse LU factorizations, cached by the matrix's key (the step over ``a0``; the
    steps are powers of two of the snapshot interval, so few keys recur) while the conductances
    stay the same. Large systems: conjugate gradients preconditioned by a classical (Ruge-Stueben)
    multigrid hierarchy, rebuilt only when the key moves by more than :data:`HIERARCHY_RANGE` or,
    for a nonlinear law, when a solve needed more than :data:`STALE_ITERATIONS` iterations.
    Classical AMG suits these M-matrices (5-point conductances plus a positive diagonal): on the
    benchmark's matrices it set up 15x faster than smoothed aggregation and needed fewer
    iterations (measured with pyamg 5.4).
    """

    def __init__(self, stats: StepStats) -> None:
        self.stats, self.hierarchy, self.key = stats, None, None
        self.factors: dict = {}
        self.assembly = None
        self.stale = False

    def matrix(self, problem: ChannelTransport, weights, diagonal) -> sp.csr_matrix:
        """``S(weights) + diag(diagonal)`` over the free cells (the pattern is found once)."""
        if self.assembly is None:
            self.assembly = ConductanceAssembly(problem.network, problem.free)
        return self.assembly.matrix(weights, diagonal)

    def solve(self, matrix, rhs, key: float, atol: float, *, reuse: bool) -> np.ndarray:
        """Solve ``matrix x = rhs``; ``reuse``: the matrix only changes with ``key`` (linear law),
        else (a Newton matrix) the solve may be inexact, to :data:`NEWTON_KRYLOV_RTOL`."""
        if rhs.size <= DIRECT_LIMIT:
            return self._factor(matrix, key, reuse).solve(rhs)
        near = self.key is not None and 1 / HIERARCHY_RANGE < key / self.key < HIERARCHY_RANGE
        if self.hierarchy is None or not near or self.stale:
            self._setup(matrix, key)
        rtol = KRYLOV_RTOL if reuse else NEWTON_KRYLOV_RTOL
        x, iterations = self._cg(matrix, rhs, atol, rtol)
        self.stale = not reuse and iterations > STALE_ITERATIONS
        if x is None:  # the kept hierarchy no longer fits the matrix: rebuild once
            self._setup(matrix, key)
            x, more = self._cg(matrix, rhs, atol, rtol)
            iterations += more
        self.stats.krylov_iterations += iterations
        if x is None:
            log.warning("conjugate gradients did not reach the tolerance")
            x = self.last
        return x

    def _factor(self, matrix, key, reuse):
        """A sparse LU factorization of ``matrix``; kept by ``key`` when ``reuse``."""
        if not reuse:
            return spla.splu(matrix.tocsc(), permc_spec=ORDERING)
        if key not in self.factors:
            if len(self.factors) >= FACTOR_CACHE:
                self.factors.pop(next(iter(self.factors)))
            self.factors[key] = spla.splu(matrix.tocsc(), permc_spec=ORDERING)
        return self.factors[key]

    def _setup(self, matrix, key) -> None:
        import pyamg  # heavy import, only for large grids

        # One forward sweep before and one backward sweep after the coarse correction: a
        # symmetric V-cycle (as conjugate gradients need) at half the cost of symmetric sweeps.
        self.hierarchy = pyamg.ruge_stuben_solver(
            matrix,
            presmoother=("gauss_seidel", {"sweep": "forward"}),
            postsmoother=("gauss_seidel", {"sweep": "backward"}),
        )
        self.key = key
        self.stats.multigrid_setups += 1

    def _cg(self, matrix, rhs, atol, rtol):
        """Conjugate gradients preconditioned by a V-cycle of the kept hierarchy; returns
        (x or None if the tolerance was not reached, iterations)."""
        count = [0]

        def tick(_):
            count[0] += 1

        x, info = spla.cg(
            matrix,
            rhs,
            rtol=rtol,
            atol=atol,
            maxiter=KRYLOV_MAXITER,
            M=self.hierarchy.aspreconditioner(cycle="V"),
            callback=tick,
        )
        self.last = x
        return (x if info == 0 else None), count[0]


def _implicit_solve(
    problem, history, h, coefficients, tol, solver, stats, start=None, *, residual_stop=None
):
    """One implicit step: Newton's method on ``a0 T - b = h dT/dt(T)`` over the free cells.

    ``start``: first Newton iterate (e.g. the explicit predictor; default the current state).
    ``residual_stop``: a factor f; if given, stop only on the residual (in thickness, below
    f :data:`NEWTON_FRACTION` of the tolerance), never on the update alone. The steady search
    needs it: at pseudo-time steps of 1e19 s a small update can leave a large rate, and the
    degenerate flats of a power-law channel (conductance -> 0 as the load flattens) shift from step
    to step without it. f = h / STEADY_MIN_STEP there keeps the rate's residual below
    ``NEWTON_FRACTION * tol / STEADY_MIN_STEP`` (round-off forbids less at the longest steps).
    Returns the new thickness (whole grid, flat) or None if Newton did not converge.

    Newton stops when the estimated distance to the solution, ``rho / (1 - rho) |update|`` with
    ``rho`` the observed contraction of the updates (or the update itself before a rate is known),
    is below :data:`NEWTON_FRACTION` of the step tolerance (the convergence test of implicit ODE
    codes; Hairer & Wanner 1996, Solving Ordinary Differential Equations II, section IV.8, from
    memory).
    """
    a0, a1, a2 = coefficients
    current, previous = history
    free, area = problem.free, problem.network.area[problem.free]
    base = a1 * current[free] - (a2 * previous[free] if a2 else 0.0)
    state = current.copy()
    if start is not None:
        state[free] = start[free]
    # CG also stops when the residual (m^3) is worth KRYLOV_FRACTION * tol of thickness per cell.
    atol = KRYLOV_FRACTION * tol * a0 * float(np.min(area)) if free.size else 0.0
    linear, last = problem.exponent == 1.0, None
    for iteration in range(NEWTON_MAXITER):
        phi, slope = problem.potential(state)
        flux, weights = _face_law(problem, phi, jacobian=True)
        residual = a0 * state[free] - base - h * _rate(problem, flux)[free]
        if iteration and (linear or residual_stop):
            if np.max(np.abs(residual)) / a0 < NEWTON_FRACTION * tol * (residual_stop or 1.0):
                return state  # linear law: one solve was enough; steady search: residual met
        matrix = solver.matrix(problem, h * weights, a0 * area / slope[free])
        # Linear law: a kept factorization serves as a chord (modified Newton) iteration while
        # only the potential's slope moved (cells crossing sea level); refreshed if that is slow.
        if linear and iteration == CHORD_LIMIT:
            solver.factors.pop(h / a0, None)
        y = solver.solve(matrix, -area * residual, h / a0, atol, reuse=linear)
        update = y / slope[free]
        state[free] += update
        stats.newton_iterations += 1
        if not np.all(np.isfinite(update)):
            return None
        size = float(np.max(np.abs(update))) if update.size else 0.0
        rate = size / last if last else None
        remaining = size if rate is None else (rate / (1.0 - rate) * size if rate < 1 else np.inf)
        if remaining < NEWTON_FRACTION * tol and residual_stop is None:
            return state
        last = size
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
        on the snapshot times. Otherwise a linear law (n = 1) takes steps of the snapshot interval
        divided by powers of two (so factorizations recur), a nonlinear law any step.
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
    run = _Stepper(problem, thickness, tolerance, fixed=step is not None)
    times = [float(t) for t in times]
    unit = (times[1] - times[0]) if len(times) > 1 else 1.0
    # Linear law: steps of unit / 2^j recur, so kept factorizations serve again; a nonlinear law
    # rebuilds its matrices anyway and takes the steps the error allows.
    snap = _quantized if problem.exponent == 1.0 else min
    cap = unit if max_step is None else snap(max_step, unit)
    if snapshot is not None:
        snapshot(0.0, run.current.copy())
    h = step or snap(_first_step(problem, run.rate, tolerance, cap), unit)
    t = 0.0
    for target in times[1:]:
        while target - t > 1e-9 * unit:
            h_try = _next_step(h, target - t, quantized=snap is _quantized or step is not None)
            if step is None and run.h_prev is not None:
                h_try = min(h_try, MAX_STEP_RATIO * run.h_prev)
            err, order = run.attempt(h_try)
            if step is None and not err <= tolerance:  # too large an error, or Newton failed
                run.stats.rejected += 1
                shrink = 0.25 if not np.isfinite(err) else SAFETY * (tolerance / err) ** (1 / order)
                h = min(snap(h_try * max(0.2, shrink), unit), 0.5 * h_try)
                continue
            run.accept(h_try)
            t += h_try
            if on_step is not None:
                on_step(t)
            if step is None:
                grow = MAX_STEP_RATIO if err == 0 else SAFETY * (tolerance / err) ** (1 / order)
                h = min(cap, snap(h_try * min(MAX_STEP_RATIO, max(0.5, grow)), unit))
        t = target
        if snapshot is not None:
            snapshot(target, run.current.copy())
    return run.stats


def _next_step(h: float, left: float, *, quantized: bool) -> float:
    """The step to try with ``left`` to go to the next snapshot: h, or what is left; free steps
    split a remainder between h and 2h in two, rather than leave a sliver for the last step."""
    if quantized or left <= h:
        return min(h, left)
    return 0.5 * left if left < 2.0 * h else h


def _quantized(h: float, unit: float) -> float:
    """The largest ``unit / 2^j`` (j >= 0) not above h: steps that land on the snapshot times and
    recur, so factorizations and multigrid hierarchies can be reused."""
    if h >= unit:
        return unit
    return unit * 2.0 ** math.floor(math.log2(h / unit))


class _Stepper:
    """The history of an integration and one attempted step at a time."""

    def __init__(self, problem: ChannelTransport, thickness, tolerance: float, *, fixed: bool):
        self.problem, self.tolerance, self.fixed = problem, tolerance, fixed
        self.stats = StepStats()
        self.solver = _LinearSolver(self.stats)
        self.current = np.array(thickness, dtype=float).ravel()
        phi, _ = problem.potential(self.current)
        self.rate = thickening_rate(problem, phi)
        self.previous = self.prev_rate = self.h_prev = None
        self.exchange = (0.0, 0.0)
        self.trial = None

    def attempt(self, h: float) -> tuple[float, float]:
        """Solve one step of length h; return (error estimate, order of the estimate)."""
        p, free = self.problem, self.problem.free
        first = self.previous is None
        coeffs = bdf2_coefficients(None if first else h / self.h_prev)
        hist = (self.current, self.current if first else self.previous)
        pred = None
        if not first:
            pred = self.current + h * self.rate
            pred += h * h / (2 * self.h_prev) * (self.rate - self.prev_rate)
        new = _implicit_solve(p, hist, h, coeffs, self.tolerance, self.solver, self.stats, pred)
        if new is None:
            self.trial = None
            return float("inf"), 1.0
        gained = _conserve(p, new, hist, h, coeffs, self.exchange)
        a0, a1, a2 = coeffs
        base = a1 * self.current - (a2 * hist[1] if a2 else 0.0)
        new_rate = np.zeros_like(self.rate)
        new_rate[free] = (a0 * new[free] - base[free]) / h
        self.trial = (new, new_rate, gained)
        if not free.size:
            return 0.0, 2.0
        if first:
            return 0.5 * h * float(np.max(np.abs(new_rate - self.rate)[free])), 2.0
        return BDF2_ERROR_WEIGHT * float(np.max(np.abs(new - pred)[free])), 3.0

    def accept(self, h: float) -> None:
        new, new_rate, gained = self.trial
        self.exchange = (gained, self.exchange[0])
        self.stats.fixed_exchange = gained
        self.previous, self.current = self.current, new
        self.prev_rate, self.rate, self.h_prev = self.rate, new_rate, h
        self.stats.steps += 1
        self.stats.step_sizes.append(h)


def _steady_step(problem, state, h, tolerance, solver, stats):
    """One backward-Euler pseudo-time step of the steady search (None if Newton failed).

    Nonlinear laws at steps of at least STEADY_MIN_STEP first stop Newton on the residual (factor
    ``h / STEADY_MIN_STEP``, see :func:`_implicit_solve`): on the bundled plateau with a power-law
    channel the update-based stop let stagnant flats shift by hundreds of metres from step to step
    and the search never settled. Where that strict solve fails (a degenerate flat that Newton
    approaches only slowly, e.g. the 1-D inflow test) the update-based stop is used as before.
    """
    args = (problem, (state, state), h, (1.0, 1.0, 0.0), tolerance, solver, stats)
    if problem.exponent != 1.0 and h >= STEADY_MIN_STEP:
        new = _implicit_solve(*args, residual_stop=h / STEADY_MIN_STEP)
        if new is not None:
            return new
    return _implicit_solve(*args)


def steady_state(
    problem: ChannelTransport,
    thickness: np.ndarray,
    *,
    tolerance: float,
    on_step: Callable[[int], None] | None = None,
) -> tuple[np.ndarray, StepStats]:
    """The state that no longer changes, by implicit pseudo-time steps of growing length.

    Parameters
    ----------
    problem : ChannelTransport
    thickness : numpy.ndarray
        Initial T, m, flat (the starting guess; with all edges closed it also fixes the volume).
    tolerance : float
        m; the iteration stops when a step of at least :data:`STEADY_MIN_STEP` changes T by less
        than ``STEADY_FRACTION * tolerance``.
    on_step : callable, optional
        Called with the number of pseudo-time steps taken after each one (progress display).

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
    h = _first_step(problem, thickening_rate(problem, phi), tolerance, STEADY_MAX_STEP)
    exchange = (0.0, 0.0)
    for _ in range(STEADY_MAXITER):
        new = _steady_step(problem, state, h, tolerance, solver, stats)
        if new is None:
            h *= 0.25
            stats.rejected += 1
            continue
        exchange = (_conserve(problem, new, (state, state), h, (1.0, 1.0, 0.0), exchange), 0.0)
        stats.fixed_exchange = exchange[0]
        change = float(np.max(np.abs(new - state)[problem.free])) if problem.free.size else 0.0
        state = new
        stats.steps += 1
        if on_step is not None:
            on_step(stats.steps)
        if h >= STEADY_MIN_STEP and change < STEADY_FRACTION * tolerance:
            return state, stats
        h = min(STEADY_MAX_STEP, h * STEADY_GROWTH)
    raise RuntimeError("no steady state reached")
