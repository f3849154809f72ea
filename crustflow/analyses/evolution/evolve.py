"""``crustflow.evolve``: step a scenario through time (or to its steady state) into an xarray.Dataset."""

from __future__ import annotations

import json
import time as _time

import numpy as np
import xarray as xr

from crustflow.analyses.evolution.model import (
    SECONDS_PER_MYR,
    EvolutionSetup,
    ProgressCallback,
    build_setup,
    dataset_attrs,
    time_coordinate,
)
from crustflow.engine.api import read_inputs
from crustflow.errors import CrustflowInputError
from crustflow.geometry.finite_volume import net_inflow
from crustflow.physics.diffusion import STEADY_MAXITER, face_flux, integrate, steady_state
from crustflow.scenario.document import Scenario
from crustflow.scenario.evolution import EvolutionSpec
from crustflow.variables import variable_attrs

__all__ = ["evolve", "evolve_grids", "run_setup", "TRANSIENT_VARIABLES", "STEADY_VARIABLES"]

#: Variables of every snapshot of a transient run (names as in the maps; elevation in m).
TRANSIENT_VARIABLES = (
    "elevation",
    "crust_thickness",
    "thickening_rate",
    "uplift_rate",
    "flux_east",
    "flux_north",
)

#: Variables of a steady-state run.
STEADY_VARIABLES = ("elevation", "crust_thickness", "flux_east", "flux_north", "dynamic_topography")

#: Attributes of the variables that are not map variables.
EXTRA_ATTRS = {
    "elevation": {
        "long_name": "surface elevation above sea level",
        "units": "m",
        "standard_name": "surface_altitude",
    },
    "dynamic_topography": {
        "long_name": "steady-state elevation minus initial elevation",
        "units": "m",
    },
}


def _attrs(name: str) -> dict:
    return dict(EXTRA_ATTRS[name]) if name in EXTRA_ATTRS else variable_attrs(name)


def _snapshot_arrays(setup: EvolutionSetup, thickness: np.ndarray, names) -> dict:
    """Practical-unit arrays (float32) of one state, from the maps' compute_fields."""
    T = thickness.reshape(setup.geometry.shape)
    maps = setup.fields(T, [n for n in names if n not in EXTRA_ATTRS])
    out = {}
    for name in names:
        if name == "elevation":
            values = np.where(setup.domain, setup.elevation(T), np.nan)
        elif name == "dynamic_topography":
            values = np.where(setup.domain, setup.elevation(T) - setup.elevation0, np.nan)
        else:
            values = maps[name]
        out[name] = np.asarray(values, dtype="float32")
    return out


def _balance(setup: EvolutionSetup, volumes, times, exchange) -> dict:
    """Volume balance of a transient run, km^3: change vs edge inflow and exchange with fixed edges."""
    inflow_rate = float(np.sum(setup.problem.source[setup.problem.free]))
    change = volumes[-1] - volumes[0]
    inflow = inflow_rate * times[-1]
    imbalance = change - inflow - exchange
    return {
        "initial_volume_km3": volumes[0] / 1e9,
        "final_volume_km3": volumes[-1] / 1e9,
        "volume_change_km3": change / 1e9,
        "edge_inflow_km3": inflow / 1e9,
        "fixed_edge_exchange_km3": exchange / 1e9,
        "imbalance_km3": imbalance / 1e9,
        "imbalance_relative": imbalance / volumes[0] if volumes[0] else float("nan"),
        "volume_km3_at_snapshots": [v / 1e9 for v in volumes],
    }


def _steady_balance(setup: EvolutionSetup, thickness: np.ndarray) -> dict:
    """Flux balance of a steady state, km^3/Myr: edge inflow vs exchange with the fixed edges."""
    problem = setup.problem
    net = problem.network
    phi, _ = problem.potential(thickness.ravel())
    flux = face_flux(problem, phi)
    gained = net_inflow(flux, net)[problem.free]
    inflow = float(np.sum(problem.source[problem.free]))
    fixed = float(np.sum(gained))  # interior faces cancel: only faces to fixed cells remain
    per_myr = SECONDS_PER_MYR / 1e9
    v0, v1 = setup.volume(setup.thickness0), setup.volume(thickness)
    held = setup.fixed.ravel()
    edge = held[net.left] != held[net.right]  # faces between a fixed and a free cell
    gross = float(np.sum(np.abs(flux[edge] * net.length[edge])))
    scale = max(abs(inflow), gross, 1e-300)
    return {
        "initial_volume_km3": v0 / 1e9,
        "final_volume_km3": v1 / 1e9,
        "volume_change_km3": (v1 - v0) / 1e9,
        "edge_inflow_km3_per_Myr": inflow * per_myr,
        "fixed_edge_exchange_km3_per_Myr": fixed * per_myr,
        "imbalance_km3_per_Myr": (inflow + fixed) * per_myr,
        "imbalance_relative": (inflow + fixed) / scale,
    }


def _coords(setup: EvolutionSetup) -> dict:
    topo = setup.topography
    return {"y": topo.y.values, "x": topo.x.values}


def _wrap(setup, arrays: dict, coords: dict, dims, attrs: dict) -> xr.Dataset:
    ds = xr.Dataset(
        {n: (dims, v, _attrs(n)) for n, v in arrays.items()}, coords=coords, attrs=attrs
    )
    for c in ("x", "y"):
        ds[c].attrs.update(setup.topography[c].attrs)
    ds = ds.rio.write_crs(setup.topography.rio.crs).rio.write_coordinate_system()
    return ds.rio.write_transform(setup.topography.rio.transform())


def _no_steady_state(setup: EvolutionSetup) -> str:
    """What to say when the steady iteration does not settle."""
    why = "material keeps entering or leaving"
    if setup.problem.exponent != 1.0:
        why = (
            "a power-law channel flows ever more slowly as its load flattens, so stagnant basins "
            "settle only very slowly"
        )
    return (
        f"no steady state was reached for these edges in {STEADY_MAXITER} pseudo-time steps "
        f'({why}); use mode = "transient" with a long duration to see where the crust heads'
    )


def run_setup(
    setup: EvolutionSetup,
    *,
    title: str = "crustflow evolution",
    progress: ProgressCallback | None = None,
    step: float | None = None,
) -> xr.Dataset:
    """Step a built setup through its snapshot times (or to its steady state).

    Parameters
    ----------
    setup : EvolutionSetup
    title : str
    progress : callable, optional
        ``progress(t, total)`` with model times in s, after every accepted step; in steady mode
        ``progress(steps, None)`` after every pseudo-time step.
    step : float, optional
        A fixed time step, s, without error control (convergence studies).

    Returns
    -------
    xarray.Dataset
        Transient: :data:`TRANSIENT_VARIABLES` on (time, y, x), ``time`` in Myr. Steady:
        :data:`STEADY_VARIABLES` on (y, x). Attributes: ``volume_balance`` and ``stepping`` (JSON).
    """
    spec = setup.spec
    T0 = setup.thickness0.ravel()
    began = _time.perf_counter()
    if spec.mode == "steady":
        tick = None if progress is None else (lambda n: progress(float(n), None))
        try:
            T, stats = steady_state(setup.problem, T0, tolerance=spec.tolerance, on_step=tick)
        except RuntimeError:
            raise CrustflowInputError(_no_steady_state(setup)) from None
        arrays = _snapshot_arrays(setup, T, STEADY_VARIABLES)
        balance = _steady_balance(setup, T.reshape(setup.geometry.shape))
        attrs = dataset_attrs(setup, title)
        ds = _wrap(setup, arrays, _coords(setup), ("y", "x"), attrs)
    else:
        snaps, times, volumes = [], [], []
        total = spec.snapshot_times[-1]

        def keep(t, T):
            times.append(t)
            volumes.append(setup.volume(T.reshape(setup.geometry.shape)))
            snaps.append(_snapshot_arrays(setup, T, TRANSIENT_VARIABLES))

        stats = integrate(
            setup.problem,
            T0,
            spec.snapshot_times,
            tolerance=spec.tolerance,
            max_step=spec.max_step,
            step=step,
            snapshot=keep,
            on_step=None if progress is None else (lambda t: progress(t, total)),
        )
        exchange = stats.fixed_exchange
        arrays = {n: np.stack([s[n] for s in snaps]) for n in TRANSIENT_VARIABLES}
        coords = dict(_coords(setup), time=time_coordinate(times))
        ds = _wrap(setup, arrays, coords, ("time", "y", "x"), dataset_attrs(setup, title))
        balance = _balance(setup, volumes, times, exchange)
    steps = {
        "steps": stats.steps,
        "rejected_steps": stats.rejected,
        "newton_iterations": stats.newton_iterations,
        "krylov_iterations": stats.krylov_iterations,
        "multigrid_setups": stats.multigrid_setups,
        "smallest_step_Myr": min(stats.step_sizes) / SECONDS_PER_MYR if stats.step_sizes else None,
        "largest_step_Myr": max(stats.step_sizes) / SECONDS_PER_MYR if stats.step_sizes else None,
        "free_cells": int(setup.problem.free.size),
        "fixed_cells": int(setup.fixed.sum()),
        "wall_seconds": _time.perf_counter() - began,
    }
    ds.attrs["volume_balance"] = json.dumps(balance)
    ds.attrs["stepping"] = json.dumps(steps)
    return ds


def evolve_grids(
    topography: xr.DataArray,
    *,
    parameters,
    spec: EvolutionSpec,
    crust_thickness: xr.DataArray | None = None,
    moho_depth: xr.DataArray | None = None,
    channel=None,
    load_setup=None,
    cell: dict | None = None,
    progress: ProgressCallback | None = None,
    step: float | None = None,
    title: str = "crustflow evolution",
) -> xr.Dataset:
    """Evolve grids already in memory (arguments as :func:`crustflow.compute_fields`, plus ``spec``).

    Returns
    -------
    xarray.Dataset
        See :func:`run_setup`.
    """
    setup = build_setup(
        topography,
        parameters=parameters,
        spec=spec,
        crust_thickness=crust_thickness,
        moho_depth=moho_depth,
        channel=channel,
        load_setup=load_setup,
        cell=cell,
    )
    return run_setup(setup, title=title, progress=progress, step=step)


def require_evolution(scenario: Scenario) -> None:
    """Raise :class:`CrustflowInputError` unless the scenario has an ``[evolution]`` table."""
    if scenario.evolution is None:
        raise CrustflowInputError(
            'the scenario has no [evolution] table; add one, e.g. [evolution] duration = "2 Myr" '
            'and save_every = "0.5 Myr" (see the README, "Through time")'
        )


def setup_from_scenario(scenario: Scenario) -> tuple[EvolutionSetup, dict]:
    """Read a scenario's grids and build its setup; also return the grids' provenance."""

    require_evolution(scenario)
    grids = read_inputs(scenario)
    setup = build_setup(
        grids.topography,
        parameters=scenario.parameters,
        spec=scenario.evolution,
        crust_thickness=grids.crust_thickness,
        moho_depth=grids.moho_depth,
        channel=scenario.channel,
        load_setup=scenario.load,
        cell=grids.cell,
    )
    return setup, grids.provenance


def evolve(scenario: Scenario, *, progress: ProgressCallback | None = None) -> xr.Dataset:
    """Step a scenario's crust through time as its ``[evolution]`` table says.

    Parameters
    ----------
    scenario : Scenario
        With an ``[evolution]`` table (:func:`crustflow.load_scenario`).
    progress : callable, optional
        ``progress(t, total)``, model times in s.

    Returns
    -------
    xarray.Dataset
        Transient mode: elevation (m), crust_thickness (km), thickening_rate and uplift_rate
        (mm yr-1), flux_east and flux_north (m2 yr-1) on dimensions (time, y, x), ``time`` in Myr.
        Steady mode: elevation, crust_thickness, flux_east, flux_north and dynamic_topography
        (steady minus initial elevation, m) on (y, x). The volume balance is in
        ``attrs["volume_balance"]`` (JSON).

    Notes
    -----
    Research estimate of a simplified model: fixed channel thickness and viscosity in space, no
    erosion or sedimentation, local Airy isostasy, thin channel between rigid walls, lithostatic
    load. No basis for hazard or engineering decisions without local, licensed review.
    """
    setup, _ = setup_from_scenario(scenario)
    return run_setup(setup, title=scenario.title, progress=progress)
