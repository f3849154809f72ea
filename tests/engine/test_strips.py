"""Strip-wise runs equal the whole-grid computation bit for bit (invariant of the halo design)."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from conftest import SCENARIO, airy, bump, write_grid

import crustflow
from crustflow.cli import main
from crustflow.variables import VARIABLES


def _compare(scenario_path, out, strip_rows):
    assert (
        main(
            [
                "run",
                str(scenario_path),
                "--out",
                str(out),
                "--quiet",
                "--strip-rows",
                str(strip_rows),
            ]
        )
        == 0
    )
    whole = crustflow.solve(crustflow.load_scenario(scenario_path))
    with xr.open_dataset(out / "fields.nc") as ds:
        for name in VARIABLES:
            # Files hold float32: compare with the whole-grid result rounded the same way.
            want = whole[name].values.astype("float32")
            got = ds[name].values.astype("float32")
            np.testing.assert_array_equal(got, want, err_msg=name)


@pytest.mark.parametrize("strip_rows", [1, 3, 7, 1000])
def test_strips_equal_whole_grid_projected_with_nodata(tmp_path, strip_rows):
    topo = bump(shape=(23, 19), radius=50e3)
    topo[5, 7] = np.nan
    topo[0, :3] = np.nan
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "crust.tif", airy(np.nan_to_num(topo, nan=200.0)))
    text = SCENARIO + '[walls]\nupper_velocity = ["3 mm/yr", "-1 mm/yr"]\n'
    (tmp_path / "scenario.toml").write_text(text)
    _compare(tmp_path / "scenario.toml", tmp_path / "out", strip_rows)


@pytest.mark.parametrize("strip_rows", [1, 4])
def test_strips_equal_whole_grid_geographic_south_up_misaligned(tmp_path, strip_rows):
    # Geographic topography with rows stored south to north, crust on a coarser grid: resampled.
    topo = bump(shape=(21, 25), cell=1.0, radius=9.0)
    write_grid(
        tmp_path / "topo.tif",
        topo,
        crs="EPSG:4326",
        west=10.0,
        north=47.0,
        cell=0.05,
        south_up=True,
    )
    crust = airy(bump(shape=(12, 14), cell=1.0, radius=5.0))
    write_grid(tmp_path / "crust.tif", crust, crs="EPSG:4326", west=9.98, north=47.02, cell=0.1)
    (tmp_path / "scenario.toml").write_text(SCENARIO)
    _compare(tmp_path / "scenario.toml", tmp_path / "out", strip_rows)


def test_airy_case_and_moho_depth(tmp_path):
    topo = bump(shape=(15, 17))
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "moho.tif", airy(topo) - topo)  # Moho depth below sea level, m
    airy_text = SCENARIO.replace('crust_thickness = "crust.tif"', 'reference_thickness = "35 km"')
    moho_text = SCENARIO.replace('crust_thickness = "crust.tif"', 'moho_depth = "moho.tif"')
    (tmp_path / "airy.toml").write_text(airy_text)
    (tmp_path / "moho.toml").write_text(moho_text)
    _compare(tmp_path / "airy.toml", tmp_path / "o1", 2)
    _compare(tmp_path / "moho.toml", tmp_path / "o2", 2)
    a = crustflow.solve(crustflow.load_scenario(tmp_path / "airy.toml"))
    b = crustflow.solve(crustflow.load_scenario(tmp_path / "moho.toml"))
    # Same crust both ways (Turcotte & Schubert 2002, 2.2), to float32 rounding of the Moho file.
    np.testing.assert_allclose(a.crust_thickness.values, b.crust_thickness.values, atol=1e-2)


def test_variable_subset_equals_full_run(tmp_path):
    # The flux-only path (no peak speed, drag, backflow) gives the same numbers as the full one.
    topo = bump(shape=(19, 23), radius=50e3)
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "crust.tif", airy(topo))
    text = SCENARIO + '[walls]\nupper_velocity = ["3 mm/yr", "-1 mm/yr"]\n'
    text += '[output]\nvariables = ["flux_east", "flux_north", "thickening_rate"]\n'
    (tmp_path / "scenario.toml").write_text(text)
    out = tmp_path / "out"
    assert main(["run", str(tmp_path / "scenario.toml"), "--out", str(out), "--quiet"]) == 0
    whole = crustflow.solve(crustflow.load_scenario(tmp_path / "scenario.toml"))
    with xr.open_dataset(out / "fields.nc") as ds:
        assert set(ds.data_vars) == {"flux_east", "flux_north", "thickening_rate", "spatial_ref"}
        for name in ("flux_east", "flux_north", "thickening_rate"):
            np.testing.assert_array_equal(ds[name].values, whole[name].values.astype("float32"))


def test_local_cluster_writes_the_same_files(scenario_dir):
    # dask.distributed LocalCluster with 2 worker processes vs the local run: identical arrays in
    # every NetCDF variable and GeoTIFF (the workers compute strips, this process writes).
    import rasterio

    text = SCENARIO + '[walls]\nupper_velocity = ["3 mm/yr", "-1 mm/yr"]\n'
    (scenario_dir / "s.toml").write_text(text)
    a, b = scenario_dir / "local", scenario_dir / "cluster"
    assert (
        main(["run", str(scenario_dir / "s.toml"), "--out", str(a), "--quiet", "--strip-rows", "7"])
        == 0
    )
    assert (
        main(
            [
                "run",
                str(scenario_dir / "s.toml"),
                "--out",
                str(b),
                "--quiet",
                "--strip-rows",
                "7",
                "--workers",
                "2",
                "--cog",
            ]
        )
        == 0
    )
    with xr.open_dataset(a / "fields.nc") as x, xr.open_dataset(b / "fields.nc") as y:
        for name in x.data_vars:
            np.testing.assert_array_equal(x[name].values, y[name].values, err_msg=name)
    for name in ("flux_east", "thickening_rate", "backflow"):
        with rasterio.open(a / f"{name}.tif") as p, rasterio.open(b / f"{name}.tif") as q:
            np.testing.assert_array_equal(p.read(1), q.read(1))
            assert q.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
            assert q.units == p.units and q.descriptions == p.descriptions
    import json

    assert json.loads((b / "run.json").read_text())["grid"]["engine"] == "dask.distributed"
