"""``crustflow ensemble``: percentile, spread and exceedance maps over uncertain parameters."""

from __future__ import annotations

import time
from pathlib import Path

from crustflow.analyses.ensemble.run import run_ensemble
from crustflow.analyses.memory import check_memory
from crustflow.errors import CrustflowInputError
from crustflow.io.folders import (
    atomic_folder,
    base_manifest,
    check_out_dir,
    protected_inputs,
    write_manifest,
)
from crustflow.io.styles import sidecars
from crustflow.scenario import load_scenario

__all__ = ["ensemble", "ensemble_into"]


def ensemble_into(scenario, folder: Path, *, progress: bool = False) -> dict:
    """Run the scenario's ensemble into ``folder``; return written files, manifest entries and
    the ensemble's summary."""
    summary = run_ensemble(scenario, scenario.ensemble, folder, progress=progress)
    written = list(summary.get("written", []))
    return {
        "written": written + sidecars(folder, written),
        "manifest": summary["manifest"],
        "summary": summary,
    }


def ensemble(scenario_path: Path, out: Path, *, progress: bool = False) -> dict:
    """Run the ``[ensemble]`` of a scenario file into the folder ``out``."""
    scenario = load_scenario(scenario_path)
    if scenario.ensemble is None:
        raise CrustflowInputError(
            "the scenario has no [ensemble] table; add one with members, seed "
            "and [ensemble.vary] (see the README)"
        )
    inputs = protected_inputs(scenario)
    check_out_dir(out, inputs)
    check_memory(scenario)
    began = time.perf_counter()
    with atomic_folder(out, inputs) as tmp:
        result = ensemble_into(scenario, tmp, progress=progress)
        manifest = base_manifest(scenario, {"ensemble": time.perf_counter() - began})
        manifest["ensemble"] = result["manifest"]
        write_manifest(tmp, manifest, result["written"])
    result["folder"] = Path(out).expanduser().resolve()
    result["seconds"] = time.perf_counter() - began
    return result
