"""The ``crustflow`` command line: argument parsing, printing and exit codes only.

The work of each command is a function in :mod:`crustflow.commands` (imported when the command runs,
so that ``crustflow --help`` stays quick). Exit status: 0 on success, 2 on bad input (one line naming
the problem and the fix), 130 when interrupted (Ctrl-C), 143 on SIGTERM, 129 on SIGHUP, 1 otherwise.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import signal
import sys
import threading
import warnings
from contextlib import contextmanager
from pathlib import Path

from crustflow._version import __version__
from crustflow.errors import CrustflowInputError, CrustflowInterrupt, CrustflowWriteError

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

_FORMAT = argparse.RawDescriptionHelpFormatter


# ---------------------------------------------------------------------------------------------
# printing


def _say(text: str, quiet: bool = False) -> None:
    """A status line on stderr (the tables go to stdout)."""
    if not quiet:
        print(f"crustflow: {text}", file=sys.stderr, flush=True)


class _StageLines:
    """Prints a line as each stage starts (``crustflow: compute and write``)."""

    def __init__(self, quiet: bool) -> None:
        self.quiet = quiet

    def __call__(self, name: str) -> None:
        _say(name, self.quiet)


def _print_run_summary(result: dict) -> None:
    from crustflow.variables import VARIABLES

    labels = {
        "flux_magnitude": "flux magnitude",
        "thickening_rate": "thickening rate",
        "uplift_rate": "uplift rate",
    }
    for name, (lo, hi) in result["ranges"].items():
        text = f"{lo:.3g} to {hi:.3g} {VARIABLES[name].units}" if lo <= hi else "no valid cells"
        print(f"  {labels[name]:<16} {text}")
    for line in _run_notes(result):
        print(f"  {line}")
    if result["backflow_cells"] is not None:
        print(f"  backflow cells   {result['backflow_cells']} of {result['valid_cells']}")


def _run_notes(result: dict) -> list[str]:
    notes = []
    if result.get("skipped_variables"):
        skipped = ", ".join(result["skipped_variables"])
        notes.append(f"note: not written for a grid this large (whole-grid steps): {skipped}")
    if result.get("excluded_cells"):
        notes.append(
            f"note: {result['excluded_cells']} cells excluded: the placed channel has no "
            "thickness there or leaves the crust"
        )
    if result.get("thin_channel_cells"):
        notes.append(
            f"WARNING: in {result['thin_channel_cells']} cells the load varies on wavelengths "
            "shorter than 3 channel thicknesses, where the thin-channel model fails "
            "(thin_channel_warning = 1)"
        )
    if result.get("unconverged_cells"):
        notes.append(
            f"WARNING: the per-cell solver did not converge in {result['unconverged_cells']} "
            "cells (solver_converged = 0 there; their values are the last iterate)"
        )
    return notes


def _print_budget_table(table) -> None:
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


def _print_profiles(ds) -> None:
    columns = (
        "flux_east",
        "flux_north",
        "upper_wall_drag_east",
        "upper_wall_drag_north",
        "lower_wall_drag_east",
        "lower_wall_drag_north",
    )
    heads = ("flux east", "flux north", "upper drag E", "upper drag N", "lower drag E")
    print(f"  {'site':<20} " + " ".join(f"{h:>12}" for h in (*heads, "lower drag N")))
    units = ("m2/yr", "m2/yr", "MPa", "MPa", "MPa", "MPa")
    print(f"  {'':<20} " + " ".join(f"{u:>12}" for u in units))
    for site in ds.site.values:
        s = ds.sel(site=site)
        values = " ".join(f"{float(s[c]):>12.4g}" for c in columns)
        print(f"  {str(site)[:20]:<20} {values}")


def _print_check(report: dict) -> None:
    grid = report["grid"]
    print(f"scenario         {report['title']}")
    print(
        f"grid             {grid['width']} x {grid['height']} cells, CRS {grid['crs']}, "
        f"cell {grid['cell'][0]:g} x {grid['cell'][1]:g} {grid['unit']}"
    )
    for key, g in report["grids"].items():
        print(
            f"{key:<16} {g['min']:.6g} to {g['max']:.6g} m, "
            f"{g['nodata_cells']} nodata cells; {g['method']}"
        )
    for note in report["notes"]:
        print(f"note: {note}")
    print("check passed: the scenario's grids and parameters are usable")


# ---------------------------------------------------------------------------------------------
# commands


def _command(name: str):
    return importlib.import_module(f"crustflow.commands.{name}")


def _bar(args) -> bool:
    return not args.quiet and sys.stderr.isatty()


def _do_run(args) -> int:
    for flag, value in (
        ("--strip-rows", args.strip_rows),
        ("--chunk-size", args.chunk_size),
        ("--workers", args.workers),
    ):
        if value is not None and value < 1:
            raise CrustflowInputError(f"{flag} must be a positive whole number, e.g. 2")
    if args.workers and args.scheduler:
        raise CrustflowInputError("give --workers or --scheduler, not both")
    run = _command("run")
    rows = args.strip_rows
    if rows is None and args.chunk_size is not None:
        rows = run.rows_for_chunk(args.scenario, args.chunk_size)
    result = run.run(
        args.scenario,
        args.out,
        strip_rows=rows,
        workers=args.workers,
        scheduler=args.scheduler,
        cog=args.cog,
        announce=_StageLines(args.quiet),
        progress=_bar(args),
    )
    _report_run(result, args.quiet)
    return 0


def _report_run(result: dict, quiet: bool) -> None:
    _say(f"wrote {result['folder']} in {result['seconds']:.1f} s", quiet)
    if quiet:
        return
    _print_run_summary(result)
    if result.get("table") is not None:
        _print_budget_table(result["table"])


def _do_demo(args) -> int:
    run = _command("run")
    from crustflow.samples import demo_scenario

    _say(f"demo scenario {demo_scenario(args.scenario)}", args.quiet)
    result = run.demo(
        args.scenario, args.out, announce=_StageLines(args.quiet), progress=_bar(args)
    )
    _report_run(result, args.quiet)
    return 0


def _do_budget(args) -> int:
    result = _command("budget").budget(
        args.scenario, args.out, sections=args.sections, regions=args.regions, run_dir=args.run
    )
    reused = result["reused"]
    how = f"reused {reused}" if reused else "computed the fields (no matching earlier run)"
    _say(f"{how}; wrote {result['folder']}", args.quiet)
    _print_budget_table(result["table"])
    return 0


def _do_profile(args) -> int:
    ds = _command("profile").profile(
        args.scenario, args.out, at=args.at, points=args.points, crs=args.crs
    )
    _print_profiles(ds)
    _say(f"wrote {ds.attrs['folder']}", args.quiet)
    return 0


def _do_ensemble(args) -> int:
    result = _command("ensemble").ensemble(args.scenario, args.out, progress=_bar(args))
    _say(f"wrote {result['folder']} in {result['seconds']:.1f} s", args.quiet)
    if not args.quiet:
        _print_ensemble_summary(result["summary"])
    return 0


def _print_ensemble_summary(summary: dict) -> None:
    path = "fast base-map path" if summary["fast_path"] else "per-member fallback"
    print(f"  members          {summary['members']} ({path})")
    if summary.get("fast_path_obstacle") and not summary["fast_path"]:
        print(f"  note: {summary['fast_path_obstacle']}")
    print(f"  variables        {', '.join(summary['spec'].get('variables', []))}")
    stats = summary.get("budget_statistics")
    if stats is not None:
        columns = [c for c in stats.columns if c.endswith("_km3_per_Myr")]
        heads = [c.removesuffix("_km3_per_Myr") for c in columns]
        print("  budgets over the members (km3/Myr)")
        print(f"  {'name':<24} " + " ".join(f"{h:>10}" for h in heads))
        for row in stats.itertuples(index=False):
            values = " ".join(f"{getattr(row, c):>10.4g}" for c in columns)
            print(f"  {str(row.name)[:24]:<24} {values}")


def _do_fit(args) -> int:
    done = _command("fit").fit(args.scenario, args.out, progress=_bar(args))
    result = done["result"]
    if not args.quiet:
        if not result.fast_path:
            _say(f"fast path not used ({result.fast_path_obstacle}): every sample ran a full solve")
        for name, reason in result.dropped:
            _say(f"dropped observation {name!r}: {reason}")
        print(result.summary.drop(columns="derived").to_string(index=False))
        print(f"fit: {done['summary_line']}")
    _say(f"wrote {done['folder']}", args.quiet)
    return 0


def _do_evolve(args) -> int:
    result = _command("evolve").evolve(args.scenario, args.out, progress=_bar(args))
    if not args.quiet:
        _print_evolution_summary(result)
    _say(f"wrote {result['folder']} in {result['seconds']:.1f} s", args.quiet)
    return 0


def _print_evolution_summary(result: dict) -> None:
    scenario, summary = result["scenario"], result["summary"]
    s, b = summary["stepping"], summary["volume_balance"]
    print(f"  {scenario.title} ({scenario.evolution.mode})")
    print(f"  steps taken      {s['steps']} ({s['rejected_steps']} repeated with a shorter step)")
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
    print(f"  largest elevation change {summary['largest_elevation_change_m']:.4g} m")


def _do_check(args) -> int:
    _print_check(_command("check").check(args.scenario))
    return 0


_COMMANDS = {
    "run": _do_run,
    "demo": _do_demo,
    "budget": _do_budget,
    "profile": _do_profile,
    "ensemble": _do_ensemble,
    "check": _do_check,
    "fit": _do_fit,
    "evolve": _do_evolve,
}


# ---------------------------------------------------------------------------------------------
# the parser


def _add_out(parser, default: str, what: str) -> None:
    parser.add_argument(
        "--out",
        type=Path,
        default=Path(default),
        help=f"output folder (default: ./{default}){what}",
    )


def _add_quiet(parser, what: str = "print nothing but errors") -> None:
    parser.add_argument("--quiet", action="store_true", help=what)


def _add_run(sub) -> None:
    run = sub.add_parser(
        "run",
        help="compute channel-flow maps for a scenario file",
        description="Compute channel-flow maps for a scenario file (TOML) and write "
        "fields.nc, one GeoTIFF per variable, flux_map.png and run.json.\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
    )
    run.add_argument("scenario", type=Path, help="scenario file (TOML)")
    _add_out(run, "crustflow_out", "; replaced if it holds an earlier run")
    _add_quiet(run)
    options = {
        "--strip-rows": "rows per strip (default: about 0.5 M cells per strip); sets peak memory",
        "--chunk-size": "chunk size in cells per side: strips of whole rows holding about N x N "
        "cells (default 724, i.e. 2^19 cells); sets peak memory per worker",
        "--workers": "compute strips in N local worker processes (dask.distributed)",
    }
    for flag, text in options.items():
        run.add_argument(flag, type=int, default=None, metavar="N", help=text)
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


def _add_demo(sub) -> None:
    demo = sub.add_parser(
        "demo",
        help="run the bundled sample scenario",
        description="Run the bundled sample scenario (an invented plateau with a "
        "steep and a gentle margin, part of it offshore).\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
    )
    _add_out(demo, "demo_out", "")
    demo.add_argument(
        "--scenario",
        default="plateau",
        help="which sample scenario: plateau (projected, default), plateau-lonlat, or wedge "
        "(a viscous salt layer under a prograding sediment wedge)",
    )
    _add_quiet(demo)


def _add_budget(sub) -> None:
    budget = sub.add_parser(
        "budget",
        help="volume budgets across sections and regions",
        description="Volume budgets of channel flow across lines (sections) and polygons (regions) "
        "drawn in a GIS: writes budgets.csv, budgets.gpkg, flux_arrows.gpkg and figures, and "
        "prints the table. Reuses the fields.nc of an earlier run of the same scenario when there "
        "is one (--run), else computes the fields. Section flux is positive towards the right-hand "
        "side of the line walked from its first to its last vertex; a region's total is its net "
        "inflow. 1 km^3/Myr = 1000 m^3/yr.\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
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
    _add_out(budget, "crustflow_budgets", "")
    _add_quiet(budget, "print only the table and errors")


def _add_profile(sub) -> None:
    profile = sub.add_parser(
        "profile",
        help="velocity and stress profiles across the channel at sites",
        description="Velocity, shear stress, viscosity (and temperature) across the channel at one "
        "site (--at X Y) or several (--points FILE): writes profile_<site>.csv and "
        "profile_<site>.png and prints the flux and wall drag.\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
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
    _add_out(profile, "crustflow_profiles", "")
    _add_quiet(profile, "print only the table and errors")


def _add_ensemble(sub) -> None:
    ensemble = sub.add_parser(
        "ensemble",
        help="percentile maps and budget distributions over uncertain parameters",
        description="Sample the [ensemble] table's distributions (viscosity, thickness, densities, "
        "wall velocity...) and write percentile, mean, spread and exceedance maps (ensemble.nc and "
        "GeoTIFFs), member and budget tables and figures. The same runs with `crustflow run` when "
        "the scenario has an [ensemble] table.\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
    )
    ensemble.add_argument("scenario", type=Path, help="scenario file (TOML) with [ensemble]")
    _add_out(ensemble, "crustflow_ensemble", "")
    _add_quiet(ensemble)


def _add_evolve(sub) -> None:
    evolve = sub.add_parser(
        "evolve",
        help="step topography and crust through time under channel flow, or find the steady state",
        description="Step the crust through time as the scenario's [evolution] table says "
        "(implicit, volume-conserving; elevation by Airy isostasy) and write evolution.nc or "
        "steady.nc, GeoTIFFs with a band per snapshot, elevation profiles and an animation. "
        "Assumes fixed channel thickness and viscosity in space and no erosion.\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
    )
    evolve.add_argument("scenario", type=Path, help="scenario file (TOML) with [evolution]")
    _add_out(evolve, "crustflow_evolution", "")
    _add_quiet(evolve)


def _add_fit(sub) -> None:
    fit = sub.add_parser(
        "fit",
        help="posterior of channel parameters from observed rates",
        description="Fit the [fit.parameters] of a scenario to the observations of its [fit] "
        "table (affine-invariant ensemble sampler from a MAP start): writes fit_summary.csv, "
        "posterior.csv, posterior_predictive.nc, fit_residuals.gpkg and figures, and prints the "
        "summary and a chi-square line. Uplift data constrain the transmissivity h^3/(12 eta), not "
        "h and eta apart. A fit of a simplified model is a consistency test, not a "
        "measurement.\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
    )
    fit.add_argument("scenario", type=Path, help="scenario file (TOML) with [fit]")
    _add_out(fit, "crustflow_fit", "")
    _add_quiet(fit)


def _add_check(sub) -> None:
    check = sub.add_parser(
        "check",
        help="validate a scenario and its grids without writing anything",
        description="Validate a scenario file and its grids: sizes, CRS, value "
        "ranges and units sanity. Writes nothing.\n\n" + CAUTION_HELP,
        formatter_class=_FORMAT,
    )
    check.add_argument("scenario", type=Path, help="scenario file (TOML)")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every command."""
    parser = argparse.ArgumentParser(
        prog="crustflow", description=DESCRIPTION, formatter_class=_FORMAT
    )
    parser.add_argument("--version", action="version", version=f"crustflow {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for add in (
        _add_run,
        _add_demo,
        _add_budget,
        _add_profile,
        _add_ensemble,
        _add_evolve,
        _add_fit,
        _add_check,
    ):
        add(sub)
    return parser


# ---------------------------------------------------------------------------------------------
# entry point


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``crustflow`` command; returns the exit status."""
    with warnings.catch_warnings():
        # NaN arithmetic on nodata is expected; library deprecation notices are not the user's to act on.
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", PendingDeprecationWarning)
        warnings.showwarning = _show_warning
        with _signals_as_interrupts():
            return _main(argv)


#: Signals that end a run like Ctrl-C: what batch schedulers (SIGTERM) and closed terminals
#: (SIGHUP) send. Exit status 128 + the signal's number (POSIX shell convention).
_SIGNALS = tuple(getattr(signal, name) for name in ("SIGTERM", "SIGHUP") if hasattr(signal, name))


def _on_signal(signum, frame) -> None:
    for sig in _SIGNALS:  # a second signal must not interrupt the clean-up
        signal.signal(sig, signal.SIG_IGN)
    raise CrustflowInterrupt(signum)


@contextmanager
def _signals_as_interrupts():
    """Turn SIGTERM and SIGHUP into :class:`CrustflowInterrupt` while a command runs; restore the
    previous handlers afterwards (main thread only: elsewhere signals cannot be handled)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {sig: signal.signal(sig, _on_signal) for sig in _SIGNALS}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Model-validity warnings from the library: one line on stderr, also under --quiet."""
    print(f"crustflow: warning: {message}", file=sys.stderr, flush=True)


def _main(argv: list[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    handler = _log_handler(getattr(args, "quiet", False))
    try:
        return _COMMANDS[args.command](args)
    except CrustflowInputError as exc:
        print(f"crustflow: error: {exc}", file=sys.stderr)
        return 2
    except CrustflowWriteError as exc:
        print(f"crustflow: error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt as exc:
        print("crustflow: interrupted; nothing was written", file=sys.stderr)
        return 128 + exc.signum if isinstance(exc, CrustflowInterrupt) else 130
    except Exception as exc:  # noqa: BLE001 - one line unless --debug
        if args.debug:
            raise
        print(
            f"crustflow: internal error: {exc.__class__.__name__}: {exc} (rerun with --debug for "
            "details and report it)",
            file=sys.stderr,
        )
        return 1
    finally:
        logging.getLogger("crustflow").removeHandler(handler)


def _log_handler(quiet: bool) -> logging.Handler:
    """Progress as periodic log lines on stderr where no bar is drawn (batch logs, notebooks)."""
    logger = logging.getLogger("crustflow")
    if quiet or sys.stderr.isatty():
        handler: logging.Handler = logging.NullHandler()
    else:
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("crustflow: %(message)s"))
        handler.setLevel(logging.INFO)
        logger.setLevel(logging.INFO)
    logger.addHandler(handler)
    return handler


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
