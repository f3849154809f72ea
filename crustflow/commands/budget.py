"""``crustflow budget``: volume budgets across sections and regions, reusing an earlier run."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

from crustflow.commands.common import check_features, write_budgets
from crustflow.engine.strips import BUDGET_VARIABLES, run_strips
from crustflow.errors import CrustflowInputError
from crustflow.io.folders import (
    MANIFEST,
    atomic_folder,
    base_manifest,
    check_out_dir,
    protected_inputs,
    write_manifest,
)
from crustflow.io.grids import file_checksum
from crustflow.scenario import load_scenario

__all__ = ["budget"]


def budget(scenario_path: Path, out: Path, *, sections=None, regions=None, run_dir: Path) -> dict:
    """Budgets of a scenario into ``out``; reuses ``run_dir/fields.nc`` when it is a run of the
    same scenario (same grids and parameters). Returns ``table``, ``reused`` and ``folder``."""
    scenario = load_scenario(scenario_path)
    scenario = dataclasses.replace(
        scenario,
        sections=Path(sections).resolve() if sections else scenario.sections,
        regions=Path(regions).resolve() if regions else scenario.regions,
    )
    if scenario.sections is None and scenario.regions is None:
        raise CrustflowInputError(
            "give --sections FILE and/or --regions FILE (or a [budgets] table in the scenario)"
        )
    fields_nc = run_dir.expanduser().resolve() / "fields.nc"
    # the earlier run's fields and manifest are inputs too: --out may not replace them
    inputs = protected_inputs(
        scenario, *(p for p in (fields_nc, fields_nc.parent / MANIFEST) if p.is_file())
    )
    check_out_dir(out, inputs)
    check_features(scenario)
    reuse = fields_nc.is_file() and _same_run(fields_nc.parent, scenario, BUDGET_VARIABLES)
    with atomic_folder(out, inputs) as tmp:
        if reuse:
            path = fields_nc
        else:
            result = run_strips(
                dataclasses.replace(scenario, formats=()),
                tmp,
                budget_fields=tmp / ".budget_fields.nc",
            )
            path = result["budget_fields"]
        table, files = write_budgets(path, tmp, scenario)
        if not reuse:
            path.unlink()
        manifest = base_manifest(scenario, {})
        manifest["fields"] = str(fields_nc) if reuse else "computed for this command"
        write_manifest(tmp, manifest, files)
    return {
        "table": table,
        "reused": fields_nc if reuse else None,
        "folder": Path(out).expanduser().resolve(),
    }


def _same_run(run_dir: Path, scenario, needed) -> bool:
    """Does ``run_dir`` hold a run of this scenario (same grids, same parameters) with ``needed``?"""
    import netCDF4

    try:
        manifest = json.loads((run_dir / MANIFEST).read_text())
        with netCDF4.Dataset(run_dir / "fields.nc") as nc:
            if not set(needed) <= set(nc.variables):
                return False
    except (OSError, ValueError):
        return False
    then = manifest.get("scenario_resolved_SI", {})
    now = json.loads(json.dumps(scenario.resolved()))
    if then.get("parameters_SI") != now["parameters_SI"] or then.get("grids") != now["grids"]:
        return False
    inputs = manifest.get("inputs", {})
    grids = [p for p in (scenario.topography, scenario.crust_thickness, scenario.moho_depth) if p]
    return all(inputs.get(str(p), {}).get("sha256") == file_checksum(p) for p in grids)
