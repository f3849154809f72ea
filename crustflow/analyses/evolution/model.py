"""Topography and crust through time under channel flow: the state, its transport problem, snapshots.

The state is the crustal thickness T of every cell; the elevation follows by Airy isostasy
(:func:`crustflow.physics.isostasy.isostatic_elevation`, the path integral of the uplift rate the maps
report). The channel flux is computed from the current state with the maps' own physics: the density
column and driving potential of :func:`crustflow.engine.fields.column_si` and the per-cell channel
solution of :func:`crustflow.scenario.channel.solve_cells`, evaluated on the faces of the finite-volume
network. Stepping is :func:`crustflow.physics.diffusion.integrate`. The saved variables of every
snapshot come from :func:`crustflow.engine.fields.fields_si` (the engine function behind
``crustflow run`` and :func:`crustflow.compute_fields`) on the state of that moment, so a snapshot
is what ``crustflow run`` gives for that elevation and thickness.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import xarray as xr

from crustflow._version import __version__
from crustflow.engine.cells import solve_cells
from crustflow.engine.fields import column_si, crust_thickness_of, fields_si
from crustflow.errors import CrustflowInputError
from crustflow.geometry.finite_volume import edge_faces, face_network, harmonic_mean
from crustflow.geometry.grid import GridGeometry, gradient, grid_geometry
from crustflow.physics.diffusion import ChannelTransport
from crustflow.physics.isostasy import isostatic_elevation
from crustflow.scenario.channel import ChannelSetup
from crustflow.scenario.evolution import EDGES, EvolutionSpec
from crustflow.scenario.parameters import ModelParameters
from crustflow.variables import CAUTION, to_practical

__all__ = ["EvolutionSetup", "build_setup", "SECONDS_PER_MYR", "TIME_UNITS"]

#: One million Julian years, s (1 yr = 365.25 d = 31 557 600 s; IAU definition of the Julian year).
SECONDS_PER_MYR = 1e6 * 365.25 * 86400.0

#: Unit of the time coordinate in outputs.
TIME_UNITS = "Myr"

#: Thickness perturbation for the slope of the driving potential, m (exact for the piecewise-linear
#: column; project choice).
SLOPE_STEP = 1.0


@dataclass(eq=False)
class EvolutionSetup:
    """Everything one run through time needs, on a north-up grid (SI).

    Attributes
    ----------
    topography : xarray.DataArray
        The initial elevation (m) with coordinates, CRS and transform; rows north to south.
    geometry : GridGeometry
    parameters : ModelParameters
    channel : ChannelSetup
    load_setup : object or None
    cell : dict
        Parameter grids as DataArrays (for compute_fields) ...
    cell_si : dict
        ... and as numpy arrays (for the column and the channel).
    elevation0, thickness0 : numpy.ndarray
        H and T at t = 0, m, NaN off the domain.
    domain : numpy.ndarray of bool
    fixed : numpy.ndarray of bool
        Domain cells held fixed by ``fixed`` edges.
    problem : ChannelTransport
    spec : EvolutionSpec
    """

    topography: xr.DataArray
    geometry: GridGeometry
    parameters: ModelParameters
    channel: ChannelSetup
    load_setup: object
    cell: dict
    cell_si: dict
    elevation0: np.ndarray
    thickness0: np.ndarray
    domain: np.ndarray
    fixed: np.ndarray
    problem: ChannelTransport
    spec: EvolutionSpec

    def elevation(self, thickness: np.ndarray) -> np.ndarray:
        """Elevation (m) of the state with crustal thickness ``thickness`` (m, grid-shaped)."""
        p = self.parameters
        return isostatic_elevation(
            thickness,
            self.elevation0,
            self.thickness0,
            rho_channel=p.rho_channel,
            rho_mantle=p.rho_mantle,
            rho_water=p.rho_water,
        )

    def fields(self, thickness: np.ndarray, wanted) -> dict:
        """Map variables of a state in practical units: the engine's ``fields_si`` on H(T), T.

        The same function ``crustflow run`` and :func:`crustflow.compute_fields` call, on the
        same geometry, so a state gives the maps' numbers (the load filters, which evolve refuses,
        are the only step of ``compute_fields`` left out).
        """
        T = np.where(self.domain, thickness, np.nan)
        H = np.where(self.domain, self.elevation(T), np.nan)
        si = fields_si(
            H,
            T,
            self.geometry,
            self.parameters,
            wanted=set(wanted),
            setup=self.channel,
            cell=self.cell_si,
            load_setup=self.load_setup,
        )
        return {name: to_practical(name, si[name]) for name in wanted}

    def volume(self, thickness: np.ndarray) -> float:
        """Crustal volume of the domain, m^3."""
        area = self.problem.network.area.reshape(self.geometry.shape)
        return float(np.sum(np.where(self.domain, thickness * area, 0.0)))


def _north_up(topography, crust_thickness, moho_depth, cell):
    if topography.y.values[0] < topography.y.values[-1]:
        topography = topography.isel(y=slice(None, None, -1))
        topography = topography.rio.write_transform(topography.rio.transform(recalc=True))
        crust_thickness = None if crust_thickness is None else crust_thickness.sortby("y", False)
        moho_depth = None if moho_depth is None else moho_depth.sortby("y", False)
        cell = {k: v.sortby("y", False) for k, v in cell.items()}
    return topography, crust_thickness, moho_depth, cell


def _check_supported(channel: ChannelSetup, load_setup, parameters: ModelParameters) -> None:
    if load_setup is not None and getattr(load_setup, "filtered", False):
        raise CrustflowInputError(
            "evolve steps the local (Airy) load only: remove [load] smoothing and "
            "elastic_thickness from the scenario to run it through time"
        )
    if channel.rheology == "flow-law":
        raise CrustflowInputError(
            'evolve supports channel.rheology "newtonian" and "power-law"; the temperature-'
            'dependent "flow-law" channel is not stepped through time yet: use one of them'
        )
    if channel.rheology == "power-law" and (parameters.wall_east or parameters.wall_north):
        raise CrustflowInputError(
            "evolve with a power-law channel needs walls at rest: set [walls] upper_velocity = "
            '["0 mm/yr", "0 mm/yr"] or use a newtonian channel'
        )


def _cell_laws(H, T, p, channel, load_setup, cell_si):
    """Per-cell conductance C and wall flux (east, north) from the maps' one-cell solution."""
    col = column_si(H, T, p, load_setup=load_setup, cell=cell_si)
    valid = col["valid"]
    zero, one = np.zeros(H.shape), np.ones(H.shape)
    kw = dict(
        viscosity=p.viscosity,
        cell=cell_si,
        elevation=col["H"],
        top_depth=col["z_top"],
        full=False,
    )
    h = np.where(valid, col["h"], np.nan) if np.ndim(col["h"]) else col["h"]
    walls = dict(wall_east=p.wall_east, wall_north=p.wall_north)
    still = dict(wall_east=0.0, wall_north=0.0)
    unit = solve_cells(np.where(valid, one, np.nan), zero, h, channel, **still, **kw)
    conductance = -unit["flux_east"]  # q = -C |G|^(n-1) G at |G| = 1 Pa/m, walls at rest
    if channel.rheology == "newtonian":
        wall = solve_cells(np.where(valid, zero, np.nan), zero, h, channel, **walls, **kw)
        return valid, conductance, wall["flux_east"], wall["flux_north"], 1.0
    nothing = np.where(valid, 0.0, np.nan)
    return valid, conductance, nothing, nothing, float(channel.stress_exponent)


def _edges(geom, domain, spec: EvolutionSpec):
    """Fixed-cell mask and edge sources (m^3/s per cell, flat) from the edge conditions."""
    fixed = np.zeros(geom.shape, dtype=bool)
    source = np.zeros(domain.size)
    for edge in EDGES:
        cond = spec.boundaries[edge]
        if cond.kind == "closed":
            continue
        if geom.periodic_x and edge in ("west", "east"):
            raise CrustflowInputError(
                f"evolution.boundaries.{edge} = {cond.kind!r} on a grid that wraps around the "
                "globe in longitude: it has no west or east edge; leave them out"
            )
        cells, length = edge_faces(geom, domain, edge)
        if cond.kind == "fixed":
            fixed.ravel()[cells] = True
        else:
            np.add.at(source, cells, cond.inflow * length)
    source[fixed.ravel()] = 0.0  # fixed cells keep their state: inflow there goes nowhere
    return fixed, source


def build_setup(
    topography: xr.DataArray,
    *,
    parameters: ModelParameters,
    spec: EvolutionSpec,
    crust_thickness: xr.DataArray | None = None,
    moho_depth: xr.DataArray | None = None,
    channel: ChannelSetup | None = None,
    load_setup=None,
    cell: dict | None = None,
) -> EvolutionSetup:
    """Build the state and the transport problem of a run through time.

    Parameters
    ----------
    topography : xarray.DataArray
        Initial elevation, m, dims (y, x), CRS set (as for :func:`crustflow.compute_fields`).
    parameters : ModelParameters
    spec : EvolutionSpec
    crust_thickness, moho_depth : xarray.DataArray, optional
        As for :func:`crustflow.compute_fields` (neither: Airy from the reference thickness).
    channel : ChannelSetup, optional
    load_setup : crustflow.scenario.load.LoadSetup, optional
    cell : dict of xarray.DataArray, optional
        Parameter grids, SI.

    Returns
    -------
    EvolutionSetup

    Raises
    ------
    CrustflowInputError
        Load filters, a flow-law channel, a power-law channel with moving walls, west/east edge
        conditions on a whole-globe grid, a column whose load falls as it thickens, inflow with no
        fixed edge in the steady mode.
    """
    channel = channel if channel is not None else ChannelSetup()
    p = parameters
    _check_supported(channel, load_setup, p)
    topo, ct, md, cell = _north_up(topography, crust_thickness, moho_depth, dict(cell or {}))
    transform = topo.rio.transform()
    geom = grid_geometry(
        topo.x.values, topo.y.values, topo.rio.crs, spacing=(transform.a, transform.e)
    )
    H = np.asarray(topo.values, dtype=float)
    grids = {
        k: np.asarray(v.values, dtype=float)
        for k, v in (("crust_thickness", ct), ("moho_depth", md))
        if v is not None
    }
    T = np.asarray(crust_thickness_of(H, p, **grids), dtype=float)
    cell_si = {k: np.asarray(v.values, dtype=float) for k, v in cell.items()}
    valid, conductance, wall_e, wall_n, exponent = _cell_laws(H, T, p, channel, load_setup, cell_si)
    domain = valid & np.isfinite(conductance) & np.isfinite(wall_e) & np.isfinite(wall_n)
    H0, T0 = np.where(domain, H, np.nan), np.where(domain, T, np.nan)
    net = face_network(geom, domain)
    fixed, source = _edges(geom, domain, spec)
    c_flat, we, wn = conductance.ravel(), wall_e.ravel(), wall_n.ravel()
    wall_face = (
        np.where(
            net.axis == 0,
            0.5 * (we[net.left] + we[net.right]),
            0.5 * (wn[net.left] + wn[net.right]),
        )
        * net.sign
    )
    state = _Potential(geom, p, load_setup, cell_si, H0, T0, domain, net)
    free = np.flatnonzero(domain.ravel() & ~fixed.ravel())
    problem = ChannelTransport(
        network=net,
        conductance=harmonic_mean(c_flat[net.left], c_flat[net.right]),
        exponent=exponent,
        wall_flux=wall_face,
        source=source,
        free=free,
        potential=state,
        tangential=state.tangential if exponent != 1.0 else None,
    )
    _, slope = state(T0.ravel())
    if free.size and not np.all(slope[free] > 0):
        raise CrustflowInputError(
            "the channel's driving load falls as the crust thickens in "
            f"{int(np.sum(~(slope[free] > 0)))} cells (check densities.channel against crust, "
            "mantle and water): such a column cannot be stepped through time"
        )
    if spec.mode == "steady" and not fixed.any() and np.sum(source) != 0:
        raise CrustflowInputError(
            'evolution.mode = "steady" with inflow needs a "fixed" edge for the material to '
            "leave by (otherwise the crust thickens for ever); make one edge fixed"
        )
    return EvolutionSetup(
        topo, geom, p, channel, load_setup, cell, cell_si, H0, T0, domain, fixed, problem, spec
    )


class _Potential:
    """``T -> (phi, dphi/dT)`` with the maps' column model, H from T by Airy isostasy."""

    def __init__(self, geom, p, load_setup, cell_si, H0, T0, domain, net) -> None:
        self.geom, self.p, self.ls, self.cell = geom, p, load_setup, cell_si
        self.H0, self.T0, self.domain, self.net = H0, T0, domain, net

    def _phi(self, T: np.ndarray) -> np.ndarray:
        p = self.p
        H = isostatic_elevation(
            T,
            self.H0,
            self.T0,
            rho_channel=p.rho_channel,
            rho_mantle=p.rho_mantle,
            rho_water=p.rho_water,
        )
        col = column_si(H, T, p, load_setup=self.ls, cell=self.cell)
        return col["p_top"] - p.rho_channel * p.gravity * col["z_top"]

    def __call__(self, thickness: np.ndarray):
        # The stepper asks again for the state it just solved (residual check, volume balance):
        # answer from the last evaluation when the thickness is the same.
        last = getattr(self, "_last", None)
        if last is not None and np.array_equal(last[0], thickness):
            return last[1], last[2]
        T = np.asarray(thickness, dtype=float).reshape(self.geom.shape)
        phi = self._phi(T)
        slope = (self._phi(T + SLOPE_STEP) - phi) / SLOPE_STEP
        lost = self.domain & ~np.isfinite(phi)
        if lost.any():
            raise CrustflowInputError(
                f"the channel no longer fits in the crust in {int(lost.sum())} cells (the crust "
                "thinned to the channel's thickness); shorten evolution.duration or thin the channel"
            )
        phi, slope = (
            np.where(self.domain, phi, 0.0).ravel(),
            np.where(self.domain, slope, 1.0).ravel(),
        )
        self._last = (np.array(thickness, dtype=float, copy=True), phi, slope)
        return phi, slope

    def tangential(self, phi: np.ndarray) -> np.ndarray:
        """Mean tangential derivative of phi of the two cells of each face, Pa/m."""
        field = np.where(self.domain, phi.reshape(self.geom.shape), np.nan)
        d_east, d_north = gradient(field, self.geom)
        d_east, d_north = np.nan_to_num(d_east).ravel(), np.nan_to_num(d_north).ravel()
        net = self.net
        across = np.where(
            net.axis == 0,
            d_north[net.left] + d_north[net.right],
            d_east[net.left] + d_east[net.right],
        )
        return 0.5 * across


def dataset_attrs(setup: EvolutionSetup, title: str) -> dict:
    """Global attributes of the evolution datasets."""
    return {
        "title": title,
        "crustflow_version": __version__,
        "parameters_SI": json.dumps(dict(vars(setup.parameters))),
        "evolution_SI": json.dumps(setup.spec.describe()),
        "caution": CAUTION,
    }


def time_coordinate(times_s) -> xr.Variable:
    """The ``time`` coordinate in Myr since the start."""
    return xr.Variable(
        "time",
        np.asarray(times_s, dtype=float) / SECONDS_PER_MYR,
        {
            "units": TIME_UNITS,
            "long_name": "model time since the initial state",
            "axis": "T",
            "comment": "1 Myr = 1e6 Julian years of 365.25 d",
        },
    )


ProgressCallback = Callable[[float, float], None]
