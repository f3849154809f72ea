"""``crustflow fit``: the posterior of channel parameters given observed rates."""

from __future__ import annotations

import time
from pathlib import Path

from crustflow.analyses.fitting.run import run_fit
from crustflow.analyses.memory import check_memory
from crustflow.errors import CrustflowInputError
from crustflow.io.folders import (
    atomic_folder,
    base_manifest,
    check_out_dir,
    protected_inputs,
    write_manifest,
)
from crustflow.scenario import load_scenario

__all__ = ["fit"]


def fit(scenario_path: Path, out: Path, *, progress: bool = False) -> dict:
    """Fit the ``[fit]`` table of a scenario file and write the results into ``out``.

    Returns what :func:`crustflow.analyses.fitting.run.run_fit` returns (``result``, the summary
    line, files, manifest entries), and ``folder``.
    """
    scenario = load_scenario(scenario_path)
    if scenario.fit is None:
        raise CrustflowInputError(
            "the scenario has no [fit] table; add [[fit.observations]], [fit.parameters] and "
            "[fit.sampler] seed (see the README)"
        )
    inputs = protected_inputs(scenario, *scenario.fit.input_paths)
    check_out_dir(out, inputs)
    check_memory(scenario)
    began = time.perf_counter()
    with atomic_folder(out, inputs) as tmp:
        done = run_fit(scenario, tmp, progress=progress)
        manifest = base_manifest(scenario, {"fit": time.perf_counter() - began})
        manifest["crustflow_run"] = "fit to observations"
        manifest["fit"] = done["manifest"]
        write_manifest(tmp, manifest, done["written"])
    done["folder"] = Path(out).expanduser().resolve()
    return done
