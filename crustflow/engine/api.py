"""From grids to channel-flow fields: the pipeline behind ``crustflow run`` and the Python API.

``compute_fields`` works on xarray grids (in memory or dask-backed: then lazily, strip by strip);
``solve`` reads the grids a scenario names, whole, or lazily with the command's own strip kernel.
Both return an ``xarray.Dataset`` in the practical units of :data:`VARIABLES` (the same variables,
names and units as ``fields.nc``), computed by the engine's one code path
(:func:`crustflow.engine.blocks.block_fields`).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import rioxarray  # noqa: F401  (registers the .rio accessor)
import xarray as xr

from crustflow._version import __version__
from crustflow.engine.blocks import Block, BlockReader, WholeGridLoad, checked_block_fields
from crustflow.engine.checks import GridChecks
from crustflow.engine.fields import crust_thickness_of, fields_si, whole_grid_load
from crustflow.engine.lazy import lazy_array_fields, lazy_scenario_fields, rows_for_chunks
from crustflow.engine.progress import StageClock
from crustflow.engine.rasters import aligned_grid, is_lazy, prepared_grid
from crustflow.engine.strips import strip_rows_for
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


def compute_fields(
    topography: xr.DataArray,
    *,
    parameters: ModelParameters,
    crust_thickness: xr.DataArray | None = None,
    moho_depth: xr.DataArray | None = None,
    channel=None,
    load_setup=None,
    cell: dict | None = None,
    variables=None,
    chunks=None,
    stage: Callable[[str], None] | None = None,
) -> xr.Dataset:
    """Channel-flow fields on the topography grid.

    Parameters
    ----------
    topography : xarray.DataArray
        Surface elevation H, m above sea level (negative offshore), with a CRS (rioxarray). Rasters
        opened with ``rioxarray.open_rasterio(path)`` work as they are: a length-1 ``band`` is
        squeezed, the nodata value (``rio.nodata`` / ``_FillValue``) is masked, the spatial
        dimensions are found by rioxarray (``x``/``y``, ``lon``/``lat``, ...), rows go north up.
    parameters : ModelParameters
        Densities, channel thickness and viscosity, wall velocity, gravity: SI floats or strings
        with units (``"15 km"``).
    crust_thickness, moho_depth : xarray.DataArray, optional
        At most one, m. On other cells (or another CRS) they are resampled bilinearly onto the
        topography grid (:func:`crustflow.engine.rasters.aligned_grid`), as the command does.
        With neither, Airy isostasy from ``parameters.reference_thickness``.
    channel : crustflow.scenario.channel.ChannelSetup, optional
        Rheology (default: Newtonian with ``parameters.viscosity``).
    load_setup : crustflow.scenario.load.LoadSetup, optional
        Roof layers, density grids, channel placement and load filters (default: none).
    cell : dict of xarray.DataArray, optional
        Parameter grids, SI: ``channel_thickness`` (m), ``viscosity`` (Pa s),
        ``temperature_top``/``temperature_base`` (K), ``surface_heat_flow`` (W/m^2).
    variables : sequence of str, optional
        The variables to compute (default: all of :data:`VARIABLES`).
    chunks : int or dict, optional
        Compute lazily, strip by strip: strips of about ``chunks`` x ``chunks`` cells (or
        ``{"y": rows}``). Dask-backed inputs are computed lazily in any case. Lazy variables are
        float32, as in the command's files.
    stage : callable, optional
        Called with a short name as each stage starts (progress display).

    Returns
    -------
    xarray.Dataset
        The variables in their practical units, with ``units`` and ``long_name``, the CRS as a
        ``spatial_ref`` grid mapping, and the parameters in the attributes.

    Raises
    ------
    CrustflowInputError
        A channel thicker than the crust anywhere; grids that cannot be read as grids.
    """
    note = stage or (lambda name: None)
    names = _names(variables)
    p = parameters
    topo = prepared_grid(topography, "topography")
    crs = _grid_crs(topo)
    grids = {"topography": topo}
    for other, key in ((crust_thickness, "crust_thickness"), (moho_depth, "moho_depth")):
        if other is not None:
            grids[key] = aligned_grid(prepared_grid(other, key, crs=crs), topo, key)
    cells = {
        k: aligned_grid(prepared_grid(v, k, crs=crs), topo, k) for k, v in (cell or {}).items()
    }
    transform = topo.rio.transform()
    spacing = (transform.a, transform.e)
    lazy = chunks is not None or any(is_lazy(g) for g in (*grids.values(), *cells.values()))
    note("compute")
    if lazy:
        whole = _whole_grid_load(grids, cells, p, load_setup, names, crs, spacing)
        rows = rows_for_chunks(chunks if chunks is not None else _chunk_rows(topo), topo.shape[1])
        data = lazy_array_fields(
            grids,
            cells,
            (p, channel, load_setup),
            names,
            rows=rows,
            crs=crs,
            spacing=spacing,
            whole=whole,
        )
    else:
        data = _eager_fields(grids, cells, p, channel, load_setup, names, crs, spacing)
    attrs = {c: dict(topo[c].attrs) for c in ("x", "y")}
    return _dataset(data, topo.x.values, topo.y.values, crs, transform, p, attrs)


def _names(variables) -> list[str]:
    if variables is None:
        return list(VARIABLES)
    unknown = [v for v in variables if v not in VARIABLES]
    if unknown:
        raise CrustflowInputError(
            f"unknown variable(s) {unknown}; choose from {', '.join(VARIABLES)}"
        )
    return [v for v in VARIABLES if v in set(variables)]


def _grid_crs(grid: xr.DataArray):
    crs = grid.rio.crs
    if crs is None:
        raise CrustflowInputError(
            "the topography grid has no CRS; write one with "
            "grid.rio.write_crs('EPSG:...') or name it in the scenario"
        )
    return crs


def _chunk_rows(topo: xr.DataArray) -> dict:
    """Strip height of dask-backed input: its own row chunks (the first)."""
    return {"y": topo.chunks[0][0] if topo.chunks else topo.shape[0]}


def _whole_grid_load(grids, cells, p, load_setup, names, crs, spacing) -> WholeGridLoad:
    """The whole-grid load step (filters, thin-channel flag), computed now on the whole grid."""
    filtered = bool(load_setup is not None and load_setup.filtered)
    thin = "thin_channel_warning" in names
    if not (filtered or thin):
        return WholeGridLoad()
    block = _whole_block(grids, cells, crs, spacing)
    pressure, flag = whole_grid_load(
        block.elevation,
        block.crust_thickness(p),
        block.geometry,
        p,
        load_setup=load_setup,
        cell=block.cell,
        filtered=filtered,
        mask=thin,
    )
    return WholeGridLoad(pressure, flag)


def _whole_block(grids, cells, crs, spacing) -> Block:
    topo = grids["topography"]
    arrays = {k: np.asarray(v.values, dtype="float64") for k, v in grids.items()}
    cell = {k: np.asarray(v.values, dtype="float64") for k, v in cells.items()}
    geometry = grid_geometry(topo.x.values, topo.y.values, crs, spacing=spacing)
    return Block(0, topo.shape[0], 0, arrays, cell, geometry)


def _eager_fields(grids, cells, p, channel, load_setup, names, crs, spacing) -> dict:
    """The whole grid at once, float64, with every input check of a run."""
    block = _whole_block(grids, cells, crs, spacing)
    whole = _whole_grid_load(grids, cells, p, load_setup, names, crs, spacing)
    si = checked_block_fields(
        block, p, channel=channel, load=load_setup, wanted=set(names), whole=whole
    )
    return {name: to_practical(name, si[name]) for name in names}


def _dataset(data: dict, x, y, crs, transform, p, coord_attrs=None) -> xr.Dataset:
    data_vars = {name: (("y", "x"), values, variable_attrs(name)) for name, values in data.items()}
    ds = xr.Dataset(data_vars, coords={"y": y, "x": x})
    for coord, attrs in (coord_attrs or {}).items():
        ds[coord].attrs.update(attrs)
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
    scenario: Scenario,
    *,
    variables=None,
    chunks=None,
    stage: Callable[[str], None] | None = None,
    timings: dict | None = None,
) -> xr.Dataset:
    """Read the grids a scenario names and compute the channel-flow fields.

    Parameters
    ----------
    scenario : Scenario
        From :func:`crustflow.load_scenario` or :func:`crustflow.scenario_from_dict`.
    variables : sequence of str, optional
        The variables to compute (default: the scenario's ``[output] variables``, else all).
    chunks : int or dict, optional
        Compute lazily with dask, in strips of about ``chunks`` x ``chunks`` cells (or
        ``{"y": rows}``): each strip is one task running the command's own strip kernel, so the
        values equal the command's files (float32) bit for bit; memory stays bounded by the
        strips. Usable with ``dask.distributed`` (workers read the inputs by path) and writable
        with ``to_zarr`` / ``to_netcdf``. The grids' value checks run now, in one streaming pass;
        the per-strip checks run with the strips.
    stage : callable, optional
        Called with a short stage name as each stage starts.
    timings : dict, optional
        Filled with wall time (s) per stage.

    Returns
    -------
    xarray.Dataset
        As :func:`compute_fields`, with the scenario title and input provenance in the attributes.
    """
    names = _names(variables if variables is not None else scenario.variables)
    clock = StageClock(stage, timings)
    if chunks is not None:
        ds = _lazy_solve(scenario, names, chunks, clock)
    else:
        clock("read grids")
        grids = read_inputs(scenario)
        ds = compute_fields(
            grids.topography,
            parameters=scenario.parameters,
            crust_thickness=grids.crust_thickness,
            moho_depth=grids.moho_depth,
            channel=scenario.channel,
            load_setup=scenario.load,
            cell=grids.cell,
            variables=names,
            stage=clock,
        )
        ds.attrs["crustflow_inputs"] = json.dumps(grids.provenance)
    clock.finish()
    ds.attrs["title"] = scenario.title
    return ds


def _lazy_solve(scenario, names, chunks, clock) -> xr.Dataset:
    clock("check grids")
    with BlockReader(scenario) as reader:
        checks = GridChecks(reader.sources)
        for block in reader.blocks(strip_rows_for(reader.width), halo=0):
            checks.update(block.arrays)
        checks.finish()
        filtered, thin = scenario.load.filtered, "thin_channel_warning" in names
        if filtered or thin:
            clock("whole-grid load")
        whole = reader.whole_grid_load(filtered=filtered, thin_channel=thin)
        height, width = reader.height, reader.width
        x, y, crs, transform = reader.x, reader.y, reader.crs, reader.transform
        record = provenance(reader.sources)
    clock("build graph")
    data = lazy_scenario_fields(
        scenario,
        names,
        rows=rows_for_chunks(chunks, width),
        height=height,
        width=width,
        whole=whole,
    )
    ds = _dataset(data, x, y, crs, transform, scenario.parameters)
    ds.attrs["crustflow_inputs"] = json.dumps(record)
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
