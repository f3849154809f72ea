"""The one block reader: rows of a scenario's grids with halo rows, in SI, with their geometry.

Every path that computes fields from a scenario's files (the command's strips, the API, profiles,
ensembles, the input check) reads its rows here and computes them with :func:`block_fields`, so they
give the same numbers:

    read rows r0-halo .. r1+halo  ->  crustal thickness  ->  parameter grids in SI  ->  geometry
    -> fields_si (with the whole-grid load, sliced to the block)  ->  crop to the block's own rows

Two halo rows on each inner side suffice: one for the gradient of the load, one more for the
divergence of the flux. Gradients and divergences take the grid spacing from the raster's transform
and treat only the true grid edges (and nodata) one-sidedly, so a block's own rows are identical,
bit for bit, to the same rows of the whole grid.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from crustflow.engine.checks import InputChecks
from crustflow.engine.fields import crust_thickness_of, fields_si, whole_grid_load
from crustflow.geometry.grid import GridGeometry, grid_geometry
from crustflow.io.grids import GridSource, close_sources, open_sources

__all__ = [
    "HALO_ROWS",
    "Block",
    "BlockReader",
    "WholeGridLoad",
    "block_fields",
    "checked_block_fields",
]

#: Halo rows on each inner side of a block: 1 for the gradient of the load, 1 for the divergence.
HALO_ROWS = 2


@dataclass(frozen=True, eq=False)
class Block:
    """Rows ``r0:r1`` of a scenario's grids, read with halo rows from row ``first`` on.

    Attributes
    ----------
    r0, r1 : int
        The block's own rows (``r1`` exclusive), on the topography grid, north up.
    first : int
        The first row read (``r0`` minus the halo, clipped at the grid's edge).
    arrays : dict of ndarray
        Every source's values as read (m for topography and thickness grids; NaN is nodata).
    cell : dict of ndarray
        The parameter grids converted to SI (``channel_thickness``, ``viscosity``, ...).
    geometry : GridGeometry
        The geometry of the rows read.
    """

    r0: int
    r1: int
    first: int
    arrays: dict
    cell: dict
    geometry: GridGeometry

    @property
    def own(self) -> slice:
        """The block's own rows within the rows read."""
        return slice(self.r0 - self.first, self.r1 - self.first)

    @property
    def elevation(self) -> np.ndarray:
        """Surface elevation of the rows read, m."""
        return self.arrays["topography"]

    def crust_thickness(self, parameters) -> np.ndarray:
        """Crustal thickness of the rows read, m (from the thickness or Moho grid, or Airy)."""
        return crust_thickness_of(
            self.elevation,
            parameters,
            crust_thickness=self.arrays.get("crust_thickness"),
            moho_depth=self.arrays.get("moho_depth"),
        )

    def own_rows(self, arrays: dict) -> dict:
        """The block's own rows of each array."""
        return {key: value[self.own] for key, value in arrays.items()}


@dataclass(frozen=True, eq=False)
class WholeGridLoad:
    """Results of the whole-grid load step (filters and the thin-channel flag), or ``None``s."""

    pressure: np.ndarray | None = None  #: filtered load at the channel top, Pa
    thin_channel: np.ndarray | None = None  #: thin-channel warning flag, 0/1
    offset: int = 0  #: grid row of the arrays' first row

    def rows(self, first: int, stop: int) -> tuple[np.ndarray | None, np.ndarray | None]:
        """Grid rows ``first:stop`` of each array."""
        a, b = first - self.offset, stop - self.offset
        return tuple(None if v is None else v[a:b] for v in (self.pressure, self.thin_channel))

    def part(self, first: int, stop: int) -> WholeGridLoad:
        """Only grid rows ``first:stop`` (what a strip computed elsewhere needs)."""
        return WholeGridLoad(*self.rows(first, stop), offset=first)

    def flagged_cells(self) -> int | None:
        """Cells with the thin-channel warning, or None without the flag."""
        return None if self.thin_channel is None else int(np.nansum(self.thin_channel))


class BlockReader:
    """Reads blocks of rows of a scenario's grids.

    Parameters
    ----------
    scenario : Scenario
    sources : dict of GridSource, optional
        Grids already opened with :func:`crustflow.io.grids.open_sources` (left open on
        :meth:`close`); by default the reader opens them and closes them on :meth:`close`.
    """

    def __init__(self, scenario, sources: dict[str, GridSource] | None = None) -> None:
        self.scenario = scenario
        self._own_sources = sources is None
        self.sources = open_sources(scenario) if sources is None else sources
        topo = self.sources["topography"]
        self.x, self.y = topo.coords()
        self.crs, self.transform = topo.crs, topo.transform
        self.height, self.width = topo.height, topo.width
        self.grids = {**scenario.channel.grids, **scenario.load.grids}

    def read(self, r0: int, r1: int, *, halo: int = HALO_ROWS) -> Block:
        """Rows ``r0:r1`` with up to ``halo`` rows on each side."""
        first, stop = max(0, r0 - halo), min(self.height, r1 + halo)
        arrays = {key: src.read(first, stop) for key, src in self.sources.items()}
        cell = {key: grid.to_si(arrays[key]) for key, grid in self.grids.items()}
        t = self.transform
        geom = grid_geometry(self.x, self.y[first:stop], self.crs, spacing=(t.a, t.e))
        return Block(r0, r1, first, arrays, cell, geom)

    def blocks(self, rows: int, *, halo: int = HALO_ROWS) -> Iterator[Block]:
        """Consecutive blocks of ``rows`` rows covering the grid, north to south."""
        for r0 in range(0, self.height, rows):
            yield self.read(r0, min(self.height, r0 + rows), halo=halo)

    def whole(self) -> Block:
        """The whole grid as one block."""
        return self.read(0, self.height, halo=0)

    def whole_grid_load(self, *, filtered: bool, thin_channel: bool) -> WholeGridLoad:
        """The whole-grid load step of the scenario (filters, thin-channel flag) on the whole grid."""
        if not (filtered or thin_channel):
            return WholeGridLoad()
        whole = self.whole()
        p = self.scenario.parameters
        pressure, flag = whole_grid_load(
            whole.elevation,
            whole.crust_thickness(p),
            whole.geometry,
            p,
            load_setup=self.scenario.load,
            cell=whole.cell,
            filtered=filtered,
            mask=thin_channel,
        )
        return WholeGridLoad(pressure, flag)

    def close(self) -> None:
        """Close the grids if this reader opened them."""
        if self._own_sources:
            close_sources(self.sources)

    def __enter__(self) -> BlockReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def block_fields(
    block: Block,
    parameters,
    *,
    channel=None,
    load=None,
    wanted=None,
    whole: WholeGridLoad | None = None,
    diagnostics: dict | None = None,
    crust_thickness: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """The fields of a block's own rows, SI (see :func:`crustflow.engine.fields.fields_si`).

    Parameters
    ----------
    block : Block
    parameters : ModelParameters
    channel, load : ChannelSetup, LoadSetup, optional
        The scenario's channel and load set-ups.
    wanted : set of str, optional
        Variables to compute (default: all).
    whole : WholeGridLoad, optional
        The whole-grid load step; its rows of this block are used.
    diagnostics : dict, optional
        Filled with the own rows of ``roof_bad`` and ``excluded`` (cell counts for the checks).
    crust_thickness : ndarray, optional
        The block's crustal thickness if already computed, m.
    """
    stop = block.first + block.elevation.shape[0]
    pressure, flag = (whole or WholeGridLoad()).rows(block.first, stop)
    thickness = block.crust_thickness(parameters) if crust_thickness is None else crust_thickness
    found: dict = {}
    si = fields_si(
        block.elevation,
        thickness,
        block.geometry,
        parameters,
        wanted=wanted,
        setup=channel,
        cell=block.cell,
        load_setup=load,
        diagnostics=found,
        p_top_filtered=pressure,
        thin_channel=flag,
    )
    if diagnostics is not None:
        diagnostics.update({k: None if v is None else v[block.own] for k, v in found.items()})
    return {name: values[block.own] for name, values in si.items()}


def checked_block_fields(
    block: Block, parameters, *, channel=None, load=None, wanted=None, whole=None
) -> dict[str, np.ndarray]:
    """:func:`block_fields` with the block's own input checks, raising the first problem.

    The checks are those of a run on the block's own rows: a channel not thinner than the crust and
    parameter grids with impossible values (before computing), roof layers reaching below the
    channel top (after). Raises :class:`~crustflow.errors.CrustflowInputError`.
    """
    thickness = block.crust_thickness(parameters)
    checks = InputChecks({}, parameters.channel_thickness)
    own = block.own
    checks.update({}, thickness[own], block.own_rows(block.cell), block.elevation[own])
    checks.cells.finish()
    checks.thin.finish()
    diagnostics: dict = {}
    si = block_fields(
        block,
        parameters,
        channel=channel,
        load=load,
        wanted=wanted,
        whole=whole,
        diagnostics=diagnostics,
        crust_thickness=thickness,
    )
    checks.update_column(diagnostics.get("roof_bad"), diagnostics.get("excluded"))
    checks.column.finish()
    return si
