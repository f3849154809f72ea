"""The per-cell channel solution for a block of cells, whatever the rheology.

Dispatches a block of driving gradients to the closed-form Newtonian channel
(:mod:`crustflow.physics.channel`) or to the power-law / flow-law solver
(:mod:`crustflow.physics.rheology`), with wall temperatures from the scenario's channel setup.
"""

from __future__ import annotations

import numpy as np

from crustflow.physics.channel import channel_flow, channel_flux
from crustflow.physics.flowlaws import steady_geotherm
from crustflow.physics.rheology import flow_law_channel, power_law_channel
from crustflow.scenario.channel import ChannelSetup

__all__ = ["wall_temperatures", "solve_cells"]


def wall_temperatures(setup: ChannelSetup, cell: dict, *, elevation, top_depth, thickness):
    """Channel top and base temperatures, K, for a block of cells.

    With a geotherm, ``T(d)`` of :func:`crustflow.physics.flowlaws.steady_geotherm` at depths below the
    surface ``d = z_top + H`` (top) and ``d + h`` (base).
    """

    if setup.geotherm is None:
        top = cell.get("temperature_top", setup.temperature_top)
        base = cell.get("temperature_base", setup.temperature_base)
        return top, base
    g = setup.geotherm
    q = cell.get("surface_heat_flow", g["surface_heat_flow"])
    depth = top_depth + elevation  # below the surface (sea floor offshore: close enough, stated)
    args = dict(
        surface_heat_flow=q,
        conductivity=g["conductivity"],
        heat_production=g["heat_production"],
        length_scale=g["heat_production_depth"],
        surface_temperature=g["surface_temperature"],
    )
    return steady_geotherm(depth, **args), steady_geotherm(depth + thickness, **args)


def solve_cells(
    g_east,
    g_north,
    thickness,
    setup: ChannelSetup,
    *,
    viscosity,
    wall_east,
    wall_north,
    cell: dict,
    elevation,
    top_depth,
    full: bool,
) -> dict:
    """One-cell solution of every cell of a block, for the scenario's rheology, in SI.

    Returns
    -------
    dict
        ``flux_east``, ``flux_north`` and, with ``full``, the other variables of
        :class:`crustflow.physics.channel.ChannelSolution`, plus ``effective_viscosity`` (Pa s) and
        ``solver_converged`` (1.0 / 0.0; all 1 for the closed-form Newtonian channel).
    """

    if setup.rheology == "newtonian":
        eta = cell.get("viscosity", viscosity)
        if full:
            out = channel_flow(
                g_east, g_north, thickness, eta, wall_east=wall_east, wall_north=wall_north
            ).as_dict()
        else:
            out = dict(
                zip(
                    ("flux_east", "flux_north"),
                    channel_flux(
                        g_east, g_north, thickness, eta, wall_east=wall_east, wall_north=wall_north
                    ),
                    strict=True,
                )
            )
        shape = np.shape(g_east)
        out["effective_viscosity"] = np.broadcast_to(np.asarray(eta, dtype=float), shape)
        out["solver_converged"] = np.where(np.isfinite(g_east), 1.0, np.nan)
        return out

    ok = np.isfinite(g_east) & np.isfinite(g_north)
    ge, gn = np.where(ok, g_east, 0.0), np.where(ok, g_north, 0.0)
    h = np.where(ok, thickness, 1.0)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # non-convergence is reported as a map
        if setup.rheology == "power-law":
            sol = power_law_channel(
                ge,
                gn,
                h,
                setup.prefactor,
                setup.stress_exponent,
                wall_east=wall_east,
                wall_north=wall_north,
            )
        else:
            top, base = wall_temperatures(
                setup, cell, elevation=elevation, top_depth=top_depth, thickness=thickness
            )
            top = np.where(ok, top, 1000.0)
            base = np.where(ok, base, 1000.0)
            sol = flow_law_channel(
                ge, gn, h, setup.law, top, base, wall_east=wall_east, wall_north=wall_north
            )
    names = (
        "flux_east",
        "flux_north",
        "mean_velocity_east",
        "mean_velocity_north",
        "peak_speed",
        "peak_speed_height",
        "upper_wall_drag_east",
        "upper_wall_drag_north",
        "lower_wall_drag_east",
        "lower_wall_drag_north",
        "backflow",
        "wall_driven_share",
        "effective_viscosity",
    )
    out = {n: np.where(ok, np.asarray(getattr(sol, n), dtype=float), np.nan) for n in names}
    out["solver_converged"] = np.where(ok, np.asarray(sol.converged, dtype=float), np.nan)
    return out
