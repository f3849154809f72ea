"""Channel cells of depth-varying and power-law rheology.

Two kernels extend the Newtonian channel of :mod:`crustflow.channel`:

- a Newtonian channel whose viscosity varies with height (temperature across the channel): the
  fluidity moments ``I_k = integral_0^h zeta^k / eta dzeta`` by Gauss-Legendre quadrature or in
  closed form for an exponential fluidity, then :func:`crustflow.channel.flux_from_moments`;
- a power-law channel ``du/dzeta = A(zeta) |tau|^(n-1) tau`` solved per cell for the two
  components of ``tau(0)`` by a vectorised, safeguarded Newton method.

The flow laws, temperatures and geotherm that feed them are in :mod:`crustflow.flowlaws` and are
re-exported here. Everything is a pure function of SI NumPy arrays that never modifies its inputs
(a dask array is computed on entry); work is vectorised over cells (Python loops run only over
quadrature nodes, polynomial terms, iterations and blocks of cells).

Conventions
-----------
- ``zeta``: height above the fixed lower wall (m), 0 to ``h``; the upper wall moves with
  ``U = (U_e, U_n)`` (m/s) relative to it. ``G = (G_e, G_n)``: driving pressure gradient (Pa/m).
- Force balance ``d tau / d zeta = G``, so ``tau(zeta) = tau(0) + G zeta`` (Pa, vector).
- ``gamma_dot = du/dzeta`` (s^-1, engineering shear strain rate) and ``eta = tau / gamma_dot``.
- Drag on the upper wall ``-tau(h)``, on the lower wall ``+tau(0)`` (as in ``channel``).

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
from dataclasses import dataclass, fields
from functools import lru_cache
from math import factorial

import numpy as np

from crustflow.channel import BACKFLOW_RTOL, ChannelSolution
from crustflow.errors import CrustflowInputError
from crustflow.flowlaws import (
    FLOW_LAWS,
    GAS_CONSTANT,
    MAX_TEMPERATURE,
    FlowLaw,
    arrhenius_viscosity,
    axial_to_shear_factor,
    effective_viscosity,
    flow_law,
    linear_temperature_prefactor,
    newtonian_flow_law,
    simple_shear_prefactor,
    steady_geotherm,
    temperature_profile,
)

__all__ = [
    "FLOW_LAWS",
    "GAS_CONSTANT",
    "MAX_TEMPERATURE",
    "FlowLaw",
    "PowerLawSolution",
    "arrhenius_fluidity_moments",
    "arrhenius_viscosity",
    "axial_to_shear_factor",
    "effective_viscosity",
    "exponential_fluidity_moments",
    "flow_law",
    "flow_law_channel",
    "fluidity_moments_gauss",
    "linear_temperature_prefactor",
    "newtonian_flow_law",
    "power_law_channel",
    "power_law_profile",
    "simple_shear_prefactor",
    "steady_geotherm",
    "temperature_profile",
]

#: Default Gauss-Legendre order (nodes) for smooth integrands (numerical choice): error below
#: 1e-16 of I_0 for an exponential fluidity with a contrast up to 1e6 across the channel.
GAUSS_ORDER = 16
#: Relative tolerance of the upper-wall condition, ``|u(h) - U| <= SOLVER_RTOL (|U| + V_p)``.
SOLVER_RTOL = 1e-9
#: Newton iterations allowed per cell (numerical choice; 3-7 are typical).
MAX_ITERATIONS = 50
#: Step halvings of the backtracking line search, and its sufficient-decrease constant ([3]_).
LINE_SEARCH_HALVINGS = 30
ARMIJO_CONSTANT = 1e-4
#: Heights sampled for the peak speed, and Newton refinements of the best sample.
PEAK_SAMPLES = 8
PEAK_NEWTON_STEPS = 4
#: Largest odd integer exponent solved with exact polynomial integrals.
LARGEST_POLYNOMIAL_EXPONENT = 15
#: Cells per block (numerical choice): temporaries of 120 KiB stay in cache and below glibc's 128 KiB
#: mmap threshold, so they are not mapped and unmapped for every operation.
BLOCK_CELLS = 15360
#: Cells per block where quadrature makes (nodes, cells) temporaries (numerical choice, measured).
QUADRATURE_BLOCK_CELLS = 4096


@lru_cache(maxsize=32)
def _gauss(order: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on [-1, 1] (read-only arrays)."""
    x, w = np.polynomial.legendre.leggauss(order)
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


def _norm(x, y):
    """``sqrt(x^2 + y^2)``: np.hypot is an order of magnitude slower; the values here are scaled."""
    return np.sqrt(x * x + y * y)


# --------------------------------------------------------------------------------------------------
# Newtonian channel with viscosity varying across it
# --------------------------------------------------------------------------------------------------


def fluidity_moments_gauss(
    viscosity_function: Callable[[np.ndarray], np.ndarray],
    thickness: np.ndarray | float,
    *,
    order: int = GAUSS_ORDER,
    return_error: bool = False,
) -> tuple[np.ndarray, ...]:
    """Fluidity moments ``I_k = integral_0^h zeta^k / eta(zeta) dzeta`` by Gauss-Legendre.

    Parameters
    ----------
    viscosity_function : callable
        ``eta(zeta)`` in Pa s, called once per node with ``zeta`` (m) an array of the shape of
        ``thickness``; it may broadcast to a larger shape of cells (e.g. through per-cell
        temperatures it closes over).
    thickness : array_like
        Channel thickness ``h`` (m), positive.
    order : int, optional
        Number of nodes (default :data:`GAUSS_ORDER`).
    return_error : bool, optional
        Also return an a-posteriori relative error estimate (costs ``order // 2`` more calls).

    Returns
    -------
    I0, I1, I2 : numpy.ndarray
        In m/(Pa s), m^2/(Pa s), m^3/(Pa s); pass them to
        :func:`crustflow.channel.flux_from_moments`.
    error : numpy.ndarray, optional
        ``max_k |I_k(order) - I_k(order // 2)| / |I_k(order)|``: the error of the lower order, an
        upper estimate (pessimistic) of the error of the returned values.

    Raises
    ------
    CrustflowInputError
        If ``order`` is below 2.

    Notes
    -----
    The ``N``-node rule on ``[0, h]`` errs by ([2]_, eq. 25.4.30, from memory)

    .. math:: E_N = \\frac{h^{2N+1} (N!)^4}{(2N+1) [(2N)!]^3} f^{(2N)}(\\xi)

    For ``1/eta = f0 exp(zeta/L)`` and a viscosity contrast ``C = exp(h/|L|)`` this bounds the
    relative error of ``I0`` by ``c_N (ln C)^(2N+1) C / (C - 1)``, ``c_N = (N!)^4 / ((2N+1)
    ((2N)!)^3)``: with ``N = 16``, 1.4e-17 at ``C = 1e6`` and 9e-12 at ``C = 1e9`` (value derived;
    I1 and I2 alike). An Arrhenius law with a linear temperature is close to exponential.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    .. [2] Abramowitz, M. & Stegun, I. A. (1964). *Handbook of Mathematical Functions*, NBS
       Applied Mathematics Series 55, eq. 25.4.30.
    """
    if int(order) < 2:
        raise CrustflowInputError(f"order must be at least 2 Gauss nodes, got {order}")
    h = np.asarray(thickness, dtype=np.float64)

    def moments(nodes: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        x, w = _gauss(nodes)
        i0 = i1 = i2 = 0.0
        for xi, wi in zip(x, w, strict=True):
            zeta = 0.5 * h * (xi + 1.0)
            weighted = (0.5 * wi) * h / np.asarray(viscosity_function(zeta))
            i0 = i0 + weighted
            i1 = i1 + weighted * zeta
            i2 = i2 + weighted * zeta * zeta
        return i0, i1, i2

    result = moments(int(order))
    if not return_error:
        return result
    coarse = moments(max(int(order) // 2, 1))
    with np.errstate(divide="ignore", invalid="ignore"):
        errors = [np.abs(a - b) / np.abs(a) for a, b in zip(result, coarse, strict=True)]
    return (*result, np.maximum.reduce(errors))


def _phi(k: int, x: np.ndarray) -> np.ndarray:
    """``integral_0^1 s^k exp(x s) ds`` for k = 0, 1, 2, without cancellation."""
    small = np.abs(x) < 2.0
    xs = np.where(small, x, 0.0)
    series = np.zeros_like(x)
    term = np.ones_like(x)
    for j in range(31):  # |x| < 2: the last term is below 1e-24 of the sum
        series = series + term / (j + k + 1)
        term = term * xs / (j + 1)
    xl = np.where(small, 1.0, x)
    ex = np.exp(xl)
    if k == 0:
        closed = np.expm1(xl) / xl
    elif k == 1:
        closed = (ex * (xl - 1.0) + 1.0) / xl**2
    else:
        closed = (ex * (xl * xl - 2.0 * xl + 2.0) - 2.0) / xl**3
    return np.where(small, series, closed)


def exponential_fluidity_moments(
    thickness: np.ndarray | float,
    lower_wall_viscosity: np.ndarray | float,
    length_scale: np.ndarray | float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact fluidity moments of ``1/eta = (1/eta_0) exp(zeta / L)``.

    Parameters
    ----------
    thickness : array_like
        Channel thickness ``h`` (m), positive.
    lower_wall_viscosity : array_like
        ``eta_0 = eta(0)`` (Pa s), positive.
    length_scale : array_like
        ``L`` (m), any sign: positive where the fluidity grows upwards (hotter top), negative
        where it falls (hotter base), infinite for a uniform viscosity. From the wall
        viscosities: ``L = h / ln(eta(0) / eta(h))``.

    Returns
    -------
    I0, I1, I2 : numpy.ndarray
        ``integral_0^h zeta^k / eta dzeta`` in m^(k+1)/(Pa s).

    Notes
    -----
    With ``x = h / L`` and ``phi_k(x) = integral_0^1 s^k e^(x s) ds`` (value derived):

    .. math::

        I_k = h^{k+1} \\phi_k(x) / \\eta_0, \\quad \\phi_0 = (e^x - 1)/x, \\quad
        \\phi_1 = (e^x (x - 1) + 1)/x^2, \\quad \\phi_2 = (e^x (x^2 - 2x + 2) - 2)/x^3

    For ``|x| < 2`` the Taylor series ``phi_k = sum_j x^j / (j! (j + k + 1))`` replaces the
    closed forms, which cancel there; ``x = 0`` gives the uniform ``h^(k+1) / ((k+1) eta_0)``.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    """
    h = np.asarray(thickness, dtype=np.float64)
    fluidity = 1.0 / np.asarray(lower_wall_viscosity, dtype=np.float64)
    with np.errstate(divide="ignore"):
        x = h / np.asarray(length_scale, dtype=np.float64)
    x = np.asarray(x, dtype=np.float64)
    return tuple(fluidity * h ** (k + 1) * _phi(k, x) for k in range(3))


def arrhenius_fluidity_moments(
    law: FlowLaw,
    thickness: np.ndarray | float,
    top_K: np.ndarray | float,
    base_K: np.ndarray | float,
    *,
    order: int = GAUSS_ORDER,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fluidity moments of a Newtonian flow law at a temperature linear across the channel.

    Parameters
    ----------
    law : FlowLaw
        A law with ``stress_exponent == 1`` (e.g. from :func:`newtonian_flow_law`).
    thickness : array_like
        Channel thickness ``h`` (m).
    top_K, base_K : array_like
        Temperatures at the upper and lower wall (K).
    order : int, optional
        Gauss-Legendre nodes (default :data:`GAUSS_ORDER`).

    Returns
    -------
    I0, I1, I2 : numpy.ndarray
        As :func:`fluidity_moments_gauss`.

    Notes
    -----
    ``eta(zeta) = 1 / A(T(zeta))`` with ``T`` from :func:`temperature_profile`, at zero pressure
    (no activation-volume term); see :func:`fluidity_moments_gauss` for the accuracy.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., sections 4-8 and 6.2.
    """
    if law.stress_exponent != 1.0:
        arrhenius_viscosity(law, 1000.0)  # raises the error that names the law
    factor = axial_to_shear_factor(1.0) * law.axial_prefactor_si
    scaled_energy = -law.activation_energy / GAS_CONSTANT

    def viscosity(zeta):
        temperature = temperature_profile(zeta, thickness, top_K, base_K)
        return 1.0 / (factor * np.exp(scaled_energy / temperature))

    return fluidity_moments_gauss(viscosity, thickness, order=order)


# --------------------------------------------------------------------------------------------------
# Power-law channel: result type
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PowerLawSolution(ChannelSolution):
    """A :class:`crustflow.channel.ChannelSolution` of a power-law channel, with solver output.

    Attributes
    ----------
    effective_viscosity : numpy.ndarray
        Harmonic depth average of the local viscosity ``tau / gamma_dot`` (Pa s):
        ``h / integral_0^h A |tau|^(n-1) dzeta``, the uniform viscosity with the same zeroth
        fluidity moment. It is ``1/A`` for n = 1 with a uniform ``A``, ``|tau| / gamma_dot`` for a
        purely wall-driven channel with a uniform ``A``, and infinite for a channel at rest
        with n > 1.
    converged : numpy.ndarray
        Boolean: the upper-wall condition holds to :data:`SOLVER_RTOL`. False where an input is
        NaN (nothing solved) and where the solver failed (values are then the last iterate).
    iterations : numpy.ndarray
        Newton iterations used (int32).
    wall_velocity_residual : numpy.ndarray
        ``|u(h) - U|`` of the returned solution (m/s).

    Notes
    -----
    The other fields are those of ``ChannelSolution``; for a power-law channel the
    ``wall_driven_share`` takes ``q_wall`` as the flux of the same channel without drive (``U h / 2``
    for a uniform prefactor) and ``q_pressure = q - q_wall``, which is the Newtonian definition
    when n = 1 ([1]_).

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    """

    effective_viscosity: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray
    wall_velocity_residual: np.ndarray


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


def _abs_power(t2: np.ndarray, n: float) -> np.ndarray:
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


def _shape_factor(cells: _Cells, law: _Law, sigma):
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
    x, w = _gauss(nodes or law.nodes)
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
        f = _abs_power(t2, law.n)
        if law.profile is not None:
            f = f * _shape_factor(cells, law, s)
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


def _newton(cells: _Cells, law: _Law, m_e, m_n, max_iterations: int):
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


def _poly_coefficients(cells: _Cells, law: _Law, m_e, m_n):
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


def _velocity(cells: _Cells, law: _Law, m_e, m_n, sigma, coefficients=None):
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
            u_e, u_n = _velocity(cells, law, m_e, m_n, s, coefficients)
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
        slope = _shape_factor(cells, law, s) * _abs_power(t2, law.n) * t2
        slope = slope + v_e * cells.g_e + v_n * cells.g_n
        # Step only where the slope is negative (towards a maximum), within the bracket.
        slope = np.minimum(slope, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            move = phi / slope
        s = np.minimum(np.maximum(s - np.where(slope < 0.0, move, 0.0), lo), hi)
        if coefficients is not None:
            v_e, v_n = _velocity(cells, law, m_e, m_n, s, coefficients)
        else:
            part = _quad(cells, law, m_e, m_n, anchor, s, nodes=short)
            v_e, v_n = anchor_e + part[0], anchor_n + part[1]
    # Candidates: lower wall (speed 0), best sample, refined point, least |tau|, upper wall.
    star = _minimum_point(cells, m_e, m_n, -0.5, 0.5)
    candidates = [
        (np.sqrt(best2), anchor),
        (_norm(v_e, v_n), s),
        (_norm(*_velocity(cells, law, m_e, m_n, star, coefficients)), star),
        (_norm(cells.u_e, cells.u_n), 0.5),
    ]
    best, best_s = np.zeros(size), np.full(size, -0.5)
    for speed, height in candidates:
        better = speed > best
        best = np.where(better, speed, best)
        best_s = np.where(better, height, best_s)
    return best, best_s


def _outputs(cells: _Cells, law: _Law, m_e, m_n) -> dict[str, np.ndarray]:
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
            coefficients = _poly_coefficients(cells, law, m_e, m_n)
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
        v_e, v_n = _velocity(
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


def _law_config(stress_exponent, prefactor_profile, quadrature_nodes) -> _Law:
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


def _flatten(named: dict, args: tuple):
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


def _setup(law: _Law, flat: dict, args: tuple):
    """Scaled cells of the valid (finite) entries, their indices and the initial guess."""
    h, prefactor = flat["thickness"], flat["prefactor"]
    count = 2 * law.p + 3 if law.p is not None else 2  # moments mu_0 .. mu_{n+1} or mu_0, mu_1
    with np.errstate(all="ignore"):
        if law.profile is None:
            mean = prefactor
        else:
            x, w = _gauss(max(law.nodes, GAUSS_ORDER))
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


def _warn_failures(converged: np.ndarray, solved: int, max_iterations: int) -> None:
    failed = solved - int(np.count_nonzero(converged))
    if failed:
        warnings.warn(
            f"power-law channel: {failed} of {solved} cells did not converge in {max_iterations} "
            "iterations; their values are the last iterate (see the converged field)",
            RuntimeWarning,
            stacklevel=3,
        )


# --------------------------------------------------------------------------------------------------
# Power-law channel: public functions
# --------------------------------------------------------------------------------------------------


def power_law_channel(
    drive_east: np.ndarray | float,
    drive_north: np.ndarray | float,
    thickness: np.ndarray | float,
    prefactor: np.ndarray | float,
    stress_exponent: float,
    *,
    wall_east: np.ndarray | float = 0.0,
    wall_north: np.ndarray | float = 0.0,
    prefactor_profile: Callable[..., np.ndarray] | None = None,
    profile_args: tuple = (),
    quadrature_nodes: int | None = None,
    max_iterations: int = MAX_ITERATIONS,
) -> PowerLawSolution:
    """Flow of a power-law channel ``du/dzeta = A |tau|^(n-1) tau``, solved cell by cell.

    Parameters
    ----------
    drive_east, drive_north : array_like
        Driving pressure gradient ``G`` (Pa/m); pressure-driven flow goes down it.
    thickness : array_like
        Channel thickness ``h`` (m), positive.
    prefactor : array_like
        Simple-shear prefactor ``A`` (Pa^-n s^-1), positive (see
        :func:`crustflow.flowlaws.simple_shear_prefactor`). With ``prefactor_profile`` it
        multiplies the profile.
    stress_exponent : float
        ``n >= 1``, one value for all cells.
    wall_east, wall_north : array_like, optional
        Upper-wall velocity ``U`` relative to the lower wall (m/s); default 0.
    prefactor_profile : callable, optional
        ``f(zeta, *profile_args)`` with ``A(zeta) = prefactor * f(...)``, for a prefactor varying
        across the channel (temperature). ``zeta`` (m) arrives with shape ``(nodes, cells)`` or
        ``(cells,)`` and each of ``profile_args`` flattened to ``(cells,)`` for the same cells,
        so ``f`` must work elementwise. See :func:`crustflow.flowlaws.linear_temperature_prefactor`.
    profile_args : tuple of array_like, optional
        Per-cell arrays passed to ``prefactor_profile``, broadcast with the other inputs.
    quadrature_nodes : int, optional
        Gauss-Legendre nodes per piece where quadrature is used (Notes); default 16 (n >= 3 or
        odd integer n), 24 (2 <= n < 3) or 32 (n < 2).
    max_iterations : int, optional
        Newton iterations allowed (default :data:`MAX_ITERATIONS`).

    Returns
    -------
    PowerLawSolution
        Fields of :class:`crustflow.channel.ChannelSolution` (same meanings and SI units) plus
        ``effective_viscosity``, ``converged``, ``iterations``, ``wall_velocity_residual``; each
        of the broadcast shape. NaN (``backflow`` and ``converged`` False) where an input is NaN.

    Raises
    ------
    CrustflowInputError
        If ``n < 1``, thickness or prefactor is not positive, or inputs do not broadcast.

    Warns
    -----
    RuntimeWarning
        If some cells did not converge (listed by ``converged``; never hidden).

    Notes
    -----
    *Equations.* ``tau(zeta) = tau0 + G zeta``; ``u(0) = 0``; the two components of ``tau0``
    solve ``u(h) = integral_0^h A |tau|^(n-1) tau dzeta = U``, the gradient of the strictly convex
    ``integral A |tau|^(n+1) / (n+1) - U.tau0``: one solution, and a symmetric positive-definite
    Jacobian ``integral A |tau|^(n-1) (I + (n-1) tau tau^T / |tau|^2)``. The flux is
    ``q = integral_0^h (h - zeta) du/dzeta dzeta`` (integration by parts). Between fixed walls,
    ``q = -2 A |G|^(n-1) G (h/2)^(n+2) / (n+2)`` and ``|tau0| = |G| h / 2`` ([1]_; SCIENCE.md).

    *Scaling and start.* With ``s_p = |G| h / 2``, ``s_c = (|U| / (A_m h))^(1/n)`` (``A_m`` the
    mean of ``A`` over the height) and ``S = (s_c^n + s_p^n)^(1/n)``, the first guess is the
    Newtonian channel of viscosity ``1 / (A_m S^(n-1))``, which is exact for pure Couette,
    pure Poiseuille (uniform ``A``) and n = 1 flow.

    *Solver.* Newton with the analytic Jacobian and a backtracking (Armijo) line search on
    ``|u(h) - U|^2`` ([3]_), on the unconverged cells only; converged when
    ``|u(h) - U| <= 1e-9 (|U| + V_p)``, ``V_p = A_m h s_p^n``. Typically 0-6 iterations.

    *Integrals.* Odd integer n (1, 3, 5, ... 15): ``|tau|^(n-1)`` is a polynomial in height and
    the integrals are exact sums over the moments ``integral a(s) s^j ds`` (closed form for a
    uniform prefactor; 16-node Gauss-Legendre of the smooth profile otherwise). Other n: Gauss-
    Legendre on two pieces split at the height of least ``|tau|`` (where ``tau`` crosses zero
    when drive and wall motion are parallel, e.g. fixed walls): each piece is then smooth apart
    from an end point (``|x|^n`` in the parallel case). Measured worst error of the integrals,
    relative to ``integral |tau|^n``, over parallel and near-parallel cases (least ``|tau|``
    from 0 to the drive's scale) against ``scipy.integrate.quad``: 6e-9 (n = 1.5, 32 nodes),
    4e-10 (n = 2.3, 24), 5e-11 (n = 3.1, 16), 2e-11 (n = 4, 16), 7e-13 (n = 4.7, 16).

    *Peak speed.* ``|u|`` at the walls, at 7 interior heights, at the height of least ``|tau|``
    (the peak itself in the parallel case) and after 4 Newton steps on ``u . tau = 0`` from the
    best interior sample, bracketed to one sample spacing: never more than the true peak, and
    exact to rounding where the peak is a smooth maximum within the bracket (its height only to
    about 1e-8 of ``h``: the top is flat). *Backflow*: ``d(u . q)/dzeta`` has the sign of
    ``tau . q``, linear in height, so ``u . q`` has one interior extremum and the test is exact;
    tolerances as :func:`crustflow.channel.channel_flow`.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2 and
       chapter 7 (power-law fluids; from memory).
    .. [2] Abramowitz, M. & Stegun, I. A. (1964). *Handbook of Mathematical Functions*, NBS
       Applied Mathematics Series 55, eq. 25.4.30 (Gauss-Legendre; from memory).
    .. [3] Dennis, J. E. & Schnabel, R. B. (1996). *Numerical Methods for Unconstrained
       Optimization and Nonlinear Equations*, SIAM, section 6.3 (from memory).
    """
    law = _law_config(stress_exponent, prefactor_profile, quadrature_nodes)
    shape, flat, args = _flatten(
        dict(
            drive_east=drive_east,
            drive_north=drive_north,
            thickness=thickness,
            prefactor=prefactor,
            wall_east=wall_east,
            wall_north=wall_north,
        ),
        tuple(profile_args),
    )
    size = flat["thickness"].size
    out = {f.name: np.full(size, np.nan) for f in fields(PowerLawSolution)}
    out["backflow"] = np.zeros(size, dtype=bool)
    out["converged"] = np.zeros(size, dtype=bool)
    out["iterations"] = np.zeros(size, dtype=np.int32)
    solved = 0
    exact = law.p is not None and law.profile is None
    step = BLOCK_CELLS if exact else QUADRATURE_BLOCK_CELLS
    for start in range(0, size, step):
        part = slice(start, start + step)
        block = {k: v[part] for k, v in flat.items()}
        cells, index, m_e, m_n = _setup(law, block, tuple(a[part] for a in args))
        if index.size == 0:
            continue
        m_e, m_n, converged, iterations, residual = _newton(cells, law, m_e, m_n, max_iterations)
        where = start + index
        for name, value in _outputs(cells, law, m_e, m_n).items():
            out[name][where] = value
        out["converged"][where] = converged
        out["iterations"][where] = iterations
        out["wall_velocity_residual"][where] = residual * cells.velocity
        solved += index.size
    _warn_failures(out["converged"], solved, max_iterations)
    return PowerLawSolution(**{k: v.reshape(shape) for k, v in out.items()})


def power_law_profile(
    zeta: np.ndarray | float,
    drive_east: np.ndarray | float,
    drive_north: np.ndarray | float,
    thickness: np.ndarray | float,
    prefactor: np.ndarray | float,
    stress_exponent: float,
    *,
    wall_east: np.ndarray | float = 0.0,
    wall_north: np.ndarray | float = 0.0,
    prefactor_profile: Callable[..., np.ndarray] | None = None,
    profile_args: tuple = (),
    quadrature_nodes: int | None = None,
    max_iterations: int = MAX_ITERATIONS,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Velocity, shear stress and viscosity at heights ``zeta`` in power-law channel cells.

    Parameters
    ----------
    zeta : array_like
        Heights above the lower wall (m), 0 to ``h``; broadcast against the cells as in
        :func:`crustflow.channel.velocity_profile` (e.g. ``(nz,)`` for one cell, ``(nz, 1, 1)``
        against maps of shape ``(ny, nx)``).
    drive_east, drive_north, thickness, prefactor, stress_exponent
        As :func:`power_law_channel`.
    wall_east, wall_north, prefactor_profile, profile_args, quadrature_nodes, max_iterations
        As :func:`power_law_channel`.

    Returns
    -------
    u_east, u_north : numpy.ndarray
        Velocity relative to the lower wall (m/s).
    tau_east, tau_north : numpy.ndarray
        Shear stress ``tau0 + G zeta`` (Pa).
    viscosity : numpy.ndarray
        Local viscosity ``tau / gamma_dot = 1 / (A(zeta) |tau|^(n-1))`` (Pa s); infinite where
        ``tau = 0`` and n > 1.

    Raises
    ------
    CrustflowInputError
        As :func:`power_law_channel`.

    Warns
    -----
    RuntimeWarning
        If some cells did not converge.

    Notes
    -----
    The cells are solved as in :func:`power_law_channel`; ``u(zeta) = integral_0^zeta A |tau|^(n-1)
    tau``, exact (polynomial) for odd integer n and a uniform prefactor, else by the split
    Gauss-Legendre rule described there.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2.
    """
    law = _law_config(stress_exponent, prefactor_profile, quadrature_nodes)
    named = dict(
        drive_east=drive_east,
        drive_north=drive_north,
        thickness=thickness,
        prefactor=prefactor,
        wall_east=wall_east,
        wall_north=wall_north,
    )
    shape, flat, args = _flatten(named, tuple(profile_args))
    cells, index, m_e, m_n = _setup(law, flat, args)
    m_e, m_n, converged, _, _ = _newton(cells, law, m_e, m_n, max_iterations)
    _warn_failures(converged, index.size, max_iterations)
    z = np.asarray(zeta, dtype=np.float64)
    full = np.broadcast_shapes(z.shape, shape)
    size = int(np.prod(full, dtype=np.int64))
    cell_of = np.broadcast_to(np.arange(flat["thickness"].size).reshape(shape), full).ravel()
    position = np.full(flat["thickness"].size, -1)
    position[index] = np.arange(index.size)
    pos = position[cell_of]
    ok = np.flatnonzero(pos >= 0)
    pos = pos[ok]
    part, me, mn = cells.take(pos), m_e[pos], m_n[pos]
    sigma = np.broadcast_to(z, full).ravel()[ok] / part.h - 0.5
    exact = law.p is not None and law.profile is None
    coefficients = _poly_coefficients(part, law, me, mn) if exact else None
    v_e, v_n = _velocity(part, law, me, mn, sigma, coefficients)
    t_e, t_n = me + part.g_e * sigma, mn + part.g_n * sigma
    fluidity = _shape_factor(part, law, sigma) * _abs_power(t_e * t_e + t_n * t_n, law.n)
    results = [np.full(size, np.nan) for _ in range(5)]
    with np.errstate(divide="ignore"):
        values = (
            part.velocity * v_e,
            part.velocity * v_n,
            part.scale * t_e,
            part.scale * t_n,
            1.0 / (part.mean_prefactor * part.scale ** (law.n - 1.0) * fluidity),
        )
    for result, value in zip(results, values, strict=True):
        result[ok] = value
    return tuple(r.reshape(full) for r in results)


def flow_law_channel(
    drive_east: np.ndarray | float,
    drive_north: np.ndarray | float,
    thickness: np.ndarray | float,
    law: FlowLaw,
    top_K: np.ndarray | float,
    base_K: np.ndarray | float | None = None,
    *,
    wall_east: np.ndarray | float = 0.0,
    wall_north: np.ndarray | float = 0.0,
    max_iterations: int = MAX_ITERATIONS,
) -> PowerLawSolution:
    """Channel of a laboratory flow law at a uniform or linearly varying temperature.

    Parameters
    ----------
    drive_east, drive_north, thickness
        As :func:`power_law_channel` (Pa/m, Pa/m, m).
    law : FlowLaw
        The flow law (e.g. ``flow_law("wet-quartzite")``).
    top_K : array_like
        Temperature at the upper wall (K); the whole channel's if ``base_K`` is None.
    base_K : array_like, optional
        Temperature at the lower wall (K); linear in between.
    wall_east, wall_north, max_iterations
        As :func:`power_law_channel`.

    Returns
    -------
    PowerLawSolution
        As :func:`power_law_channel`.

    Raises
    ------
    CrustflowInputError
        If a temperature is out of range, or as :func:`power_law_channel`.

    Notes
    -----
    ``A(zeta) = 3^((n+1)/2) A_ax exp(-Q / (R T(zeta)))`` (:func:`simple_shear_prefactor`) with
    ``T`` from :func:`temperature_profile`; a Newtonian law (n = 1) takes the same exact path.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., sections 4-8 and 6.2.
    """
    common = dict(wall_east=wall_east, wall_north=wall_north, max_iterations=max_iterations)
    n = law.stress_exponent
    if base_K is None:
        prefactor = simple_shear_prefactor(law, top_K)
        return power_law_channel(drive_east, drive_north, thickness, prefactor, n, **common)
    temperature_profile(0.0, 1.0, top_K, base_K)  # checks both temperatures up front
    return power_law_channel(
        drive_east,
        drive_north,
        thickness,
        1.0,
        n,
        prefactor_profile=linear_temperature_prefactor(law),
        profile_args=(thickness, top_K, base_K),
        **common,
    )
