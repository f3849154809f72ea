"""The ensemble engine: the grids read strip by strip with halo rows, the input checks, the loops
over strips and members of the fast path and of the fallback, and the volume budgets of every
member.

Part of :mod:`crustflow.analyses.ensemble.run`; :func:`crustflow.analyses.ensemble.run.run_ensemble` drives it.
The base maps
and per-member scalars of the fast path are in :mod:`crustflow.analyses.ensemble.fast`.
"""

from __future__ import annotations

import numpy as np

from crustflow.analyses.budgets import budget_table, read_features
from crustflow.analyses.ensemble import report
from crustflow.analyses.ensemble.fast import (
    ON_VALID_FIELDS,
    MemberChunk,
    MemberScalars,
    block_basis,
)
from crustflow.engine.blocks import Block, BlockReader, block_fields
from crustflow.engine.checks import CellInputCheck, ColumnCheck, GridChecks
from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import divergence
from crustflow.variables import to_practical

# ----------------------------------------------------------------------------------------------
# reading strips: the engine's one block reader


class EnsembleGrid(BlockReader):
    """The scenario's grids, read strip by strip with halo rows (crustflow.engine.blocks)."""

    @property
    def airy(self) -> bool:
        return self.scenario.crust_thickness is None and self.scenario.moho_depth is None

    @property
    def cell_grids(self) -> dict:
        return self.grids


def member_fields(strip: Block, parameters, scenario, wanted) -> dict[str, np.ndarray]:
    """The fields of one member on one strip's own rows (the fallback), as the map computes them.

    The strip is checked as :mod:`crustflow.engine.strips` checks it: a channel not thinner than the
    crust, and roof layers reaching below the channel top, are errors.
    """
    T = strip.crust_thickness(parameters)
    h = strip.cell.get("channel_thickness", parameters.channel_thickness)
    if h is not None:  # None: the channel is placed by depths
        with np.errstate(invalid="ignore"):
            bad = (np.isfinite(T) & np.isfinite(strip.elevation) & (T <= h))[strip.own]
        if bad.any():
            raise CrustflowInputError(
                f"the channel is not thinner than the crust in {int(bad.sum())} cells for an "
                "ensemble member; narrow channel.thickness (or the densities) in [ensemble.vary]"
            )
    diagnostics: dict = {}
    si = block_fields(
        strip,
        parameters,
        channel=scenario.channel,
        load=scenario.load,
        wanted=set(wanted),
        diagnostics=diagnostics,
        crust_thickness=T,
    )
    roof_bad = diagnostics.get("roof_bad")
    if roof_bad is not None and roof_bad.any():
        check = ColumnCheck()
        check.update(roof_bad, 0)
        check.finish()
    return {n: si[n] for n in wanted}


def scan_grid(grid: EnsembleGrid, rows: int, bar) -> dict:
    """First pass: the input checks of a run and the extremes the thickness check needs."""
    checks = GridChecks(grid.sources)
    cells = None
    if grid.cell_grids:
        cells = CellInputCheck()
    low = {"H": np.inf, "T": np.inf}
    p = grid.scenario.parameters
    for strip in grid.blocks(rows):
        crop = {k: v[strip.own] for k, v in strip.arrays.items()}
        checks.update(crop)
        if cells is not None:
            cells.update({k: v[strip.own] for k, v in strip.cell.items()})
        H = crop["topography"]
        ok = np.isfinite(H)
        if ok.any():
            low["H"] = min(low["H"], float(H[ok].min()))
        if not grid.airy:
            T = strip.crust_thickness(p)[strip.own]
            ok &= np.isfinite(T)
            if ok.any():
                low["T"] = min(low["T"], float(T[ok].min()))
        bar.update(strip.r1 - strip.r0)
    checks.finish()
    if cells is not None:
        cells.finish()
    return low


def check_thickness(members, low: dict, airy: bool, varied: bool) -> None:
    """Every member's channel must be thinner than its thinnest crust (as crustflow.solve checks)."""
    s = MemberScalars.of(members, airy)
    if airy:
        thinnest = s.t0 + (s.a if low["H"] >= 0 else s.b) * low["H"]
    else:
        thinnest = np.full_like(s.h, low["T"])
    bad = np.flatnonzero(s.h >= thinnest)
    if bad.size:
        i = int(bad[0])
        fix = (
            'set max in [ensemble.vary]."channel.thickness" below the thinnest crust'
            if varied
            else "give a thinner channel or narrow the varied densities and reference thickness in "
            "[ensemble.vary]"
        )
        raise CrustflowInputError(
            f"channel.thickness is not less than the thinnest crust in {bad.size} of "
            f"{len(members)} ensemble members (member {i}: channel {s.h[i] / 1e3:.4g} km, crust "
            f"{thinnest[i] / 1e3:.4g} km); {fix}"
        )


# ----------------------------------------------------------------------------------------------
# the member loops of the fast path and the fallback


def fast_maps(grid, members, needed, reducer, writer, rows, chunk, buffers, bar) -> None:
    scalars = MemberScalars.of(members, grid.airy)
    for strip in grid.blocks(rows):
        T = None if grid.airy else strip.crust_thickness(grid.scenario.parameters)
        basis = block_basis(strip.elevation, T, strip.geometry)
        flat = {k: v[strip.own].ravel() for k, v in basis.items()}
        cells = np.flatnonzero(flat["valid"])
        reducer.start(flat["valid"].size)
        for c0 in range(0, cells.size, chunk):
            idx = cells[c0 : c0 + chunk]
            part = MemberChunk({k: v[idx] for k, v in flat.items()}, scalars, buffers)
            for name in needed:
                rows_ok = part.columns["valid" if name in ON_VALID_FIELDS else "live"]
                reducer.add(name, part.values(name), idx, rows_ok)
            bar.update(idx.size)
        bar.update(flat["valid"].size - cells.size)
        writer.write(strip.r0, strip.r1, reducer.maps)


def fallback_maps(grid, members, needed, reducer, writer, rows, chunk, bar) -> None:
    M = len(members)
    for strip in grid.blocks(rows):
        n = (strip.r1 - strip.r0) * grid.width
        stacks = {name: np.empty((M, n)) for name in needed}
        for m, p in enumerate(members):
            si = member_fields(strip, p, grid.scenario, needed)
            for name in needed:
                stacks[name][m] = si[name].ravel()
            bar.update(1)
        reducer.start(n)
        cells = np.flatnonzero(np.isfinite(strip.elevation[strip.own]).ravel())
        for c0 in range(0, cells.size, chunk):
            idx = cells[c0 : c0 + chunk]
            for name in needed:
                vals = np.ascontiguousarray(stacks[name][:, idx].T)
                reducer.add(name, vals, idx, np.isfinite(vals).all(axis=1))
        writer.write(strip.r0, strip.r1, reducer.maps)


# ----------------------------------------------------------------------------------------------
# budgets


def read_budget_features(scenario, crs) -> dict:

    out = {}
    for kind in ("sections", "regions"):
        path = getattr(scenario, kind, None)
        if path is not None:
            out[kind] = read_features(path, kind, crs)
    return out


def budgets_by_member(grid, members, features, fast: bool, rows: int, memory: int, bar):
    """Volume flux of every feature for every member (DataFrame, m^3/yr, one column per feature)."""
    import pandas as pd

    wanted = ("flux_east", "flux_north", "thickening_rate")
    if fast:
        s = MemberScalars.of(members, grid.airy)
        k = -(s.h**3) / (12.0 * s.eta)
        coefs = [0.5 * s.h * s.ue, 0.5 * s.h * s.un] + [k * gm for gm in s.gamma]
        jobs = [("one", None), (None, "one")] + [(f"{v}_east", f"{v}_north") for v in s.vectors]

        def fields(strip, j, cache):
            if "basis" not in cache:
                T = None if grid.airy else strip.crust_thickness(grid.scenario.parameters)
                cache["basis"] = block_basis(strip.elevation, T, strip.geometry)
            base = cache["basis"]
            live = base["live"]
            east, north = jobs[j]
            qe = np.where(live, base[east] if east else 0.0, np.nan)
            qn = np.where(live, base[north] if north else 0.0, np.nan)
            thick = -divergence(qe, qn, strip.geometry)
            return [v[strip.own] for v in (qe, qn, thick)]

        n_jobs = len(jobs)
    else:

        def fields(strip, j, cache):
            si = member_fields(strip, members[j], grid.scenario, wanted)
            return [si[n] for n in wanted]

        n_jobs = len(members)
    tables = _whole_grid_budgets(grid, n_jobs, fields, features, rows, memory, bar)
    labels = report.budget_labels(tables[0])
    totals = np.array([t["volume_flux_m3_per_yr"].to_numpy() for t in tables])
    if fast:
        totals = np.column_stack(coefs) @ totals
    frame = pd.DataFrame(totals, columns=labels)
    frame.attrs.update(names=list(tables[0]["name"]), kinds=list(tables[0]["kind"]))
    return frame


def _whole_grid_budgets(grid, n_jobs, fields, features, rows, memory, bar):
    """budget_table of each job's whole-grid flux, as many jobs per pass over the grid as fit."""
    import rioxarray  # noqa: F401  (registers the .rio accessor)
    import xarray as xr

    names = ("flux_east", "flux_north", "thickening_rate")
    per_pass = max(1, memory // (8 * len(names) * grid.height * grid.width))
    tables = []
    for j0 in range(0, n_jobs, per_pass):
        jobs = range(j0, min(n_jobs, j0 + per_pass))
        store = np.empty((len(jobs), len(names), grid.height, grid.width))
        for strip in grid.blocks(rows):
            cache: dict = {}
            for i, j in enumerate(jobs):
                for k, values in enumerate(fields(strip, j, cache)):
                    store[i, k, strip.r0 : strip.r1] = values
        for i in range(len(jobs)):
            ds = xr.Dataset(
                {n: (("y", "x"), to_practical(n, store[i, k])) for k, n in enumerate(names)},
                coords={"y": grid.y, "x": grid.x},
            ).rio.write_crs(grid.crs)
            tables.append(budget_table(ds, features.get("sections"), features.get("regions")))
            bar.update(1)
    return tables
