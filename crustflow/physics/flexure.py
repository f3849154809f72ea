"""Loads seen through a thin elastic upper crust, and Gaussian smoothing of gridded loads.

Both filters act in the wavenumber domain of a regular grid and are pure functions on numpy arrays in
SI units. They share one procedure (:func:`wavenumber_filter`):

1. **Nodata.** Cells that are not finite (NaN marks nodata) are filled with the value of the nearest
   finite cell (Euclidean distance in row/column index space, ``scipy.ndimage.distance_transform_edt``),
   so a band of nodata continues the adjacent data instead of pulling the field towards an arbitrary
   value; after filtering they get their original values back (NaN stays NaN).
2. **Padding against wrap-around.** The grid is mirrored at every edge (even reflection about the
   outer cell edges), so its periodic continuation is continuous; this is done implicitly by the
   orthonormal type-II discrete cosine transform, which equals the FFT of the grid mirrored to twice
   its size in each direction at a quarter of the memory (``tests/test_flexure.py`` checks the two
   against each other). The cosine of wavenumber index ``m`` on ``n`` cells of spacing ``d`` has
   wavenumber ``k_m = pi m / (n d)`` (rad/m). The grid's edges thus act as planes of symmetry: the
   load is taken to continue beyond each edge as its mirror image, and within about one filter
   length (sigma for smoothing, the flexural parameter alpha for the elastic lid) of an edge across
   which the load ramps, results carry that assumption.
3. **Response.** Each coefficient is multiplied by the filter's response at
   ``k = sqrt(k_east^2 + k_north^2)``; the response is 1 at ``k = 0``, so the mean of a grid without
   nodata is preserved exactly and a uniform field passes unchanged.

Geographic grids are filtered in a *local equidistant frame*: constant spacings taken from the
ellipsoid at the grid's central latitude (:func:`local_frame`, which also estimates the error of that
approximation). Projected grids are filtered in projected coordinates with the ground spacings at the
grid's centre (projected metres over the projection's scale factor there); the variation of the
scale factor across the grid is the frame's error, estimated the same way.
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage

from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import GridGeometry, radii_of_curvature
from crustflow.geometry.projection import point_factors

__all__ = [
    "YOUNGS_MODULUS",
    "POISSONS_RATIO",
    "LOCAL_FRAME_WARNING",
    "LocalFrame",
    "local_frame",
    "flexural_rigidity",
    "flexural_parameter",
    "flexural_response",
    "flexural_filter",
    "gaussian_smoothing",
    "wavenumber_filter",
    "gaussian_response",
    "elastic_lid_response",
    "dct_wavenumbers",
    "fill_nearest",
    "report_frame",
]

logger = logging.getLogger(__name__)

#: Default Young's modulus of the elastic upper crust, Pa. Common practice, no source (flexure
#: studies commonly take 1e11 Pa; Turcotte & Schubert 2002, chapter 3, use 70 GPa in their
#: examples -- from memory).
YOUNGS_MODULUS = 1e11

#: Default Poisson's ratio of the elastic upper crust, dimensionless. Common practice, no source
#: (the value of Turcotte & Schubert 2002, chapter 3, from memory).
POISSONS_RATIO = 0.25

#: Largest Poisson's ratio of a stable isotropic elastic solid (incompressible limit),
#: dimensionless. Definition (thermodynamic stability of isotropic elasticity: -1 < nu < 1/2).
POISSON_LIMIT = 0.5

#: Relative change of the metric spacings across a geographic grid above which the local
#: equidistant frame draws a warning, dimensionless. Project choice: at 5 % the wavenumbers of the
#: edge rows are misjudged by up to 5 %, the flexural term ``D k^4`` by up to ~20 % and the Gaussian
#: exponent ``k^2 sigma^2 / 2`` by up to ~10 %.
LOCAL_FRAME_WARNING = 0.05

#: Cells per axis (evenly spread, edges included) at which a projected grid's projection factors
#: are sampled to estimate its local frame's error. Project choice: the scale factor varies
#: smoothly on the scale of the Earth's radius, so 17 x 17 samples find its extremes closely.
FRAME_SAMPLES = 17


@dataclass(frozen=True)
class LocalFrame:
    """Constant metric spacings in which a grid is filtered.

    Attributes
    ----------
    dx : float
        Spacing between columns (east), m, positive.
    dy : float
        Spacing between rows (north), m, positive.
    central_latitude : float or None
        Latitude at which the spacings of a geographic grid are taken, degrees; None for a
        projected grid (its spacings are taken at the grid's centre).
    relative_error : float
        Largest relative departure, over the grid's rows, of the true local spacings (east
        ``N(phi) cos(phi) |dlambda|``, north ``M(phi) |dphi|``) from ``dx``, ``dy``; dimensionless.
        Projected grids: the same over :data:`FRAME_SAMPLES` x :data:`FRAME_SAMPLES` cells, with
        the ground lengths of a grid step from the projection factors; 0 without a CRS (projected
        metres are used as they are).
    """

    dx: float
    dy: float
    central_latitude: float | None
    relative_error: float


def local_frame(geometry: GridGeometry) -> LocalFrame:
    """Local equidistant frame of a grid, with an estimate of its error.

    Parameters
    ----------
    geometry : crustflow.geometry.grid.GridGeometry

    Returns
    -------
    LocalFrame

    Notes
    -----
    Projected grids with a CRS: ``dx``, ``dy`` are the ground lengths of one grid step along x and
    y at the grid's centre (:func:`crustflow.geometry.grid.ground_steps`: projected metres over the
    scale factor of a conformal projection); without a CRS ``|x step|``, ``|y step|``. The filter
    ignores the angle between the grid axes on the ground of a non-conformal projection (its
    angular distortion) and the variation of the scale factor, which the relative error reports:
    1.5 % on a 3000 km Lambert conformal conic grid with standard parallels 25 and 45 N.

    Geographic grids: at the central latitude ``phi0`` (midway between the first and last row
    centres) ``dx = N(phi0) cos(phi0) |dlambda|`` and ``dy = M(phi0) |dphi|``, with the radii of
    curvature ``N = a / W``, ``M = a (1 - e2) / W^3``, ``W = sqrt(1 - e2 sin^2 phi)``. Treating the
    grid as a plane rectangle with these spacings misjudges distances along row ``phi`` by the
    relative amount ``N(phi) cos(phi) / (N(phi0) cos(phi0)) - 1`` (about ``-tan(phi0) (phi - phi0)``
    to first order) and along the meridian by ``M(phi) / M(phi0) - 1`` (of order ``e2``, negligible).
    :attr:`LocalFrame.relative_error` is the largest magnitude of either over the row centres: a
    horizontal wavenumber on the edge rows is off by up to that fraction, so ``D k^4`` by up to
    about four times it. A 1 x 1 degree grid at 45 degrees gives about 0.9 %.

    References
    ----------
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395, ch. 4
    (radii of curvature; chapter from memory).
    """
    if geometry.kind == "projected":
        if not geometry.scaled:
            return LocalFrame(abs(geometry.dx), abs(geometry.dy), None, 0.0)
        return _projected_frame(geometry)
    phi = np.radians(geometry.y)
    phi0 = 0.5 * (phi[0] + phi[-1])
    n_rows, m_rows = radii_of_curvature(phi, geometry.ellipsoid)
    n0, m0 = radii_of_curvature(np.array(phi0), geometry.ellipsoid)
    east0 = float(n0 * np.cos(phi0))
    dlam, dphi = abs(math.radians(geometry.dx)), abs(math.radians(geometry.dy))
    if not east0 > 0.0:
        raise CrustflowInputError(
            "the grid is centred on a pole, where no local east spacing exists; filter it in a "
            "polar projected CRS instead"
        )
    error = max(
        float(np.max(np.abs(n_rows * np.cos(phi) / east0 - 1.0))),
        float(np.max(np.abs(m_rows / m0 - 1.0))),
    )
    return LocalFrame(east0 * dlam, float(m0) * dphi, math.degrees(phi0), error)


def flexural_rigidity(
    elastic_thickness,
    youngs_modulus: float = YOUNGS_MODULUS,
    poissons_ratio: float = POISSONS_RATIO,
):
    """Flexural rigidity of a thin elastic plate.

    Parameters
    ----------
    elastic_thickness : float or array_like
        Elastic thickness Te, m, >= 0.
    youngs_modulus : float, optional
        E, Pa, > 0 (default :data:`YOUNGS_MODULUS`).
    poissons_ratio : float, optional
        nu, dimensionless, in (-1, 0.5) (default :data:`POISSONS_RATIO`).

    Returns
    -------
    float or numpy.ndarray
        D, N m (= Pa m^3).

    Notes
    -----
    ``D = E Te^3 / (12 (1 - nu^2))``.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002). Geodynamics, 2nd ed. Cambridge University Press,
    chapter 3 (plate bending).
    """
    te = _checked_elastic_thickness(elastic_thickness)
    e, nu = _checked_elastic_moduli(youngs_modulus, poissons_ratio)
    d = e * te**3 / (12.0 * (1.0 - nu * nu))
    return float(d) if np.ndim(d) == 0 else d


def flexural_parameter(rigidity, density_contrast: float, gravity: float):
    """Flexural parameter (the natural length scale of plate bending).

    Parameters
    ----------
    rigidity : float or array_like
        D, N m, >= 0.
    density_contrast : float
        drho, kg/m^3, > 0: density of the material displaced by the deflection minus that of the
        material filling it (the restoring contrast).
    gravity : float
        g, m/s^2, > 0.

    Returns
    -------
    float or numpy.ndarray
        alpha, m.

    Notes
    -----
    ``alpha = (4 D / (drho g))^(1/4)``. Under a line load on a continuous plate the deflection is
    ``w0 exp(-|x|/alpha) (cos(x/alpha) + sin(|x|/alpha))``: first zero at ``3 pi alpha / 4``, first
    bulge at ``pi alpha``.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002). Geodynamics, 2nd ed. Cambridge University Press,
    chapter 3 (flexure under a line load; section number not checked).
    """
    d = np.asarray(rigidity, dtype=float)
    if np.any(d < 0) or not np.all(np.isfinite(d)):
        raise CrustflowInputError(
            "flexural rigidity must be finite and >= 0 (N m); compute it with flexural_rigidity"
        )
    _checked_restoring(density_contrast, gravity)
    alpha = (4.0 * d / (density_contrast * gravity)) ** 0.25
    return float(alpha) if np.ndim(alpha) == 0 else alpha


def flexural_response(wavenumber, rigidity: float, density_contrast: float, gravity: float):
    """Fraction of a load of wavenumber k that reaches the base of a thin elastic lid.

    Parameters
    ----------
    wavenumber : array_like
        k, rad/m, >= 0.
    rigidity : float
        D, N m.
    density_contrast, gravity : float
        kg/m^3 and m/s^2 (see :func:`flexural_parameter`).

    Returns
    -------
    numpy.ndarray
        ``1 / (1 + D k^4 / (drho g))``, dimensionless, in (0, 1].

    Notes
    -----
    A lid of rigidity D deflects by ``w`` under a surface load ``q`` (Pa) against the restoring
    pressure ``drho g w``: ``D del^4 w + drho g w = q``. In the wavenumber domain
    ``w_k = q_k / (D k^4 + drho g)``, and the pressure passed on below the lid is
    ``drho g w_k = q_k / (1 + D k^4 / (drho g))``. The response is 1/2 at
    ``k = (drho g / D)^(1/4) = 2^(1/2) / alpha``.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002). Geodynamics, 2nd ed. Cambridge University Press,
    chapter 3 (periodic loading of an elastic plate).
    """
    k = np.asarray(wavenumber, dtype=float)
    return 1.0 / (1.0 + rigidity * k**4 / (density_contrast * gravity))


def flexural_filter(
    load,
    geometry: GridGeometry,
    *,
    elastic_thickness: float,
    density_contrast: float,
    gravity: float,
    youngs_modulus: float = YOUNGS_MODULUS,
    poissons_ratio: float = POISSONS_RATIO,
) -> np.ndarray:
    """The part of a surface load that a thin elastic upper crust passes on to the channel.

    Parameters
    ----------
    load : array_like, shape (nrow, ncol)
        Surface load (e.g. the overburden pressure at the channel top), Pa (any unit u; returned
        in u). NaN marks nodata.
    geometry : crustflow.geometry.grid.GridGeometry
    elastic_thickness : float
        Te, m, a single value >= 0. Te = 0 returns a copy of ``load`` unchanged.
    density_contrast : float
        drho, kg/m^3, > 0: the restoring density contrast across the deflected interface (e.g. the
        channel's density minus that of the material filling the deflection above it).
    gravity : float
        m/s^2, > 0.
    youngs_modulus, poissons_ratio : float, optional
        E (Pa) and nu (dimensionless) of the lid; defaults :data:`YOUNGS_MODULUS`,
        :data:`POISSONS_RATIO`.

    Returns
    -------
    numpy.ndarray, shape (nrow, ncol)
        Transmitted load, same unit as ``load``; NaN where ``load`` is NaN. Dividing it by
        ``drho g`` gives the lid's deflection, m (positive where the load is positive).

    Warns
    -----
    UserWarning
        On a geographic grid whose local-frame error (:func:`local_frame`) exceeds
        :data:`LOCAL_FRAME_WARNING`; the error is logged (logger ``crustflow.physics.flexure``, level
        DEBUG) on every call.

    Notes
    -----
    At wavenumber k the load is scaled by ``1 / (1 + D k^4 / (drho g))`` with
    ``D = E Te^3 / (12 (1 - nu^2))`` (:func:`flexural_response`). Long wavelengths pass (Airy
    limit), wavelengths short compared with ``2 pi alpha`` are carried by the lid; a uniform load
    passes unchanged. Padding, nodata and the local frame as described in the module
    docstring (:func:`wavenumber_filter`).

    Only a single, uniform Te is supported: a spatially varying elastic thickness has no
    wavenumber-domain solution and is out of scope. The lid is continuous (unbroken) and infinite
    in extent; the mirrored padding makes the grid's edges act as planes of symmetry of the load
    (results within about alpha of an edge across which the load ramps carry that assumption).

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002). Geodynamics, 2nd ed. Cambridge University Press,
    chapter 3.
    """
    response = elastic_lid_response(
        elastic_thickness=elastic_thickness,
        density_contrast=density_contrast,
        gravity=gravity,
        youngs_modulus=youngs_modulus,
        poissons_ratio=poissons_ratio,
    )
    if response is None:
        return _checked_grid(load, geometry, "load").copy()
    return wavenumber_filter(load, geometry, response)


def elastic_lid_response(
    *,
    elastic_thickness: float,
    density_contrast: float,
    gravity: float,
    youngs_modulus: float = YOUNGS_MODULUS,
    poissons_ratio: float = POISSONS_RATIO,
) -> Callable[[np.ndarray], np.ndarray] | None:
    """The response of :func:`flexural_filter` as a function of ``k^2``, or None for Te = 0.

    Parameters as for :func:`flexural_filter` (checked here). The returned callable maps ``k^2``
    (rad^2/m^2) to ``1 / (1 + D k^4 / (drho g))`` (Turcotte & Schubert 2002, chapter 3); the
    in-memory filter and the out-of-core one (:mod:`crustflow.engine.outofcore`) both use it.
    """
    te = _checked_elastic_thickness(elastic_thickness)
    if np.ndim(te) != 0:
        raise CrustflowInputError(
            "load.elastic_thickness must be a single value; a spatially varying Te is not supported"
        )
    rigidity = flexural_rigidity(float(te), youngs_modulus, poissons_ratio)
    _checked_restoring(density_contrast, gravity)
    if rigidity == 0.0:
        return None
    flex = rigidity / (density_contrast * gravity)
    return lambda k2: 1.0 / (1.0 + flex * k2 * k2)


def gaussian_smoothing(field, geometry: GridGeometry, *, sigma: float) -> np.ndarray:
    """Smooth a gridded field with an isotropic Gaussian of standard deviation ``sigma``.

    Parameters
    ----------
    field : array_like, shape (nrow, ncol)
        Any field, unit u. NaN marks nodata.
    geometry : crustflow.geometry.grid.GridGeometry
    sigma : float
        Standard deviation of the Gaussian kernel, m (not its full width at half maximum, which is
        ``2 sqrt(2 ln 2) sigma`` = 2.355 sigma), >= 0; 0 returns a copy of ``field`` unchanged.

    Returns
    -------
    numpy.ndarray, shape (nrow, ncol)
        Smoothed field, unit u; NaN where ``field`` is NaN. Its mean equals the mean of ``field``
        when ``field`` has no nodata.

    Notes
    -----
    Convolution with ``exp(-r^2 / (2 sigma^2)) / (2 pi sigma^2)``, applied exactly in the
    wavenumber domain: the amplitude of a sinusoid of wavenumber k is multiplied by
    ``exp(-k^2 sigma^2 / 2)``. Padding, nodata and the local frame as described in the module
    docstring (:func:`wavenumber_filter`).

    References
    ----------
    Bracewell, R. N. (2000). The Fourier Transform and Its Applications, 3rd ed. McGraw-Hill
    (Fourier transform of a Gaussian; from memory).
    """
    response = gaussian_response(sigma)
    if response is None:
        return _checked_grid(field, geometry, "field").copy()
    return wavenumber_filter(field, geometry, response)


def gaussian_response(sigma: float) -> Callable[[np.ndarray], np.ndarray] | None:
    """The response of :func:`gaussian_smoothing` as a function of ``k^2``, or None for sigma = 0.

    Parameters
    ----------
    sigma : float
        Standard deviation of the Gaussian, m, >= 0 (checked here).

    Returns
    -------
    callable or None
        Maps ``k^2`` (rad^2/m^2) to ``exp(-k^2 sigma^2 / 2)`` (Bracewell 2000, from memory); the
        in-memory filter and the out-of-core one (:mod:`crustflow.engine.outofcore`) both use it.
    """
    if not (np.ndim(sigma) == 0 and math.isfinite(sigma) and sigma >= 0):
        raise CrustflowInputError(
            f"load.smoothing is {sigma!r}; give the Gaussian's standard deviation as a length "
            '>= 0, e.g. "40 km"'
        )
    if sigma == 0:
        return None
    half_s2 = 0.5 * float(sigma) ** 2
    return lambda k2: np.exp(-half_s2 * k2)


def wavenumber_filter(
    field, geometry: GridGeometry, response: Callable[[np.ndarray], np.ndarray]
) -> np.ndarray:
    """Apply an isotropic wavenumber-domain filter to a grid (nodata fill, mirror padding).

    Parameters
    ----------
    field : array_like, shape (nrow, ncol)
        Unit u; non-finite cells are nodata.
    geometry : crustflow.geometry.grid.GridGeometry
    response : callable
        Maps ``k^2`` (rad^2/m^2, an array) to the dimensionless factor applied at that squared
        wavenumber; it should be 1 at ``k^2 = 0``.

    Returns
    -------
    numpy.ndarray, shape (nrow, ncol)
        Filtered field, unit u; nodata cells keep their input values.

    Notes
    -----
    Steps as in the module docstring: nearest-cell fill of nodata, orthonormal DCT-II (the FFT of
    the mirrored grid), multiplication by ``response(k_east^2 + k_north^2)`` with
    ``k_m = pi m / (n d)``, inverse transform, nodata restored. The frame's error is logged at
    DEBUG level and warned about above :data:`LOCAL_FRAME_WARNING`.

    References
    ----------
    Makhoul, J. (1980). A fast cosine transform in one and two dimensions. IEEE Transactions on
    Acoustics, Speech, and Signal Processing 28(1) (the DCT as the FFT of a mirrored sequence).
    """
    values = _checked_grid(field, geometry, "field")
    nodata = ~np.isfinite(values)
    if nodata.all():
        return values.copy()
    frame = local_frame(geometry)
    report_frame(frame)
    filled = fill_nearest(values, nodata) if nodata.any() else values
    nrow, ncol = values.shape
    coef = sp_fft.dctn(filled, type=2, norm="ortho")
    k_north, k_east = dct_wavenumbers(nrow, ncol, frame)
    coef *= response(k_north[:, None] ** 2 + k_east[None, :] ** 2)
    out = sp_fft.idctn(coef, type=2, norm="ortho")
    np.copyto(out, values, where=nodata)
    return out


# ----------------------------------------------------------------------------------------------
# helpers


def _projected_frame(geometry: GridGeometry) -> LocalFrame:
    """Local frame of a projected grid with a CRS: ground spacings at its centre (see local_frame)."""
    crs = geometry.crs.sub_crs_list[0] if geometry.crs.is_compound else geometry.crs
    nrow, ncol = geometry.shape
    rows = np.unique(np.linspace(0, nrow - 1, FRAME_SAMPLES).round().astype(int))
    cols = np.unique(np.linspace(0, ncol - 1, FRAME_SAMPLES).round().astype(int))
    x, y = geometry.x, geometry.y
    centre = point_factors(crs, 0.5 * (x[0] + x[-1]), 0.5 * (y[0] + y[-1]))
    samples = point_factors(crs, x[cols][None, :], y[rows][:, None])

    def steps(f):  # ground metres per projected metre along x and along y
        return np.hypot(1.0, f.shear / f.north) / f.east, 1.0 / f.north

    east0, north0 = (float(v) for v in steps(centre))
    east, north = steps(samples)
    error = max(
        float(np.max(np.abs(east / east0 - 1.0))), float(np.max(np.abs(north / north0 - 1.0)))
    )
    return LocalFrame(abs(geometry.dx) * east0, abs(geometry.dy) * north0, None, error)


def dct_wavenumbers(nrow: int, ncol: int, frame: LocalFrame) -> tuple[np.ndarray, np.ndarray]:
    """Wavenumbers (rad/m) of the DCT-II coefficients along rows (north) and columns (east):
    ``k_m = pi m / (n d)`` (Makhoul 1980)."""
    k_east = np.pi * np.arange(ncol) / (ncol * frame.dx)
    k_north = np.pi * np.arange(nrow) / (nrow * frame.dy)
    return k_north, k_east


def report_frame(frame: LocalFrame) -> None:
    """Log the local frame's error; warn above :data:`LOCAL_FRAME_WARNING`."""
    if frame.central_latitude is None:
        _report_projected_frame(frame)
        return
    logger.debug(
        "local equidistant frame at %.4f degrees: dx %.6g m, dy %.6g m, largest relative spacing "
        "error %.3g",
        frame.central_latitude,
        frame.dx,
        frame.dy,
        frame.relative_error,
    )
    if frame.relative_error > LOCAL_FRAME_WARNING:
        warnings.warn(
            f"filtering a geographic grid in a local frame at {frame.central_latitude:.2f} "
            f"degrees: spacings change by up to {100 * frame.relative_error:.1f} % across the "
            "grid, so wavenumbers near its north and south edges are off by as much; reproject "
            "the grid to a local projected CRS or filter smaller pieces",
            UserWarning,
            stacklevel=3,
        )


def _report_projected_frame(frame: LocalFrame) -> None:
    if frame.relative_error == 0.0:
        return
    logger.debug(
        "local frame at the grid's centre: dx %.6g m, dy %.6g m on the ground, largest relative "
        "spacing error %.3g",
        frame.dx,
        frame.dy,
        frame.relative_error,
    )
    if frame.relative_error > LOCAL_FRAME_WARNING:
        warnings.warn(
            "filtering a projected grid in a local frame at its centre: the projection's scale "
            f"changes by up to {100 * frame.relative_error:.1f} % across the grid, so wavenumbers "
            "near its edges are off by as much; filter smaller pieces or use a projection with "
            "less scale variation",
            UserWarning,
            stacklevel=4,
        )


def _checked_grid(field, geometry: GridGeometry, name: str) -> np.ndarray:
    values = np.array(field, dtype=float)  # a copy: inputs are never modified
    if values.shape != geometry.shape:
        raise CrustflowInputError(
            f"{name} has shape {values.shape} but the grid is {geometry.shape}; pass an array "
            "indexed [row, col] = [y, x] on the same grid"
        )
    return values


def _checked_elastic_thickness(elastic_thickness):
    te = np.asarray(elastic_thickness, dtype=float)
    if not np.all(np.isfinite(te)) or np.any(te < 0):
        raise CrustflowInputError(
            f"load.elastic_thickness is {elastic_thickness!r}; give a length >= 0, e.g. "
            '"20 km" (0 means no elastic lid)'
        )
    return te


def _checked_elastic_moduli(youngs_modulus: float, poissons_ratio: float) -> tuple[float, float]:
    if not (math.isfinite(youngs_modulus) and youngs_modulus > 0):
        raise CrustflowInputError(
            f'load.youngs_modulus is {youngs_modulus!r}; give a positive modulus, e.g. "100 GPa"'
        )
    if not (math.isfinite(poissons_ratio) and -1.0 < poissons_ratio < POISSON_LIMIT):
        raise CrustflowInputError(
            f"load.poissons_ratio is {poissons_ratio!r}; give a number between -1 and 0.5, "
            "e.g. 0.25"
        )
    return float(youngs_modulus), float(poissons_ratio)


def _checked_restoring(density_contrast: float, gravity: float) -> None:
    if not (np.ndim(density_contrast) == 0 and math.isfinite(density_contrast)):
        raise CrustflowInputError(
            f"density contrast {density_contrast!r} must be a single finite value in kg/m^3"
        )
    if not density_contrast > 0:
        raise CrustflowInputError(
            f"density contrast {density_contrast:g} kg/m^3 under the elastic lid must be "
            "positive: the material displaced by the deflection must be denser than its infill"
        )
    if not (math.isfinite(gravity) and gravity > 0):
        raise CrustflowInputError(f"gravity {gravity!r} must be positive, in m/s^2")


def fill_nearest(values: np.ndarray, nodata: np.ndarray) -> np.ndarray:
    """Copy of ``values`` with every nodata cell set to its nearest finite cell (index space)."""
    rows, cols = ndimage.distance_transform_edt(nodata, return_distances=False, return_indices=True)
    return values[rows, cols]
