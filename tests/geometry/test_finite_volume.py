"""Finite-volume faces on the ellipsoid agree with the maps' geometry and conserve volume."""

from __future__ import annotations

import numpy as np
import pytest

from crustflow.geometry.finite_volume import edge_faces, face_network, net_inflow
from crustflow.geometry.grid import WGS84, GridGeometry, cell_areas, divergence


def _geographic(lon, lat):
    return GridGeometry(kind="geographic", x=lon, y=lat, ellipsoid=WGS84)


def test_face_fluxes_match_the_maps_divergence():
    # Same face values (mean of the two cells) and face lengths as crustflow.geometry.grid.divergence:
    # interior cells get the same thickening rate (the maps' finite-volume form, LeVeque 2002).
    geom = _geographic(np.arange(20) * 0.5 + 0.25, 60 - np.arange(15) * 0.5 - 0.25)
    rng = np.random.default_rng(1)
    qe, qn = rng.normal(size=geom.shape), rng.normal(size=geom.shape)
    net = face_network(geom, np.ones(geom.shape, dtype=bool))
    e, n = qe.ravel(), qn.ravel()
    face = np.where(
        net.axis == 0, 0.5 * (e[net.left] + e[net.right]), 0.5 * (n[net.left] + n[net.right])
    )
    rate = net_inflow(face * net.sign, net).reshape(geom.shape) / np.broadcast_to(
        cell_areas(geom), geom.shape
    )
    maps = -divergence(qe, qn, geom)
    np.testing.assert_allclose(rate[1:-1, 1:-1], maps[1:-1, 1:-1], rtol=1e-10, atol=1e-15)


def test_net_inflow_sums_to_zero_and_wraps_the_globe():
    # Whole-globe grid: the seam is an ordinary face, so a closed globe conserves volume exactly.
    geom = _geographic(np.arange(36) * 10 + 5.0, 85 - np.arange(18) * 10.0)
    assert geom.periodic_x
    domain = np.ones(geom.shape, dtype=bool)
    domain[5, 7] = False  # a nodata cell stays out of the network
    net = face_network(geom, domain)
    assert not np.any((net.left == 5 * 36 + 7) | (net.right == 5 * 36 + 7))
    seam = (net.axis == 0) & (net.left % 36 == 35)
    assert np.all(net.right[seam] % 36 == 0) and seam.sum() == 18
    rng = np.random.default_rng(2)
    total = net_inflow(rng.normal(size=net.size), net).sum()
    assert abs(total) < 1e-12 * net.length.sum()


def test_edge_faces_by_compass_direction():
    # Rows north to south (dy < 0): the north edge is row 0; edge faces are the parallels bounding it.
    geom = _geographic(np.arange(4) + 0.5, np.array([2.5, 1.5, 0.5]))
    domain = np.ones(geom.shape, dtype=bool)
    cells, length = edge_faces(geom, domain, "north")
    np.testing.assert_array_equal(cells, np.arange(4))
    cells, length = edge_faces(geom, domain, "west")
    np.testing.assert_array_equal(cells, [0, 4, 8])
    # meridian arc of 1 degree near the equator: 110.57 km (WGS84; NIMA TR8350.2 radii)
    assert length[2] == pytest.approx(110574, rel=1e-3)
