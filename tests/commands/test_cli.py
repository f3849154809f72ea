"""The command line: demo end to end, outputs read back, every bad input gives exit 2 and one line."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import rasterio
import xarray as xr
from conftest import SCENARIO, UTM, airy, bump, write_grid

from crustflow.cli import main
from crustflow.variables import VARIABLES


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    assert main(["demo", "--out", str(out), "--quiet"]) == 0
    return out


def test_demo_writes_every_output(demo_run):
    names = {p.name for p in demo_run.iterdir()}
    assert {"fields.nc", "flux_map.png", "run.json"} <= names
    assert {f"{v}.tif" for v in VARIABLES} <= names
    assert not [p for p in demo_run.parent.iterdir() if ".partial-" in p.name]


def test_netcdf_reads_back_with_crs_and_units(demo_run):
    with xr.open_dataset(demo_run / "fields.nc", decode_coords="all") as ds:
        assert ds.attrs["Conventions"] == "CF-1.8"
        assert "crustflow" in ds.attrs["source"] and "scenario" in ds.attrs
        assert ds.rio.crs.to_epsg() == 32625
        for name, var in VARIABLES.items():
            assert ds[name].attrs["units"] == var.units
            assert ds[name].attrs["long_name"] == var.long_name
            assert ds[name].encoding["grid_mapping"] == "spatial_ref"
        with rasterio.open(demo_run / "flux_east.tif") as src:
            assert src.transform == ds.rio.transform()
    import netCDF4

    with netCDF4.Dataset(demo_run / "fields.nc") as nc:  # the raw file, as a GIS reads it
        assert nc.variables["flux_east"].grid_mapping == "spatial_ref"
        assert "crs_wkt" in nc.variables["spatial_ref"].ncattrs()
        assert nc.variables["x"].standard_name == "projection_x_coordinate"
    with rasterio.open(f"netcdf:{demo_run / 'fields.nc'}:flux_east") as src:  # GDAL's view
        assert src.crs.to_epsg() == 32625


def test_geotiffs_read_back(demo_run):
    from crustflow.samples.plateau import demo_scenario

    with rasterio.open(demo_scenario("plateau").parent / "topography.tif") as topo:
        crs, transform, shape = topo.crs, topo.transform, topo.shape
    with xr.open_dataset(demo_run / "fields.nc") as ds:
        for name, var in VARIABLES.items():
            with rasterio.open(demo_run / f"{name}.tif") as src:
                assert src.crs == crs and src.transform == transform and src.shape == shape
                assert src.count == 1 and src.descriptions[0] == var.long_name
                assert src.units[0] == var.units
                assert src.profile["tiled"] and src.profile["compress"] == "deflate"
                data = src.read(1, masked=True)
                if var.flag:
                    assert src.nodata == 255
                else:
                    assert np.isnan(src.nodata)
                np.testing.assert_allclose(
                    data.astype("float64").filled(np.nan),
                    ds[name].values,
                    rtol=1e-6,
                    equal_nan=True,
                )


def test_manifest(demo_run):
    manifest = json.loads((demo_run / "run.json").read_text())
    assert manifest["scenario_as_written"]["channel"]["viscosity"] == "1e19 Pa*s"
    assert manifest["scenario_resolved_SI"]["parameters_SI"]["viscosity"] == 1e19
    assert all(len(v["sha256"]) == 64 for v in manifest["inputs"].values())
    assert manifest["versions"]["numpy"] and manifest["stage_seconds"]
    assert "bilinear" in manifest["alignment"]["crust_thickness"]["method"]


def test_lonlat_demo(tmp_path):
    assert (
        main(["demo", "--scenario", "plateau-lonlat", "--out", str(tmp_path / "o"), "--quiet"]) == 0
    )
    with xr.open_dataset(tmp_path / "o" / "fields.nc", decode_coords="all") as ds:
        assert ds.rio.crs.to_epsg() == 4326
        assert np.isfinite(ds.flux_magnitude.values).mean() > 0.9


def test_output_selection(scenario_dir):
    text = SCENARIO + '[output]\nvariables = ["flux_east"]\nformats = ["geotiff"]\n'
    (scenario_dir / "sel.toml").write_text(text)
    out = scenario_dir / "sel_out"
    assert main(["run", str(scenario_dir / "sel.toml"), "--out", str(out), "--quiet"]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert names == ["flux_east.qml", "flux_east.tif", "report.html", "run.json"]


def test_check_command(scenario_dir, capsys):
    assert main(["check", str(scenario_dir / "scenario.toml")]) == 0
    assert "check passed" in capsys.readouterr().out
    assert not (scenario_dir / "crustflow_out").exists()


def _bad_cases(d):
    """(description, scenario text, setup, expected message) for each bad input."""
    topo = bump()
    cases = {
        "missing file": (
            SCENARIO.replace("crust.tif", "nothere.tif"),
            None,
            r"grids.crust_thickness: file not found",
        ),
        "not a raster": (
            SCENARIO.replace("crust.tif", "notes.txt"),
            lambda: (d / "notes.txt").write_text("hello"),
            r"is not a raster",
        ),
        "bare number": (
            SCENARIO.replace('"15 km"', "15"),
            None,
            r"channel.thickness = 15 has no "
            r"units",
        ),
        "unknown key": (
            SCENARIO.replace("viscosity =", "viscosty ="),
            None,
            r"unknown key 'viscosty'.*did you mean 'viscosity'",
        ),
        "negative viscosity": (
            SCENARIO.replace('"1e19 Pa*s"', '"-1e19 Pa*s"'),
            None,
            r"channel.viscosity must be positive",
        ),
        "zero viscosity": (
            SCENARIO.replace('"1e19 Pa*s"', '"0 Pa*s"'),
            None,
            r"channel.viscosity must be positive",
        ),
        "channel thicker than crust": (
            SCENARIO.replace('"15 km"', '"45 km"'),
            None,
            r"channel.thickness \(45 km\) is not less than the crustal "
            r"thickness",
        ),
        "no overlap": (
            SCENARIO.replace("crust.tif", "far.tif"),
            lambda: write_grid(d / "far.tif", airy(topo), west=900e3),
            r"does not overlap the topography grid",
        ),
        "all nodata": (
            SCENARIO.replace("crust.tif", "empty.tif"),
            lambda: write_grid(d / "empty.tif", np.full_like(topo, np.nan)),
            r"holds no valid cells",
        ),
        "thickness in km": (
            SCENARIO.replace("crust.tif", "km.tif"),
            lambda: write_grid(d / "km.tif", airy(topo) / 1e3),
            r"values look like kilometres \(max \d+(\.\d+)?\); give the grid in metres",
        ),
        "no crs": (
            SCENARIO.replace("topo.tif", "nocrs.tif"),
            lambda: write_grid(d / "nocrs.tif", topo, crs=None),
            r"carries no CRS; .*crs = \"EPSG:...\"",
        ),
    }
    return cases


@pytest.mark.parametrize("case", list(_bad_cases(None)))
def test_bad_input_exit_2_one_line_no_output(scenario_dir, capsys, case):
    text, setup, message = _bad_cases(scenario_dir)[case]
    if setup:
        setup()
    (scenario_dir / "bad.toml").write_text(text)
    before = {p: p.stat().st_mtime_ns for p in scenario_dir.iterdir()}
    out = scenario_dir / "out"
    assert main(["run", str(scenario_dir / "bad.toml"), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1, err
    import re

    assert re.search(message, err), err
    assert not out.exists()
    assert not [p for p in scenario_dir.iterdir() if ".partial-" in p.name]
    # `check` finds the same problem, with the same message
    assert main(["check", str(scenario_dir / "bad.toml")]) == 2
    assert re.search(message, capsys.readouterr().err)
    assert {p: p.stat().st_mtime_ns for p in scenario_dir.iterdir() if p in before} == before


def test_output_folder_holding_inputs_is_refused(scenario_dir, capsys):
    assert main(["run", str(scenario_dir / "scenario.toml"), "--out", str(scenario_dir)]) == 2
    assert "holds the input" in capsys.readouterr().err


def test_installed_command_no_traceback(tmp_path):
    # The real entry point in a subprocess: bad input is one line on stderr, exit 2.
    (tmp_path / "s.toml").write_text('[grids]\ntopography = "t.tif"\n')
    proc = subprocess.run(
        [sys.executable, "-m", "crustflow", "run", str(tmp_path / "s.toml")],
        capture_output=True,
        text=True,
        cwd=tmp_path,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    help_text = subprocess.run(
        [sys.executable, "-m", "crustflow", "run", "--help"], capture_output=True, text=True
    ).stdout
    assert "no basis for hazard or engineering decisions" in " ".join(help_text.split())


def test_grids_with_shared_pixel_grid_but_no_crs_use_the_scenario_crs(tmp_path):
    topo = bump()
    write_grid(tmp_path / "topo.tif", topo, crs=None)
    write_grid(tmp_path / "crust.tif", airy(topo), crs=None)
    text = SCENARIO.replace(
        'crust_thickness = "crust.tif"', f'crust_thickness = "crust.tif"\ncrs = "{UTM}"'
    )
    (tmp_path / "s.toml").write_text(text)
    assert main(["run", str(tmp_path / "s.toml"), "--out", str(tmp_path / "o"), "--quiet"]) == 0


def test_demo_writes_budgets(demo_run):
    import geopandas as gpd
    import pandas as pd

    table = pd.read_csv(demo_run / "budgets.csv")
    assert set(table["kind"]) == {"section", "region"}
    assert (table["covered_fraction"] > 0.99).all()
    # 1 km^3/Myr = 1000 m^3/yr (unit definition)
    assert np.allclose(table["volume_flux_km3_per_Myr"] * 1000, table["volume_flux_m3_per_yr"])
    layers = gpd.list_layers(demo_run / "budgets.gpkg")["name"].tolist()
    assert sorted(layers) == ["layer_styles", "regions", "sections"]
    arrow_layers = sorted(gpd.list_layers(demo_run / "flux_arrows.gpkg")["name"])
    assert arrow_layers == ["arrows", "layer_styles", "samples"]
    assert (demo_run / "budget_map.png").is_file()
    assert (demo_run / "section_Varnessa_Scarp.png").is_file()


def test_budget_command_reuses_run_and_matches(demo_run, tmp_path, capsys):
    from crustflow.samples.plateau import demo_scenario

    scenario = demo_scenario("plateau")
    folder = scenario.parent
    args = [
        "budget",
        str(scenario),
        "--sections",
        str(folder / "margins.geojson"),
        "--regions",
        str(folder / "basins.geojson"),
    ]
    # With the demo's run: its fields.nc is reused (no recomputation).
    assert main(args + ["--run", str(demo_run), "--out", str(tmp_path / "b1")]) == 0
    err = capsys.readouterr()
    assert "reused" in err.err and "Varnessa Scarp" in err.out
    # Without a run: the fields are computed; the numbers are the same.
    assert main(args + ["--run", str(tmp_path / "none"), "--out", str(tmp_path / "b2")]) == 0
    assert "computed the fields" in capsys.readouterr().err
    import pandas as pd

    a = pd.read_csv(tmp_path / "b1" / "budgets.csv")
    b = pd.read_csv(tmp_path / "b2" / "budgets.csv")
    np.testing.assert_allclose(a["volume_flux_m3_per_yr"], b["volume_flux_m3_per_yr"], rtol=1e-12)
    assert not (tmp_path / "b2" / ".budget_fields.nc").exists()


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ('{"type": "FeatureCollection", "features": []}', r"has no features"),
        (
            '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": '
            '"urn:ogc:def:crs:EPSG::32633"}}, "features": [{"type": "Feature", "properties": {}, '
            '"geometry": {"type": "Point", "coordinates": [400000, 5100000]}}]}',
            r"Point",
        ),
        (
            '{"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": '
            '"urn:ogc:def:crs:EPSG::32633"}}, "features": [{"type": "Feature", "properties": {}, '
            '"geometry": {"type": "LineString", "coordinates": [[900000, 100000], [910000, 100000]]}}]}',
            r"outside the grid",
        ),
    ],
)
def test_bad_sections_exit_2(scenario_dir, capsys, content, message):
    import re

    (scenario_dir / "lines.geojson").write_text(content)
    out = scenario_dir / "out"
    code = main(
        [
            "budget",
            str(scenario_dir / "scenario.toml"),
            "--sections",
            str(scenario_dir / "lines.geojson"),
            "--out",
            str(out),
        ]
    )
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and re.search(message, err), err
    assert not out.exists()


def test_sections_without_crs_exit_2(scenario_dir, capsys):
    import geopandas as gpd
    from shapely.geometry import LineString

    lines = gpd.GeoDataFrame(
        {"name": ["a"]}, geometry=[LineString([(350e3, 5100e3), (450e3, 5100e3)])]
    )
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # pyogrio warns about the missing CRS
        lines.to_file(scenario_dir / "nocrs.gpkg", driver="GPKG")
    code = main(
        [
            "budget",
            str(scenario_dir / "scenario.toml"),
            "--sections",
            str(scenario_dir / "nocrs.gpkg"),
            "--out",
            str(scenario_dir / "out"),
        ]
    )
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "CRS" in err, err
    assert not (scenario_dir / "out").exists()


def test_api_budget_table_matches_command(demo_run):
    import pandas as pd

    import crustflow
    from crustflow.samples.plateau import demo_scenario

    scenario = crustflow.load_scenario(demo_scenario("plateau"))
    table = crustflow.budget_table(crustflow.solve(scenario), scenario.sections, scenario.regions)
    written = pd.read_csv(demo_run / "budgets.csv")
    np.testing.assert_allclose(
        table["volume_flux_m3_per_yr"], written["volume_flux_m3_per_yr"], rtol=1e-5
    )  # the command reads float32 fields back from fields.nc


ENSEMBLE = """
[ensemble]
members = 40
seed = 7
[ensemble.vary]
"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", high = "1e20 Pa*s" }
"""


def test_run_with_ensemble_and_ensemble_command(scenario_dir):
    (scenario_dir / "e.toml").write_text(SCENARIO + ENSEMBLE)
    out = scenario_dir / "o"
    assert main(["run", str(scenario_dir / "e.toml"), "--out", str(out), "--quiet"]) == 0
    assert {"fields.nc", "ensemble.nc", "ensemble_members.csv"} <= {p.name for p in out.iterdir()}
    manifest = json.loads((out / "run.json").read_text())
    assert manifest["ensemble"]["members"] == 40
    out2 = scenario_dir / "o2"
    assert main(["ensemble", str(scenario_dir / "e.toml"), "--out", str(out2), "--quiet"]) == 0
    with xr.open_dataset(out / "ensemble.nc") as a, xr.open_dataset(out2 / "ensemble.nc") as b:
        # same seed, same samples: identical maps (reproducibility)
        np.testing.assert_array_equal(a.flux_magnitude.values, b.flux_magnitude.values)
        assert list(a.percentile.values) == [5, 50, 95]


def test_ensemble_command_needs_the_table(scenario_dir, capsys):
    assert (
        main(["ensemble", str(scenario_dir / "scenario.toml"), "--out", str(scenario_dir / "o")])
        == 2
    )
    assert "has no [ensemble] table" in capsys.readouterr().err
