"""The ``crustflow`` command: run, demo, check.

Exit status: 0 on success, 2 on bad input (one line naming the problem and the fix), 1 otherwise.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from crustflow._version import __version__
from crustflow.errors import CrustflowInputError

CAUTION_HELP = (
    "Outputs are research estimates of a simplified model (thin channel, rigid walls, lithostatic "
    "load, idealised rheology); they are no basis for hazard or engineering decisions without "
    "local, licensed review."
)

DESCRIPTION = (
    "Maps of lower-crustal channel flow from gridded topography and crustal thickness: driving "
    "pressure gradient, flux, velocities, wall drag, flow reversal, thickening and uplift rates, "
    "written as CF NetCDF, GeoTIFF and a figure.\n\n" + CAUTION_HELP
)


class Progress:
    """Prints one line per stage to stderr, with the time the previous stage took."""

    def __init__(self, quiet: bool = False) -> None:
        self.quiet = quiet
        self.start = time.perf_counter()
        self.last: tuple[str, float] | None = None

    def __call__(self, name: str) -> None:
        now = time.perf_counter()
        if self.last is not None:
            self._line(f"{self.last[0]} ({now - self.last[1]:.2f} s)")
        self.last = (name, now)

    def finish(self) -> None:
        self("")
        self.last = None

    def _line(self, text: str) -> None:
        if not self.quiet:
            print(f"crustflow: {text}", file=sys.stderr, flush=True)


def _client(workers: int | None, scheduler: str | None):
    """A dask.distributed client: a local cluster of ``workers`` processes, or a running scheduler."""
    if not workers and not scheduler:
        return None, None
    from dask.distributed import Client, LocalCluster

    if scheduler:
        try:
            return Client(scheduler, timeout="20s"), None
        except OSError as exc:
            raise CrustflowInputError(
                f"--scheduler {scheduler}: no dask scheduler answers there "
                f"({exc.__class__.__name__}); start one or check the address"
            ) from None
    cluster = LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None
    )
    return Client(cluster), cluster


def _run(
    scenario_path: Path,
    out: Path,
    quiet: bool,
    strip_rows: int | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    cog: bool = False,
) -> int:
    from crustflow.io.writers import atomic_folder
    from crustflow.scenario.document import load_scenario

    began = time.perf_counter()
    scenario = load_scenario(scenario_path)
    progress = Progress(quiet)
    timings: dict[str, float] = {}
    clock = {"name": None, "t": time.perf_counter()}

    def note(name: str) -> None:
        now = time.perf_counter()
        if clock["name"]:
            timings[clock["name"]] = timings.get(clock["name"], 0.0) + now - clock["t"]
        clock.update(name=name, t=now)
        progress(name)

    budgets = scenario.sections is not None or scenario.regions is not None
    if budgets:
        _check_features(scenario)
    client, cluster = _client(workers, scheduler)
    try:
        with atomic_folder(out, scenario.input_paths) as tmp:
            result = _run_into(
                scenario, tmp, note, progress, timings, quiet, strip_rows, budgets, client, cog
            )
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
    if not quiet:
        print(
            f"crustflow: wrote {out.expanduser().resolve()} in {time.perf_counter() - began:.1f} s",
            file=sys.stderr,
        )
        _summary(result)
        if result.get("table") is not None:
            _print_table(result["table"])
    return 0


def _rows_for_chunk(scenario_path: Path, chunk: int) -> int:
    """Strip rows holding about ``chunk`` x ``chunk`` cells of the scenario's topography grid."""
    import rasterio

    from crustflow.scenario.document import load_scenario

    scenario = load_scenario(scenario_path)
    try:
        with rasterio.open(scenario.topography) as src:
            width = src.width
    except (rasterio.errors.RasterioError, OSError):
        return max(1, chunk)  # the run itself reports the unreadable file
    return max(1, chunk * chunk // width)


def _run_into(
    scenario, tmp: Path, note, progress, timings, quiet, strip_rows, budgets, client, cog
) -> dict:
    """Compute and write everything a run asks for into ``tmp``; return the run's result."""
    from crustflow.engine.strips import run_strips
    from crustflow.io.writers import base_manifest, write_manifest

    result = run_strips(
        scenario,
        tmp,
        strip_rows=strip_rows,
        stage=note,
        progress=not quiet and sys.stderr.isatty(),
        budget_fields=tmp / ".budget_fields.nc" if budgets else None,
        client=client,
    )
    written = result["written"]
    if cog:
        note("cloud-optimised GeoTIFF")
        from crustflow.io.writers import to_cog

        for name in written:
            if name.endswith(".tif"):
                to_cog(tmp / name)
    result["table"] = None
    if budgets:
        note("budgets")
        result["table"], files = _write_budgets(
            result["budget_fields"], tmp, scenario.sections, scenario.regions, scenario.title
        )
        written += files
        if result["budget_fields"].name != "fields.nc":
            result["budget_fields"].unlink()
    if result["figure"] is not None:
        from crustflow.figures.common import flux_map

        note("draw figure")
        flux_map(result["figure"], tmp / "flux_map.png", title=scenario.title)
        written.append("flux_map.png")
    ensemble = None
    if scenario.ensemble is not None:
        note("ensemble")
        ensemble = _run_ensemble(scenario, tmp, quiet)
        written += ensemble["written"]
    note("write manifest")
    manifest = base_manifest(scenario, timings, result["provenance"])
    manifest["grid"] = {
        "shape": result["shape"],
        "strip_rows": result["strip_rows"],
        "engine": "dask.distributed" if client is not None else "local",
    }
    if ensemble is not None:
        manifest["ensemble"] = ensemble["manifest"]
    write_manifest(tmp, manifest, written)
    progress.finish()
    return result


def _check_features(scenario) -> None:
    """Read the scenario's section and region files once, so that bad ones fail before any work."""
    from crustflow.analyses.budgets import read_features
    from crustflow.io.grids import close_sources, open_sources

    sources = open_sources(scenario)
    try:
        crs = sources["topography"].crs
    finally:
        close_sources(sources)
    if scenario.sections is not None:
        read_features(scenario.sections, "sections", crs)
    if scenario.regions is not None:
        read_features(scenario.regions, "regions", crs)


def _write_budgets(fields_path: Path, folder: Path, sections, regions, title: str):
    import xarray as xr

    from crustflow.analyses.budgets import write_budget_outputs

    with xr.open_dataset(fields_path, decode_coords="all") as fields:
        fields = fields.load()
    files = write_budget_outputs(fields, folder, sections=sections, regions=regions, title=title)
    import pandas as pd

    return pd.read_csv(folder / "budgets.csv"), files


def _print_table(table) -> None:
    """The budget table on the terminal: totals in km^3/Myr (1 km^3/Myr = 1000 m^3/yr)."""
    print(
        "  budgets (sections: positive to the right of the line's direction; regions: net inflow)"
    )
    print(
        f"  {'name':<24} {'kind':<8} {'km3/Myr':>12} {'length km':>10} {'area km2':>12} "
        f"{'covered':>8}"
    )
    for row in table.itertuples():
        length = "" if row.length_km != row.length_km else f"{row.length_km:.1f}"
        area = "" if row.area_km2 != row.area_km2 else f"{row.area_km2:.0f}"
        print(
            f"  {str(row.name)[:24]:<24} {row.kind:<8} {row.volume_flux_km3_per_Myr:>12.4g} "
            f"{length:>10} {area:>12} {row.covered_fraction:>8.2f}"
        )


def _summary(result: dict) -> None:
    from crustflow.variables import VARIABLES

    labels = {
        "flux_magnitude": "flux magnitude",
        "thickening_rate": "thickening rate",
        "uplift_rate": "uplift rate",
    }
    for name, (lo, hi) in result["ranges"].items():
        unit = VARIABLES[name].units
        text = f"{lo:.3g} to {hi:.3g} {unit}" if lo <= hi else "no valid cells"
        print(f"  {labels[name]:<16} {text}")
    if result.get("skipped_variables"):
        print(
            f"  note: not written for a grid this large (whole-grid steps): "
            f"{', '.join(result['skipped_variables'])}"
        )
    if result.get("excluded_cells"):
        print(
            f"  note: {result['excluded_cells']} cells excluded: the placed channel has no "
            "thickness there or leaves the crust"
        )
    if result.get("thin_channel_cells"):
        print(
            f"  WARNING: in {result['thin_channel_cells']} cells the load varies on wavelengths "
            "shorter than 3 channel thicknesses, where the thin-channel model fails "
            "(thin_channel_warning = 1)"
        )
    if result.get("unconverged_cells"):
        print(
            f"  WARNING: the per-cell solver did not converge in {result['unconverged_cells']} "
            "cells (solver_converged = 0 there; their values are the last iterate)"
        )
    if result["backflow_cells"] is not None:
        print(f"  backflow cells   {result['backflow_cells']} of {result['valid_cells']}")


def _check(scenario_path: Path) -> int:
    from crustflow.engine.fields import ThinCrustCheck, crust_thickness_of
    from crustflow.engine.strips import strip_rows_for
    from crustflow.io.grids import GridChecks, close_sources, open_sources
    from crustflow.scenario.channel import CellInputCheck
    from crustflow.scenario.document import load_scenario

    scenario = load_scenario(scenario_path)
    p = scenario.parameters
    sources = open_sources(scenario)
    try:
        topo = sources["topography"]
        checks = GridChecks(sources)
        thin = ThinCrustCheck(p.channel_thickness)
        cell_check = CellInputCheck()
        rows = strip_rows_for(topo.width)
        for r0 in range(0, topo.height, rows):
            arrays = {k: src.read(r0, min(topo.height, r0 + rows)) for k, src in sources.items()}
            checks.update(arrays)
            H = arrays["topography"]
            T = crust_thickness_of(
                H,
                p,
                crust_thickness=arrays.get("crust_thickness"),
                moho_depth=arrays.get("moho_depth"),
            )
            cell = {
                k: g.to_si(arrays[k])
                for k, g in {**scenario.channel.grids, **scenario.load.grids}.items()
            }
            cell_check.update(cell)
            thin.update(np.where(np.isfinite(H), T, np.nan), cell.get("channel_thickness"))
        checks.finish()
        cell_check.finish()
        thin.finish()
        unit = "degrees" if topo.crs.is_geographic else "m"
        print(f"scenario         {scenario.title}")
        print(
            f"grid             {topo.width} x {topo.height} cells, CRS {topo.crs.to_string()}, "
            f"cell {abs(topo.transform.a):g} x {abs(topo.transform.e):g} {unit}"
        )
        for key, src in sources.items():
            cells = topo.width * topo.height
            print(
                f"{key:<16} {checks.vmin[key]:.6g} to {checks.vmax[key]:.6g} m, "
                f"{cells - checks.count[key]} nodata cells; {src.method}"
            )
    finally:
        close_sources(sources)
    if not 1e16 <= p.viscosity <= 1e24:
        print(
            f"note: viscosity {p.viscosity:.3g} Pa s lies outside 1e16-1e24 Pa s, unusual for a "
            "crustal channel"
        )
    if not 1e3 <= p.channel_thickness <= 60e3:
        print(f"note: channel thickness {p.channel_thickness / 1e3:g} km lies outside 1-60 km")
    print("check passed: the scenario's grids and parameters are usable")
    return 0


def _budget(scenario_path: Path, sections, regions, run_dir: Path, out: Path, quiet: bool) -> int:
    import dataclasses

    from crustflow.engine.strips import BUDGET_VARIABLES, run_strips
    from crustflow.io.writers import atomic_folder, base_manifest, write_manifest
    from crustflow.scenario.document import load_scenario

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
    _check_features(scenario)
    fields_nc = run_dir.expanduser().resolve() / "fields.nc"
    reuse = fields_nc.is_file() and _same_run(fields_nc.parent, scenario, BUDGET_VARIABLES)
    with atomic_folder(out, scenario.input_paths) as tmp:
        if reuse:
            path = fields_nc
        else:
            result = run_strips(
                dataclasses.replace(scenario, formats=()),
                tmp,
                budget_fields=tmp / ".budget_fields.nc",
            )
            path = result["budget_fields"]
        table, files = _write_budgets(
            path, tmp, scenario.sections, scenario.regions, scenario.title
        )
        if not reuse:
            path.unlink()
        manifest = base_manifest(scenario, {})
        manifest["fields"] = str(fields_nc) if reuse else "computed for this command"
        write_manifest(tmp, manifest, files)
    if not quiet:
        how = f"reused {fields_nc}" if reuse else "computed the fields (no matching earlier run)"
        print(f"crustflow: {how}; wrote {out.expanduser().resolve()}", file=sys.stderr)
    _print_table(table)
    return 0


def _same_run(run_dir: Path, scenario, needed) -> bool:
    """Does ``run_dir`` hold a run of this scenario (same grids, same parameters) with ``needed``?"""
    import json

    import netCDF4

    from crustflow.io.grids import file_checksum

    try:
        manifest = json.loads((run_dir / "run.json").read_text())
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


def _profile(scenario_path: Path, at, points, crs, out: Path, quiet: bool) -> int:
    from crustflow.analyses.profiles import read_points, velocity_profiles, write_profile_outputs
    from crustflow.io.writers import atomic_folder, base_manifest, write_manifest
    from crustflow.scenario.document import load_scenario

    if (at is None) == (points is None):
        raise CrustflowInputError("give the site with --at X Y, or several with --points FILE")
    scenario = load_scenario(scenario_path)
    if at is not None:
        sites = [(f"{at[0]:g}_{at[1]:g}", at[0], at[1], crs)]
    else:
        sites = read_points(points)
    ds = velocity_profiles(scenario, sites)
    with atomic_folder(out, scenario.input_paths) as tmp:
        files = write_profile_outputs(ds, tmp)
        write_manifest(tmp, base_manifest(scenario, {}), files)
    print(
        f"  {'site':<20} {'flux east':>11} {'flux north':>11} {'upper drag E':>12} "
        f"{'upper drag N':>12} {'lower drag E':>12} {'lower drag N':>12}"
    )
    print(f"  {'':<20} {'m2/yr':>11} {'m2/yr':>11} {'MPa':>12} {'MPa':>12} {'MPa':>12} {'MPa':>12}")
    for site in ds.site.values:
        s = ds.sel(site=site)
        print(
            f"  {str(site)[:20]:<20} {float(s.flux_east):>11.4g} {float(s.flux_north):>11.4g} "
            f"{float(s.upper_wall_drag_east):>12.4g} {float(s.upper_wall_drag_north):>12.4g} "
            f"{float(s.lower_wall_drag_east):>12.4g} {float(s.lower_wall_drag_north):>12.4g}"
        )
    if not quiet:
        print(f"crustflow: wrote {out.expanduser().resolve()}", file=sys.stderr)
    return 0


def _run_ensemble(scenario, folder: Path, quiet: bool) -> dict:
    """Run the scenario's ensemble into ``folder``; return written files and manifest entries."""
    from crustflow.analyses.ensemble.run import run_ensemble

    summary = run_ensemble(
        scenario, scenario.ensemble, folder, progress=not quiet and sys.stderr.isatty()
    )
    return {"written": list(summary.get("written", [])), "manifest": summary["manifest"]}


def _ensemble(scenario_path: Path, out: Path, quiet: bool) -> int:
    from crustflow.io.writers import atomic_folder, base_manifest, write_manifest
    from crustflow.scenario.document import load_scenario

    scenario = load_scenario(scenario_path)
    if scenario.ensemble is None:
        raise CrustflowInputError(
            "the scenario has no [ensemble] table; add one with members, seed "
            "and [ensemble.vary] (see the README)"
        )
    began = time.perf_counter()
    with atomic_folder(out, scenario.input_paths) as tmp:
        ensemble = _run_ensemble(scenario, tmp, quiet)
        manifest = base_manifest(scenario, {"ensemble": time.perf_counter() - began})
        manifest["ensemble"] = ensemble["manifest"]
        write_manifest(tmp, manifest, ensemble["written"])
    if not quiet:
        print(
            f"crustflow: wrote {out.expanduser().resolve()} in {time.perf_counter() - began:.1f} s",
            file=sys.stderr,
        )
    return 0


def _evolve(scenario_path: Path, out: Path, quiet: bool) -> int:
    """``crustflow evolve``: the scenario's [evolution] run into an atomic folder, then a summary."""
    from crustflow.analyses.evolution.run import run_evolution
    from crustflow.io.writers import atomic_folder, base_manifest, write_manifest
    from crustflow.scenario.document import load_scenario

    scenario = load_scenario(scenario_path)
    if scenario.evolution is None:
        raise CrustflowInputError(
            'the scenario has no [evolution] table; add one, e.g. [evolution] duration = "2 Myr" '
            'and save_every = "0.5 Myr" (see the README, "Through time")'
        )
    began, bar = time.perf_counter(), None
    if not quiet and sys.stderr.isatty() and scenario.evolution.mode == "transient":
        from tqdm import tqdm

        total = scenario.evolution.duration / 3.15576e13  # s -> Myr (Julian years)
        bar = tqdm(total=total, unit="Myr", desc="model time", file=sys.stderr)

    def progress(t: float, _total: float) -> None:
        bar.update(t / 3.15576e13 - bar.n)

    try:
        with atomic_folder(out, scenario.input_paths) as tmp:
            result = run_evolution(scenario, tmp, progress if bar is not None else None)
            manifest = base_manifest(scenario, {"evolution": time.perf_counter() - began})
            manifest["crustflow_run"] = "evolution through time"
            manifest["evolution"] = result["manifest"]
            write_manifest(tmp, manifest, result["written"])
    finally:
        if bar is not None:
            bar.close()
    if not quiet:
        s, b = result["summary"]["stepping"], result["summary"]["volume_balance"]
        print(f"crustflow evolve: {scenario.title} ({scenario.evolution.mode})")
        print(
            f"  steps taken      {s['steps']} ({s['rejected_steps']} repeated with a shorter step)"
        )
        if scenario.evolution.mode == "transient":
            print(
                f"  volume balance   change {b['volume_change_km3']:.6g} km3 = edge inflow "
                f"{b['edge_inflow_km3']:.6g} + fixed edges {b['fixed_edge_exchange_km3']:.6g} "
                f"(mismatch {b['imbalance_relative']:.1e} of the volume)"
            )
        else:
            print(
                f"  steady balance   edge inflow {b['edge_inflow_km3_per_Myr']:.6g} + fixed edges "
                f"{b['fixed_edge_exchange_km3_per_Myr']:.6g} km3/Myr (mismatch "
                f"{b['imbalance_relative']:.1e}); volume change {b['volume_change_km3']:.6g} km3"
            )
        print(f"  largest elevation change {result['summary']['largest_elevation_change_m']:.4g} m")
        print(f"  wrote {out.expanduser().resolve()} in {time.perf_counter() - began:.1f} s")
        print("  caution: research estimate of a simplified model; not for hazard decisions")
    return 0


def _demo(out: Path, quiet: bool, scenario_name: str) -> int:
    from crustflow.samples.plateau import demo_scenario

    path = demo_scenario(scenario_name)
    if not quiet:
        print(f"crustflow: demo scenario {path}", file=sys.stderr)
    return _run(path, out, quiet)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="crustflow",
        description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"crustflow {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    common = dict(formatter_class=argparse.RawDescriptionHelpFormatter)
    run = sub.add_parser(
        "run",
        help="compute channel-flow maps for a scenario file",
        description="Compute channel-flow maps for a scenario file (TOML) and write "
        "fields.nc, one GeoTIFF per variable, flux_map.png and run.json.\n\n" + CAUTION_HELP,
        **common,
    )
    run.add_argument("scenario", type=Path, help="scenario file (TOML)")
    run.add_argument(
        "--out",
        type=Path,
        default=Path("crustflow_out"),
        help="output folder (default: ./crustflow_out); replaced if it holds an earlier run",
    )
    run.add_argument("--quiet", action="store_true", help="print nothing but errors")
    run.add_argument(
        "--strip-rows",
        type=int,
        default=None,
        metavar="N",
        help="rows per strip (default: about 0.5 M cells per strip); sets peak memory",
    )
    run.add_argument(
        "--chunk-size",
        type=int,
        default=None,
        metavar="N",
        help="chunk size in cells per side: strips of whole rows holding about N x N "
        "cells (default 724, i.e. 2^19 cells); sets peak memory per worker",
    )
    run.add_argument(
        "--workers",
        type=int,
        default=None,
        metavar="N",
        help="compute strips in N local worker processes (dask.distributed)",
    )
    run.add_argument(
        "--scheduler",
        default=None,
        metavar="ADDRESS",
        help="compute strips on a running dask.distributed scheduler, e.g. "
        "tcp://10.0.0.5:8786; workers read the inputs by path (shared filesystem "
        "needed); only this process writes the outputs",
    )
    run.add_argument(
        "--cog",
        action="store_true",
        help="write the GeoTIFFs as cloud-optimised GeoTIFFs (with overviews)",
    )
    demo = sub.add_parser(
        "demo",
        help="run the bundled sample scenario",
        description="Run the bundled sample scenario (an invented plateau with a "
        "steep and a gentle margin, part of it offshore).\n\n" + CAUTION_HELP,
        **common,
    )
    demo.add_argument(
        "--out", type=Path, default=Path("demo_out"), help="output folder (default: ./demo_out)"
    )
    demo.add_argument(
        "--scenario",
        default="plateau",
        help="which sample scenario: plateau (projected, default), plateau-lonlat, or wedge "
        "(a viscous salt layer under a prograding sediment wedge)",
    )
    demo.add_argument("--quiet", action="store_true", help="print nothing but errors")
    budget = sub.add_parser(
        "budget",
        help="volume budgets across sections and regions",
        description="Volume budgets of channel flow across lines (sections) and polygons (regions) "
        "drawn in a GIS: writes budgets.csv, budgets.gpkg, flux_arrows.gpkg and figures, and "
        "prints the table. Reuses the fields.nc of an earlier run of the same scenario when there "
        "is one (--run), else computes the fields. Section flux is positive towards the right-hand "
        "side of the line walked from its first to its last vertex; a region's total is its net "
        "inflow. 1 km^3/Myr = 1000 m^3/yr.\n\n" + CAUTION_HELP,
        **common,
    )
    budget.add_argument("scenario", type=Path, help="scenario file (TOML)")
    budget.add_argument("--sections", type=Path, help="lines (any vector format, any CRS)")
    budget.add_argument("--regions", type=Path, help="polygons (any vector format, any CRS)")
    budget.add_argument(
        "--run",
        type=Path,
        default=Path("crustflow_out"),
        help="folder of an earlier run whose fields.nc to reuse (default: ./crustflow_out)",
    )
    budget.add_argument(
        "--out",
        type=Path,
        default=Path("crustflow_budgets"),
        help="output folder (default: ./crustflow_budgets)",
    )
    budget.add_argument("--quiet", action="store_true", help="print only the table and errors")
    profile = sub.add_parser(
        "profile",
        help="velocity and stress profiles across the channel at sites",
        description="Velocity, shear stress, viscosity (and temperature) across the channel at one "
        "site (--at X Y) or several (--points FILE): writes profile_<site>.csv and "
        "profile_<site>.png and prints the flux and wall drag.\n\n" + CAUTION_HELP,
        **common,
    )
    profile.add_argument("scenario", type=Path, help="scenario file (TOML)")
    profile.add_argument(
        "--at",
        nargs=2,
        type=float,
        metavar=("X", "Y"),
        help="site coordinates (in --crs, default the grid's CRS)",
    )
    profile.add_argument("--crs", default=None, help="CRS of --at, e.g. EPSG:4326 (lon lat)")
    profile.add_argument("--points", type=Path, help="vector file of Point sites (name attribute)")
    profile.add_argument(
        "--out",
        type=Path,
        default=Path("crustflow_profiles"),
        help="output folder (default: ./crustflow_profiles)",
    )
    profile.add_argument("--quiet", action="store_true", help="print only the table and errors")
    ensemble = sub.add_parser(
        "ensemble",
        help="percentile maps and budget distributions over uncertain parameters",
        description="Sample the [ensemble] table's distributions (viscosity, thickness, densities, "
        "wall velocity...) and write percentile, mean, spread and exceedance maps (ensemble.nc and "
        "GeoTIFFs), member and budget tables and figures. The same runs with `crustflow run` when "
        "the scenario has an [ensemble] table.\n\n" + CAUTION_HELP,
        **common,
    )
    ensemble.add_argument("scenario", type=Path, help="scenario file (TOML) with [ensemble]")
    ensemble.add_argument(
        "--out",
        type=Path,
        default=Path("crustflow_ensemble"),
        help="output folder (default: ./crustflow_ensemble)",
    )
    ensemble.add_argument("--quiet", action="store_true", help="print nothing but errors")
    evolve = sub.add_parser(
        "evolve",
        help="step topography and crust through time under channel flow, or find the steady state",
        description="Step the crust through time as the scenario's [evolution] table says "
        "(implicit, volume-conserving; elevation by Airy isostasy) and write evolution.nc or "
        "steady.nc, GeoTIFFs with a band per snapshot, elevation profiles and an animation. "
        "Assumes fixed channel thickness and viscosity in space and no erosion.\n\n" + CAUTION_HELP,
        **common,
    )
    evolve.add_argument("scenario", type=Path, help="scenario file (TOML) with [evolution]")
    evolve.add_argument(
        "--out",
        type=Path,
        default=Path("crustflow_evolution"),
        help="output folder (default: ./crustflow_evolution)",
    )
    evolve.add_argument("--quiet", action="store_true", help="print nothing but errors")
    check = sub.add_parser(
        "check",
        help="validate a scenario and its grids without writing anything",
        description="Validate a scenario file and its grids: sizes, CRS, value "
        "ranges and units sanity. Writes nothing.\n\n" + CAUTION_HELP,
        **common,
    )
    check.add_argument("scenario", type=Path, help="scenario file (TOML)")
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``crustflow`` command; returns the exit status."""
    with warnings.catch_warnings():
        # NaN arithmetic on nodata is expected; library deprecation notices are not the user's to act on.
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", PendingDeprecationWarning)
        return _main(argv)


def _main(argv: list[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    try:
        if args.command == "run":
            for flag, value in (
                ("--strip-rows", args.strip_rows),
                ("--chunk-size", args.chunk_size),
                ("--workers", args.workers),
            ):
                if value is not None and value < 1:
                    raise CrustflowInputError(f"{flag} must be a positive whole number, e.g. 2")
            if args.workers and args.scheduler:
                raise CrustflowInputError("give --workers or --scheduler, not both")
            rows = args.strip_rows
            if rows is None and args.chunk_size is not None:
                rows = _rows_for_chunk(args.scenario, args.chunk_size)
            return _run(
                args.scenario, args.out, args.quiet, rows, args.workers, args.scheduler, args.cog
            )
        if args.command == "demo":
            return _demo(args.out, args.quiet, args.scenario)
        if args.command == "budget":
            return _budget(
                args.scenario, args.sections, args.regions, args.run, args.out, args.quiet
            )
        if args.command == "profile":
            return _profile(args.scenario, args.at, args.points, args.crs, args.out, args.quiet)
        if args.command == "ensemble":
            return _ensemble(args.scenario, args.out, args.quiet)
        if args.command == "check":
            return _check(args.scenario)
        if args.command == "evolve":
            return _evolve(args.scenario, args.out, args.quiet)
    except CrustflowInputError as exc:
        print(f"crustflow: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("crustflow: interrupted; nothing was written", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - one line unless --debug
        if args.debug:
            raise
        print(
            f"crustflow: internal error: {exc.__class__.__name__}: {exc} (rerun with --debug for "
            "details and report it)",
            file=sys.stderr,
        )
        return 1
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
