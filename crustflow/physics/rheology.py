"""Channel cells of depth-varying and power-law rheology.

Two kernels extend the Newtonian channel of :mod:`crustflow.physics.channel`:

- a Newtonian channel whose viscosity varies with height (temperature across the channel): the
  fluidity moments ``I_k = integral_0^h zeta^k / eta dzeta`` by Gauss-Legendre quadrature or in
  closed form for an exponential fluidity, then :func:`crustflow.physics.channel.flux_from_moments`;
- a power-law channel ``du/dzeta = A(zeta) |tau|^(n-1) tau`` solved per cell for the two
  components of ``tau(0)`` by a vectorised, safeguarded Newton method.

The flow laws, temperatures and geotherm that feed them are in :mod:`crustflow.physics.flowlaws` and are
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

from collections.abc import Callable
from dataclasses import dataclass, fields

import numpy as np

from crustflow.physics.channel import ChannelSolution
from crustflow.physics.flowlaws import (
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
from crustflow.physics.fluidity import GAUSS_ORDER as GAUSS_ORDER
from crustflow.physics.fluidity import (
    arrhenius_fluidity_moments,
    exponential_fluidity_moments,
    fluidity_moments_gauss,
)
from crustflow.physics.powerlaw_solver import ARMIJO_CONSTANT as ARMIJO_CONSTANT
from crustflow.physics.powerlaw_solver import (
    LARGEST_POLYNOMIAL_EXPONENT as LARGEST_POLYNOMIAL_EXPONENT,
)
from crustflow.physics.powerlaw_solver import LINE_SEARCH_HALVINGS as LINE_SEARCH_HALVINGS
from crustflow.physics.powerlaw_solver import PEAK_NEWTON_STEPS as PEAK_NEWTON_STEPS
from crustflow.physics.powerlaw_solver import PEAK_SAMPLES as PEAK_SAMPLES
from crustflow.physics.powerlaw_solver import SOLVER_RTOL as SOLVER_RTOL
from crustflow.physics.powerlaw_solver import (
    abs_power,
    flatten_cells,
    law_config,
    poly_coefficients,
    scaled_velocity,
    setup_cells,
    shape_factor,
    solution_fields,
    solve_newton,
    warn_failures,
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

# The fluidity moments are in crustflow.physics.fluidity and the internals of the power-law solver
# in crustflow.physics.powerlaw_solver; the constants imported above as ``X as X`` were defined here before
# the split and stay importable from here.

#: Newton iterations allowed per cell (numerical choice; 3-7 are typical).
MAX_ITERATIONS = 50
#: Cells per block (numerical choice): temporaries of 120 KiB stay in cache and below glibc's 128 KiB
#: mmap threshold, so they are not mapped and unmapped for every operation.
BLOCK_CELLS = 15360
#: Cells per block where quadrature makes (nodes, cells) temporaries (numerical choice, measured).
QUADRATURE_BLOCK_CELLS = 4096


# --------------------------------------------------------------------------------------------------
# Power-law channel: result type
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PowerLawSolution(ChannelSolution):
    """A :class:`crustflow.physics.channel.ChannelSolution` of a power-law channel, with solver output.

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
        :func:`crustflow.physics.flowlaws.simple_shear_prefactor`). With ``prefactor_profile`` it
        multiplies the profile.
    stress_exponent : float
        ``n >= 1``, one value for all cells.
    wall_east, wall_north : array_like, optional
        Upper-wall velocity ``U`` relative to the lower wall (m/s); default 0.
    prefactor_profile : callable, optional
        ``f(zeta, *profile_args)`` with ``A(zeta) = prefactor * f(...)``, for a prefactor varying
        across the channel (temperature). ``zeta`` (m) arrives with shape ``(nodes, cells)`` or
        ``(cells,)`` and each of ``profile_args`` flattened to ``(cells,)`` for the same cells,
        so ``f`` must work elementwise. See :func:`crustflow.physics.flowlaws.linear_temperature_prefactor`.
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
        Fields of :class:`crustflow.physics.channel.ChannelSolution` (same meanings and SI units) plus
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
    tolerances as :func:`crustflow.physics.channel.channel_flow`.

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 6.2 and
       chapter 7 (power-law fluids; from memory).
    .. [2] Abramowitz, M. & Stegun, I. A. (1964). *Handbook of Mathematical Functions*, NBS
       Applied Mathematics Series 55, eq. 25.4.30 (Gauss-Legendre; from memory).
    .. [3] Dennis, J. E. & Schnabel, R. B. (1996). *Numerical Methods for Unconstrained
       Optimization and Nonlinear Equations*, SIAM, section 6.3 (from memory).
    """
    law = law_config(stress_exponent, prefactor_profile, quadrature_nodes)
    shape, flat, args = flatten_cells(
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
        cells, index, m_e, m_n = setup_cells(law, block, tuple(a[part] for a in args))
        if index.size == 0:
            continue
        m_e, m_n, converged, iterations, residual = solve_newton(
            cells, law, m_e, m_n, max_iterations
        )
        where = start + index
        for name, value in solution_fields(cells, law, m_e, m_n).items():
            out[name][where] = value
        out["converged"][where] = converged
        out["iterations"][where] = iterations
        out["wall_velocity_residual"][where] = residual * cells.velocity
        solved += index.size
    warn_failures(out["converged"], solved, max_iterations)
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
        :func:`crustflow.physics.channel.velocity_profile` (e.g. ``(nz,)`` for one cell, ``(nz, 1, 1)``
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
    law = law_config(stress_exponent, prefactor_profile, quadrature_nodes)
    named = dict(
        drive_east=drive_east,
        drive_north=drive_north,
        thickness=thickness,
        prefactor=prefactor,
        wall_east=wall_east,
        wall_north=wall_north,
    )
    shape, flat, args = flatten_cells(named, tuple(profile_args))
    cells, index, m_e, m_n = setup_cells(law, flat, args)
    m_e, m_n, converged, _, _ = solve_newton(cells, law, m_e, m_n, max_iterations)
    warn_failures(converged, index.size, max_iterations)
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
    coefficients = poly_coefficients(part, law, me, mn) if exact else None
    v_e, v_n = scaled_velocity(part, law, me, mn, sigma, coefficients)
    t_e, t_n = me + part.g_e * sigma, mn + part.g_n * sigma
    fluidity = shape_factor(part, law, sigma) * abs_power(t_e * t_e + t_n * t_n, law.n)
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
