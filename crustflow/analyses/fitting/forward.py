"""The forward model of a fit: model values at the observation cells for many parameter sets.

Two paths give the same numbers (``tests/analyses/test_fitting.py`` compares them with
:func:`crustflow.solve`):

* **Fast path** (Newtonian channel, uniform parameters, default load model): the base maps of
  :mod:`crustflow.analyses.ensemble.fast` are computed once, on strips of rows with halo rows as the
  ensemble and the command read them, and kept only at the observation cells. Every output is
  then a sum of those base values times per-sample scalars, so an evaluation costs about
  (number of observations) x (number of base maps) multiply-adds per parameter set.
* **Fallback** (power-law or flow-law channels, parameter grids, layered loads): the strips that
  hold observations are kept in memory and every parameter set runs the full per-strip solve
  (:func:`crustflow.engine.fields.fields_si`, through the ensemble's member loop).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from crustflow.analyses.ensemble.engine import EnsembleGrid, member_fields, scan_grid
from crustflow.analyses.ensemble.fast import (
    FAST_VARIABLES,
    ON_VALID_FIELDS,
    MemberBuffers,
    MemberChunk,
    MemberScalars,
    block_basis,
)
from crustflow.engine.strips import strip_rows_for
from crustflow.errors import CrustflowInputError
from crustflow.scenario.parameters import ModelParameters

__all__ = ["SiteModel", "fit_obstacle"]

#: ModelParameters fields a sample may set (the fields of the varied keys).
FIELDS = tuple(f.name for f in dataclasses.fields(ModelParameters))


def fit_obstacle(scenario, variables) -> str | None:
    """Why the fast path does not apply to this scenario and these variables, or None."""
    channel = scenario.channel
    if channel.rheology != "newtonian":
        return f"the channel is {channel.rheology}, not Newtonian"
    if channel.grids:
        return f"channel parameters are grids ({', '.join(channel.grids)})"
    if scenario.load != type(scenario.load)():
        return "the load model is not a uniform crust with the channel at its base"
    other = sorted(set(variables) - set(FAST_VARIABLES))
    if other:
        return f"the fast path does not compute {', '.join(other)}"
    return None


class SiteModel:
    """Model values at a fixed set of grid cells, for many parameter sets at once.

    Parameters
    ----------
    scenario : Scenario
    rows, cols : array of int
        The cells (row and column on the topography grid), one per observation.
    variables : array of str
        The variable observed at each cell.
    fast : bool, optional
        Force the fast path (True: an error where it does not apply) or the fallback (False);
        default: the fast path wherever :func:`fit_obstacle` finds nothing against it.

    Attributes
    ----------
    fast : bool
    obstacle : str or None
        Why the fast path does not apply.
    lowest : dict
        Lowest elevation ``H`` and crustal thickness ``T`` on the grid, m (for the channel check).
    airy : bool
        Crustal thickness from Airy isostasy (no thickness or Moho grid).
    """

    def __init__(self, scenario, rows, cols, variables, *, fast: bool | None = None) -> None:
        self.scenario = scenario
        self.variables = np.asarray(variables, dtype=object)
        self.obstacle = fit_obstacle(scenario, set(self.variables))
        if fast and self.obstacle:
            raise CrustflowInputError(f"the fast path does not apply: {self.obstacle}")
        self.fast = self.obstacle is None if fast is None else bool(fast)
        grid = EnsembleGrid(scenario)
        try:
            self.width, self.airy = grid.width, grid.airy
            self.strip_rows = strip_rows_for(grid.width)
            self.lowest = scan_grid(grid, self.strip_rows, SilentBar())
            cells = np.asarray(rows, dtype=np.int64) * grid.width + np.asarray(cols)
            self.unique, self.index = np.unique(cells, return_inverse=True)
            if self.fast:
                self.columns = self._basis_columns(grid)
            else:
                self.strips = [s for s in grid.blocks(self.strip_rows) if self._cells_in(s).size]
        finally:
            grid.close()
        self._buffers: dict[int, MemberBuffers] = {}

    # -- set-up ------------------------------------------------------------------------------

    def _cells_in(self, strip) -> np.ndarray:
        """Positions in :attr:`unique` of the cells in ``strip``'s own rows."""
        lo, hi = strip.r0 * self.width, strip.r1 * self.width
        return np.flatnonzero((self.unique >= lo) & (self.unique < hi))

    def _basis_columns(self, grid) -> dict[str, np.ndarray]:
        """The fast path's base maps at the unique cells (one value per cell and base map)."""
        columns: dict[str, np.ndarray] = {}
        for strip in grid.blocks(self.strip_rows):
            pos = self._cells_in(strip)
            if not pos.size:
                continue
            T = None if grid.airy else strip.crust_thickness(self.scenario.parameters)
            basis = block_basis(strip.elevation, T, strip.geometry)
            flat = self.unique[pos] - strip.r0 * self.width
            for k, v in basis.items():
                if k not in columns:
                    columns[k] = np.empty(self.unique.size, dtype=v.dtype)
                columns[k][pos] = v[strip.own].ravel()[flat]
        return columns

    # -- evaluation ----------------------------------------------------------------------------

    def defined(self) -> np.ndarray:
        """Whether each observation's cell has a model value (False: nodata or a grid edge).

        On the fast path this is the base maps' mask; on the fallback, the scenario's own
        parameters are solved once and their NaNs mark the cells without a value.
        """
        if self.fast:
            ok = np.empty(self.variables.size, dtype=bool)
            for name in set(self.variables):
                mask = self.columns["valid" if name in ON_VALID_FIELDS else "live"]
                sel = self.variables == name
                ok[sel] = mask[self.index[sel]]
            return ok
        return np.isfinite(self.predict_members([self.scenario.parameters]))[0]

    def keep(self, mask) -> None:
        """Keep only the observations where ``mask`` is true (in order)."""
        mask = np.asarray(mask, dtype=bool)
        self.variables, self.index = self.variables[mask], self.index[mask]

    def predict(self, values: dict[str, np.ndarray]) -> np.ndarray:
        """Model values at the observations for parameter sets given field by field (SI).

        Parameters
        ----------
        values : dict
            ModelParameters field -> array over the parameter sets (SI); fields not given keep
            the scenario's value.

        Returns
        -------
        ndarray, shape (sets, observations)
            SI; NaN where the model has no value.
        """
        n = len(next(iter(values.values())))
        if not self.fast:
            base = self.scenario.parameters
            members = [
                dataclasses.replace(base, **{k: float(v[i]) for k, v in values.items()})
                for i in range(n)
            ]
            return self.predict_members(members)
        p = self.scenario.parameters

        def get(name):
            if name in values:
                return np.asarray(values[name], dtype=float)
            value = getattr(p, name)
            return np.full(n, np.nan if value is None else float(value))

        buffers = self._buffers.setdefault(n, MemberBuffers(n))
        chunk = MemberChunk(self.columns, MemberScalars.of_values(get, self.airy), buffers)
        out = np.empty((n, self.variables.size))
        for name in set(self.variables):
            sel = self.variables == name
            out[:, sel] = chunk.values(name)[self.index[sel]].T
        return out

    def predict_members(self, members) -> np.ndarray:
        """Model values at the observations for a list of ModelParameters (SI; the fallback's
        per-member full solve, or the fast path's base maps)."""
        if self.fast:
            fields = {f: np.array([getattr(m, f) for m in members], dtype=float) for f in FIELDS}
            fields = {f: v for f, v in fields.items() if np.isfinite(v).all()}
            return self.predict(fields)
        names = sorted(set(self.variables))
        out = np.full((len(members), self.variables.size), np.nan)
        for strip in self.strips:
            pos = self._cells_in(strip)
            flat = self.unique[pos] - strip.r0 * self.width
            at = np.flatnonzero(np.isin(self.index, pos))
            lookup = np.searchsorted(pos, self.index[at])
            for m, member in enumerate(members):
                si = member_fields(strip, member, self.scenario, names)
                for name in names:
                    sel = self.variables[at] == name
                    out[m, at[sel]] = si[name].ravel()[flat][lookup[sel]]
        return out

    def thinnest_crust(self, values: dict[str, np.ndarray]) -> np.ndarray:
        """Thinnest crust on the grid for each parameter set, m (the channel must be thinner)."""
        low = self.lowest
        if not self.airy:
            return np.full(len(next(iter(values.values()))), low["T"])
        p = self.scenario.parameters
        n = len(next(iter(values.values())))

        def get(name):
            return np.asarray(values.get(name, np.full(n, getattr(p, name) or np.nan)), float)

        s = MemberScalars.of_values(get, True)
        return s.t0 + (s.a if low["H"] >= 0 else s.b) * low["H"]


class SilentBar:
    """A progress bar that shows nothing (the grid scan's bar)."""

    def update(self, n) -> None:
        """Ignore progress."""
