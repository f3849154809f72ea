"""``crustflow check``: validate a scenario and its grids without writing anything."""

from __future__ import annotations

from pathlib import Path

from crustflow.engine.blocks import BlockReader
from crustflow.engine.checks import InputChecks
from crustflow.engine.strips import strip_rows_for
from crustflow.scenario import load_scenario

__all__ = ["check", "USUAL_VISCOSITY", "USUAL_THICKNESS"]

#: Viscosities usual for a crustal channel, Pa s (published estimates span 1e16-1e21 Pa s:
#: Clark & Royden 2000; Copley & McKenzie 2007; Bendick et al. 2008; a decade of margin each side).
USUAL_VISCOSITY = (1e16, 1e24)

#: Channel thicknesses usual for a crustal channel, m (common practice, no source).
USUAL_THICKNESS = (1e3, 60e3)


def check(scenario_path: Path) -> dict:
    """Read the scenario's grids block by block and run every input check of a run.

    Returns
    -------
    dict
        ``title``, ``grid`` (width, height, CRS, cell size and unit), ``grids`` (per source: min,
        max, nodata cells, how it was aligned) and ``notes`` (unusual but legal values).
    """
    scenario = load_scenario(scenario_path)
    p = scenario.parameters
    with BlockReader(scenario) as reader:
        checks = InputChecks(reader.sources, p.channel_thickness)
        for block in reader.blocks(strip_rows_for(reader.width), halo=0):
            checks.update(block.arrays, block.crust_thickness(p), block.cell, block.elevation)
        checks.grids.finish()
        checks.cells.finish()
        checks.thin.finish()
        cells = reader.width * reader.height
        g = checks.grids
        grids = {
            key: {
                "min": g.vmin[key],
                "max": g.vmax[key],
                "nodata_cells": cells - g.count[key],
                "method": src.method,
            }
            for key, src in reader.sources.items()
        }
        grid = {
            "width": reader.width,
            "height": reader.height,
            "crs": reader.crs.to_string(),
            "cell": (abs(reader.transform.a), abs(reader.transform.e)),
            "unit": "degrees" if reader.crs.is_geographic else "m",
        }
    return {"title": scenario.title, "grid": grid, "grids": grids, "notes": _notes(p)}


def _notes(p) -> list[str]:
    notes = []
    low, high = USUAL_VISCOSITY
    if p.viscosity is not None and not low <= p.viscosity <= high:
        notes.append(
            f"viscosity {p.viscosity:.3g} Pa s lies outside {_sci(low)}-{_sci(high)} Pa s, unusual "
            "for a crustal channel"
        )
    low, high = USUAL_THICKNESS
    if p.channel_thickness is not None and not low <= p.channel_thickness <= high:
        notes.append(
            f"channel thickness {p.channel_thickness / 1e3:g} km lies outside "
            f"{low / 1e3:g}-{high / 1e3:g} km"
        )
    return notes


def _sci(value: float) -> str:
    return f"{value:.0e}".replace("e+", "e")
