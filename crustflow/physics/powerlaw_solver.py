"""Internals of the power-law channel of :mod:`crustflow.physics.rheology`.

Dimensionless, on flattened 1-D arrays of cells: the checks and scaling of the inputs and the first
guess (:func:`law_config`, :func:`flatten_cells`, :func:`setup_cells`), the integrals over the height (exact
polynomial sums for odd integer n, split Gauss-Legendre quadrature otherwise), the safeguarded
Newton iteration (:func:`solve_newton`), and the dimensional outputs with peak speed and backflow
(:func:`solution_fields`). The equations, the solver and its accuracy are documented in
:func:`crustflow.physics.rheology.power_law_channel`; conventions as in :mod:`crustflow.physics.rheology`.

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   section 6.2 and chapter 7 (power-law fluids; from memory).
.. [2] Abramowitz, M. & Stegun, I. A. (1964). *Handbook of Mathematical Functions*, NBS Applied
   Mathematics Series 55, eq. 25.4.30 (Gauss-Legendre error term; equation number from memory).
.. [3] Dennis, J. E. & Schnabel, R. B. (1996). *Numerical Methods for Unconstrained Optimization
   and Nonlinear Equations*, SIAM, section 6.3 (backtracking line search; from memory).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache
from math import factorial

import numpy as np

from crustflow.errors import CrustflowInputError
from crustflow.physics.channel import BACKFLOW_RTOL
from crustflow.physics.fluidity import GAUSS_ORDER, gauss_legendre

#: Relative tolerance of the upper-wall condition, ``|u(h) - U| <= SOLVER_RTOL (|U| + V_p)``.
SOLVER_RTOL = 1e-9
#: Step halvings of the backtracking line search, and its sufficient-decrease constant ([3]_).
LINE_SEARCH_HALVINGS = 30
ARMIJO_CONSTANT = 1e-4
#: Heights sampled for the peak speed, and Newton refinements of the best sample.
PEAK_SAMPLES = 8
PEAK_NEWTON_STEPS = 4
#: Largest odd integer exponent solved with exact polynomial integrals.
LARGEST_POLYNOMIAL_EXPONENT = 15


def _norm(x, y):
    """``sqrt(x^2 + y^2)``: np.hypot is an order of magnitude slower; the values here are scaled."""
    return np.sqrt(x * x + y * y)


# --------------------------------------------------------------------------------------------------
# Power-law channel: internals (dimensionless, flattened 1-D arrays of cells)
# --------------------------------------------------------------------------------------------------
# Scaled problem: sigma = zeta / h - 1/2 in [-1/2, 1/2], tau = S (m + g sigma) with S a stress
# scale, A = A_mean * a(sigma), velocities in units of V = A_mean h S^n. The unknown is the
# scaled stress m at mid-channel; the wall condition reads
#     R(m) = integral a |m + g sigma|^(n-1) (m + g sigma) dsigma - U / V = 0,
# the gradient of the convex potential integral a |tau|^(n+1) / (n+1) - (U/V).m, so the
# Jacobian is symmetric positive definite wherever tau does not vanish identically.


@dataclass(frozen=True)
class _Law:
    n: float
    p: int | None  # (n - 1) / 2 for odd integer n (exact polynomial integrals), else None
    profile: Callable | None
    nodes: int  # Gauss nodes per piece (general path) or for the moments (profile)


_ROWS = (
    "g_e",  # scaled drive G h / S
    "g_n",
    "gg",  # |g|^2
    "u_e",  # scaled wall velocity U / V
    "u_n",
    "h",  # thickness, m
    "scale",  # stress scale S, Pa
    "velocity",  # velocity scale V = A_m h S^n, m/s
    "mean_prefactor",  # A_m, Pa^-n s^-1
    "prefactor",  # multiplier of the profile
    "pressure_scale",  # (s_p / S)^n
)


class _Cells:
    """Per-cell parameters as rows of one 2-D array (so that subsets cost one copy)."""

    def __init__(self, data: np.ndarray, mu: tuple | int, n_args: int):
        self.data = data
        for row, name in enumerate(_ROWS):
            setattr(self, name, data[row])
        row = len(_ROWS)
        if isinstance(mu, tuple):  # uniform prefactor: moments are numbers
            self.mu = mu
        else:
            self.mu = tuple(data[row : row + mu])
            row += mu
        self.args = tuple(data[row : row + n_args])
        self._layout = (mu, n_args)

    def take(self, index: np.ndarray) -> _Cells:
        return _Cells(np.take(self.data, index, axis=1), *self._layout)


def _uniform_moment(j: int) -> float:
    """``integral_{-1/2}^{1/2} s^j ds``."""
    return 0.0 if j % 2 else 2.0 * 0.5 ** (j + 1) / (j + 1)


@lru_cache(maxsize=16)
def _poly_terms(p: int) -> tuple[tuple[float, int, int, int, int], ...]:
    """Terms ``coef a^i b^j c^l s^k`` of ``(a + 2 b s + c s^2)^p``, k = j + 2 l."""
    terms = []
    for i in range(p + 1):
        for j in range(p + 1 - i):
            l_ = p - i - j
            coef = factorial(p) / (factorial(i) * factorial(j) * factorial(l_)) * 2.0**j
            terms.append((coef, i, j, l_, j + 2 * l_))
    return tuple(terms)


def _monomial(coef, powers, exponents):
    out = coef
    for power, e in zip(powers, exponents, strict=True):
        if e:
            out = out * power[e]
    return out


def _ladders(bases, p: int) -> list[list]:
    """``[1, x, x^2, ..., x^p]`` for each x in ``bases`` (by multiplication)."""
    powers = []
    for base in bases:
        ladder = [1.0, base]
        for _ in range(p - 1):
            ladder.append(ladder[-1] * base)
        powers.append(ladder)
    return powers


def _poly_sums(a, b, c, mu, p, *, derivatives=False, flux=False):
    """E, O (and F) = sum_k pi_k mu_{k}, mu_{k+1} (, mu_{k+2}) and dE/da, dE/db, dO/da, dO/db."""
    powers = _ladders((a, b, c), p)
    sums = [0.0] * (7 if derivatives else 3)

    def add(slot, value, j):
        m = mu[j]
        if not (isinstance(m, float) and m == 0.0):
            sums[slot] = sums[slot] + value * m

    for coef, i, j, l_, k in _poly_terms(p):
        value = _monomial(coef, powers, (i, j, l_))
        add(0, value, k)
        add(1, value, k + 1)
        if flux:
            add(2, value, k + 2)
        if derivatives:
            if i:
                d_a = _monomial(coef * i, powers, (i - 1, j, l_))
                add(3, d_a, k)
                add(5, d_a, k + 1)
            if j:
                d_b = _monomial(coef * j, powers, (i, j - 1, l_))
                add(4, d_b, k)
                add(6, d_b, k + 1)
    return sums


def abs_power(t2: np.ndarray, n: float) -> np.ndarray:
    """``|tau|^(n-1)`` from ``t2 = |tau|^2``, avoiding pow() where n allows."""
    e = 0.5 * (n - 1.0)
    if e == 0.0:
        return np.ones_like(t2)
    whole = int(e)
    if e == whole:
        out = t2
        for _ in range(whole - 1):
            out = out * t2
        return out
    if 2.0 * e == int(2.0 * e):
        root = np.sqrt(t2)
        return root * t2**whole if whole else root
    return np.power(t2, e)


def shape_factor(cells: _Cells, law: _Law, sigma):
    """Scaled prefactor ``a(sigma) = A(zeta) / A_mean`` (1 for a uniform prefactor)."""
    if law.profile is None:
        return 1.0
    zeta = cells.h * (sigma + 0.5)
    values = law.profile(zeta, *cells.args)
    return cells.prefactor * np.asarray(values, dtype=np.float64) / cells.mean_prefactor


def _minimum_point(cells: _Cells, m_e, m_n, lo, hi):
    """Height (sigma) of the smallest |tau|, clipped to [min(lo, hi), max(lo, hi)]."""
    gg = cells.gg
    dot = m_e * cells.g_e + m_n * cells.g_n
    star = np.divide(-dot, gg, out=np.full_like(gg, -0.5), where=gg > 0.0)
    return np.clip(star, np.minimum(lo, hi), np.maximum(lo, hi))


def _quad(cells: _Cells, law: _Law, m_e, m_n, lo, hi, *, jacobian=False, moments=False, nodes=None):
    """Gauss-Legendre integrals over sigma in [lo, hi], split where |tau| is smallest (n not odd).

    Returns ``[I_e, I_n]`` (integral of a |tau|^(n-1) tau), then ``J11, J12, J22`` (its
    derivative in m) if ``jacobian``, then ``E, S_e, S_n`` (integrals of a |tau|^(n-1) and of
    sigma a |tau|^(n-1) tau) if ``moments``.
    """
    x, w = gauss_legendre(nodes or law.nodes)
    x = x[:, None]
    if law.p is None:
        split = _minimum_point(cells, m_e, m_n, lo, hi)
        pieces = ((lo, split), (split, hi))
    else:
        pieces = ((lo, hi),)
    total = None
    for a, b in pieces:
        half = 0.5 * (np.asarray(b) - a)
        s = 0.5 * (np.asarray(b) + a) + half * x
        t_e = m_e + cells.g_e * s
        t_n = m_n + cells.g_n * s
        t2 = t_e * t_e + t_n * t_n
        f = abs_power(t2, law.n)
        if law.profile is not None:
            f = f * shape_factor(cells, law, s)
        f_e, f_n = f * t_e, f * t_n
        parts = [f_e, f_n]
        if jacobian:
            k = np.divide((law.n - 1.0) * f, t2, out=np.zeros_like(t2), where=t2 > 0.0)
            k_e = k * t_e
            parts += [f + k_e * t_e, k_e * t_n, f + k * t_n * t_n]
        if moments:
            parts += [f, f_e * s, f_n * s]
        sums = [half * (w @ part) for part in parts]
        total = sums if total is None else [t + v for t, v in zip(total, sums, strict=True)]
    return total


def _evaluate(cells: _Cells, law: _Law, m_e, m_n, jacobian: bool):
    """Residual ``R = u(h)/V - U/V`` and, if asked, its Jacobian (J11, J12, J22)."""
    if law.p is None:
        out = _quad(cells, law, m_e, m_n, -0.5, 0.5, jacobian=jacobian)
        r_e, r_n = out[0] - cells.u_e, out[1] - cells.u_n
        return r_e, r_n, (tuple(out[2:5]) if jacobian else None)
    g_e, g_n = cells.g_e, cells.g_n
    a = m_e * m_e + m_n * m_n
    b = m_e * g_e + m_n * g_n
    sums = _poly_sums(a, b, cells.gg, cells.mu, law.p, derivatives=jacobian)
    big_e, big_o = sums[0], sums[1]
    r_e = m_e * big_e + g_e * big_o - cells.u_e
    r_n = m_n * big_e + g_n * big_o - cells.u_n
    if not jacobian:
        return r_e, r_n, None
    e_a, e_b, o_a, o_b = sums[3:7]
    v_e, v_n = 2.0 * e_a * m_e + e_b * g_e, 2.0 * e_a * m_n + e_b * g_n
    w_e, w_n = 2.0 * o_a * m_e + o_b * g_e, 2.0 * o_a * m_n + o_b * g_n
    j11 = big_e + m_e * v_e + g_e * w_e
    j12 = m_e * v_n + g_e * w_n
    j22 = big_e + m_n * v_n + g_n * w_n
    return r_e, r_n, (j11, j12, j22)


def solve_newton(cells: _Cells, law: _Law, m_e, m_n, max_iterations: int):
    """Safeguarded Newton on all cells at once; returns m, converged, iterations, residual.

    Finished cells leave the iteration; the arrays are compacted once a third of them has left
    (copies cost more than the few wasted evaluations).
    """
    size = m_e.size
    iterations = np.zeros(size, dtype=np.int32)
    converged = np.zeros(size, dtype=bool)
    residual = np.full(size, np.nan)
    m_e, m_n = m_e.copy(), m_n.copy()
    active, sub, live = np.arange(size), cells, np.ones(size, dtype=bool)
    me, mn = m_e.copy(), m_n.copy()
    tol = SOLVER_RTOL * (_norm(cells.u_e, cells.u_n) + cells.pressure_scale)
    r_e, r_n, jac = _evaluate(cells, law, me, mn, True)
    stalled = np.zeros(size, dtype=bool)
    for iteration in range(max_iterations + 1):
        norm = _norm(r_e, r_n)
        done = norm <= tol
        finished = live & (done | stalled | ~np.isfinite(norm) | (iteration == max_iterations))
        if finished.any():
            end = np.flatnonzero(finished)
            ids = active[end]
            m_e[ids], m_n[ids] = me[end], mn[end]
            converged[ids], residual[ids] = done[end], norm[end]
            live[end] = False
            if not live.any():
                break
            if np.count_nonzero(live) < 0.67 * live.size:
                keep = np.flatnonzero(live)
                active, me, mn, tol, r_e, r_n = (v[keep] for v in (active, me, mn, tol, r_e, r_n))
                jac, sub, live = tuple(j[keep] for j in jac), sub.take(keep), live[keep]
        iterations[active[live]] += 1
        j11, j12, j22 = jac
        det = j11 * j22 - j12 * j12
        regular = (det > 0.0) & np.isfinite(det)
        det = np.where(regular, det, 1.0)
        # Newton direction; steepest descent of |R|^2 / 2 (-J R, here -R) if J is singular.
        # Finished cells that still sit in the arrays stand still (d = 0).
        d_e = np.where(regular, (j12 * r_n - j22 * r_e) / det, -r_e) * live
        d_n = np.where(regular, (j12 * r_e - j11 * r_n) / det, -r_n) * live
        phi = r_e * r_e + r_n * r_n
        t_e, t_n = me + d_e, mn + d_n
        s_e, s_n, s_jac = _evaluate(sub, law, t_e, t_n, True)
        s_jac = list(s_jac)
        fail = s_e * s_e + s_n * s_n > (1.0 - 2.0 * ARMIJO_CONSTANT) * phi
        pending = np.flatnonzero(fail & live)
        step = 1.0
        for _ in range(LINE_SEARCH_HALVINGS):  # backtracking on the few cells that need it
            if pending.size == 0:
                break
            step *= 0.5
            p_e = me[pending] + step * d_e[pending]
            p_n = mn[pending] + step * d_n[pending]
            q_e, q_n, q_jac = _evaluate(sub.take(pending), law, p_e, p_n, True)
            ok = q_e * q_e + q_n * q_n <= (1.0 - 2.0 * ARMIJO_CONSTANT * step) * phi[pending]
            won = pending[ok]
            t_e[won], t_n[won], s_e[won], s_n[won] = p_e[ok], p_n[ok], q_e[ok], q_n[ok]
            for full, part in zip(s_jac, q_jac, strict=True):
                full[won] = part[ok]
            pending = pending[~ok]
        stalled = np.zeros(live.size, dtype=bool)
        if pending.size:  # no decrease found: stop there, reported as not converged
            stalled[pending] = True
            for new, old in zip(
                (t_e, t_n, s_e, s_n, *s_jac), (me, mn, r_e, r_n, *jac), strict=True
            ):
                new[pending] = old[pending]
        me, mn, r_e, r_n, jac = t_e, t_n, s_e, s_n, tuple(s_jac)
    return m_e, m_n, converged, iterations, residual


def poly_coefficients(cells: _Cells, law: _Law, m_e, m_n):
    """Coefficients of ``u / V = sum_j c_j x^j``, ``x = sigma + 1/2 = zeta / h`` (uniform A, odd n).

    With ``t0 = m - g/2`` (stress at the lower wall), ``tau = t0 + g x`` and
    ``|tau|^(n-1) = sum_k pi_k x^k``, so ``u = sum_k pi_k (t0 x^(k+1)/(k+1) + g x^(k+2)/(k+2))``:
    no constant term, ``u(0) = 0`` exactly.
    """
    g_e, g_n = cells.g_e, cells.g_n
    t_e, t_n = m_e - 0.5 * g_e, m_n - 0.5 * g_n
    powers = _ladders((t_e * t_e + t_n * t_n, t_e * g_e + t_n * g_n, cells.gg), law.p)
    pi = [0.0] * (2 * law.p + 1)
    for coef, i, j, l_, k in _poly_terms(law.p):
        pi[k] = pi[k] + _monomial(coef, powers, (i, j, l_))
    c_e, c_n = [0.0] * (2 * law.p + 3), [0.0] * (2 * law.p + 3)
    for k, value in enumerate(pi):
        first, second = value / (k + 1), value / (k + 2)
        c_e[k + 1] = c_e[k + 1] + t_e * first
        c_n[k + 1] = c_n[k + 1] + t_n * first
        c_e[k + 2] = c_e[k + 2] + g_e * second
        c_n[k + 2] = c_n[k + 2] + g_n * second
    return c_e, c_n


def _horner(coefficients, sigma):
    out = coefficients[-1]
    for c in coefficients[-2::-1]:
        out = out * sigma + c
    return out


def scaled_velocity(cells: _Cells, law: _Law, m_e, m_n, sigma, coefficients=None):
    """Scaled velocity ``u(sigma) / V`` relative to the lower wall."""
    if coefficients is not None:
        x = sigma + 0.5
        return _horner(coefficients[0], x), _horner(coefficients[1], x)
    out = _quad(cells, law, m_e, m_n, -0.5, sigma)
    return out[0], out[1]


def _take_coefficients(coefficients, index):
    if coefficients is None:
        return None
    return tuple(
        [c[index] if isinstance(c, np.ndarray) else c for c in part] for part in coefficients
    )


def _peak(cells: _Cells, law: _Law, m_e, m_n, coefficients):
    """Largest scaled speed ``|u| / V`` and its height sigma (see power_law_channel Notes)."""
    size = m_e.size
    spacing = 1.0 / PEAK_SAMPLES
    short = max(law.nodes // 2, 8)  # nodes on intervals of at most two sample spacings
    best2 = np.full(size, -1.0)
    anchor, anchor_e, anchor_n = np.zeros(size), np.zeros(size), np.zeros(size)
    u_e = u_n = 0.0
    for k in range(1, PEAK_SAMPLES):  # interior samples; the walls are candidates below
        s = -0.5 + k * spacing
        if coefficients is not None:
            u_e, u_n = scaled_velocity(cells, law, m_e, m_n, s, coefficients)
        else:  # cumulative panels
            part = _quad(cells, law, m_e, m_n, s - spacing, s, nodes=short)
            u_e, u_n = u_e + part[0], u_n + part[1]
        speed2 = u_e * u_e + u_n * u_n
        better = speed2 > best2
        best2 = np.maximum(speed2, best2)
        anchor = np.where(better, s, anchor)
        anchor_e, anchor_n = np.where(better, u_e, anchor_e), np.where(better, u_n, anchor_n)
    # Newton on phi = u . tau (d|u|^2/dsigma = 2 a |tau|^(n-1) phi) from the best sample.
    lo, hi = anchor - spacing, anchor + spacing
    s, v_e, v_n = anchor, anchor_e, anchor_n
    for _ in range(PEAK_NEWTON_STEPS):
        t_e, t_n = m_e + cells.g_e * s, m_n + cells.g_n * s
        t2 = t_e * t_e + t_n * t_n
        phi = v_e * t_e + v_n * t_n
        slope = shape_factor(cells, law, s) * abs_power(t2, law.n) * t2
        slope = slope + v_e * cells.g_e + v_n * cells.g_n
        # Step only where the slope is negative (towards a maximum), within the bracket.
        slope = np.minimum(slope, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            move = phi / slope
        s = np.minimum(np.maximum(s - np.where(slope < 0.0, move, 0.0), lo), hi)
        if coefficients is not None:
            v_e, v_n = scaled_velocity(cells, law, m_e, m_n, s, coefficients)
        else:
            part = _quad(cells, law, m_e, m_n, anchor, s, nodes=short)
            v_e, v_n = anchor_e + part[0], anchor_n + part[1]
    # Candidates: lower wall (speed 0), best sample, refined point, least |tau|, upper wall.
    star = _minimum_point(cells, m_e, m_n, -0.5, 0.5)
    candidates = [
        (np.sqrt(best2), anchor),
        (_norm(v_e, v_n), s),
        (_norm(*scaled_velocity(cells, law, m_e, m_n, star, coefficients)), star),
        (_norm(cells.u_e, cells.u_n), 0.5),
    ]
    best, best_s = np.zeros(size), np.full(size, -0.5)
    for speed, height in candidates:
        better = speed > best
        best = np.where(better, speed, best)
        best_s = np.where(better, height, best_s)
    return best, best_s


def solution_fields(cells: _Cells, law: _Law, m_e, m_n) -> dict[str, np.ndarray]:
    """Dimensional fields of the solved cells (see PowerLawSolution)."""
    g_e, g_n = cells.g_e, cells.g_n
    coefficients = None
    if law.p is None:
        i_e, i_n, big_e, s_e, s_n = _quad(cells, law, m_e, m_n, -0.5, 0.5, moments=True)
    else:
        a, b = m_e * m_e + m_n * m_n, m_e * g_e + m_n * g_n
        big_e, big_o, big_f = _poly_sums(a, b, cells.gg, cells.mu, law.p, flux=True)
        i_e, i_n = m_e * big_e + g_e * big_o, m_n * big_e + g_n * big_o
        s_e, s_n = m_e * big_o + g_e * big_f, m_n * big_o + g_n * big_f
        if law.profile is None:
            coefficients = poly_coefficients(cells, law, m_e, m_n)
    # Scaled mean velocity q / (h V) = integral (1/2 - sigma) a |tau|^(n-1) tau dsigma.
    q_e, q_n = 0.5 * i_e - s_e, 0.5 * i_n - s_n
    couette = 0.5 - cells.mu[1]
    wall_e, wall_n = cells.u_e * couette, cells.u_n * couette
    wall_part = _norm(wall_e, wall_n)
    pressure_part = _norm(q_e - wall_e, q_n - wall_n)
    shared = wall_part + pressure_part
    share = np.divide(wall_part, shared, out=np.zeros_like(shared), where=shared > 0.0)

    # Backflow: d(u.q)/dsigma has the sign of tau.q, linear in sigma, so u.q has one interior
    # minimum, at tau.q = 0, when g.q > 0; otherwise its least value is at a wall.
    q_size = _norm(q_e, q_n)
    speed_scale = _norm(cells.u_e, cells.u_n) + cells.pressure_scale
    tol = BACKFLOW_RTOL * speed_scale * q_size
    net = q_size > BACKFLOW_RTOL * shared
    gq = g_e * q_e + g_n * q_n
    turn = np.divide(-(m_e * q_e + m_n * q_n), gq, out=np.zeros_like(gq), where=gq > 0.0)
    inside = np.flatnonzero(net & (gq > 0.0) & (turn > -0.5) & (turn < 0.5))
    backflow = net & (cells.u_e * q_e + cells.u_n * q_n < -tol)
    if inside.size:
        part = cells.take(inside)
        v_e, v_n = scaled_velocity(
            part,
            law,
            m_e[inside],
            m_n[inside],
            turn[inside],
            _take_coefficients(coefficients, inside),
        )
        backflow[inside] |= v_e * q_e[inside] + v_n * q_n[inside] < -tol[inside]

    peak, peak_s = _peak(cells, law, m_e, m_n, coefficients)
    h, stress, velocity = cells.h, cells.scale, cells.velocity
    with np.errstate(divide="ignore"):
        viscosity = h * stress / (velocity * big_e)
    return {
        "flux_east": h * velocity * q_e,
        "flux_north": h * velocity * q_n,
        "mean_velocity_east": velocity * q_e,
        "mean_velocity_north": velocity * q_n,
        "peak_speed": velocity * peak,
        "peak_speed_height": h * (peak_s + 0.5),
        "upper_wall_drag_east": -stress * (m_e + 0.5 * g_e),
        "upper_wall_drag_north": -stress * (m_n + 0.5 * g_n),
        "lower_wall_drag_east": stress * (m_e - 0.5 * g_e),
        "lower_wall_drag_north": stress * (m_n - 0.5 * g_n),
        "backflow": backflow,
        "wall_driven_share": share,
        "effective_viscosity": viscosity,
    }


def law_config(stress_exponent, prefactor_profile, quadrature_nodes) -> _Law:
    if np.ndim(stress_exponent) != 0:
        raise CrustflowInputError(
            "stress_exponent must be one number for all cells; solve each flow law separately"
        )
    n = float(stress_exponent)
    if not n >= 1.0:
        raise CrustflowInputError(
            f"stress_exponent is {n:g}; power-law creep needs n >= 1 (n = 1 is Newtonian)"
        )
    if prefactor_profile is not None and not callable(prefactor_profile):
        raise CrustflowInputError(
            "prefactor_profile must be a function f(zeta, *profile_args) returning A(zeta)"
        )
    odd = n == round(n) and round(n) % 2 == 1 and n <= LARGEST_POLYNOMIAL_EXPONENT
    p = (round(n) - 1) // 2 if odd else None
    if quadrature_nodes is None:
        nodes = GAUSS_ORDER if (odd or n >= 3.0) else (24 if n >= 2.0 else 32)
    else:
        nodes = int(quadrature_nodes)
        if nodes < 2:
            raise CrustflowInputError(f"quadrature_nodes must be at least 2, got {nodes}")
    return _Law(n, p, prefactor_profile, nodes)


def flatten_cells(named: dict, args: tuple):
    """Broadcast the per-cell inputs to one shape and flatten them (copies; inputs untouched)."""
    arrays = {}
    for name, value in named.items():
        try:
            array = np.asarray(value, dtype=np.float64)
        except (TypeError, ValueError):
            raise CrustflowInputError(
                f"{name} must be a number or an array of numbers in SI units, got {value!r}"
            ) from None
        arrays[name] = array
    extra = [np.asarray(a) for a in args]
    try:
        shape = np.broadcast_shapes(*(a.shape for a in arrays.values()), *(a.shape for a in extra))
    except ValueError:
        shapes = ", ".join(f"{k} {v.shape}" for k, v in arrays.items())
        raise CrustflowInputError(
            f"power-law channel inputs do not broadcast together ({shapes}, profile_args "
            f"{[a.shape for a in extra]}); give arrays of one shape or scalars"
        ) from None
    flat = {k: np.broadcast_to(v, shape).ravel() for k, v in arrays.items()}
    for name in ("thickness", "prefactor"):
        if np.any(flat[name] <= 0.0):
            raise CrustflowInputError(
                f"{name} must be positive (SI units) where given; use NaN for nodata"
            )
    return shape, flat, tuple(np.broadcast_to(a, shape).ravel() for a in extra)


def setup_cells(law: _Law, flat: dict, args: tuple):
    """Scaled cells of the valid (finite) entries, their indices and the initial guess."""
    h, prefactor = flat["thickness"], flat["prefactor"]
    count = 2 * law.p + 3 if law.p is not None else 2  # moments mu_0 .. mu_{n+1} or mu_0, mu_1
    with np.errstate(all="ignore"):
        if law.profile is None:
            mean = prefactor
        else:
            x, w = gauss_legendre(max(law.nodes, GAUSS_ORDER))
            sigma = 0.5 * x[:, None]
            values = prefactor * np.asarray(law.profile(h * (sigma + 0.5), *args), dtype=float)
            mean = 0.5 * (w @ values)
        finite = np.isfinite(mean) & (mean > 0.0)
        for name in ("drive_east", "drive_north", "thickness", "wall_east", "wall_north"):
            finite &= np.isfinite(flat[name])
    index = np.flatnonzero(finite)
    g_e, g_n, h = flat["drive_east"][index], flat["drive_north"][index], h[index]
    u_e, u_n, mean = flat["wall_east"][index], flat["wall_north"][index], mean[index]
    if law.profile is None:
        mu = tuple(_uniform_moment(j) for j in range(count))
    else:
        shape = values[:, index] / mean
        mu = tuple(0.5 * (w @ (shape * sigma**j)) for j in range(count))
    n = law.n
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        pressure_stress = 0.5 * _norm(g_e, g_n) * h
        couette_stress = (_norm(u_e, u_n) / (mean * h)) ** (1.0 / n)
        big = np.maximum(pressure_stress, couette_stress)
        ratio = np.divide(
            np.minimum(pressure_stress, couette_stress), big, out=np.zeros_like(big), where=big > 0
        )
        scale = np.where(big > 0.0, big * (1.0 + ratio**n) ** (1.0 / n), 1.0)
        velocity = mean * h * scale**n
        rows = [
            g_e * h / scale,
            g_n * h / scale,
            (g_e * g_e + g_n * g_n) * (h / scale) ** 2,
            u_e / velocity,
            u_n / velocity,
            h,
            scale,
            velocity,
            mean,
            prefactor[index],
            (pressure_stress / scale) ** n,
        ]
    layout = mu if law.profile is None else count
    extra = [] if law.profile is None else list(mu)
    data = np.array(rows + extra + [a[index] for a in args], dtype=np.float64).reshape(
        -1, index.size
    )
    cells = _Cells(data, layout, len(args))
    mu = cells.mu
    # Initial guess: the Newtonian channel of viscosity 1 / (A S^(n-1)), exact for n = 1.
    m_e = cells.u_e - cells.g_e * mu[1]
    m_n = cells.u_n - cells.g_n * mu[1]
    return cells, index, m_e, m_n


def warn_failures(converged: np.ndarray, solved: int, max_iterations: int) -> None:
    failed = solved - int(np.count_nonzero(converged))
    if failed:
        warnings.warn(
            f"power-law channel: {failed} of {solved} cells did not converge in {max_iterations} "
            "iterations; their values are the last iterate (see the converged field)",
            RuntimeWarning,
            stacklevel=3,
        )
