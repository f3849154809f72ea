"""Map-projection factors: true ground lengths and areas on projected grids.

A projected grid's metres are not ground metres: a map projection stretches distances by its scale
factor (between 0.9996 and 1.0004 inside a UTM zone, a few per cent across a continent in a conic or
azimuthal projection). This module gives, per cell, the local linear map between ground metres and
projected metres, from pyproj's projection factors, so that gradients, face lengths and cell areas
are true (ellipsoidal) ones.

The local frame (used for every vector on a projected grid): its *north* axis points along the
ground direction that the projection maps onto grid north; its *east* axis is 90 degrees clockwise
from it. In this frame the Jacobian of the projection (projected metres per ground metre) is lower
triangular::

    J_F = [[c, 0],
           [d, b]]

``c``: projected x-metres per ground metre along the frame's east axis; ``d``: the projected
y-metres that this step also moves (shear); ``b``: projected y-metres per ground metre along the
frame's north axis. For a conformal projection (UTM, Lambert conformal conic, polar stereographic,
Mercator) ``c = b = k`` (the point scale factor) and ``d = 0``; the frame is then the true
east/north frame turned by the meridian convergence. For other projections (equal-area, equidistant)
``d`` carries their angular distortion and every formula below stays exact to first order in the
cell size.

Cost: factors are evaluated exactly with pyproj on an absolute lattice of projected coordinates
(integer multiples of :data:`FACTOR_SPACING`; cells coarser than that are evaluated at their own
coordinates) and interpolated bilinearly in between. The value at a cell therefore depends only on
its own coordinates: a strip of rows gets the whole grid's numbers bit for bit.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import pyproj

__all__ = [
    "FACTOR_SPACING",
    "FIELDS",
    "ProjectionFactors",
    "is_conformal",
    "lattice_factors",
    "point_factors",
]

#: Spacing of the lattice of exact pyproj evaluations, m (projected). Value derived: the factors
#: vary on the scale of the Earth's radius, so bilinear interpolation errs by about
#: ``FACTOR_SPACING^2 |k''| / 8``: at most 2.3e-7 relative on a 3000 km conic grid
#: (tests/geometry/test_projection_factors.py checks it against pyproj at every cell).
FACTOR_SPACING = 5000.0

#: Shears ``|d| / c`` below this are set to exactly zero (conformal projections), dimensionless.
#: Value derived: PROJ differentiates numerically, so a conformal projection's d is ~1e-11, not 0.
CONFORMAL_SHEAR = 1e-8

#: Distance from a pole, degrees of latitude, within which the factors are taken as isotropic
#: (``c = b = sqrt(areal scale)``, ``d = 0``). Value derived: dividing PROJ's derivatives by
#: ``N cos(phi)`` loses all precision within about 100 m (1e-3 degree) of a pole (measured with
#: EPSG:3413 and EPSG:3031); at 0.01 degree from the pole of a polar azimuthal projection its h and
#: k differ by less than 1e-9, and a polar stereographic projection is conformal anyway.
POLE_GUARD = 0.01

#: Rows interpolated at a time, so that a whole grid's factors need no full-size temporaries
#: (project choice).
ROW_BLOCK = 256

#: Names of the factors in :class:`ProjectionFactors`.
FIELDS = ("east", "shear", "north", "north_offset")

#: Offsets of the conformality probes from (0, 0) and from (500 km, 0), projected m (project
#: choice: points near where most projections put their origin, but not on it: the origin of a
#: polar projection is a pole, where the factors are degenerate).
PROBES = ((1e5, 1e5), (-1e5, 1e5), (1e5, -1e5), (-1e5, -1e5), (2e5, 0.0))


@dataclass(frozen=True)
class ProjectionFactors:
    """Lower-triangular Jacobian ``[[east, 0], [shear, north]]`` of the projection per point.

    Attributes
    ----------
    east, shear, north : numpy.ndarray
        c, d, b of the module docstring: projected metres per ground metre, dimensionless.
    north_offset : numpy.ndarray
        True azimuth of the frame's north axis (the ground direction of grid north) minus PROJ's
        meridian convergence, degrees: 0 on conformal projections (set to exactly 0 where the
        shear is 0), up to about the angular distortion on others.
    """

    east: np.ndarray
    shear: np.ndarray
    north: np.ndarray
    north_offset: np.ndarray

    @property
    def areal(self) -> np.ndarray:
        """Areal scale ``c b`` (projected area per ground area), dimensionless."""
        return self.east * self.north


def point_factors(crs: pyproj.CRS, x, y) -> ProjectionFactors:
    """Exact projection factors at projected points, from ``pyproj.Proj.get_factors``.

    Parameters
    ----------
    crs : pyproj.CRS
        Projected CRS (its horizontal part when compound) with easting/northing axes.
    x, y : array_like
        Easting and northing, m (broadcast together).

    Returns
    -------
    ProjectionFactors
        Same shape as the broadcast inputs.

    Notes
    -----
    Points are transformed to longitude/latitude on the CRS's own datum; PROJ gives the partial
    derivatives of the projection ``dx/dlambda, dx/dphi, dy/dlambda, dy/dphi`` (per radian, in
    units of the semi-major axis a). With the radii of curvature ``N`` (prime vertical) and ``M``
    (meridian) the Jacobian from ground (east, north) metres to projected metres is
    ``J = a [[x_lam / (N cos phi), x_phi / M], [y_lam / (N cos phi), y_phi / M]]``. Its LQ
    decomposition ``J = J_F Q`` (Q a rotation) gives ``c = |(J00, J01)|``,
    ``d = (J00 J10 + J01 J11) / c``, ``b = det J / c``: the rotation Q turns true north onto the
    ground direction of grid north, whose true azimuth is ``atan2(-J01, J00)`` (equal to PROJ's
    meridian convergence on a conformal projection; checked against ``pyproj.Geod.inv``). Within
    :data:`POLE_GUARD` of a pole, where ``N cos(phi)`` vanishes, ``c = b = sqrt(areal scale)``
    and ``d = 0`` (the pole is the centre of the polar projections that contain it, where they
    are not distorted in shape).

    References
    ----------
    PROJ contributors. PROJ coordinate transformation software, ``proj_factors``.
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395, ch. 4
    (scale factors and radii of curvature).
    """
    crs = crs.sub_crs_list[0] if crs.is_compound else crs
    x, y = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
    to_lonlat, proj, e2 = _tools(crs.to_wkt())
    lon, lat = to_lonlat.transform(x, y)
    f = proj.get_factors(lon, lat)
    phi = np.radians(np.asarray(lat, dtype=float))
    w = np.sqrt(1.0 - e2 * np.sin(phi) ** 2)
    east_radius = np.cos(phi) / w  # N cos(phi) / a
    north_radius = (1.0 - e2) / w**3  # M / a
    j00 = np.asarray(f.dx_dlam, dtype=float).reshape(x.shape) / east_radius
    j01 = np.asarray(f.dx_dphi, dtype=float).reshape(x.shape) / north_radius
    j10 = np.asarray(f.dy_dlam, dtype=float).reshape(x.shape) / east_radius
    j11 = np.asarray(f.dy_dphi, dtype=float).reshape(x.shape) / north_radius
    c = np.hypot(j00, j01)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = (j00 * j10 + j01 * j11) / c
        b = (j00 * j11 - j01 * j10) / c
        d = np.where(np.abs(d) <= CONFORMAL_SHEAR * c, 0.0, d)
    convergence = np.asarray(f.meridian_convergence, dtype=float).reshape(x.shape)
    offset = np.mod(np.degrees(np.arctan2(-j01, j00)) - convergence + 180.0, 360.0) - 180.0
    polar = np.abs(np.asarray(lat, dtype=float)).reshape(x.shape) >= 90.0 - POLE_GUARD
    if polar.any():
        iso = np.sqrt(np.asarray(f.areal_scale, dtype=float).reshape(x.shape))
        c, b = np.where(polar, iso, c), np.where(polar, iso, b)
        d = np.where(polar, 0.0, d)
    return ProjectionFactors(c, d, b, np.where(d == 0.0, 0.0, offset))


def lattice_factors(
    crs: pyproj.CRS, x, y, *, x_step: float, y_step: float, fields: tuple[str, ...] = FIELDS
) -> ProjectionFactors:
    """Projection factors on a grid of points, interpolated from an absolute lattice.

    Parameters
    ----------
    crs : pyproj.CRS
        Projected CRS.
    x, y : array_like
        1-D query coordinates (e.g. cell centres or cell faces), m.
    x_step, y_step : float
        The grid's cell sizes, m: an axis whose cells are at least :data:`FACTOR_SPACING` wide is
        evaluated exactly at the query coordinates.
    fields : tuple of str, optional
        The factors wanted (default all); the others are NaN of shape (1, 1).

    Returns
    -------
    ProjectionFactors
        Arrays of shape ``(y.size, x.size)``. On a conformal projection (:func:`is_conformal`) only
        k is interpolated: ``east`` and ``north`` are the same array, ``shear`` and
        ``north_offset`` zeros of shape (1, 1).

    Notes
    -----
    Lattice nodes sit at integer multiples of :data:`FACTOR_SPACING`; a query at ``q`` takes node
    ``i = floor(q / L)`` and weight ``q / L - i`` along each axis (bilinear: along x, then y). Queries whose
    interpolated factors are not finite (a node outside the projection's domain) are evaluated
    exactly. Each value depends only on the query's own coordinates.
    """
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    conformal = is_conformal(crs)
    wanted = ("east",) if conformal else fields
    xn, xi, xw = _axis_nodes(x, x_step)
    yn, yi, yw = _axis_nodes(y, y_step)
    nodes = point_factors(crs, xn[None, :], yn[:, None])
    out = {}
    for name in wanted:
        # Along x on the few lattice rows first, then along y (whole-row copies: cheap).
        v = getattr(nodes, name)
        cols = v[:, xi] if xw is None else v[:, xi] * (1.0 - xw) + v[:, xi + 1] * xw
        out[name] = cols[yi] if yw is None else _rows_between(cols, yi, yw)
    bad = ~np.logical_and.reduce([np.isfinite(v) for v in out.values()])
    if bad.any():
        r, c = np.nonzero(bad)
        exact = point_factors(crs, x[c], y[r])
        for name, v in out.items():
            v[r, c] = getattr(exact, name)
    if conformal:
        zero = np.zeros((1, 1))
        return ProjectionFactors(out["east"], zero, out["east"], zero)
    missing = np.full((1, 1), np.nan)
    return ProjectionFactors(*(out.get(name, missing) for name in FIELDS))


def is_conformal(crs: pyproj.CRS) -> bool:
    """True when the projection is conformal (shear 0 and ``c = b``) at a fixed set of probes.

    Parameters
    ----------
    crs : pyproj.CRS
        Projected CRS.

    Returns
    -------
    bool

    Notes
    -----
    The probes are projected points 100-200 km from (0, 0) and from (500 km, 0) (a false easting
    common to transverse Mercator zones); those outside the projection's domain are skipped, and
    fewer than three valid probes count as not conformal. The answer depends on the CRS only, so
    every strip of a grid takes the same path. Conformal: ``|d| <= CONFORMAL_SHEAR c`` (set to 0)
    and ``|c - b| <= CONFORMAL_SHEAR c`` at every valid probe.
    """
    return _conformal(crs.to_wkt())


def _rows_between(cols: np.ndarray, yi: np.ndarray, yw: np.ndarray) -> np.ndarray:
    """Rows interpolated between lattice rows ``yi`` and ``yi + 1`` with weights ``yw``, in blocks
    of :data:`ROW_BLOCK` rows (elementwise, so the blocking does not change any value)."""
    out = np.empty((yi.size, cols.shape[1]))
    for start in range(0, yi.size, ROW_BLOCK):
        rows = slice(start, start + ROW_BLOCK)
        lower = cols[yi[rows]]
        lower *= (1.0 - yw[rows])[:, None]
        upper = cols[yi[rows] + 1]
        upper *= yw[rows][:, None]
        np.add(lower, upper, out=out[rows])
    return out


def _axis_nodes(q: np.ndarray, step: float):
    """Node coordinates, left node index and weight per query (weight None: exact at queries)."""
    if abs(step) >= FACTOR_SPACING:
        return q, np.arange(q.size), None
    cell = np.floor(q / FACTOR_SPACING)
    first = math.floor(float(cell.min()))
    count = int(cell.max()) - first + 2
    nodes = (first + np.arange(count)) * FACTOR_SPACING
    return nodes, (cell - first).astype(int), q / FACTOR_SPACING - cell


@functools.lru_cache(maxsize=16)
def _tools(wkt: str) -> tuple[pyproj.Transformer, pyproj.Proj, float]:
    """Inverse transformer, Proj object and first eccentricity squared of a projected CRS (building
    them costs more than evaluating a strip's lattice)."""
    crs = pyproj.CRS.from_wkt(wkt)
    ell = crs.ellipsoid
    e2 = 1.0 - (float(ell.semi_minor_metre) / float(ell.semi_major_metre)) ** 2
    to_lonlat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
    return to_lonlat, pyproj.Proj(crs), e2


@functools.lru_cache(maxsize=64)
def _conformal(wkt: str) -> bool:
    crs = pyproj.CRS.from_wkt(wkt)
    px = np.array([dx + x0 for x0 in (0.0, 5e5) for dx, _ in PROBES])
    py = np.array([dy for _ in (0.0, 5e5) for _, dy in PROBES])
    try:
        with np.errstate(all="ignore"):
            f = point_factors(crs, px, py)
    except pyproj.exceptions.ProjError:
        return False
    ok = np.isfinite(f.east) & np.isfinite(f.north) & np.isfinite(f.shear)
    if ok.sum() < 3:
        return False
    equal = np.abs(f.east - f.north) <= CONFORMAL_SHEAR * f.east
    return bool(np.all(f.shear[ok] == 0.0) and np.all(equal[ok]))
