"""Grid geometry on the ellipsoid: gradients, flux divergence, cell areas and azimuths.

Grids are regular 2-D numpy arrays indexed ``[row, col] = [y, x]`` with 1-D cell-centre coordinates
``x`` (length ncol) and ``y`` (length nrow) in either order. Two kinds of grid:

* ``"projected"``: x, y are easting and northing in metres. Distances and areas are true ones on
  the CRS's ellipsoid: projected metres divided by the projection's per-cell scale factors, from
  pyproj's projection factors (:mod:`crustflow.geometry.projection`). A projected grid built
  without a CRS keeps projected metres as they are.
* ``"geographic"``: x is longitude and y latitude in degrees on the CRS's ellipsoid (never a sphere,
  unless the CRS itself is defined on one).

Vectors are (east, north) components per metre in the local metric frame (on projected grids the
frame whose north axis is the ground direction of grid north, see
:mod:`crustflow.geometry.projection`); azimuths are degrees clockwise from true north. Everything
here is pure numpy on in-memory arrays, apart from the calls to pyproj for the CRS, the projection
factors and the meridian convergence.

Whole-globe grids and the poles:

* Longitude wraps on a geographic grid whose columns span the full circle (``ncol |dx| = 360``
  degrees to 1e-9 relative; :attr:`GridGeometry.periodic_x`). The first and last columns are then
  neighbours across the antimeridian: :func:`gradient` takes central differences across the seam
  (one-sided only next to nodata), and in :func:`divergence` the west face of the first column and
  the east face of the last column are one face carrying one flux, so the seam adds nothing and
  ``sum(div * area)`` over any full row still telescopes to the north/south faces. Rows never wrap
  (a strip of rows keeps the full width, so strips equal the whole grid bit for bit), and partial
  geographic and projected grids keep one-sided differences at their edges.
* A pole is a point, not an edge: the parallel bounding a row is clipped to +-90 degrees and the
  face there has zero length, so no flux crosses a pole and cell areas stay positive (a row centred
  on a pole spans only half a step). On a row centred exactly on +-90 the east direction is
  undefined and the east gradient is NaN (its metric scale is set to NaN: no division by zero); the
  north gradient there, and the divergence of a flux given there, stay finite. Rows next to a pole
  are ordinary rows with finite values. The north derivative never reaches across a pole: the edge
  rows take one-sided differences.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pyproj

from crustflow.errors import CrustflowInputError
from crustflow.geometry.projection import (
    ProjectionFactors,
    lattice_factors,
    point_factors,
)

__all__ = [
    "WGS84",
    "Ellipsoid",
    "GridGeometry",
    "azimuth",
    "cell_areas",
    "cell_spacings",
    "divergence",
    "face_lengths",
    "grid_geometry",
    "gradient",
    "ground_steps",
    "meridian_convergence",
]

#: Allowed values of :attr:`GridGeometry.kind`.
GRID_KINDS = ("projected", "geographic")

#: Latitude of the poles, degrees (definition).
POLE_LATITUDE = 90.0

#: Largest distance between exact meridian-convergence evaluations along a row, m (linear in
#: between). The error is below 1e-6 degree on UTM grids up to 63 degrees latitude at the zone
#: edge (tests/test_maps.py checks it against pyproj at every cell); value derived.
CONVERGENCE_SPACING = 2000.0

#: One full turn, degrees (definition); azimuths are reduced to [0, FULL_TURN).
FULL_TURN = 360.0

#: Largest accepted relative departure of any coordinate step from the mean step, dimensionless.
#: Project choice: float64 coordinates built from an affine transform are regular to ~1e-12.
SPACING_RTOL = 1e-5

#: Relative tolerance on ``ncol |dx| = 360`` degrees for a grid whose longitudes wrap around,
#: dimensionless (project choice: well above the rounding of a float64 transform).
PERIOD_RTOL = 1e-9

#: Relative tolerance when recognising a CRS axis unit as metre or degree, dimensionless
#: (project choice).
UNIT_RTOL = 1e-12

#: Number of Gauss-Legendre nodes for meridian arcs between two parallels. Value derived: the arc
#: integrand M(phi) is analytic and nearly constant (relative variation ~e^2), so 16 nodes reproduce
#: pyproj.Geod.inv meridian distances to rounding even for a pole-to-pole arc.
MERIDIAN_ARC_NODES = 16

_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(MERIDIAN_ARC_NODES)


@dataclass(frozen=True)
class Ellipsoid:
    """Reference ellipsoid of revolution.

    Parameters
    ----------
    semi_major : float
        Equatorial radius a, m.
    inverse_flattening : float
        1/f, dimensionless. 0 (the pyproj convention) or infinity means a sphere.
    name : str
        Human-readable name.
    reference : str
        Where the constants come from.

    Notes
    -----
    Flattening ``f = 1/inverse_flattening``, first eccentricity squared ``e2 = f (2 - f)``,
    semi-minor axis ``b = a (1 - f)``.

    References
    ----------
    NIMA (2000). Department of Defense World Geodetic System 1984. Technical Report TR8350.2,
    3rd ed.
    """

    semi_major: float
    inverse_flattening: float
    name: str
    reference: str

    def __post_init__(self):
        if not (math.isfinite(self.semi_major) and self.semi_major > 0):
            raise CrustflowInputError(
                f"ellipsoid {self.name!r} has semi_major {self.semi_major!r}; "
                "give a positive radius in m"
            )
        if self.inverse_flattening < 0 or math.isnan(self.inverse_flattening):
            raise CrustflowInputError(
                f"ellipsoid {self.name!r} has inverse_flattening {self.inverse_flattening!r}; "
                "give 1/f (e.g. 298.257223563), or 0 for a sphere"
            )

    @property
    def flattening(self) -> float:
        """Flattening f, dimensionless (0 for a sphere)."""
        if self.inverse_flattening == 0 or math.isinf(self.inverse_flattening):
            return 0.0
        return 1.0 / self.inverse_flattening

    @property
    def e2(self) -> float:
        """First eccentricity squared ``f (2 - f)``, dimensionless."""
        f = self.flattening
        return f * (2.0 - f)

    @property
    def semi_minor(self) -> float:
        """Polar radius ``b = a (1 - f)``, m."""
        return self.semi_major * (1.0 - self.flattening)

    @classmethod
    def from_crs(cls, crs) -> Ellipsoid:
        """Ellipsoid of a CRS.

        Parameters
        ----------
        crs : pyproj.CRS or any input of ``pyproj.CRS.from_user_input``
            Geographic or projected coordinate reference system.

        Returns
        -------
        Ellipsoid
            Semi-major axis in m and inverse flattening as pyproj reports them.
        """
        crs = _to_crs(crs)
        ell = crs.ellipsoid
        if ell is None:
            raise CrustflowInputError(
                f"crs {crs.name!r} has no ellipsoid; give a geographic or projected CRS"
            )
        ident = ell.to_json_dict().get("id") or {}
        source = f"{ident.get('authority', 'no authority')}:{ident.get('code', '-')}"
        return cls(
            semi_major=float(ell.semi_major_metre),
            inverse_flattening=float(ell.inverse_flattening),
            name=ell.name,
            reference=f"pyproj CRS {crs.name!r}, ellipsoid {source}",
        )


#: WGS84 ellipsoid: a = 6378137 m, 1/f = 298.257223563. NIMA TR8350.2 (3rd ed., 2000), table 3.1.
WGS84 = Ellipsoid(
    semi_major=6378137.0,
    inverse_flattening=298.257223563,
    name="WGS 84",
    reference="NIMA TR8350.2 (3rd ed., 2000)",
)


@dataclass(frozen=True, eq=False)
class GridGeometry:
    """Geometry of a regular grid.

    Parameters
    ----------
    kind : {"projected", "geographic"}
        Projected: x, y in metres. Geographic: x longitude, y latitude, degrees.
    x : numpy.ndarray
        Cell-centre x coordinates (length ncol), m or degrees east, regular, either order.
    y : numpy.ndarray
        Cell-centre y coordinates (length nrow), m or degrees north, regular, either order.
    ellipsoid : Ellipsoid or None
        Required for geographic grids (taken from ``crs`` when omitted).
    crs : pyproj.CRS or None
        The grid's CRS; may be None for a projected grid (then no meridian convergence).
    spacing : tuple of float or None
        Signed (x, y) steps, m or degrees, when known exactly (e.g. from a raster's transform);
        default: from the coordinates. Giving them makes results on a strip of rows identical,
        bit for bit, to those on the whole grid.

    Notes
    -----
    Coordinates are validated and stored as read-only float64 copies. Comparison is by identity.
    """

    kind: str
    x: np.ndarray
    y: np.ndarray
    ellipsoid: Ellipsoid | None = None
    crs: object | None = None
    spacing: tuple[float, float] | None = None

    def __post_init__(self):
        if self.kind not in GRID_KINDS:
            raise CrustflowInputError(f"grid kind {self.kind!r} is not one of {GRID_KINDS}")
        crs = None if self.crs is None else _to_crs(self.crs)
        object.__setattr__(self, "crs", crs)
        object.__setattr__(self, "x", _checked_coords(self.x, "x"))
        object.__setattr__(self, "y", _checked_coords(self.y, "y"))
        if self.kind == "geographic":
            if self.ellipsoid is None:
                if crs is None:
                    raise CrustflowInputError(
                        "a geographic grid needs an ellipsoid; pass ellipsoid=WGS84 (or the right "
                        "one) or the grid's crs"
                    )
                object.__setattr__(self, "ellipsoid", Ellipsoid.from_crs(crs))
            worst = float(np.max(np.abs(self.y)))
            if worst > POLE_LATITUDE:
                raise CrustflowInputError(
                    f"latitudes (y) reach {worst:g} degrees, beyond +-{POLE_LATITUDE:g}; check "
                    "that y holds latitudes and that x and y are not swapped"
                )

    @property
    def shape(self) -> tuple[int, int]:
        """Grid shape (nrow, ncol)."""
        return (self.y.size, self.x.size)

    @property
    def dx(self) -> float:
        """Signed step of x from one column to the next, m or degrees."""
        return float(self.spacing[0]) if self.spacing is not None else _step(self.x)

    @property
    def dy(self) -> float:
        """Signed step of y from one row to the next, m or degrees."""
        return float(self.spacing[1]) if self.spacing is not None else _step(self.y)

    @property
    def periodic_x(self) -> bool:
        """True when longitude wraps: a geographic grid whose columns span the full 360 degrees.

        The test is ``|ncol |dx| - 360| <= 1e-9 * 360``; projected grids are never periodic.
        """
        if self.kind != "geographic":
            return False
        span = self.x.size * abs(self.dx)
        return abs(span - FULL_TURN) <= PERIOD_RTOL * FULL_TURN

    @property
    def scaled(self) -> bool:
        """True for a projected grid with a CRS: its metres are corrected by projection factors."""
        return self.kind == "projected" and self.crs is not None

    @cached_property
    def centre_factors(self) -> ProjectionFactors:
        """Projection factors at the cell centres, arrays of shape (nrow, ncol) (projected grids
        with a CRS only; see :func:`crustflow.geometry.projection.lattice_factors`)."""
        return self._factors(self.x, self.y)

    @cached_property
    def x_face_factors(self) -> ProjectionFactors:
        """Projection factors at the midpoints of the faces between columns, (nrow, ncol + 1):
        means of the two neighbouring cells' factors (linear extrapolation at the grid's edges;
        second order, like the lattice interpolation); only ``north`` is computed."""
        f = self.centre_factors
        north = _face_mean(f.north, 1)
        return ProjectionFactors(north, np.nan, north, np.nan)

    @cached_property
    def y_face_factors(self) -> ProjectionFactors:
        """Projection factors at the midpoints of the faces between rows, (nrow + 1, ncol), as
        :attr:`x_face_factors`; ``north_offset`` is not computed."""
        f = self.centre_factors
        east = _face_mean(f.east, 0)
        north = east if f.north is f.east else _face_mean(f.north, 0)
        return ProjectionFactors(east, _face_mean(f.shear, 0), north, np.nan)

    @cached_property
    def _ground_faces(self) -> tuple[np.ndarray, np.ndarray]:
        east = abs(self.dy) / self.x_face_factors.north
        north = abs(self.dx) / self.y_face_factors.east
        for v in (east, north):
            v.setflags(write=False)
        return east, north

    @cached_property
    def _ground_areas(self) -> np.ndarray:
        f = self.centre_factors
        area = abs(self.dx * self.dy) / (f.east * f.north)
        area.setflags(write=False)
        return area

    def _factors(self, x: np.ndarray, y: np.ndarray) -> ProjectionFactors:
        if not self.scaled:
            raise CrustflowInputError(
                "projection factors need a projected grid with its crs; build the geometry with "
                "grid_geometry(x, y, crs)"
            )
        horizontal = self.crs.sub_crs_list[0] if self.crs.is_compound else self.crs
        return lattice_factors(horizontal, x, y, x_step=self.dx, y_step=self.dy)


def grid_geometry(x, y, crs, *, spacing: tuple[float, float] | None = None) -> GridGeometry:
    """Build and validate the geometry of a regular grid from its coordinates and CRS.

    Parameters
    ----------
    x, y : array_like
        1-D cell-centre coordinates: easting/northing in m (projected CRS) or longitude/latitude in
        degrees (geographic CRS). Regular spacing, at least 2 cells each, either order.
    crs : pyproj.CRS or any input of ``pyproj.CRS.from_user_input``
        The grid's CRS; its kind decides the grid kind.
    spacing : tuple of float, optional
        Signed (x, y) steps when known exactly (see :class:`GridGeometry`).

    Returns
    -------
    GridGeometry

    Raises
    ------
    CrustflowInputError
        Irregular spacing, fewer than 2 cells along an axis, a projected CRS whose unit is not
        the metre, a geographic CRS whose unit is not the degree, latitudes beyond +-90, or a CRS
        that is neither geographic nor projected.
    """
    if crs is None:
        raise CrustflowInputError(
            "grid_geometry needs the grid's crs (e.g. 'EPSG:4326' or 'EPSG:32633'); for a bare "
            "metre grid build GridGeometry(kind='projected', x=..., y=...)"
        )
    crs = _to_crs(crs)
    horizontal = crs.sub_crs_list[0] if crs.is_compound else crs
    if horizontal.is_geographic:
        kind, wanted, factor = "geographic", "degree", math.radians(1.0)
    elif horizontal.is_projected:
        kind, wanted, factor = "projected", "metre", 1.0
    else:
        raise CrustflowInputError(
            f"crs {crs.name!r} is neither geographic nor projected; give the grid in "
            "longitude/latitude degrees or in a projected CRS in metres"
        )
    for axis in horizontal.axis_info:
        if not math.isclose(axis.unit_conversion_factor, factor, rel_tol=UNIT_RTOL):
            raise CrustflowInputError(
                f"crs {crs.name!r} has axis unit {axis.unit_name!r}; a {kind} grid must be in "
                f"{wanted}s: reproject the grid to a {wanted}-based CRS"
            )
    ellipsoid = Ellipsoid.from_crs(horizontal) if horizontal.ellipsoid is not None else None
    return GridGeometry(kind=kind, x=x, y=y, ellipsoid=ellipsoid, crs=crs, spacing=spacing)


def cell_spacings(geom: GridGeometry) -> tuple[np.ndarray, np.ndarray]:
    """Local metric spacing of cell centres, as used by :func:`gradient`.

    Parameters
    ----------
    geom : GridGeometry

    Returns
    -------
    east, north : numpy.ndarray
        Positive spacings along the parallel and the meridian at each row's centre (geographic
        grids, shape (nrow, 1)), or true lengths of one grid step along x and along y at each cell
        (projected grids with a CRS, shape (nrow, ncol)), m. Projected grids without a CRS:
        ``|dx|``, ``|dy|``, shape (1, 1).

    Notes
    -----
    Geographic: ``east = N(phi) cos(phi) |dlambda|``, ``north = M(phi) |dphi|`` with
    ``W = sqrt(1 - e2 sin^2 phi)``, ``N = a / W``, ``M = a (1 - e2) / W^3``.
    Projected, with the projection factors c, d, b of :mod:`crustflow.geometry.projection`:
    ``east = |dx| sqrt(1 + (d / b)^2) / c``, ``north = |dy| / b``; for a conformal projection
    (d = 0, c = b = k) both are projected lengths divided by the point scale factor k.

    References
    ----------
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395, ch. 4
    (radii of curvature; chapter from memory).
    """
    if geom.scaled:
        f = geom.centre_factors
        return abs(geom.dx) * np.hypot(1.0, f.shear / f.north) / f.east, abs(geom.dy) / f.north
    if geom.kind == "projected":
        return np.full((1, 1), abs(geom.dx)), np.full((1, 1), abs(geom.dy))
    phi = np.radians(geom.y)[:, None]
    n_rad, m_rad = radii_of_curvature(phi, geom.ellipsoid)
    return (
        n_rad * np.cos(phi) * abs(math.radians(geom.dx)),
        m_rad * abs(math.radians(geom.dy)),
    )


def face_lengths(geom: GridGeometry) -> tuple[np.ndarray, np.ndarray]:
    """Lengths of the cell faces used by :func:`divergence`.

    Parameters
    ----------
    geom : GridGeometry

    Returns
    -------
    east_faces : numpy.ndarray
        Length of the faces crossed by the east flux (the meridian segments bounding each row), m,
        shape (nrow, 1); projected grids with a CRS: (nrow, ncol + 1), entry i the face between
        columns i - 1 and i.
    north_faces : numpy.ndarray
        Length of the faces crossed by the north flux (the parallels bounding the rows), m, shape
        (nrow + 1, 1); entry j is the face between rows j - 1 and j (0 and nrow: the grid edges).
        Projected grids with a CRS: (nrow + 1, ncol). These two are read-only arrays cached on the
        geometry.

    Notes
    -----
    Geographic: east faces are the meridian arcs ``integral M(phi) dphi`` between the row's bounding
    parallels, by Gauss-Legendre quadrature; north faces at latitude ``phi_f`` are parallel arcs
    ``N(phi_f) cos(phi_f) |dlambda|`` (exact), zero at a pole. Bounding parallels are midway between
    row centres (half a step beyond the edge rows), clipped to +-90 degrees.
    Projected, with the projection factors c, d, b of :mod:`crustflow.geometry.projection` at
    the face's midpoint: ``|dy| / b`` (true length of a face between columns) and ``|dx| / c``
    (a face between rows: its true length on a conformal projection; on others its extent across
    the north component, the east component crossing it through the shear term of
    :func:`divergence`). Without a CRS: ``|dy|`` and ``|dx|``.

    References
    ----------
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395, ch. 4.
    """
    nrow = geom.shape[0]
    if geom.scaled:
        return geom._ground_faces
    if geom.kind == "projected":
        return np.full((nrow, 1), abs(geom.dy)), np.full((nrow + 1, 1), abs(geom.dx))
    phi_f = np.radians(_row_bounds(geom))
    east = np.abs(_meridian_arc(phi_f[:-1], phi_f[1:], geom.ellipsoid))
    n_rad, _ = radii_of_curvature(phi_f, geom.ellipsoid)
    north = n_rad * np.cos(phi_f) * abs(math.radians(geom.dx))
    north = np.where(np.abs(phi_f) >= math.radians(POLE_LATITUDE), 0.0, north)
    return east[:, None], north[:, None]


def cell_areas(geom: GridGeometry) -> np.ndarray:
    """Cell areas.

    Parameters
    ----------
    geom : GridGeometry

    Returns
    -------
    numpy.ndarray
        Area of each cell, m^2: shape (nrow, 1) for geographic grids (depends on the row only),
        (nrow, ncol) for projected grids with a CRS, (1, 1) for projected grids without one
        (``|dx dy|``); broadcasts against (nrow, ncol). Read-only (cached on the geometry) for
        projected grids with a CRS.

    Notes
    -----
    The exact area on the ellipsoid between parallels phi1 < phi2 over a longitude span dlambda is
    ``A = (a^2 / 2) dlambda (q(phi2) - q(phi1))`` with
    ``q(phi) = (1 - e2) [sin phi / (1 - e2 sin^2 phi) + atanh(e sin phi) / e]`` (Snyder 1987, q of
    the authalic latitude). The difference is evaluated without cancellation (value derived by
    algebra): with ``s = sin phi`` and ``ds = s2 - s1 = 2 cos((phi1+phi2)/2) sin((phi2-phi1)/2)``,
    ``q2 - q1 = (1 - e2) [ds (1 + e2 s1 s2) / ((1 - e2 s1^2)(1 - e2 s2^2))
    + atanh(e ds / (1 - e2 s1 s2)) / e]``; for a sphere the atanh term is ``ds``.
    Bounding parallels as in :func:`face_lengths`.
    Projected: ``|dx dy| / (c b)``, the projected area over the areal scale at the cell centre
    (``k^2`` on a conformal projection; 1 on an equal-area one); midpoint rule, relative error
    about ``(dx^2 + dy^2) / (24 R^2)`` for a cell of sides dx, dy (value derived).

    References
    ----------
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395, ch. 3
    (function q of the authalic latitude, eq. 3-12; equation number from memory).
    """
    if geom.scaled:
        return geom._ground_areas
    if geom.kind == "projected":
        return np.full((1, 1), abs(geom.dx * geom.dy))
    phi_f = np.radians(_row_bounds(geom))
    ell = geom.ellipsoid
    p1, p2 = phi_f[:-1], phi_f[1:]
    s1, s2 = np.sin(p1), np.sin(p2)
    ds = 2.0 * np.cos(0.5 * (p1 + p2)) * np.sin(0.5 * (p2 - p1))
    e2 = ell.e2
    algebraic = ds * (1.0 + e2 * s1 * s2) / ((1.0 - e2 * s1**2) * (1.0 - e2 * s2**2))
    if e2 > 0:
        e = math.sqrt(e2)
        hyperbolic = np.arctanh(e * ds / (1.0 - e2 * s1 * s2)) / e
    else:
        hyperbolic = ds
    dq = (1.0 - e2) * (algebraic + hyperbolic)
    area = 0.5 * ell.semi_major**2 * abs(math.radians(geom.dx)) * np.abs(dq)
    return area[:, None]


def gradient(field, geom: GridGeometry) -> tuple[np.ndarray, np.ndarray]:
    """Horizontal gradient of a gridded field, nodata-aware.

    Parameters
    ----------
    field : array_like, shape (nrow, ncol)
        Scalar field in any unit u; NaN marks nodata.
    geom : GridGeometry

    Returns
    -------
    d_east, d_north : numpy.ndarray, shape (nrow, ncol)
        Derivatives towards east and north, u/m (on projected grids along the local frame of
        :mod:`crustflow.geometry.projection`). NaN where the cell is NaN, or (per component) where
        both neighbours along that axis are missing (on non-conformal projections the east
        component also needs the north derivative).

    Notes
    -----
    Along each axis: central difference ``(f[i+1] - f[i-1]) / (2 d)`` where both neighbours are
    valid, otherwise the one-sided difference to the valid neighbour (grid edges included), with
    the signed coordinate step d, so either axis order gives the right sign. NaN therefore never
    spreads beyond the cells that depend on it, and fields linear in the grid coordinates are
    differentiated exactly.
    Geographic grids: ``(1 / (N cos phi)) df/dlambda`` and ``(1 / M) df/dphi`` (radii of curvature
    as in :func:`cell_spacings`); the east component is NaN on a row centred on a pole. When the
    grid spans all longitudes (:attr:`GridGeometry.periodic_x`) the first and last columns are
    neighbours across the antimeridian, so they get central differences like any other column.
    Projected grids with a CRS: with the grid derivatives ``f_x``, ``f_y`` per projected metre and
    the projection factors c, d, b at the cell centre (:mod:`crustflow.geometry.projection`),
    ``d_east = c f_x + d f_y``, ``d_north = b f_y`` (the transpose of the projection's Jacobian);
    on a conformal projection this is ``k`` times the derivative per projected metre. Without a
    CRS: derivatives per projected metre.

    References
    ----------
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395, ch. 4.
    """
    f = _checked_field(field, geom, "field")
    if geom.kind == "projected":
        fx, fy = _axis_derivative(f, 1, geom.dx), _axis_derivative(f, 0, geom.dy)
        if not geom.scaled:
            return fx, fy
        p = geom.centre_factors
        east = p.east * fx
        sheared = p.shear != 0
        if sheared.any():
            np.add(east, p.shear * fy, out=east, where=sheared)
        return east, p.north * fy
    phi = np.radians(geom.y)[:, None]
    n_rad, m_rad = radii_of_curvature(phi, geom.ellipsoid)
    east_scale = np.where(np.abs(phi) >= math.radians(POLE_LATITUDE), np.nan, n_rad * np.cos(phi))
    d_lam = _axis_derivative(f, 1, math.radians(geom.dx), periodic=geom.periodic_x)
    d_phi = _axis_derivative(f, 0, math.radians(geom.dy))
    return d_lam / east_scale, d_phi / m_rad


def divergence(q_east, q_north, geom: GridGeometry) -> np.ndarray:
    """Flux divergence in finite-volume form (volume-conserving).

    Parameters
    ----------
    q_east, q_north : array_like, shape (nrow, ncol)
        Vector components towards east and north at cell centres, unit u (e.g. m^2/s for a flux per
        unit width); NaN marks nodata (a cell is nodata if either component is NaN).
    geom : GridGeometry

    Returns
    -------
    numpy.ndarray, shape (nrow, ncol)
        Divergence, u/m (m/s for q in m^2/s); NaN on nodata cells only.

    Notes
    -----
    ``div = (sum over the four faces of outward normal q x face length) / cell area``. The value on
    a face is the mean of the two adjacent cells; at the grid edge or next to nodata it is the
    adjacent valid cell's own value, so cells next to nodata keep a finite divergence. Each interior
    face enters its two cells with opposite signs, so for any rectangle of cells
    ``sum(div * area)`` equals the net outward flux through the rectangle's boundary faces to
    rounding. On the ellipsoid this is the discrete form of
    ``(1 / (N cos phi M)) (d(M q_e)/dlambda + d(N cos phi q_n)/dphi)``, including the
    converging-meridians term (uniform northward q gives ``-tan(phi) q / N``). Face lengths from
    :func:`face_lengths`, areas from :func:`cell_areas`. On a grid spanning all longitudes
    (:attr:`GridGeometry.periodic_x`) the west face of the first column and the east face of the
    last column are the same meridian and carry the same flux (mean of the two columns), so the
    antimeridian is an ordinary interior face; otherwise longitude does not wrap around.
    Projected grids with a CRS: true face lengths and cell areas from the projection factors c, d,
    b; on a non-conformal projection a face between rows also passes
    ``q_east |dx| d / (c b)`` (the shear term, d at the face), the exact flux through the face's
    ground image (cross product of q with it).

    References
    ----------
    LeVeque, R. J. (2002). Finite Volume Methods for Hyperbolic Problems. Cambridge University
    Press.
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395.
    """
    qe = _checked_field(q_east, geom, "q_east")
    qn = _checked_field(q_north, geom, "q_north")
    nodata = np.isnan(qe) | np.isnan(qn)
    qe = np.where(nodata, np.nan, qe)
    qn = np.where(nodata, np.nan, qn)
    east_len, north_len = face_lengths(geom)
    flux_e = _face_values(qe, 1, periodic=geom.periodic_x) * east_len  # (nrow, ncol + 1)
    flux_n = _face_values(qn, 0) * north_len  # (nrow + 1, ncol)
    if geom.scaled:
        p = geom.y_face_factors
        sheared = p.shear != 0
        if sheared.any():
            shear_len = abs(geom.dx) * p.shear / (p.east * p.north)
            np.add(flux_n, _face_values(qe, 0) * shear_len, out=flux_n, where=sheared)
    net = np.sign(geom.dx) * (flux_e[:, 1:] - flux_e[:, :-1]) + np.sign(geom.dy) * (
        flux_n[1:, :] - flux_n[:-1, :]
    )
    div = net / cell_areas(geom)
    return np.where(nodata, np.nan, div)


def ground_steps(geom: GridGeometry, x, y, east, north) -> tuple[np.ndarray, ...]:
    """True lengths and directions of short grid steps at arbitrary points.

    Parameters
    ----------
    geom : GridGeometry
    x, y : array_like
        Points, in the grid's coordinates (broadcast together with ``east``, ``north``).
    east, north : array_like
        Unit step directions in the grid's coordinates (grid east/north on projected grids).

    Returns
    -------
    scale, ground_east, ground_north : numpy.ndarray
        Ground metres per projected metre along the step (1 where the grid is not a projected
        grid with a CRS), and the step's unit direction in the local frame of :func:`gradient`.

    Notes
    -----
    With the projection factors c, d, b at the point (:mod:`crustflow.geometry.projection`, exact
    pyproj values), a grid step ``t`` is the ground vector ``(t_x / c, (t_y - d t_x / c) / b)``
    (the inverse Jacobian); scale is its length. Geographic grids and projected grids without a
    CRS return the inputs with scale 1.
    """
    east, north = np.asarray(east, dtype=float), np.asarray(north, dtype=float)
    if not geom.scaled:
        return np.ones(np.broadcast(x, y, east).shape), east + 0.0, north + 0.0
    horizontal = geom.crs.sub_crs_list[0] if geom.crs.is_compound else geom.crs
    f = point_factors(horizontal, x, y)
    ge = east / f.east
    gn = (north - f.shear * ge) / f.north
    scale = np.hypot(ge, gn)
    with np.errstate(invalid="ignore", divide="ignore"):
        return scale, ge / scale, gn / scale


def meridian_convergence(geom: GridGeometry) -> np.ndarray:
    """Meridian convergence at each cell centre.

    Parameters
    ----------
    geom : GridGeometry
        Projected grids need ``geom.crs``.

    Returns
    -------
    numpy.ndarray, shape (nrow, ncol)
        Convergence gamma, degrees: the angle measured clockwise from true north to grid north
        (equivalently counter-clockwise from grid north to true north), so that
        ``true azimuth = grid azimuth + gamma``. Zero on geographic grids.

    Notes
    -----
    Cell centres are transformed to longitude/latitude on the CRS's own geodetic datum and passed to
    ``pyproj.Proj(crs).get_factors(lon, lat).meridian_convergence``. Sign determined empirically
    (pyproj 3.7 / PROJ 9.5) and pinned by a test against ``pyproj.Geod.inv``: positive east of the
    central meridian in the northern hemisphere for Transverse Mercator (UTM 33N at 18 E, 60 N:
    +2.60 degrees; the geodesic azimuth of grid north there is +2.60 degrees).

    References
    ----------
    PROJ contributors. PROJ coordinate transformation software, ``proj_factors``.
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395.
    """
    if geom.kind == "geographic":
        return np.zeros(geom.shape)
    if geom.crs is None:
        raise CrustflowInputError(
            "meridian convergence needs the projected grid's crs; build the geometry with "
            "grid_geometry(x, y, crs)"
        )
    horizontal = geom.crs.sub_crs_list[0] if geom.crs.is_compound else geom.crs
    to_lonlat = pyproj.Transformer.from_crs(horizontal, horizontal.geodetic_crs, always_xy=True)
    ncol = geom.x.size
    # Exact (pyproj) every CONVERGENCE_SPACING along a row and at its last cell, linear in between:
    # rows stay independent (strips of rows give the same numbers as the whole grid).
    stride = max(1, int(CONVERGENCE_SPACING // abs(geom.dx)))
    cols = np.unique(np.r_[np.arange(0, ncol, stride), ncol - 1])
    east, north = np.meshgrid(geom.x[cols], geom.y)
    lon, lat = to_lonlat.transform(east, north)
    factors = pyproj.Proj(horizontal).get_factors(lon, lat)
    exact = np.asarray(factors.meridian_convergence, dtype=float).reshape(geom.y.size, cols.size)
    if cols.size == ncol:
        return exact
    right = np.clip(np.searchsorted(cols, np.arange(ncol), side="right"), 1, cols.size - 1)
    left = right - 1
    weight = (np.arange(ncol) - cols[left]) / (cols[right] - cols[left])
    return exact[:, left] * (1.0 - weight) + exact[:, right] * weight


def azimuth(east, north, geom: GridGeometry) -> np.ndarray:
    """Azimuth of a vector field, degrees clockwise from true north.

    Parameters
    ----------
    east, north : array_like, shape (nrow, ncol)
        Vector components (any common unit): local east/north on geographic grids, grid east/north
        on projected grids.
    geom : GridGeometry

    Returns
    -------
    numpy.ndarray, shape (nrow, ncol)
        Azimuth in [0, 360) degrees clockwise from true north. NaN where either component is NaN;
        0 for a zero vector (no direction; by definition, not convergence-corrected).

    Notes
    -----
    ``azimuth = atan2(east, north) + gamma`` reduced to [0, 360), with gamma from
    :func:`meridian_convergence` (0 on geographic grids). On a conformal projection (UTM, Lambert
    conformal conic, polar stereographic, Mercator) this equals the ``pyproj.Geod.inv`` forward
    azimuth from a cell centre to a point a short distance along the vector. On other projections
    (projected grids with a CRS) the vector's frame is turned by the true azimuth of grid north,
    which departs from gamma by up to the angular distortion: that offset
    (:attr:`crustflow.geometry.projection.ProjectionFactors.north_offset`) is added too.
    """
    e = _checked_field(east, geom, "east")
    n = _checked_field(north, geom, "north")
    az = np.degrees(np.arctan2(e, n))
    if geom.kind == "projected":
        az = az + meridian_convergence(geom)
        if geom.scaled:
            offset = geom.centre_factors.north_offset
            if np.any(offset != 0.0):
                az = az + offset
    az = np.mod(az, FULL_TURN)
    az = np.where(az >= FULL_TURN, 0.0, az)  # np.mod(-tiny, 360) rounds to 360
    az = np.where((e == 0) & (n == 0), 0.0, az)
    return np.where(np.isnan(e) | np.isnan(n), np.nan, az)


# ----------------------------------------------------------------------------------------------
# helpers


def _to_crs(crs) -> pyproj.CRS:
    try:
        return pyproj.CRS.from_user_input(crs)
    except pyproj.exceptions.CRSError as err:
        raise CrustflowInputError(
            f"crs {crs!r} is not understood by pyproj ({err}); give e.g. 'EPSG:4326' or a WKT "
            "string"
        ) from None


def _checked_coords(values, name: str) -> np.ndarray:
    c = np.array(values, dtype=float).reshape(-1) if np.ndim(values) <= 1 else None
    if c is None:
        raise CrustflowInputError(
            f"{name} has shape {np.shape(values)}; give 1-D cell-centre coordinates"
        )
    if c.size < 2:
        raise CrustflowInputError(
            f"{name} has {c.size} cell(s); a grid needs at least 2 cells along each axis: "
            "give a larger grid"
        )
    if not np.all(np.isfinite(c)):
        raise CrustflowInputError(
            f"{name} contains NaN or infinite coordinates; give finite values"
        )
    steps = np.diff(c)
    step = _step(c)
    if step == 0 or np.max(np.abs(steps - step)) > SPACING_RTOL * abs(step):
        raise CrustflowInputError(
            f"{name} spacing is irregular (steps from {steps.min():g} to {steps.max():g}); "
            "resample the grid to regular spacing first"
        )
    c.setflags(write=False)
    return c


def _step(c: np.ndarray) -> float:
    return float((c[-1] - c[0]) / (c.size - 1))


def _checked_field(values, geom: GridGeometry, name: str) -> np.ndarray:
    f = np.asarray(values, dtype=float)
    if f.shape != geom.shape:
        raise CrustflowInputError(
            f"{name} has shape {f.shape} but the grid is {geom.shape}; pass arrays indexed "
            "[row, col] = [y, x] on the same grid"
        )
    return f


def radii_of_curvature(phi: np.ndarray, ell: Ellipsoid) -> tuple[np.ndarray, np.ndarray]:
    """Prime-vertical (N) and meridional (M) radii of curvature, m, at latitude phi (rad)."""
    w = np.sqrt(1.0 - ell.e2 * np.sin(phi) ** 2)
    return ell.semi_major / w, ell.semi_major * (1.0 - ell.e2) / w**3


def _meridian_arc(phi1: np.ndarray, phi2: np.ndarray, ell: Ellipsoid) -> np.ndarray:
    """Signed meridian arc length from phi1 to phi2 (rad), m, by Gauss-Legendre on M(phi)."""
    half = 0.5 * (phi2 - phi1)
    mid = 0.5 * (phi2 + phi1)
    nodes = mid[..., None] + half[..., None] * _GL_NODES
    _, m_rad = radii_of_curvature(nodes, ell)
    # Weighted sum node by node, not a matrix product: BLAS may order the sum differently for
    # different numbers of rows, and a strip of rows must get the whole grid's values bit for bit.
    total = np.zeros_like(half)
    for k, weight in enumerate(_GL_WEIGHTS):
        total += weight * m_rad[..., k]
    return half * total


def _face_mean(v: np.ndarray, axis: int) -> np.ndarray:
    """The n + 1 face values of n cell values along ``axis``: neighbour means inside, linear
    extrapolation at the ends; arrays of length 1 along ``axis`` (broadcast constants) pass."""
    if v.shape[axis] == 1:
        return v

    def part(sl: slice) -> tuple:
        return (sl, slice(None)) if axis == 0 else (slice(None), sl)

    shape = list(v.shape)
    shape[axis] += 1
    out = np.empty(shape)
    inner = out[part(slice(1, -1))]
    np.add(v[part(slice(None, -1))], v[part(slice(1, None))], out=inner)
    inner *= 0.5
    out[part(slice(0, 1))] = 1.5 * v[part(slice(0, 1))] - 0.5 * v[part(slice(1, 2))]
    out[part(slice(-1, None))] = 1.5 * v[part(slice(-1, None))] - 0.5 * v[part(slice(-2, -1))]
    return out


def _bounds(c: np.ndarray, step: float) -> np.ndarray:
    """The n + 1 face coordinates of n cell centres: midpoints, and half a step beyond the ends."""
    return np.concatenate(([c[0] - 0.5 * step], 0.5 * (c[:-1] + c[1:]), [c[-1] + 0.5 * step]))


def _row_bounds(geom: GridGeometry) -> np.ndarray:
    """Latitudes (degrees) of the nrow + 1 parallels bounding the rows, clipped to the poles."""
    return np.clip(_bounds(geom.y, geom.dy), -POLE_LATITUDE, POLE_LATITUDE)


def _axis_derivative(
    f: np.ndarray, axis: int, step: float, *, periodic: bool = False
) -> np.ndarray:
    """d f / d coordinate along ``axis``: central, or one-sided next to NaN and at the edges.

    ``periodic``: the first and last cells along ``axis`` are neighbours (no edges).
    """

    def part(sl: slice) -> tuple:
        return (sl, slice(None)) if axis == 0 else (slice(None), sl)

    out = np.empty_like(f)
    inv2, inv1 = 0.5 / step, 1.0 / step
    if periodic:  # one wrapped cell on each side: every cell is interior
        g = np.concatenate([f[part(slice(-1, None))], f, f[part(slice(0, 1))]], axis=axis)
        prev, here, nxt = g[part(slice(None, -2))], f, g[part(slice(2, None))]
        inner = out
    else:
        prev, here, nxt = f[part(slice(None, -2))], f[part(slice(1, -1))], f[part(slice(2, None))]
        inner = out[part(slice(1, -1))]
    with np.errstate(invalid="ignore"):
        # Interior: central difference where both neighbours are valid ...
        np.subtract(nxt, prev, out=inner)
        inner *= inv2
        # ... else one-sided from the valid neighbour (NaN if there is none).
        lone = np.isnan(inner)
        if lone.any():
            forward = np.where(np.isnan(nxt), (here - prev) * inv1, (nxt - here) * inv1)
            np.copyto(inner, forward, where=lone)
        if not periodic:  # grid edges: one-sided from the only neighbour
            out[part(slice(0, 1))] = (f[part(slice(1, 2))] - f[part(slice(0, 1))]) * inv1
            out[part(slice(-1, None))] = (f[part(slice(-1, None))] - f[part(slice(-2, -1))]) * inv1
    np.copyto(out, f, where=np.isnan(f))  # nodata stays nodata
    return out


def _face_values(q: np.ndarray, axis: int, *, periodic: bool = False) -> np.ndarray:
    """Values on the n + 1 faces along ``axis``: mean of valid neighbours, else the valid one.

    ``periodic``: faces 0 and n are one face between the last and the first cell (same value).
    """

    def part(sl) -> tuple:
        return (sl, slice(None)) if axis == 0 else (slice(None), sl)

    shape = list(q.shape)
    shape[axis] += 1
    out = np.empty(shape, dtype=q.dtype)
    if periodic:  # the seam face is an interior face between the last cell and the first
        q = np.concatenate([q[part(slice(-1, None))], q], axis=axis)
        inner = out[part(slice(0, -1))]
    else:
        inner = out[part(slice(1, -1))]
    left, right = q[part(slice(None, -1))], q[part(slice(1, None))]
    np.add(left, right, out=inner)
    inner *= 0.5
    lone = np.isnan(inner)
    if lone.any():  # next to nodata: the valid neighbour's own value (NaN if neither is valid)
        np.copyto(inner, np.where(np.isnan(left), right, left), where=lone)
    if periodic:
        out[part(slice(-1, None))] = out[part(slice(0, 1))]
    else:
        out[part(slice(0, 1))] = q[part(slice(0, 1))]
        out[part(slice(-1, None))] = q[part(slice(-1, None))]
    return out
