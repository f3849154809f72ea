"""``crustflow evolve``: topography and crust stepped through time, or the steady state."""

from __future__ import annotations

import time
from pathlib import Path

from crustflow.analyses.evolution.evolve import require_evolution
from crustflow.analyses.evolution.run import run_evolution
from crustflow.analyses.memory import check_memory
from crustflow.constants import SECONDS_PER_YEAR
from crustflow.engine.progress import Progress
from crustflow.io.folders import (
    atomic_folder,
    base_manifest,
    check_out_dir,
    protected_inputs,
    write_manifest,
)
from crustflow.scenario import load_scenario

__all__ = ["evolve"]

#: Seconds in a million (Julian) years.
SECONDS_PER_MYR = 1e6 * SECONDS_PER_YEAR


def evolve(scenario_path: Path, out: Path, *, progress: bool = False) -> dict:
    """Run the ``[evolution]`` of a scenario file into the folder ``out``.

    Returns what :func:`crustflow.analyses.evolution.run.run_evolution` returns (``summary``,
    ``written``, ``manifest``), with ``scenario``, ``folder`` and ``seconds``.
    """
    scenario = load_scenario(scenario_path)
    require_evolution(scenario)
    inputs = protected_inputs(scenario)
    check_out_dir(out, inputs)
    check_memory(scenario)
    began = time.perf_counter()
    transient = scenario.evolution.mode == "transient"
    if transient:
        total, unit, desc = scenario.evolution.duration / SECONDS_PER_MYR, " Myr", "model time"
    else:
        total, unit, desc = None, " pseudo-time steps", "steady-state search"
    with Progress(total, unit=unit, desc=desc, bar=progress) as bar:

        def advance(t: float, _total: float | None) -> None:
            bar.update((t / SECONDS_PER_MYR if transient else t) - bar.done)

        with atomic_folder(out, inputs) as tmp:
            result = run_evolution(scenario, tmp, advance)
            manifest = base_manifest(scenario, {"evolution": time.perf_counter() - began})
            manifest["crustflow_run"] = "evolution through time"
            manifest["evolution"] = result["manifest"]
            write_manifest(tmp, manifest, result["written"])
    result.update(
        scenario=scenario,
        folder=Path(out).expanduser().resolve(),
        seconds=time.perf_counter() - began,
    )
    return result
