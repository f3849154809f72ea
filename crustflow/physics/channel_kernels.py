"""Array kernels behind :mod:`crustflow.physics.channel`: input handling, the mean velocity, the peak
speed and Simpson's rule.

The public functions of :mod:`crustflow.physics.channel` call these; import those, not these. Like them,
each works elementwise with broadcasting on NumPy and dask arrays (results stay lazy), never
modifies its inputs, and checks dtypes and shapes only, never values. Conventions as in
:mod:`crustflow.physics.channel`.

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   section 6.2.
.. [2] Cartwright, K. V. (2017). Simpson's rule cumulative integration with MS Excel and
   irregularly-spaced data. *Journal of Mathematical Sciences and Mathematics Education*
   12(2), 1-9 (from memory).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, TypeAlias

import numpy as np

from crustflow.errors import CrustflowInputError

if TYPE_CHECKING:
    import dask.array as da

#: A numpy or dask array of float64 (channel inputs and outputs keep the array type given).
Array: TypeAlias = "np.ndarray | da.Array"
#: What the channel functions accept: arrays or scalars, broadcast together.
ArrayLike: TypeAlias = "np.ndarray | da.Array | float"


# --------------------------------------------------------------------------------------------------
# Input handling (cheap and array-type agnostic: dtype and shape only, never values)
# --------------------------------------------------------------------------------------------------


def as_float_array(value: ArrayLike, name: str) -> Array:
    """Return ``value`` as a float array without computing or copying dask arrays."""
    if not (hasattr(value, "shape") and hasattr(value, "dtype")):
        try:
            value = np.asarray(value, dtype=np.float64)
        except (TypeError, ValueError):
            raise CrustflowInputError(
                f"{name} must be a number or an array of numbers in SI units, got {value!r}"
            ) from None
    kind = value.dtype.kind
    if kind not in "biuf":
        raise CrustflowInputError(
            f"{name} has dtype {value.dtype}; give real numbers in SI units (float64)"
        )
    if value.dtype != np.float64 and not (kind == "f" and value.dtype.itemsize > 8):
        value = value.astype(np.float64)
    return value


def broadcast_inputs(**named: ArrayLike) -> list[Array]:
    """Convert inputs to float arrays and broadcast them against each other (no copies)."""
    arrays = [as_float_array(value, name) for name, value in named.items()]
    try:
        return list(np.broadcast_arrays(*arrays))
    except ValueError:
        shapes = ", ".join(f"{name} {np.shape(a)}" for name, a in zip(named, arrays, strict=True))
        raise CrustflowInputError(
            f"channel inputs do not broadcast together ({shapes}); give arrays of one shape or "
            "scalars, or add length-1 axes so that they line up"
        ) from None


def unit_ratio(numerator: Array, denominator: Array, fill: float) -> Array:
    """``numerator / denominator`` where it lies in [-1, 1], else ``fill``.

    Divides only where ``|numerator| <= |denominator|`` and the denominator is nonzero, so it never
    divides by zero or overflows (dask evaluates later, outside any ``np.errstate``).
    """
    inside = (np.abs(numerator) <= np.abs(denominator)) & (denominator != 0)
    return np.where(inside, numerator / np.where(inside, denominator, 1.0), fill)


# --------------------------------------------------------------------------------------------------
# Uniform viscosity
# --------------------------------------------------------------------------------------------------


def mean_velocity(drive_e, drive_n, h, eta, wall_e, wall_n):
    """Pressure-driven velocity scale B and the mean velocity, m/s (shared by every flux path)."""
    # Pressure-driven velocity scale B = G h^2 / (2 eta) (m/s): u(s) = A s + B s^2, A = U - B.
    scale = np.square(h) / (2.0 * eta)
    b_e = drive_e * scale
    b_n = drive_n * scale
    # Mean velocity U/2 - h^2 G / (12 eta) = U/2 - B/6.
    mean_e = 0.5 * wall_e - b_e / 6.0
    mean_n = 0.5 * wall_n - b_n / 6.0
    return b_e, b_n, mean_e, mean_n


def peak_speed_kernel(
    a_e: Array, a_n: Array, b_e: Array, b_n: Array, h: Array
) -> tuple[Array, Array]:
    """Largest ``|A s + B s^2|`` over ``0 <= s <= 1`` and the height ``s h`` where it occurs."""
    # Normalise by |A| + |B| so that the squares below stay near 1 whatever the units.
    norm = np.hypot(a_e, a_n) + np.hypot(b_e, b_n)
    safe_norm = np.where(norm > 0, norm, 1.0)
    a_e, a_n, b_e, b_n = a_e / safe_norm, a_n / safe_norm, b_e / safe_norm, b_n / safe_norm

    c2 = 2.0 * (b_e * b_e + b_n * b_n)
    c1 = 3.0 * (a_e * b_e + a_n * b_n)
    c0 = a_e * a_e + a_n * a_n
    root_part = -0.5 * (c1 + np.copysign(np.sqrt(np.maximum(c1 * c1 - 4.0 * c2 * c0, 0.0)), c1))
    # Only roots in [0, 1] matter; others become the lower wall, already a candidate.
    first = np.clip(unit_ratio(root_part, c2, 0.0), 0.0, 1.0)
    second = np.clip(unit_ratio(c0, root_part, 0.0), 0.0, 1.0)

    def speed(s: Array | float) -> Array:
        return np.hypot(a_e * s + b_e * s * s, a_n * s + b_n * s * s)

    # Start from the lower wall: speed(0) is NaN where an input is NaN, and NaN then sticks.
    best = speed(0.0)
    best_s = np.zeros_like(best)
    for candidate in (1.0, first, second):  # four candidates, not a loop over cells
        value = speed(candidate)
        better = value > best
        best = np.where(better, value, best)
        best_s = np.where(better, candidate, best_s)
    peak = norm * best
    height = np.where(np.isnan(peak), np.nan, best_s * h)
    return peak, height


# --------------------------------------------------------------------------------------------------
# Viscosity varying with height
# --------------------------------------------------------------------------------------------------


def simpson_last_axis(y: Array, x: Array) -> Array:
    """Composite Simpson integral of ``y`` over ``x`` along the last axis, with array ops only.

    Same rule and weights as ``scipy.integrate.simpson`` (SciPy >= 1.11) on irregular samples:
    Simpson's rule on pairs of intervals and, for an odd number of intervals, the parabola through
    the last three samples on the last interval (Cartwright 2017). Two samples: trapezoid.
    """
    dx = np.diff(x, axis=-1)
    n = y.shape[-1]
    if n == 2:
        return 0.5 * dx[..., 0] * (y[..., 0] + y[..., 1])
    stop = n if n % 2 == 1 else n - 1  # samples covered by whole pairs of intervals
    h0 = dx[..., 0 : stop - 1 : 2]
    h1 = dx[..., 1 : stop - 1 : 2]
    span = h0 + h1
    pairs = (
        span
        / 6.0
        * (
            (2.0 - h1 / h0) * y[..., 0 : stop - 2 : 2]
            + span * span / (h0 * h1) * y[..., 1 : stop - 1 : 2]
            + (2.0 - h0 / h1) * y[..., 2:stop:2]
        )
    )
    total = np.sum(pairs, axis=-1)
    if n % 2 == 0:
        h0 = dx[..., -2]
        h1 = dx[..., -1]
        alpha = (2.0 * h1 * h1 + 3.0 * h0 * h1) / (6.0 * (h0 + h1))
        beta = (h1 * h1 + 3.0 * h0 * h1) / (6.0 * h0)
        gamma = h1 * h1 * h1 / (6.0 * h0 * (h0 + h1))
        total = total + alpha * y[..., -1] + beta * y[..., -2] - gamma * y[..., -3]
    return total
