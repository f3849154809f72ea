"""``crustflow run`` and ``crustflow demo``: maps of a scenario, with budgets, figure and ensemble
when the scenario asks for them, written atomically into one folder."""

from __future__ import annotations

import time
from pathlib import Path

from crustflow.analyses.memory import check_memory
from crustflow.commands.common import check_features, distributed_client, write_budgets
from crustflow.commands.report import write_report
from crustflow.engine.progress import StageClock
from crustflow.engine.strips import run_strips
from crustflow.io.folders import (
    atomic_folder,
    base_manifest,
    check_out_dir,
    protected_inputs,
    write_manifest,
)
from crustflow.io.styles import sidecars
from crustflow.samples import demo_scenario
from crustflow.scenario import load_scenario

__all__ = ["run", "demo", "rows_for_chunk"]


def run(
    scenario_path: Path,
    out: Path,
    *,
    strip_rows: int | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    cog: bool = False,
    announce=None,
    progress: bool = False,
) -> dict:
    """Run a scenario file into the folder ``out``.

    Returns
    -------
    dict
        The strip run's result (ranges, counts, ...), ``table`` (the budget table or None),
        ``folder`` (the output folder) and ``seconds``.
    """
    began = time.perf_counter()
    scenario = load_scenario(scenario_path)
    inputs = protected_inputs(scenario)
    check_out_dir(out, inputs)
    check_memory(scenario)
    stages = StageClock(announce)
    budgets = scenario.sections is not None or scenario.regions is not None
    if budgets:
        check_features(scenario)
    client, cluster = distributed_client(workers, scheduler)
    try:
        with atomic_folder(out, inputs) as tmp:
            result = _run_into(scenario, tmp, stages, strip_rows, budgets, client, cog, progress)
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
    result["folder"] = Path(out).expanduser().resolve()
    result["seconds"] = time.perf_counter() - began
    return result


def demo(name: str, out: Path, **options) -> dict:
    """Run a bundled sample scenario (see :mod:`crustflow.samples`) into ``out``."""
    result = run(demo_scenario(name), out, **options)
    result["scenario"] = demo_scenario(name)
    return result


def rows_for_chunk(scenario_path: Path, chunk: int) -> int:
    """Strip rows holding about ``chunk`` x ``chunk`` cells of the scenario's topography grid."""
    import rasterio

    scenario = load_scenario(scenario_path)
    try:
        with rasterio.open(scenario.topography) as src:
            width = src.width
    except (rasterio.errors.RasterioError, OSError):
        return max(1, chunk)  # the run itself reports the unreadable file
    return max(1, chunk * chunk // width)


def _run_into(scenario, tmp: Path, stages: StageClock, strip_rows, budgets, client, cog, progress):
    """Compute and write everything a run asks for into ``tmp``; return the run's result."""
    result = run_strips(
        scenario,
        tmp,
        strip_rows=strip_rows,
        stage=stages,
        progress=progress,
        budget_fields=tmp / ".budget_fields.nc" if budgets else None,
        client=client,
    )
    written = result["written"]
    written += sidecars(tmp, written)
    if cog:
        _to_cog(tmp, written, scenario.compression, stages)
    result["table"] = None
    if budgets:
        stages("budgets")
        result["table"], files = write_budgets(result["budget_fields"], tmp, scenario)
        written += files
        if result["budget_fields"].name != "fields.nc":
            result["budget_fields"].unlink()
    if result["figure"] is not None:
        written += _figure(result["figure"], tmp, scenario, stages)
    ensemble = None
    if scenario.ensemble is not None:
        from crustflow.commands.ensemble import ensemble_into

        stages("ensemble")
        ensemble = ensemble_into(scenario, tmp, progress=progress)
        written += ensemble["written"]
    stages("write manifest")
    manifest = base_manifest(scenario, stages.timings, result["provenance"])
    manifest["grid"] = {
        "shape": result["shape"],
        "strip_rows": result["strip_rows"],
        "engine": "dask.distributed" if client is not None else "local",
    }
    if ensemble is not None:
        manifest["ensemble"] = ensemble["manifest"]
    stages("write report")
    written.append(write_report(tmp, manifest, result, scenario, written))
    write_manifest(tmp, manifest, written)
    stages.finish()
    return result


def _to_cog(tmp: Path, written: list[str], compression: str, stages: StageClock) -> None:
    from crustflow.io.writers import to_cog

    stages("cloud-optimised GeoTIFF")
    for name in written:
        if name.endswith(".tif"):
            to_cog(tmp / name, compression)


def _figure(figure, tmp: Path, scenario, stages: StageClock) -> list[str]:
    """The flux map and the rates map, in every ``[output] figure_formats``."""
    from crustflow.figures.common import save_figure
    from crustflow.figures.flux import draw_flux_map
    from crustflow.figures.rates import draw_rates_map

    stages("draw figure")
    options = {"formats": scenario.figure_formats, "dpi": scenario.figure_dpi}
    written = save_figure(draw_flux_map(figure, title=scenario.title), tmp, "flux_map", **options)
    written += save_figure(
        draw_rates_map(figure, title=scenario.title), tmp, "rates_map", **options
    )
    return written
