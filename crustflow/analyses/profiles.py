"""Velocity and stress profiles across the channel at chosen sites.

For each site the driving gradient is computed from the grids around it (the same functions as the
maps, on a strip of rows), and the one-cell solution of the scenario's rheology is evaluated at heights
``zeta`` from the lower wall (0) to the upper wall (h).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from crustflow.errors import CrustflowInputError

__all__ = ["velocity_profiles", "read_points", "write_profile_outputs"]

#: Heights sampled across the channel for a profile (lower wall, upper wall and between).
PROFILE_SAMPLES = 101


def read_points(path, grid_crs=None) -> list[tuple[str, float, float, object]]:
    """Sites from a vector file of points: (label, x, y, crs), label from a ``name`` attribute."""
    import geopandas as gpd

    path = Path(path)
    if not path.is_file():
        raise CrustflowInputError(f"points file not found: {path}; check the path")
    try:
        frame = gpd.read_file(path)
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
        raise CrustflowInputError(
            f"{path} is not a vector file geopandas can read ({exc})"
        ) from None
    if frame.empty:
        raise CrustflowInputError(f"points file {path} has no features; add at least one point")
    if frame.crs is None:
        raise CrustflowInputError(
            f"points file {path} has no CRS; assign one in your GIS and save it again"
        )
    if not (frame.geometry.geom_type == "Point").all():
        raise CrustflowInputError(f"points file {path} must hold Point features only")
    names = frame["name"].astype(str) if "name" in frame else frame.index.astype(str)
    return [(n, g.x, g.y, frame.crs) for n, g in zip(names, frame.geometry, strict=True)]


def _label(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", text).strip("_") or "site"


def velocity_profiles(scenario, sites, *, samples: int = PROFILE_SAMPLES):
    """Profiles across the channel at sites.

    Parameters
    ----------
    scenario : Scenario
    sites : list of (label, x, y, crs)
        Coordinates in ``crs`` (None: the grid's CRS).
    samples : int
        Heights from the lower to the upper wall.

    Returns
    -------
    xarray.Dataset
        Dimensions (site, zeta): ``height`` (m above the lower wall), ``velocity_east``,
        ``velocity_north``, ``speed`` (mm/yr), ``shear_stress_east``, ``shear_stress_north`` (MPa),
        ``viscosity`` (Pa s), ``temperature`` (degC, flow-law channels); per site ``flux_east``,
        ``flux_north`` (m2/yr), ``upper_wall_drag_*``, ``lower_wall_drag_*`` (MPa), ``x``, ``y``,
        ``drive_east``, ``drive_north`` (Pa/m), ``channel_thickness`` (km).

    Notes
    -----
    Newtonian: ``u(zeta) = U zeta/h + G (zeta^2 - h zeta)/(2 eta)``, ``tau = eta U/h + G (zeta - h/2)``
    (Turcotte & Schubert 2002, section 6.2). Power-law and flow-law channels: the profile of the
    per-cell solver of :mod:`crustflow.physics.rheology`.
    """
    import xarray as xr
    from pyproj import Transformer

    from crustflow.constants import SECONDS_PER_YEAR
    from crustflow.engine.fields import crust_thickness_of, fields_si
    from crustflow.engine.strips import HALO_ROWS
    from crustflow.geometry.grid import grid_geometry
    from crustflow.io.grids import close_sources, open_sources

    sources = open_sources(scenario)
    p = scenario.parameters
    setup = scenario.channel
    rows = []
    try:
        topo = sources["topography"]
        t = topo.transform
        x_all, y_all = topo.coords()
        for label, sx, sy, crs in sites:
            if crs is not None:
                sx, sy = Transformer.from_crs(crs, topo.crs, always_xy=True).transform(sx, sy)
            col, row = ~t * (sx, sy)
            col, row = int(np.floor(col)), int(np.floor(row))
            if not (0 <= row < topo.height and 0 <= col < topo.width):
                raise CrustflowInputError(
                    f"site '{label}' ({sx:.6g}, {sy:.6g}) lies outside the "
                    "topography grid; give a point inside it"
                )
            a, b = max(0, row - HALO_ROWS), min(topo.height, row + HALO_ROWS + 1)
            arrays = {k: s.read(a, b) for k, s in sources.items()}
            H = arrays["topography"]
            T = crust_thickness_of(
                H,
                p,
                crust_thickness=arrays.get("crust_thickness"),
                moho_depth=arrays.get("moho_depth"),
            )
            cell = {k: g.to_si(arrays[k]) for k, g in setup.grids.items()}
            geom = grid_geometry(x_all, y_all[a:b], topo.crs, spacing=(t.a, t.e))
            si = fields_si(H, T, geom, p, setup=setup, cell=cell)
            at = (row - a, col)
            value = {k: float(v[at]) for k, v in si.items()}
            if not np.isfinite(value["drive_east"]):
                raise CrustflowInputError(f"site '{label}' falls on nodata; choose another point")
            local = {k: float(v[at]) for k, v in cell.items()}
            rows.append(
                (
                    label,
                    float(x_all[col]),
                    float(y_all[row]),
                    value,
                    local,
                    float(H[at]),
                    value["channel_top_depth"],
                )
            )
    finally:
        close_sources(sources)
    fraction = np.linspace(0.0, 1.0, samples)
    data = {k: [] for k in ("ue", "un", "te", "tn", "eta", "temp", "zeta")}
    for *_, value, local, elevation, top_depth in rows:
        h = value["channel_thickness"]
        zeta = fraction * h
        ge, gn = value["drive_east"], value["drive_north"]
        temp = np.full_like(zeta, np.nan)
        if setup.rheology == "newtonian":
            from crustflow.physics.channel import velocity_profile

            eta = local.get("viscosity", p.viscosity)
            ue, un, te, tn = velocity_profile(
                zeta, ge, gn, h, eta, wall_east=p.wall_east, wall_north=p.wall_north
            )
            visc = np.full_like(zeta, eta)
        else:
            from crustflow.physics.rheology import power_law_profile

            if setup.rheology == "power-law":
                ue, un, te, tn, visc = power_law_profile(
                    zeta,
                    ge,
                    gn,
                    h,
                    setup.prefactor,
                    setup.stress_exponent,
                    wall_east=p.wall_east,
                    wall_north=p.wall_north,
                )
            else:
                from crustflow.engine.cells import wall_temperatures
                from crustflow.physics.flowlaws import (
                    linear_temperature_prefactor,
                    temperature_profile,
                )

                top, base = wall_temperatures(
                    setup, local, elevation=elevation, top_depth=top_depth, thickness=h
                )
                ue, un, te, tn, visc = power_law_profile(
                    zeta,
                    ge,
                    gn,
                    h,
                    1.0,
                    setup.law.stress_exponent,
                    wall_east=p.wall_east,
                    wall_north=p.wall_north,
                    prefactor_profile=linear_temperature_prefactor(setup.law),
                    profile_args=(h, float(top), float(base)),
                )
                temp = np.asarray(temperature_profile(zeta, h, float(top), float(base))) - 273.15
        for key, v in (
            ("ue", ue),
            ("un", un),
            ("te", te),
            ("tn", tn),
            ("eta", visc),
            ("temp", temp),
            ("zeta", zeta),
        ):
            data[key].append(np.broadcast_to(np.asarray(v, dtype=float), zeta.shape))
    mm = 1e3 * SECONDS_PER_YEAR
    site = [r[0] for r in rows]
    dims = ("site", "sample")
    ue, un = np.array(data["ue"]) * mm, np.array(data["un"]) * mm

    def per_site(key, factor=1.0):
        return ("site", np.array([r[3][key] * factor for r in rows]))

    ds = xr.Dataset(
        {
            "height": (
                dims,
                np.array(data["zeta"]),
                {"units": "m", "long_name": "height above the channel's lower wall"},
            ),
            "velocity_east": (dims, ue, {"units": "mm yr-1"}),
            "velocity_north": (dims, un, {"units": "mm yr-1"}),
            "speed": (dims, np.hypot(ue, un), {"units": "mm yr-1"}),
            "shear_stress_east": (dims, np.array(data["te"]) * 1e-6, {"units": "MPa"}),
            "shear_stress_north": (dims, np.array(data["tn"]) * 1e-6, {"units": "MPa"}),
            "viscosity": (dims, np.array(data["eta"]), {"units": "Pa s"}),
            "temperature": (dims, np.array(data["temp"]), {"units": "degC"}),
            "flux_east": per_site("flux_east", SECONDS_PER_YEAR),
            "flux_north": per_site("flux_north", SECONDS_PER_YEAR),
            "upper_wall_drag_east": per_site("upper_wall_drag_east", 1e-6),
            "upper_wall_drag_north": per_site("upper_wall_drag_north", 1e-6),
            "lower_wall_drag_east": per_site("lower_wall_drag_east", 1e-6),
            "lower_wall_drag_north": per_site("lower_wall_drag_north", 1e-6),
            "drive_east": per_site("drive_east"),
            "drive_north": per_site("drive_north"),
            "channel_thickness": per_site("channel_thickness", 1e-3),
            "x": ("site", np.array([r[1] for r in rows])),
            "y": ("site", np.array([r[2] for r in rows])),
        },
        coords={"site": site, "sample": np.arange(samples)},
    )
    for key in ("flux_east", "flux_north"):
        ds[key].attrs["units"] = "m2 yr-1"
    for key in (
        "upper_wall_drag_east",
        "upper_wall_drag_north",
        "lower_wall_drag_east",
        "lower_wall_drag_north",
    ):
        ds[key].attrs["units"] = "MPa"
    ds["channel_thickness"].attrs["units"] = "km"
    ds.attrs["rheology"] = setup.rheology
    return ds


def write_profile_outputs(ds, folder) -> list[str]:
    """``profile_<label>.csv`` and ``profile_<label>.png`` for every site; returns file names."""
    import pandas as pd

    from crustflow.figures.common import add_caution, pyplot

    plt = pyplot()

    folder = Path(folder)
    written = []
    taken: set[str] = set()
    for site in ds.site.values:
        s = ds.sel(site=site)
        label = _label(str(site))
        while label in taken:
            label += "_"
        taken.add(label)
        frame = pd.DataFrame(
            {
                "height_m": s.height.values,
                "velocity_east_mm_per_yr": s.velocity_east.values,
                "velocity_north_mm_per_yr": s.velocity_north.values,
                "speed_mm_per_yr": s.speed.values,
                "shear_stress_east_MPa": s.shear_stress_east.values,
                "shear_stress_north_MPa": s.shear_stress_north.values,
                "viscosity_Pa_s": s.viscosity.values,
                "temperature_degC": s.temperature.values,
            }
        )
        frame.to_csv(folder / f"profile_{label}.csv", index=False)
        fig, (a1, a2) = plt.subplots(1, 2, figsize=(8, 5), sharey=True, layout="constrained")
        hk = s.height.values / 1e3
        a1.plot(s.velocity_east.values, hk, label="east", color="#1b9e77")
        a1.plot(s.velocity_north.values, hk, label="north", color="#7570b3")
        a1.set_xlabel("velocity (mm/yr)")
        a1.set_ylabel("height above the lower wall (km)")
        a2.plot(s.shear_stress_east.values, hk, label="east", color="#1b9e77")
        a2.plot(s.shear_stress_north.values, hk, label="north", color="#7570b3")
        a2.set_xlabel("shear stress (MPa)")
        for ax in (a1, a2):
            for wall in (0.0, hk[-1]):
                ax.axhline(wall, color="0.3", lw=1.5)
            ax.axvline(0.0, color="0.7", lw=0.8)
            ax.legend(loc="best", fontsize=8)
        qe, qn = float(s.flux_east), float(s.flux_north)
        fig.suptitle(
            f"{site}: flux ({qe:.4g}, {qn:.4g}) m²/yr east, north; walls at 0 and {hk[-1]:.3g} km"
        )
        add_caution(fig)
        fig.savefig(folder / f"profile_{label}.png", dpi=120)
        plt.close(fig)
        written += [f"profile_{label}.csv", f"profile_{label}.png"]
    return written
