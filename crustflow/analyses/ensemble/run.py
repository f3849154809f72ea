"""Ensembles: how sure are the maps? Sample uncertain scalar parameters and map the spread of the results.

An ensemble varies scalar scenario values (viscosity, channel thickness, densities, wall velocity,
gravity, the Airy reference thickness) according to stated probability distributions, runs the model
for every sampled member and reduces the members cell by cell to percentiles, mean, standard deviation
and exceedance probabilities, and feature by feature to distributions of the volume budgets.

Two engines give the same numbers (``tests/test_ensemble.py``):

* **Fast path.** For a Newtonian channel of uniform parameters every output is a combination of a few
  base maps with per-member scalars (see :func:`fast_fields`), so each member costs a few multiply-adds
  per cell. Cells are processed in chunks of a strip of rows, never holding members x cells for the whole
  grid; the strips are read with halo rows as :mod:`crustflow.engine.strips` does.
* **Fallback.** Anything else (parameter grids, other rheologies) loops over the members and calls
  :func:`crustflow.engine.fields.fields_si` on each strip. It is slower, by about the ratio of a full model
  run to a few multiply-adds per cell.

Conventions
-----------
- SI inside; practical units at the edges: the units of :data:`crustflow.variables.VARIABLES` in files,
  and the units named in the column headers of the sampled values.
- Percentiles: numpy's ``"linear"`` method (definition 7 of Hyndman & Fan 1996), over the members of a
  cell. The order statistics are taken on the member values rounded to float32, the precision of the
  output files; rounding is monotone, so they are the float64 order statistics rounded, and the linear
  interpolation between them is done in float64.
- Standard deviation: the sample standard deviation over members (``ddof = 1``).
- Exceedance: the share of members whose value is strictly greater than the threshold (0 to 1).
- A cell that is nodata for a variable has no statistics (NaN).
- Members are numbered from 0, in sampling order.

References
----------
.. [1] McKay, M. D., Beckman, R. J. & Conover, W. J. (1979). A comparison of three methods for
   selecting values of input variables in the analysis of output from a computer code.
   Technometrics 21(2), 239-245.
.. [2] Hyndman, R. J. & Fan, Y. (1996). Sample quantiles in statistical packages. The American
   Statistician 50(4), 361-365.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from crustflow.analyses.ensemble import report
from crustflow.analyses.ensemble.engine import (
    EnsembleGrid,
    budgets_by_member,
    check_thickness,
    fallback_maps,
    fast_maps,
    read_budget_features,
    scan_grid,
)
from crustflow.analyses.ensemble.fast import FAST_VARIABLES as FAST_VARIABLES
from crustflow.analyses.ensemble.fast import LINEAR as LINEAR
from crustflow.analyses.ensemble.fast import (
    SOLUTION,
    MemberBuffers,
    fast_fields,
    fast_path_obstacle,
)
from crustflow.engine.progress import Progress, StageClock
from crustflow.engine.strips import strip_rows_for
from crustflow.errors import CrustflowInputError
from crustflow.io.grids import provenance as grid_provenance
from crustflow.scenario.ensemble import CIRCULAR as CIRCULAR
from crustflow.scenario.ensemble import DISTRIBUTIONS, SAMPLING, parse_ensemble
from crustflow.scenario.ensemble import WHOLE_GRID as WHOLE_GRID
from crustflow.scenario.ensemble_spec import DEFAULT_PERCENTILES as DEFAULT_PERCENTILES
from crustflow.scenario.ensemble_spec import DEFAULT_VARIABLES as DEFAULT_VARIABLES
from crustflow.scenario.ensemble_spec import (
    PERCENTILE_METHOD,
    VARIABLE_KEYS,
    Distribution,
    EnsembleSpec,
    VectorDistribution,
    sample_members,
)
from crustflow.scenario.ensemble_spec import U_HIGH as U_HIGH
from crustflow.scenario.ensemble_spec import U_LOW as U_LOW

__all__ = [
    "Distribution",
    "VectorDistribution",
    "EnsembleSpec",
    "parse_ensemble",
    "sample_members",
    "run_ensemble",
    "fast_fields",
    "fast_path_obstacle",
    "SAMPLING",
    "DISTRIBUTIONS",
    "VARIABLE_KEYS",
    "MEMORY_BYTES",
]

# This module runs an ensemble; the parts are in ensemble_spec (varied keys, distributions, sampling),
# ensemble_parse (the [ensemble] table), ensemble_fast (base maps and member scalars),
# ensemble_engine (strips, member loops, budgets), ensemble_stats and ensemble_report (statistics,
# files, figures). The names imported above as ``X as X`` were defined here before the split and
# stay importable from here.

#: Percentiles the figure needs (median and the 5-95 % spread), computed in any case.
FIGURE_PERCENTILES = (5.0, 50.0, 95.0)

#: Working memory for the member-by-cell arrays, bytes. Project choice: 1 GiB keeps a 1000-member
#: run of a 1000 x 1000 grid far below 4 GB with chunks large enough to keep numpy busy.
MEMORY_BYTES = 1 << 30

#: Member-by-cell float64 arrays alive at once on the fast path (named buffers, the float32 sort
#: copy, a comparison mask), and with the full one-cell solution (peak speed, drag, backflow). Peak
#: traced by tracemalloc over one chunk of 9,000 cells and 200 members: 5.8 and 36 arrays; rounded up.
FAST_ARRAYS, FULL_ARRAYS = 8, 40


# ----------------------------------------------------------------------------------------------
# the run


def run_ensemble(
    scenario,
    spec: EnsembleSpec,
    folder,
    *,
    progress: bool = False,
    strip_rows: int | None = None,
    fast: bool | None = None,
    memory_bytes: int = MEMORY_BYTES,
) -> dict:
    """Run an ensemble of a scenario and write its maps, tables and figures into ``folder``.

    Parameters
    ----------
    scenario : Scenario
    spec : EnsembleSpec
        From :func:`parse_ensemble`.
    folder : path
        An existing (temporary) folder; see :func:`crustflow.analyses.ensemble.report.write_tables` and
        :class:`crustflow.analyses.ensemble.report.MapWriter` for the files. ``[output] formats`` of the
        scenario chooses NetCDF, GeoTIFF and figures; the CSV tables are always written.
    progress : bool
        Progress bars on stderr (cells done and time left; members done on the fallback).
    strip_rows : int, optional
        Rows per strip (default: :func:`crustflow.engine.strips.strip_rows_for` on the fast path, from
        ``memory_bytes`` on the fallback).
    fast : bool, optional
        Force the fast path (True; an error where it does not apply) or the fallback (False);
        default: the fast path wherever :func:`fast_path_obstacle` finds nothing against it.
    memory_bytes : int
        Budget for the member-by-cell work arrays, bytes (default :data:`MEMORY_BYTES`).

    Returns
    -------
    dict
        ``written`` (file names), ``fast_path`` (bool), ``fast_path_obstacle`` (str or None),
        ``samples`` (DataFrame of :func:`sample_members`), ``member_budgets`` (DataFrame of the
        volume flux of each feature per member, m^3/yr, or None), ``budget_statistics``
        (DataFrame or None), ``timings`` (seconds per stage), ``shape``, ``strip_rows``,
        ``chunk_cells``, ``provenance`` (grid alignment), ``spec`` (:meth:`EnsembleSpec.describe`),
        ``members``, ``percentile_method``, and ``manifest``: the JSON-ready entries (no
        DataFrames; budget statistics as records) for a run manifest.

    Raises
    ------
    CrustflowInputError
        Every check of a run (grids, features), a member whose channel is not thinner than its
        crust, and ``fast=True`` where the fast path does not apply.

    Notes
    -----
    Fast path: a first pass checks the grids; then each strip of rows is read with two halo rows,
    its base maps are computed (:func:`fast_fields`), its valid cells are cut into chunks of
    ``memory_bytes / (8 members FAST_ARRAYS)`` cells, and each chunk's member values are formed by
    one matrix product per variable and reduced at once
    (:class:`crustflow.analyses.ensemble.report.Reducer`). Budgets are linear in
    the flux: the budgets of the two or three base flux fields and of the unit wall fields
    (:func:`crustflow.analyses.budgets.budget_table`) combine with the member scalars.
    Fallback: strips of ``memory_bytes / (8 members (variables + 2) width)`` rows; each member runs
    :func:`crustflow.engine.fields.fields_si` on each strip; budgets come from ``budget_table`` on each
    member's whole-grid flux.
    """
    folder = Path(folder)
    clock = StageClock()
    clock("sample members")
    fast, obstacle = _choose_path(scenario, spec, fast)
    members, samples = sample_members(spec, scenario.parameters)
    clock("check grids")
    grid = EnsembleGrid(scenario)
    try:
        plan = _plan(grid, spec, fast, strip_rows, memory_bytes)
        with Progress(grid.height, unit=" rows", desc="checking grids", bar=progress) as b:
            low = scan_grid(grid, plan.check_rows, b)
        features = read_budget_features(scenario, grid.crs)
        if not grid.cell_grids:
            check_thickness(members, low, grid.airy, "channel.thickness" in spec.vary)
        clock("maps")
        writer, reducer = _map_outputs(folder, grid, scenario, spec, plan)
        written = _maps(grid, members, plan, reducer, writer, progress)
        member_budgets = None
        if features:
            clock("budgets")
            with Progress(None, unit=" fields", desc="budgets", bar=progress) as b:
                member_budgets = budgets_by_member(
                    grid, members, features, fast, plan.rows, memory_bytes, b
                )
        provenance = grid_provenance(grid.sources)
    finally:
        grid.close()
    clock("tables and figures")
    written += report.write_tables(folder, samples, member_budgets, spec)
    stats = report.budget_statistics(member_budgets, spec.percentiles, spec.members)
    if "figure" in scenario.formats:
        written += writer.figures(folder, stats, member_budgets)
    clock.finish()
    summary = {
        "fast_path": bool(fast),
        "fast_path_obstacle": obstacle,
        "members": spec.members,
        "spec": spec.describe(),
        "percentile_method": PERCENTILE_METHOD,
        "timings": {k: round(v, 4) for k, v in clock.timings.items()},
        "shape": [grid.height, grid.width],
        "strip_rows": plan.rows,
        "chunk_cells": plan.chunk,
        "provenance": provenance,
    }
    budget_records = None if member_budgets is None else stats.to_dict(orient="records")
    return dict(
        summary,
        written=written,
        samples=samples,
        member_budgets=member_budgets,
        budget_statistics=stats if member_budgets is not None else None,
        manifest=dict(summary, outputs=list(written), budget_statistics=budget_records),
    )


def _choose_path(scenario, spec: EnsembleSpec, fast: bool | None) -> tuple[bool, str | None]:
    """The fast base-map path or the per-member fallback, and what rules the fast path out."""
    if scenario.load.filtered:
        raise CrustflowInputError(
            "ensembles do not support [load] smoothing or elastic_thickness yet (the filtered load "
            "is a whole-grid computation for every member); remove them from the scenario"
        )
    obstacle = fast_path_obstacle(scenario, spec)
    if fast is None:
        return obstacle is None, obstacle
    if fast and obstacle:
        raise CrustflowInputError(f"the fast path does not apply: {obstacle}; leave fast unset")
    return fast, obstacle


@dataclass(frozen=True)
class _Plan:
    fast: bool
    names: list  #: variables reported
    needed: list  #: variables computed (reported and the exceedance variable)
    percentiles: tuple
    check_rows: int  #: rows per strip of the checking pass
    rows: int  #: rows per strip of the maps
    chunk: int  #: cells per member-by-cell chunk


def _plan(grid, spec: EnsembleSpec, fast: bool, strip_rows, memory_bytes: int) -> _Plan:
    """Strip heights and chunk sizes within the memory budget."""
    M = spec.members
    names = list(spec.variables)
    needed = names
    if spec.exceedance_variable:
        needed = list(dict.fromkeys(names + [spec.exceedance_variable]))
    full = bool(set(needed) & set(SOLUTION))
    rows = check_rows = strip_rows or strip_rows_for(grid.width)
    if fast:
        chunk = max(1, memory_bytes // (8 * M * (FULL_ARRAYS if full else FAST_ARRAYS)))
    else:
        rows = strip_rows or max(1, memory_bytes // (8 * M * (len(needed) + 2) * grid.width))
        chunk = max(1, memory_bytes // (8 * M * 2 * (len(needed) + 2)))
    percentiles = tuple(sorted(set(spec.percentiles) | set(FIGURE_PERCENTILES)))
    return _Plan(fast, names, needed, percentiles, check_rows, rows, chunk)


def _map_outputs(folder: Path, grid, scenario, spec: EnsembleSpec, plan: _Plan):
    """The map writer (NetCDF, GeoTIFF, figure rows) and the per-cell statistics reducer."""
    buffers = MemberBuffers(spec.members)
    reducer = report.Reducer(
        plan.names,
        spec.exceedance_variable,
        spec.thresholds,
        plan.percentiles,
        spec.members,
        buffers.get,
    )
    reducer.buffers = buffers
    writer = report.MapWriter(folder, grid, scenario, spec, plan.percentiles, plan.rows)
    return writer, reducer


def _maps(grid, members, plan: _Plan, reducer, writer, progress: bool) -> list[str]:
    """Percentile, spread and exceedance maps, strip by strip; returns the files written."""
    M = len(members)
    try:
        if plan.fast:
            desc = f"ensemble ({M} members)"
            with Progress(grid.height * grid.width, unit=" cells", desc=desc, bar=progress) as b:
                fast_maps(
                    grid,
                    members,
                    plan.needed,
                    reducer,
                    writer,
                    plan.rows,
                    plan.chunk,
                    reducer.buffers,
                    b,
                )
        else:
            total = M * -(-grid.height // plan.rows)
            desc = f"ensemble ({M} members, fallback)"
            with Progress(total, unit=" member-strips", desc=desc, bar=progress) as b:
                fallback_maps(grid, members, plan.needed, reducer, writer, plan.rows, plan.chunk, b)
        return writer.close()
    except BaseException:
        writer.abort()
        raise
