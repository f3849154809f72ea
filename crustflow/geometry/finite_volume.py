"""Finite-volume faces of a grid on the ellipsoid: two-point fluxes and sparse operators.

The cells of a :class:`~crustflow.geometry.grid.GridGeometry` inside a domain mask exchange volume
through the faces they share. A :class:`FaceNetwork` lists every such face once, with the two cells it
joins (``left`` -> ``right``: towards increasing column or row index), its length and the distance
between the two cell centres. A flux computed on a face enters ``right`` and leaves ``left`` with the
same value, so any sum of ``area * rate`` over cells telescopes to the domain's boundary faces:
volume is conserved to rounding.

Face lengths and cell areas are those of :func:`crustflow.geometry.grid.face_lengths` and
:func:`crustflow.geometry.grid.cell_areas` (meridian arcs, parallels and exact authalic areas on the
ellipsoid); distances between centres come from :func:`crustflow.geometry.grid.cell_spacings`.
Whole-globe grids (:attr:`GridGeometry.periodic_x`) join the last and the first column across the
antimeridian; faces at the poles have zero length. Pure numpy and scipy.sparse; no files.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import GridGeometry, cell_areas, cell_spacings, face_lengths

__all__ = [
    "FaceNetwork",
    "face_network",
    "edge_faces",
    "harmonic_mean",
    "face_difference",
    "net_inflow",
    "conductance_matrix",
    "ConductanceAssembly",
    "EDGE_NAMES",
]

#: Grid edges by compass direction.
EDGE_NAMES = ("west", "east", "south", "north")


@dataclass(frozen=True, eq=False)
class FaceNetwork:
    """The faces between neighbouring domain cells of a grid.

    Attributes
    ----------
    shape : tuple of int
        Grid shape (nrow, ncol); cells are numbered ``row * ncol + col``.
    left, right : numpy.ndarray of int64
        The two cells of each face; ``right`` is the next column (east faces) or the next row
        (north faces), and the first column for the seam face of a whole-globe grid.
    length : numpy.ndarray
        Face length, m.
    distance : numpy.ndarray
        Distance between the two cell centres, m.
    axis : numpy.ndarray of int8
        0 for faces between columns (crossed by the east flux), 1 between rows (north flux).
    sign : numpy.ndarray
        +1 if ``left -> right`` points east (axis 0) or north (axis 1), else -1.
    area : numpy.ndarray
        Area of every cell of the grid, flat, m^2.
    """

    shape: tuple[int, int]
    left: np.ndarray
    right: np.ndarray
    length: np.ndarray
    distance: np.ndarray
    axis: np.ndarray
    sign: np.ndarray
    area: np.ndarray

    @property
    def size(self) -> int:
        """Number of faces."""
        return self.left.size


def face_network(geom: GridGeometry, domain: np.ndarray) -> FaceNetwork:
    """All faces between two cells of the domain.

    Parameters
    ----------
    geom : GridGeometry
    domain : numpy.ndarray of bool, shape (nrow, ncol)
        Cells that take part (nodata cells are out: no face joins them).

    Returns
    -------
    FaceNetwork

    Notes
    -----
    East faces: length of the meridian segment bounding the row, distance ``N cos(phi) |dlambda|``
    at the row's centre (the parallel arc between the centres). North faces: length of the parallel
    between the rows, distance the mean of the two rows' ``M |dphi|`` (the meridian arc between the
    centres to second order in the step; value derived). Projected grids: ``|dy|`` / ``|dx|``.
    """
    nrow, ncol = geom.shape
    domain = np.asarray(domain, dtype=bool)
    if domain.shape != geom.shape:
        raise CrustflowInputError(
            f"domain mask has shape {domain.shape} but the grid is {geom.shape}; pass one "
            "boolean per cell"
        )
    index = np.arange(nrow * ncol).reshape(nrow, ncol)
    east_len, north_len, east_gap, north_gap = _full_metrics(geom)
    # between columns (and across the antimeridian on whole-globe grids)
    lc, rc = index[:, :-1], index[:, 1:]
    e_len, e_gap = east_len[:, 1:ncol], 0.5 * (east_gap[:, :-1] + east_gap[:, 1:])
    if geom.periodic_x:
        lc, rc = np.hstack([lc, index[:, -1:]]), np.hstack([rc, index[:, :1]])
        e_len = np.hstack([e_len, east_len[:, :1]])
        e_gap = np.hstack([e_gap, 0.5 * (east_gap[:, -1:] + east_gap[:, :1])])
    # between rows
    lr, rr = index[:-1, :], index[1:, :]
    n_len, n_gap = north_len[1:nrow, :], 0.5 * (north_gap[:-1, :] + north_gap[1:, :])
    left = np.concatenate([lc.ravel(), lr.ravel()])
    right = np.concatenate([rc.ravel(), rr.ravel()])
    length = np.concatenate([e_len.ravel(), n_len.ravel()])
    distance = np.concatenate([e_gap.ravel(), n_gap.ravel()])
    axis = np.concatenate([np.zeros(lc.size, np.int8), np.ones(lr.size, np.int8)])
    sign = np.where(axis == 0, np.sign(geom.dx), np.sign(geom.dy))
    flat = domain.ravel()
    keep = flat[left] & flat[right]
    area = np.broadcast_to(cell_areas(geom), geom.shape).ravel().copy()
    return FaceNetwork(
        shape=(nrow, ncol),
        left=left[keep],
        right=right[keep],
        length=length[keep],
        distance=distance[keep],
        axis=axis[keep],
        sign=sign[keep].astype(float),
        area=area,
    )


def edge_faces(geom: GridGeometry, domain: np.ndarray, edge: str) -> tuple[np.ndarray, np.ndarray]:
    """The outer faces of the domain cells on one edge of the grid.

    Parameters
    ----------
    geom : GridGeometry
    domain : numpy.ndarray of bool, shape (nrow, ncol)
    edge : {"west", "east", "south", "north"}
        By compass direction, whatever the order of the grid's coordinates.

    Returns
    -------
    cells : numpy.ndarray of int64
        Flat indices of the domain cells in the grid's outermost column or row on that edge.
    length : numpy.ndarray
        Length of each cell's outer face, m (zero at a pole).
    """
    if edge not in EDGE_NAMES:
        raise CrustflowInputError(f"edge {edge!r} is not one of {', '.join(EDGE_NAMES)}")
    nrow, ncol = geom.shape
    east_len, north_len, _, _ = _full_metrics(geom)
    if edge in ("west", "east"):
        col = 0 if (edge == "west") == (geom.dx > 0) else ncol - 1
        rows = np.arange(nrow)
        cells, length = rows * ncol + col, east_len[:, 0 if col == 0 else ncol].copy()
    else:
        row = 0 if (edge == "south") == (geom.dy > 0) else nrow - 1
        cells = row * ncol + np.arange(ncol)
        length = north_len[0 if row == 0 else nrow, :].copy()
    keep = np.asarray(domain, dtype=bool).ravel()[cells]
    return cells[keep], length[keep]


def _full_metrics(geom: GridGeometry):
    """Face lengths and centre spacings on the full grid: east faces (nrow, ncol + 1), north faces
    (nrow + 1, ncol), east and north spacings (nrow, ncol), m. Geographic grids give them per row,
    projected grids with a CRS per cell (true lengths with the projection factors)."""
    nrow, ncol = geom.shape
    east_len, north_len = face_lengths(geom)
    east_gap, north_gap = cell_spacings(geom)
    return (
        np.broadcast_to(east_len, (nrow, ncol + 1)),
        np.broadcast_to(north_len, (nrow + 1, ncol)),
        np.broadcast_to(east_gap, (nrow, ncol)),
        np.broadcast_to(north_gap, (nrow, ncol)),
    )


def harmonic_mean(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Harmonic mean ``2 a b / (a + b)`` of two non-negative arrays (0 where either is 0).

    Notes
    -----
    The transmissivity of two half-cells in series: the exact face value for a layered medium
    across a strength jump (e.g. Patankar 1980, Numerical Heat Transfer and Fluid Flow, section
    4.2-3; section number from memory).
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    total = a + b
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, 2.0 * a * b / np.where(total > 0, total, 1.0), 0.0)


def face_difference(values: np.ndarray, net: FaceNetwork) -> np.ndarray:
    """Two-point derivative ``(v[right] - v[left]) / distance`` on every face, unit of v per m."""
    v = np.asarray(values, dtype=float).ravel()
    return (v[net.right] - v[net.left]) / net.distance


def net_inflow(face_flux: np.ndarray, net: FaceNetwork) -> np.ndarray:
    """Volume entering each cell per unit time from face fluxes, flat.

    Parameters
    ----------
    face_flux : numpy.ndarray
        Flux per unit face length from ``left`` to ``right``, m^2/s.
    net : FaceNetwork

    Returns
    -------
    numpy.ndarray
        ``sum over faces of (+-) flux * length``, m^3/s, one value per grid cell: each face's volume
        leaves ``left`` and enters ``right`` once, so the sum over all cells is zero to rounding.
    """
    volume = np.asarray(face_flux, dtype=float) * net.length
    ncell = net.shape[0] * net.shape[1]
    return np.bincount(net.right, volume, minlength=ncell) - np.bincount(
        net.left, volume, minlength=ncell
    )


def conductance_matrix(
    weights: np.ndarray, net: FaceNetwork, unknowns: np.ndarray
) -> sp.csr_matrix:
    """Symmetric sparse matrix ``S`` of a two-point flux law, restricted to unknown cells.

    Parameters
    ----------
    weights : numpy.ndarray
        Per face, volume flux per unit potential difference ``w = c length / distance`` (c the face's
        conductance), non-negative.
    net : FaceNetwork
    unknowns : numpy.ndarray of int64
        Flat grid indices of the cells solved for, in the order of the matrix rows.

    Returns
    -------
    scipy.sparse.csr_matrix
        ``(S p)_i = sum over faces of i: w (p_i - p_j)``: the net volume outflow of cell i for a
        potential p (p = 0 on cells not among ``unknowns``). Symmetric positive semi-definite.
        Built by :class:`ConductanceAssembly`; use one directly to build many matrices.
    """
    return ConductanceAssembly(net, unknowns).matrix(weights)


class ConductanceAssembly:
    """The sparsity pattern of :func:`conductance_matrix` for one network and set of unknowns.

    The pattern (sorted CSR indices, the slot of every face's entries) is found once; each matrix
    then costs two weighted counts over the faces. Nonlinear flux laws need a matrix per iteration
    with the same pattern.

    Parameters
    ----------
    net : FaceNetwork
    unknowns : numpy.ndarray of int64
        Flat grid indices of the cells solved for, in the order of the matrix rows.
    """

    def __init__(self, net: FaceNetwork, unknowns: np.ndarray) -> None:
        n = int(unknowns.size)
        position = np.full(net.shape[0] * net.shape[1], -1, dtype=np.int64)
        position[unknowns] = np.arange(n)
        pl, pr = position[net.left], position[net.right]
        self.size = n
        self.left_face, self.right_face = np.flatnonzero(pl >= 0), np.flatnonzero(pr >= 0)
        self.left_row, self.right_row = pl[self.left_face], pr[self.right_face]
        self.both = np.flatnonzero((pl >= 0) & (pr >= 0))
        rows = np.concatenate([pl[self.both], pr[self.both], np.arange(n)])
        cols = np.concatenate([pr[self.both], pl[self.both], np.arange(n)])
        # One slot per distinct (row, col): a face joining a cell to itself or two faces joining
        # the same pair (whole-globe grids one or two columns wide) add up in their slot.
        keys, self.slot = np.unique(rows * max(n, 1) + cols, return_inverse=True)
        self.indices = (keys % max(n, 1)).astype(np.int32 if n < 2**31 else np.int64)
        self.indptr = np.searchsorted(keys // max(n, 1), np.arange(n + 1)).astype(
            self.indices.dtype
        )

    def matrix(self, weights: np.ndarray, diagonal: np.ndarray | None = None) -> sp.csr_matrix:
        """``S`` for per-face ``weights`` (see :func:`conductance_matrix`), plus ``diagonal``."""
        w = np.asarray(weights, dtype=float)
        n = self.size
        diag = np.bincount(self.left_row, w[self.left_face], minlength=n) + np.bincount(
            self.right_row, w[self.right_face], minlength=n
        )
        if diagonal is not None:
            diag = diag + diagonal
        off = -w[self.both]
        values = np.concatenate([off, off, diag])
        data = np.bincount(self.slot, values, minlength=self.indices.size)
        return sp.csr_matrix((data, self.indices, self.indptr), shape=(n, n), copy=False)
