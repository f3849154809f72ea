"""From grids to channel-flow fields: the pipeline behind ``crustflow run`` and the Python API.

``compute_fields`` works on xarray grids already in memory (for scripts and synthetic grids);
``solve`` reads the grids a scenario names and calls it. Both return an ``xarray.Dataset`` in the
practical units of :data:`VARIABLES` (the same variables, names and units as ``fields.nc``).
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr

from crustflow._version import __version__
from crustflow.engine.checks import CellInputCheck, ColumnCheck, GridChecks, ThinCrustCheck
from crustflow.engine.fields import crust_thickness_of, fields_si, whole_grid_load
from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import grid_geometry
from crustflow.io.grids import as_dataarray, close_sources, open_sources, provenance
from crustflow.scenario.document import Scenario
from crustflow.scenario.parameters import ModelParameters
from crustflow.variables import CAUTION, VARIABLES, Variable, to_practical, variable_attrs

__all__ = [
    "Variable",
    "VARIABLES",
    "compute_fields",
    "solve",
    "fields_si",
    "to_practical",
    "variable_attrs",
    "crust_thickness_of",
    "CAUTION",
]


def _grid_crs(grid: xr.DataArray):
    crs = grid.rio.crs
    if crs is None:
        raise CrustflowInputError(
            "the topography grid has no CRS; write one with "
            "grid.rio.write_crs('EPSG:...') or name it in the scenario"
        )
    return crs


def compute_fields(
    topography: xr.DataArray,
    *,
    parameters: ModelParameters,
    crust_thickness: xr.DataArray | None = None,
    moho_depth: xr.DataArray | None = None,
    channel=None,
    load_setup=None,
    cell: dict | None = None,
    stage: Callable[[str], None] | None = None,
) -> xr.Dataset:
    """Channel-flow fields on the topography grid.

    Parameters
    ----------
    topography : xarray.DataArray
        Surface elevation H, m above sea level (negative offshore), dims (y, x), CRS set with rioxarray.
        NaN is nodata.
    parameters : ModelParameters
        SI parameters (densities, channel thickness and viscosity, wall velocity, gravity).
    crust_thickness, moho_depth : xarray.DataArray, optional
        At most one, on the topography grid's cells, m. With neither, Airy isostasy from
        ``parameters.reference_thickness``.
    channel : crustflow.scenario.channel.ChannelSetup, optional
        Rheology (default: Newtonian with ``parameters.viscosity``).
    load_setup : crustflow.scenario.load.LoadSetup, optional
        Roof layers, density grids, channel placement and load filters (default: none).
    cell : dict of xarray.DataArray, optional
        Parameter grids on the topography grid's cells, SI: ``channel_thickness`` (m),
        ``viscosity`` (Pa s), ``temperature_top``/``temperature_base`` (K), ``surface_heat_flow``
        (W/m^2).
    stage : callable, optional
        Called with a short name as each stage starts (progress display).

    Returns
    -------
    xarray.Dataset
        The variables of :data:`VARIABLES` in their practical units, with ``units`` and ``long_name``,
        the CRS as a ``spatial_ref`` grid mapping, and the parameters in the attributes.

    Raises
    ------
    CrustflowInputError
        A channel thicker than the crust anywhere; grids not on the topography grid.
    """
    note = stage or (lambda name: None)
    p = parameters
    crs = _grid_crs(topography)
    note("compute")
    flip = topography.y.values[0] < topography.y.values[-1]
    if flip:  # rows south to north: work north up
        topography = topography.isel(y=slice(None, None, -1))
        crust_thickness = None if crust_thickness is None else crust_thickness.sortby("y", False)
        moho_depth = None if moho_depth is None else moho_depth.sortby("y", False)
        cell = {k: v.sortby("y", False) for k, v in (cell or {}).items()}
    # The stored transform (as read from the file) gives the exact spacing; recompute it from the
    # coordinates only when there is none or the rows were flipped here.
    transform = topography.rio.transform(recalc=flip)
    geom = grid_geometry(
        topography.x.values, topography.y.values, crs, spacing=(transform.a, transform.e)
    )
    H = np.asarray(topography.values, dtype="float64")
    grids = {}
    pairs = [(crust_thickness, "crust_thickness"), (moho_depth, "moho_depth")]
    pairs += [(v, k) for k, v in (cell or {}).items()]
    for other, key in pairs:
        if other is None:
            continue
        if (
            other.shape != H.shape
            or not np.allclose(other.x.values, topography.x.values)
            or not np.allclose(other.y.values, topography.y.values)
        ):
            raise CrustflowInputError(
                f"{key} is not on the topography grid's cells; align it first "
                "(read both with crustflow.solve, or resample it)"
            )
        grids[key] = np.asarray(other.values, dtype="float64")
    cell_si = {k: grids.pop(k) for k in list(grids) if k not in ("crust_thickness", "moho_depth")}
    T = crust_thickness_of(H, p, **grids)

    cell_check = CellInputCheck()
    cell_check.update(cell_si)
    cell_check.finish()
    check = ThinCrustCheck(p.channel_thickness)
    check.update(np.where(np.isfinite(H), T, np.nan), cell_si.get("channel_thickness"))
    check.finish()
    p_filtered, warning = whole_grid_load(H, T, geom, p, load_setup=load_setup, cell=cell_si)
    diagnostics: dict = {}
    si = fields_si(
        H,
        T,
        geom,
        p,
        setup=channel,
        cell=cell_si,
        load_setup=load_setup,
        p_top_filtered=p_filtered,
        thin_channel=warning,
        diagnostics=diagnostics,
    )

    column = ColumnCheck()
    column.update(diagnostics.get("roof_bad"), 0)
    column.finish()
    data_vars = {
        name: (("y", "x"), to_practical(name, si[name]), variable_attrs(name)) for name in VARIABLES
    }
    ds = xr.Dataset(data_vars, coords={"y": topography.y.values, "x": topography.x.values})
    for coord in ("x", "y"):
        ds[coord].attrs.update(topography[coord].attrs)
    ds = ds.rio.write_crs(crs).rio.write_coordinate_system()
    ds = ds.rio.write_transform(transform)
    ds.attrs.update(
        {
            "title": "crustflow channel-flow fields",
            "crustflow_version": __version__,
            "parameters_SI": json.dumps(dict(vars(p))),
            "caution": CAUTION,
        }
    )
    return ds


def solve(
    scenario: Scenario, *, stage: Callable[[str], None] | None = None, timings: dict | None = None
) -> xr.Dataset:
    """Read the grids a scenario names and compute the channel-flow fields.

    Parameters
    ----------
    scenario : Scenario
        From :func:`crustflow.load_scenario` or :func:`crustflow.scenario_from_dict`.
    stage : callable, optional
        Called with a short stage name as each stage starts.
    timings : dict, optional
        Filled with wall time (s) per stage.

    Returns
    -------
    xarray.Dataset
        As :func:`compute_fields`, with the scenario title and input provenance in the attributes.
    """

    clock = {"name": None, "start": time.perf_counter()}
    times = timings if timings is not None else {}

    def note(name: str) -> None:
        now = time.perf_counter()
        if clock["name"] is not None:
            times[clock["name"]] = times.get(clock["name"], 0.0) + now - clock["start"]
        clock.update(name=name, start=now)
        if stage is not None and name != "done":
            stage(name)

    note("read grids")
    grids = read_inputs(scenario)
    ds = compute_fields(
        grids.topography,
        parameters=scenario.parameters,
        crust_thickness=grids.crust_thickness,
        moho_depth=grids.moho_depth,
        channel=scenario.channel,
        load_setup=scenario.load,
        cell=grids.cell,
        stage=note,
    )
    note("done")
    times.pop("done", None)
    ds.attrs["title"] = scenario.title
    ds.attrs["crustflow_inputs"] = json.dumps(grids.provenance)
    return ds


@dataclass
class InputGrids:
    """The input grids of one run, aligned on the topography grid.

    Attributes
    ----------
    topography : xarray.DataArray
        Surface elevation, m above sea level.
    crust_thickness : xarray.DataArray or None
        Surface to Moho, m.
    moho_depth : xarray.DataArray or None
        Moho depth below sea level, m.
    provenance : dict
        How each grid was read and aligned (for the run manifest).
    """

    topography: xr.DataArray
    crust_thickness: xr.DataArray | None = None
    moho_depth: xr.DataArray | None = None
    provenance: dict = field(default_factory=dict)
    cell: dict = field(default_factory=dict)  #: channel parameter grids, in SI


def read_inputs(scenario) -> InputGrids:
    """Read, check and align the grids a :class:`~crustflow.scenario.document.Scenario` names, whole.

    Parameters
    ----------
    scenario : Scenario

    Returns
    -------
    InputGrids
        Grids in m on the topography grid.

    Raises
    ------
    CrustflowInputError
        Missing CRS, grids that do not overlap, thickness grids that look like kilometres, ...
    """
    sources = open_sources(scenario)
    try:
        arrays = {key: src.read() for key, src in sources.items()}
        checks = GridChecks(sources)
        checks.update(arrays)
        checks.finish()
        out = InputGrids(
            topography=as_dataarray(arrays["topography"], sources["topography"], "topography"),
            provenance=provenance(sources),
        )
        for key in ("crust_thickness", "moho_depth"):
            if key in arrays:
                setattr(out, key, as_dataarray(arrays[key], sources["topography"], key))
        for key, grid in {**scenario.channel.grids, **scenario.load.grids}.items():
            out.cell[key] = as_dataarray(grid.to_si(arrays[key]), sources["topography"], key)
        return out
    finally:
        close_sources(sources)
