"""Ensembles: percentile maps against numpy over explicit members, an analytic transform of a
log-uniform viscosity, reproducibility and Latin-hypercube strata, budgets member by member, the fast
path against the fallback and against fields_si, truncation, and every error message.

Grids are invented test data (conftest's cos^2 plateau and Airy crust), used only to exercise the
code paths; the checks are invariants and exact references (numpy.percentile, fields_si,
budget_table, scipy.stats), named beside each.
"""

from __future__ import annotations

import copy
import dataclasses
import math

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
import xarray as xr
from conftest import airy, bump, write_grid

import crustflow
from crustflow import CrustflowInputError, ModelParameters
from crustflow.analyses.budgets import budget_table
from crustflow.analyses.ensemble.report import sorted_percentiles
from crustflow.analyses.ensemble.run import (
    FAST_VARIABLES,
    fast_fields,
    parse_ensemble,
    run_ensemble,
    sample_members,
)
from crustflow.engine.api import read_inputs
from crustflow.engine.fields import crust_thickness_of, fields_si
from crustflow.geometry.grid import grid_geometry
from crustflow.variables import VARIABLES, to_practical

UTM = "EPSG:32633"
SHAPE = (18, 22)
CELL = 5e3
WEST, NORTH = 300e3, 5200e3

VARY = {
    "channel.viscosity": {"distribution": "log-uniform", "low": "1e18 Pa*s", "high": "1e20 Pa*s"},
    "channel.thickness": {
        "distribution": "normal",
        "mean": "15 km",
        "sd": "3 km",
        "min": "5 km",
        "max": "25 km",
    },
    "densities.channel": {"distribution": "uniform", "low": "2750 kg/m^3", "high": "2900 kg/m^3"},
    "walls.upper_velocity": {
        "distribution": "normal",
        "mean": ["5 mm/yr", "0 mm/yr"],
        "sd": ["2 mm/yr", "2 mm/yr"],
    },
}
REPORT = {
    "percentiles": [5, 50, 95],
    "variables": ["flux_magnitude", "thickening_rate", "uplift_rate", "flux_east"],
    "exceedance": {"variable": "uplift_rate", "thresholds": ["0.5 mm/yr", "1 mm/yr"]},
}


def ensemble(members=12, seed=7, **extra) -> dict:
    raw = {
        "members": members,
        "seed": seed,
        "sampling": "latin-hypercube",
        "vary": copy.deepcopy(VARY),
        "report": copy.deepcopy(REPORT),
    }
    raw.update(extra)
    return raw


def topography(geographic=False):
    """The plateau with a strip of sea and two nodata cells (invented)."""
    topo = bump(SHAPE, cell=CELL, radius=45e3) - 600.0  # corners below sea level
    topo[3, 4] = np.nan
    topo[11, 20] = np.nan
    return topo


def make_case(
    folder, *, geographic=False, airy_crust=False, budgets=False, formats=("netcdf", "geotiff")
):
    """Write grids (and features) into ``folder``; return the scenario."""
    topo = topography()
    kw = dict(crs="EPSG:4326", west=10.0, north=47.0, cell=0.05) if geographic else {}
    write_grid(folder / "topo.tif", topo, **kw)
    grids = {"topography": "topo.tif"}
    if airy_crust:
        grids["reference_thickness"] = "35 km"
    else:
        crust = airy(np.nan_to_num(topo, nan=0.0)) + 2e3 * np.sin(np.arange(SHAPE[1]) / 3.0)
        write_grid(folder / "crust.tif", crust, **kw)
        grids["crust_thickness"] = "crust.tif"
    raw = {
        "title": "ensemble test",
        "grids": grids,
        "channel": {"thickness": "15 km", "viscosity": "1e19 Pa*s"},
        "walls": {"upper_velocity": ["3 mm/yr", "-1 mm/yr"]},
        "output": {"formats": list(formats)},
    }
    if budgets:
        xc, yc = WEST + CELL * SHAPE[1] / 2, NORTH - CELL * SHAPE[0] / 2
        gpd.GeoDataFrame(
            {"name": ["across the flank", "north flank"]},
            geometry=[
                shapely.LineString([(xc + 15e3, yc - 30e3), (xc + 15e3, yc + 30e3)]),
                shapely.LineString([(xc - 30e3, yc + 20e3), (xc + 30e3, yc + 25e3)]),
            ],
            crs=UTM,
        ).to_file(folder / "sections.geojson")
        gpd.GeoDataFrame(
            {"name": ["plateau"]},
            geometry=[shapely.box(xc - 22e3, yc - 18e3, xc + 24e3, yc + 21e3)],
            crs=UTM,
        ).to_file(folder / "regions.geojson")
        raw["budgets"] = {"sections": "sections.geojson", "regions": "regions.geojson"}
    return crustflow.scenario_from_dict(raw, base_dir=folder)


def explicit_members(scenario, members, names):
    """fields_si of every member on the whole grid (the slow, obvious reference), practical units."""
    grids = read_inputs(scenario)
    topo = grids.topography
    t = topo.rio.transform()
    geom = grid_geometry(topo.x.values, topo.y.values, topo.rio.crs, spacing=(t.a, t.e))
    H = topo.values
    crust = None if grids.crust_thickness is None else grids.crust_thickness.values
    out = {n: [] for n in names}
    for p in members:
        T = crust_thickness_of(H, p, crust_thickness=crust)
        si = fields_si(H, T, geom, p, wanted=set(names))
        for n in names:
            out[n].append(to_practical(n, si[n]))
    return {n: np.array(v) for n, v in out.items()}


def read_nc(folder):
    with xr.open_dataset(folder / "ensemble.nc", decode_coords="all") as ds:
        return ds.load()


def close(got, want, rel=2e-6):
    """float32 files: within a few float32 units of the field's largest value (value derived)."""
    scale = np.nanmax(np.abs(want))
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
    np.testing.assert_allclose(got, want, rtol=rel, atol=rel * scale)


@pytest.fixture(scope="module")
def run_case(tmp_path_factory):
    """One scenario with budgets, run on the fast path; shared by several tests."""
    folder = tmp_path_factory.mktemp("ens")
    scenario = make_case(folder, budgets=True, formats=("netcdf", "geotiff", "figure"))
    spec = parse_ensemble(ensemble(), scenario.parameters)
    out = folder / "out"
    out.mkdir()
    summary = run_ensemble(scenario, spec, out)
    return scenario, spec, out, summary


# ----------------------------------------------------------------------------------------------
# maps


def test_percentile_maps_equal_numpy_over_explicit_members(run_case):
    # Reference: numpy.percentile (method "linear") over fields_si run member by member.
    scenario, spec, out, summary = run_case
    assert summary["fast_path"]
    members, _ = sample_members(spec, scenario.parameters)
    names = list(spec.variables)
    ref = explicit_members(scenario, members, names)
    ds = read_nc(out)
    for n in names:
        want = np.percentile(ref[n], spec.percentiles, axis=0, method="linear")
        close(ds[n].values, want)
        close(ds[f"{n}_mean"].values, ref[n].mean(axis=0))
        close(ds[f"{n}_sd"].values, ref[n].std(axis=0, ddof=1), rel=1e-5)
        assert ds[n].attrs["units"] == VARIABLES[n].units
        assert ds[n].dims == ("percentile", "y", "x")
        assert ds[n].rio.crs is not None
    np.testing.assert_array_equal(ds.percentile.values, [5.0, 50.0, 95.0])
    # Exceedance: the share of members strictly above each threshold (0.5 and 1 mm/yr).
    up = ref["uplift_rate"]
    want = np.array([(up > t).mean(axis=0) for t in (0.5, 1.0)])
    want[:, np.isnan(up[0])] = np.nan
    np.testing.assert_array_equal(ds["uplift_rate_exceedance"].values, want.astype("float32"))
    np.testing.assert_allclose(ds.threshold.values, [0.5, 1.0])
    assert ds.threshold.attrs["units"] == "mm yr-1"
    # The GeoTIFF of a percentile map holds the same numbers as the NetCDF.
    import rasterio

    with rasterio.open(out / "thickening_rate_p95.tif") as src:
        np.testing.assert_array_equal(src.read(1), ds["thickening_rate"].sel(percentile=95).values)
        assert src.tags(1)["units"] == "mm yr-1"
    assert (out / "ensemble_flux_magnitude.png").stat().st_size > 0
    assert (out / "uplift_rate_exceedance.png").stat().st_size > 0
    import json

    manifest = json.loads(json.dumps(summary["manifest"]))  # JSON-ready as it is
    assert manifest["outputs"] == summary["written"] and manifest["members"] == 12
    assert manifest["budget_statistics"][0]["name"] == "across the flank"
    assert (out / "ensemble_budgets.png").stat().st_size > 0


def test_log_uniform_viscosity_gives_the_transformed_flux_percentiles(tmp_path):
    # Pure pressure-driven channel: q = -h^3 G / (12 eta), so |q| = |q|(eta0) eta0 / eta, decreasing
    # in eta; the p-th percentile of |q| is |q| at the (100 - p)-th percentile of eta. With
    # N = 1001 members, (N - 1) p / 100 = 10 p is an integer: both are exact order statistics.
    # Log-uniform on [lo, hi]: eta_q = exp(ln hi - (p / 100) ln(hi / lo)) at u = 1 - p / 100. Latin
    # hypercube: the k-th smallest u lies in [k / N, (k + 1) / N), so the sample order statistic
    # is within a factor exp(ln(hi / lo) / N) of the analytic quantile. (value derived)
    scenario = make_case(tmp_path)
    scenario = dataclasses.replace(
        scenario, parameters=dataclasses.replace(scenario.parameters, wall_east=0.0, wall_north=0.0)
    )
    n, lo, hi = 1001, 1e18, 1e20
    raw = {
        "members": n,
        "seed": 11,
        "vary": {
            "channel.viscosity": {
                "distribution": "log-uniform",
                "low": "1e18 Pa*s",
                "high": "1e20 Pa*s",
            }
        },
        "report": {"percentiles": [5, 50, 95], "variables": ["flux_magnitude"]},
    }
    spec = parse_ensemble(raw, scenario.parameters)
    (tmp_path / "out").mkdir()
    summary = run_ensemble(scenario, spec, tmp_path / "out")
    got = read_nc(tmp_path / "out")["flux_magnitude"].values
    eta0 = 1e19
    q0 = explicit_members(
        scenario, [dataclasses.replace(scenario.parameters, viscosity=eta0)], ["flux_magnitude"]
    )["flux_magnitude"][0]
    sampled = np.sort(summary["samples"]["channel.viscosity_Pa_s"].to_numpy())
    for i, p in enumerate((5, 50, 95)):
        eta_sample = sampled[10 * (100 - p)]
        close(got[i], q0 * eta0 / eta_sample)
        eta_exact = math.exp(math.log(hi) - p / 100 * math.log(hi / lo))
        tol = math.exp(math.log(hi / lo) / n) - 1
        ok = q0 > 1e-6 * np.nanmax(q0)  # flat ground drives nothing: only rounding noise there
        np.testing.assert_allclose(got[i][ok], (q0 * eta0 / eta_exact)[ok], rtol=tol + 1e-6)


def test_strips_and_chunks_do_not_change_the_maps(run_case, tmp_path):
    # Invariant of the halo design (as tests/test_stream.py for single runs): 3-row strips and
    # 50-cell chunks give the whole-grid numbers.
    scenario, spec, out, _ = run_case
    (tmp_path / "o").mkdir()
    run_ensemble(
        scenario, spec, tmp_path / "o", strip_rows=3, memory_bytes=50 * 8 * spec.members * 8
    )
    a, b = read_nc(out), read_nc(tmp_path / "o")
    for n in spec.variables:
        close(b[n].values, a[n].values, rel=1e-6)


def test_same_seed_same_files_other_seed_other_samples(tmp_path):
    # Reproducibility: numpy.random.Generator(PCG64(seed)) and scipy's LatinHypercube with it.
    scenario = make_case(tmp_path)
    spec = parse_ensemble(ensemble(members=8), scenario.parameters)
    outs = []
    for name in ("a", "b"):
        (tmp_path / name).mkdir()
        outs.append(run_ensemble(scenario, spec, tmp_path / name))
    tifs = sorted(p.name for p in (tmp_path / "a").glob("*.tif"))
    assert len(tifs) == 12
    for name in tifs:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
    a, b = read_nc(tmp_path / "a"), read_nc(tmp_path / "b")
    for var in a.data_vars:
        np.testing.assert_array_equal(a[var].values, b[var].values)
    pd.testing.assert_frame_equal(outs[0]["samples"], outs[1]["samples"])
    other = dataclasses.replace(spec, seed=8)
    _, again = sample_members(spec, scenario.parameters)
    _, changed = sample_members(other, scenario.parameters)
    pd.testing.assert_frame_equal(again, outs[0]["samples"])
    assert not np.any(changed.iloc[:, 1:].to_numpy() == again.iloc[:, 1:].to_numpy())


@pytest.mark.parametrize("n", [7, 50])
def test_latin_hypercube_puts_one_member_in_each_stratum(n):
    # McKay, Beckman & Conover (1979): each of the N equal-probability strata of every parameter
    # holds exactly one sample. Strata from each distribution's CDF (scipy.stats.truncnorm for the
    # truncated normal).
    params = ModelParameters(channel_thickness=15e3, viscosity=1e19)
    spec = parse_ensemble(ensemble(members=n, seed=3), params)
    members, table = sample_members(spec, params)
    assert len(members) == n and list(table["member"]) == list(range(n))
    for dim in spec.dimensions():
        si = (
            table[dim.label].to_numpy()
            / crustflow.analyses.ensemble.run.VARIABLE_KEYS[dim.key].factor
        )
        strata = np.floor(dim.distribution.cdf(si) * n).astype(int)
        assert sorted(strata) == list(range(n)), dim.label
    # The members carry the sampled values; what is not varied is kept.
    assert members[0].rho_crust == params.rho_crust
    assert members[2].wall_north == pytest.approx(
        table["walls.upper_velocity_north_mm_per_yr"][2] / (1e3 * 365.25 * 86400)
    )


def test_truncated_normal_stays_within_its_bounds():
    # scipy.stats.truncnorm as the inverse CDF, clipped: no value below min or above max, even
    # with the bounds close to the mean (a heavy truncation) and random sampling.
    params = ModelParameters(channel_thickness=15e3, viscosity=1e19)
    raw = ensemble(members=2000, sampling="random")
    raw["vary"] = {
        "channel.thickness": {
            "distribution": "normal",
            "mean": "15 km",
            "sd": "3 km",
            "min": "14 km",
            "max": "15.5 km",
        }
    }
    _, table = sample_members(parse_ensemble(raw, params), params)
    h = table["channel.thickness_km"].to_numpy()
    assert h.min() >= 14.0 and h.max() <= 15.5
    assert h.min() < 14.01 and h.max() > 15.49  # the whole interval is used


def test_sorted_percentiles_equal_numpy_bit_for_bit():
    # Reference: numpy.percentile, method "linear" (Hyndman & Fan 1996, definition 7).
    rng = np.random.default_rng(5)
    for n in (2, 3, 10, 101, 1000):
        rows = np.sort(rng.normal(size=(40, n)), axis=1)
        q = [0, 0.5, 5, 25, 50, 62.5, 95, 99.9, 100]
        np.testing.assert_array_equal(
            sorted_percentiles(rows, q), np.percentile(rows, q, axis=1, method="linear")
        )


# ----------------------------------------------------------------------------------------------
# the fast path


@pytest.mark.parametrize("geographic", [False, True])
@pytest.mark.parametrize("mode", ["grid", "moho", "airy"])
def test_fast_path_member_equals_fields_si(geographic, mode):
    # Reference: crustflow.engine.fields.fields_si per member. The decomposition into base maps is exact
    # algebra (fast_fields' Notes); what differs is rounding, ~1e-13 of the largest value. The
    # one-cell extras that divide or locate a maximum (peak height, wall-driven share) amplify it
    # a little more.
    rng = np.random.default_rng(2)
    topo = topography()
    if geographic:
        x, y, crs = 10 + 0.05 * np.arange(SHAPE[1]), 47 - 0.05 * np.arange(SHAPE[0]), "EPSG:4326"
    else:
        x, y, crs = WEST + CELL * np.arange(SHAPE[1]), NORTH - CELL * np.arange(SHAPE[0]), UTM
    geom = grid_geometry(x, y, crs, spacing=(x[1] - x[0], y[1] - y[0]))
    crust = airy(np.nan_to_num(topo, nan=0.0)) + 3e3 * rng.random(SHAPE)
    base = ModelParameters(
        channel_thickness=15e3, viscosity=1e19, reference_thickness=35e3 if mode == "airy" else None
    )
    members = [
        dataclasses.replace(
            base,
            viscosity=10 ** rng.uniform(18, 20),
            channel_thickness=rng.uniform(8e3, 20e3),
            rho_channel=rng.uniform(2700, 2900),
            rho_crust=rng.uniform(2750, 2850),
            rho_water=rng.uniform(1000, 1050),
            rho_mantle=rng.uniform(3250, 3350),
            gravity=rng.uniform(9.7, 9.9),
            wall_east=rng.normal(0, 1e-10),
            wall_north=rng.normal(0, 1e-10),
            reference_thickness=rng.uniform(30e3, 40e3) if mode == "airy" else None,
        )
        for _ in range(3)
    ]
    kw = {
        "grid": {"crust_thickness": crust},
        "moho": {"moho_depth": crust - np.nan_to_num(topo)},
        "airy": {},
    }[mode]
    names = [n for n in FAST_VARIABLES if n in VARIABLES]
    fast = fast_fields(topo, geom, members, wanted=names, **kw)
    loose = ("peak_speed_height", "wall_driven_share")
    for m, p in enumerate(members):
        ref = fields_si(topo, crust_thickness_of(topo, p, **kw), geom, p, wanted=set(names))
        for n in names:
            a, b = fast[n][m], ref[n]
            np.testing.assert_array_equal(np.isnan(a), np.isnan(b), err_msg=n)
            scale = np.nanmax(np.abs(b)) or 1.0
            rel = 1e-10 if n in loose else 1e-12
            assert np.nanmax(np.abs(a - b)) <= rel * scale, n


@pytest.mark.parametrize("geographic, airy_crust", [(False, False), (True, True)])
def test_fast_path_equals_fallback(tmp_path, geographic, airy_crust):
    # The two engines: linear algebra on base maps vs fields_si member by member.
    scenario = make_case(tmp_path, geographic=geographic, airy_crust=airy_crust)
    raw = ensemble(members=6)
    if airy_crust:  # Airy crust moves with the densities too
        raw["vary"]["densities.mantle"] = {
            "distribution": "uniform",
            "low": "3250 kg/m^3",
            "high": "3350 kg/m^3",
        }
        raw["vary"]["grids.reference_thickness"] = {
            "distribution": "uniform",
            "low": "32 km",
            "high": "38 km",
        }
    raw["report"]["variables"] += ["peak_speed", "backflow", "overburden_pressure"]
    spec = parse_ensemble(raw, scenario.parameters)
    runs = {}
    for fast in (True, False):
        (tmp_path / str(fast)).mkdir()
        runs[fast] = run_ensemble(scenario, spec, tmp_path / str(fast), fast=fast)
        assert runs[fast]["fast_path"] is fast
    a, b = read_nc(tmp_path / "True"), read_nc(tmp_path / "False")
    for var in a.data_vars:
        if var != "spatial_ref":
            close(a[var].values, b[var].values, rel=1e-6)


# ----------------------------------------------------------------------------------------------
# budgets


def test_budget_distributions_equal_budget_table_member_by_member(run_case, tmp_path):
    # Reference: crustflow.analyses.budgets.budget_table on compute_fields, one member at a time.
    scenario, spec, out, summary = run_case
    members, _ = sample_members(spec, scenario.parameters)
    grids = read_inputs(scenario)
    want = []
    for p in members:
        ds = crustflow.compute_fields(
            grids.topography, parameters=p, crust_thickness=grids.crust_thickness
        )
        table = budget_table(ds, scenario.sections, scenario.regions)
        want.append(table["volume_flux_m3_per_yr"].to_numpy())
    want = np.array(want)
    got = summary["member_budgets"].to_numpy()
    np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-9 * np.abs(want).max())
    assert list(summary["member_budgets"].attrs["kinds"]) == ["section", "section", "region"]
    stats = pd.read_csv(out / "ensemble_budgets.csv")
    np.testing.assert_allclose(stats["p50_m3_per_yr"], np.percentile(want, 50, axis=0), rtol=1e-9)
    np.testing.assert_allclose(stats["sd_km3_per_Myr"], want.std(axis=0, ddof=1) / 1e3, rtol=1e-9)
    members_csv = pd.read_csv(out / "ensemble_members.csv")
    assert "section_across_the_flank_volume_flux_m3_per_yr" in members_csv
    assert "channel.thickness_km" in members_csv and len(members_csv) == spec.members
    # The fallback computes each member's budgets with budget_table directly.
    (tmp_path / "slow").mkdir()
    slow = run_ensemble(scenario, spec, tmp_path / "slow", fast=False)
    np.testing.assert_allclose(
        slow["member_budgets"].to_numpy(), want, rtol=1e-9, atol=1e-9 * np.abs(want).max()
    )


# ----------------------------------------------------------------------------------------------
# errors: every message a user can see


PARAMS = ModelParameters(channel_thickness=15e3, viscosity=1e19)


def _edit(path, value):
    raw = ensemble()
    where = raw
    for key in path[:-1]:
        where = where[key]
    if value is KeyError:
        del where[path[-1]]
    else:
        where[path[-1]] = value
    return raw


@pytest.mark.parametrize(
    "path, value, match",
    [
        (("member",), 10, r"unknown key 'member' in \[ensemble\]; did you mean 'members'\?"),
        (("members",), 1, r"ensemble.members = 1 is not an integer of at least 2"),
        (("members",), KeyError, r"\[ensemble\] needs members = N"),
        (("seed",), KeyError, r"\[ensemble\] needs seed = N .* repeated exactly"),
        (("seed",), -1, r"ensemble.seed = -1 is not an integer of at least 0"),
        (
            ("sampling",),
            "sobol",
            r"ensemble.sampling = 'sobol' is not one of latin-hypercube, random",
        ),
        (("vary",), {}, r"\[ensemble.vary\] is missing or empty"),
        (
            ("vary", "channel.viscosty"),
            {},
            r"unknown key 'channel.viscosty' in \[ensemble.vary\]; "
            r"did you mean 'channel.viscosity'\?; the keys that can vary: channel.viscosity, "
            r"channel.thickness, densities.crust, densities.mantle, densities.water, densities.channel, "
            r"walls.upper_velocity, constants.gravity",
        ),
        (
            ("vary", "channel.viscosity", "low"),
            1e18,
            r'channel.viscosity"\.low = 1e\+18 has no units; write it as a string with units',
        ),
        (
            ("vary", "channel.viscosity", "distribution"),
            "gamma",
            r"distribution = 'gamma' is not one of uniform, log-uniform, normal",
        ),
        (("vary", "channel.viscosity", "hgh"), "1e20 Pa*s", r"unknown key 'hgh' .* did you mean"),
        (
            ("vary", "channel.viscosity", "high"),
            KeyError,
            r"a log-uniform distribution needs low and "
            r'high; add high = "..."',
        ),
        (
            ("vary", "channel.viscosity", "mean"),
            "1e19 Pa*s",
            r"mean does not apply to a log-uniform "
            "distribution",
        ),
        (("vary", "channel.viscosity", "low"), "1e21 Pa*s", r"low must be less than high"),
        (("vary", "channel.viscosity"), "1e19 Pa*s", r'"channel.viscosity" must be a table'),
        (
            ("vary", "channel.thickness", "min"),
            KeyError,
            r'"channel.thickness": a normal distribution can give values that are not positive \(min '
            r'not set\); add a lower truncation bound, e.g. min = "5 km"',
        ),
        (("vary", "channel.thickness", "min"), "-1 km", r"min must be positive"),
        (("vary", "channel.thickness", "sd"), "0 km", r"sd must be positive"),
        (("vary", "channel.thickness", "max"), "4 km", r"min must be less than max"),
        (("vary", "channel.thickness", "mean"), "15 Pa", r"has units of .*expected a length"),
        (("vary", "densities.channel", "low"), "0 kg/m^3", r"low must be positive"),
        (
            ("vary", "walls.upper_velocity", "sd"),
            "2 mm/yr",
            r'upper_velocity"\.sd must be a list of two values with units \(east, north\)',
        ),
        (
            ("vary", "grids.reference_thickness"),
            {"distribution": "uniform", "low": "30 km", "high": "40 km"},
            r"grids.reference_thickness cannot vary as a scalar: .*Airy case only",
        ),
        (("report",), [5], r"ensemble.report must be a table"),
        (
            ("report", "percentile"),
            [5],
            r"unknown key 'percentile' in \[ensemble.report\]; did you "
            r"mean 'percentiles'\?",
        ),
        (
            ("report", "percentiles"),
            [5, 150],
            r"ensemble.report.percentiles has 150, outside 0..100",
        ),
        (("report", "percentiles"), [], r"percentiles must be a non-empty list"),
        (
            ("report", "variables"),
            ["uplift"],
            r"unknown key 'uplift' in ensemble.report.variables; "
            r"did you mean 'uplift_rate'\?",
        ),
        (("report", "variables"), ["flux_azimuth"], r"flux_azimuth is a direction"),
        (("report", "variables"), "uplift_rate", r"variables must be a non-empty list"),
        (("report", "exceedance"), "uplift_rate", r"exceedance must be a table"),
        (
            ("report", "exceedance", "thresholds"),
            KeyError,
            r"exceedance needs variable and thresholds",
        ),
        (("report", "exceedance", "thresholds"), [], r"thresholds must be a non-empty list"),
        (("report", "exceedance", "thresholds"), [0.5], r"has 0.5 without units"),
        (
            ("report", "exceedance", "thresholds"),
            ["1 km"],
            r"has '1 km', not a value in units of "
            r"uplift_rate \(mm yr-1\)",
        ),
        (
            ("report", "exceedance", "variable"),
            "wall_driven_share",
            r"wall_driven_share is a number "
            "without units",
        ),
    ],
)
def test_bad_ensemble_tables_are_refused_with_a_clear_message(path, value, match):
    raw = _edit(path, value)
    if path[-1] == "variable":
        raw["report"]["exceedance"]["thresholds"] = ["1 mm/yr"]
    with pytest.raises(CrustflowInputError, match=match):
        parse_ensemble(raw, PARAMS)


def test_a_normal_thickness_without_min_is_rejected():
    raw = ensemble()
    del raw["vary"]["channel.thickness"]["min"]
    with pytest.raises(CrustflowInputError, match=r"channel.thickness.*min not set.*min = "):
        parse_ensemble(raw, PARAMS)


def test_dimensionless_thresholds_and_the_table_itself():
    raw = ensemble()
    raw["report"]["exceedance"] = {"variable": "wall_driven_share", "thresholds": [0.5]}
    assert parse_ensemble(raw, PARAMS).thresholds == (0.5,)
    with pytest.raises(CrustflowInputError, match=r"\[ensemble\] must be a table"):
        parse_ensemble([1], PARAMS)
    with pytest.raises(
        CrustflowInputError,
        match=r"a log-uniform distribution needs a positive "
        "low",
    ):
        parse_ensemble(
            _edit(
                ("vary", "walls.upper_velocity"),
                {
                    "distribution": "log-uniform",
                    "low": ["-1 mm/yr", "1 mm/yr"],
                    "high": ["5 mm/yr", "5 mm/yr"],
                },
            ),
            PARAMS,
        )


def test_inconsistent_members_and_thick_channels_are_refused(tmp_path):
    raw = ensemble()
    raw["vary"]["densities.mantle"] = {
        "distribution": "uniform",
        "low": "2700 kg/m^3",
        "high": "3300 kg/m^3",
    }
    with pytest.raises(
        CrustflowInputError,
        match=r"ensemble member \d+: densities.mantle must "
        r"exceed .*; narrow the ranges in \[ensemble.vary\]",
    ):
        sample_members(parse_ensemble(raw, PARAMS), PARAMS)
    scenario = make_case(tmp_path)
    raw = ensemble()
    raw["vary"]["channel.thickness"].update(mean="40 km", max="60 km")
    spec = parse_ensemble(raw, scenario.parameters)
    (tmp_path / "o").mkdir()
    with pytest.raises(
        CrustflowInputError,
        match=r"channel.thickness is not less than the "
        r"thinnest crust in \d+ of 12 ensemble members .*; set max in",
    ):
        run_ensemble(scenario, spec, tmp_path / "o")


def test_parameter_grids_take_the_fallback_and_are_checked_per_member(tmp_path):
    # A channel-thickness grid: the fast path does not apply; an Airy crust thinned by a varied
    # reference thickness meets the 20 km channel in some members.
    write_grid(tmp_path / "topo.tif", topography())
    write_grid(tmp_path / "h.tif", np.full(SHAPE, 20e3))
    scenario = crustflow.scenario_from_dict(
        {
            "grids": {"topography": "topo.tif", "reference_thickness": "35 km"},
            "channel": {"thickness": {"grid": "h.tif", "units": "m"}, "viscosity": "1e19 Pa*s"},
            "output": {"formats": ["netcdf"]},
        },
        base_dir=tmp_path,
    )
    raw = {"members": 4, "seed": 1, "vary": {"channel.viscosity": VARY["channel.viscosity"]}}
    spec = parse_ensemble(raw, scenario.parameters)
    (tmp_path / "o").mkdir()
    summary = run_ensemble(scenario, spec, tmp_path / "o")
    assert not summary["fast_path"] and "grids" in summary["fast_path_obstacle"]
    with pytest.raises(
        CrustflowInputError,
        match=r"the fast path does not apply: channel "
        r"parameters are grids \(channel_thickness\); leave fast unset",
    ):
        run_ensemble(scenario, spec, tmp_path / "o", fast=True)
    raw["vary"]["grids.reference_thickness"] = {
        "distribution": "uniform",
        "low": "10 km",
        "high": "40 km",
    }
    with pytest.raises(
        CrustflowInputError,
        match=r"channel is not thinner than the crust in "
        r"\d+ cells for an ensemble member; narrow channel.thickness",
    ):
        run_ensemble(scenario, parse_ensemble(raw, scenario.parameters), tmp_path / "o")
    with pytest.raises(
        CrustflowInputError,
        match=r"channel.thickness cannot vary as a scalar: "
        "the scenario gives it as a grid",
    ):
        parse_ensemble(
            {"members": 4, "seed": 1, "vary": {"channel.thickness": VARY["channel.thickness"]}},
            scenario.parameters,
        )


def test_what_ensembles_cannot_do_yet_is_refused(tmp_path, monkeypatch):
    raw = ensemble()
    raw["report"]["variables"] = ["thin_channel_warning"]
    with pytest.raises(
        CrustflowInputError,
        match=r"thin_channel_warning needs the whole grid for "
        "every member and is not available in ensembles",
    ):
        parse_ensemble(raw, PARAMS)
    write_grid(tmp_path / "topo.tif", topography())
    base = {
        "grids": {"topography": "topo.tif", "reference_thickness": "35 km"},
        "channel": {"thickness": "30 km", "viscosity": "1e19 Pa*s"},
        "output": {"formats": ["netcdf"]},
    }
    (tmp_path / "o").mkdir()
    smooth = crustflow.scenario_from_dict(
        dict(base, load={"smoothing": "10 km"}), base_dir=tmp_path
    )
    spec = parse_ensemble(
        {"members": 3, "seed": 1, "vary": {"channel.viscosity": VARY["channel.viscosity"]}},
        smooth.parameters,
    )
    with pytest.raises(
        CrustflowInputError,
        match=r"ensembles do not support \[load\] smoothing "
        "or elastic_thickness yet",
    ):
        run_ensemble(smooth, spec, tmp_path / "o")
    # Airy crust thinner than the (fixed) channel in some members: the reference thickness varies.
    scenario = crustflow.scenario_from_dict(base, base_dir=tmp_path)
    spec = parse_ensemble(
        {
            "members": 4,
            "seed": 1,
            "vary": {
                "grids.reference_thickness": {
                    "distribution": "uniform",
                    "low": "20 km",
                    "high": "40 km",
                }
            },
        },
        scenario.parameters,
    )
    with pytest.raises(
        CrustflowInputError,
        match=r"in \d of 4 ensemble members .*; give a "
        r"thinner channel or narrow the varied densities and reference thickness",
    ):
        run_ensemble(scenario, spec, tmp_path / "o")
    # A distribution whose inverse CDF fails (scipy guards the far tails; the check stays).
    monkeypatch.setattr(
        crustflow.analyses.ensemble.run.Distribution, "ppf", lambda self, u: u * np.nan
    )
    with pytest.raises(
        CrustflowInputError,
        match=r'"channel.viscosity": the distribution gives '
        "non-finite values",
    ):
        sample_members(parse_ensemble(ensemble(), PARAMS), PARAMS)
