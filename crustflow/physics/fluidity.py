"""Fluidity moments of a Newtonian channel whose viscosity varies with height.

The depth-varying kernel of :mod:`crustflow.physics.rheology`, which re-exports the public functions here;
import them from there. The moments ``I_k = integral_0^h zeta^k / eta dzeta`` come from
Gauss-Legendre quadrature or, for an exponential fluidity, in closed form, and feed
:func:`crustflow.physics.channel.flux_from_moments`. Conventions as in :mod:`crustflow.physics.rheology`.

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   section 6.2.
.. [2] Abramowitz, M. & Stegun, I. A. (1964). *Handbook of Mathematical Functions*, NBS Applied
   Mathematics Series 55, eq. 25.4.30 (Gauss-Legendre error term; equation number from memory).
"""

from __future__ import annotations

from collections.abc import Callable
from functools import lru_cache

import numpy as np

from crustflow.errors import CrustflowInputError
from crustflow.physics.flowlaws import (
    GAS_CONSTANT,
    FlowLaw,
    arrhenius_viscosity,
    axial_to_shear_factor,
    temperature_profile,
)

#: Default Gauss-Legendre order (nodes) for smooth integrands (numerical choice): error below
#: 1e-16 of I_0 for an exponential fluidity with a contrast up to 1e6 across the channel.
GAUSS_ORDER = 16


@lru_cache(maxsize=32)
def gauss_legendre(order: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on [-1, 1] (read-only arrays)."""
    x, w = np.polynomial.legendre.leggauss(order)
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


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
        :func:`crustflow.physics.channel.flux_from_moments`.
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
        x, w = gauss_legendre(nodes)
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
