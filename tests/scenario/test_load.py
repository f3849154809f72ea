"""Load-model options in scenarios: roof layers, placement, filters; the wedge sample; bad inputs."""

from __future__ import annotations

import re

import numpy as np
import pytest
import xarray as xr
from conftest import SCENARIO, airy, bump, write_grid

import crustflow
from crustflow.cli import main


def run(path, out):
    assert main(["run", str(path), "--out", str(out), "--quiet"]) == 0
    return xr.open_dataset(out / "fields.nc")


def test_zero_filters_equal_no_filters(scenario_dir):
    # Te = 0 and no smoothing return the load unchanged (SCIENCE.md: response 1 at D = 0).
    (scenario_dir / "f.toml").write_text(
        SCENARIO + '[load]\nelastic_thickness = "0 km"\nsmoothing = "0 km"\n'
    )
    a = run(scenario_dir / "scenario.toml", scenario_dir / "o1")
    b = run(scenario_dir / "f.toml", scenario_dir / "o2")
    np.testing.assert_array_equal(a.flux_east.values, b.flux_east.values)


def test_elastic_crust_reduces_the_drive(scenario_dir):
    # A stiff lid passes only long wavelengths of the load (Turcotte & Schubert 2002, chapter 3):
    # the largest drive falls, the area mean of the load is kept.
    (scenario_dir / "f.toml").write_text(SCENARIO + '[load]\nelastic_thickness = "30 km"\n')
    a = run(scenario_dir / "scenario.toml", scenario_dir / "o1")
    b = run(scenario_dir / "f.toml", scenario_dir / "o2")
    assert np.nanmax(np.abs(b.drive_east.values)) < 0.8 * np.nanmax(np.abs(a.drive_east.values))
    assert np.nanmean(b.overburden_pressure.values) == pytest.approx(
        np.nanmean(a.overburden_pressure.values), rel=1e-6
    )


def test_equal_density_roof_layer_changes_nothing(scenario_dir):
    # A roof layer as dense as the crust is crust by another name: identical load (hand sum).
    write_grid(scenario_dir / "sed.tif", np.full(bump().shape, 2000.0))
    text = SCENARIO + (
        '[[roof.layers]]\nname = "sediments"\n'
        'thickness = { grid = "sed.tif", units = "m" }\ndensity = "2800 kg/m^3"\n'
    )
    (scenario_dir / "r.toml").write_text(text)
    a = run(scenario_dir / "scenario.toml", scenario_dir / "o1")
    b = run(scenario_dir / "r.toml", scenario_dir / "o2")
    np.testing.assert_allclose(
        b.overburden_pressure.values, a.overburden_pressure.values, rtol=1e-6
    )
    np.testing.assert_allclose(
        b.flux_east.values,
        a.flux_east.values,
        rtol=1e-4,
        atol=1e-6 * np.nanmax(np.abs(a.flux_east.values)),
    )


def test_wedge_sample_runs(tmp_path):
    assert main(["demo", "--scenario", "wedge", "--out", str(tmp_path / "w"), "--quiet"]) == 0
    with xr.open_dataset(tmp_path / "w" / "fields.nc") as ds:
        assert np.isfinite(ds.flux_magnitude.values).mean() > 0.5
        assert "thin_channel_warning" in ds


def test_placement_by_depths_flags_cells(tmp_path):
    topo = bump()
    write_grid(tmp_path / "topo.tif", topo)
    write_grid(tmp_path / "crust.tif", airy(topo))
    top = np.full(topo.shape, 20e3)
    base = np.full(topo.shape, 30e3)
    base[:2] = 10e3  # base above top in two rows: flagged and excluded, not refused
    write_grid(tmp_path / "top.tif", top)
    write_grid(tmp_path / "base.tif", base)
    text = SCENARIO.replace(
        'thickness = "15 km"\n',
        'placement = "depths"\n'
        'top_depth = { grid = "top.tif", units = "m" }\n'
        'base_depth = { grid = "base.tif", units = "m" }\n',
    )
    (tmp_path / "s.toml").write_text(text)
    ds = crustflow.solve(crustflow.load_scenario(tmp_path / "s.toml"))
    assert np.isnan(ds.flux_east.values[:2]).all()
    np.testing.assert_allclose(ds.channel_thickness.values[5:], 10.0)  # km


@pytest.mark.parametrize(
    ("extra", "setup", "message"),
    [
        (
            '[[roof.layers]]\nname = "lavas"\nthickness = "30 km"\ndensity = "2900 kg/m^3"\n',
            None,
            r"roof layers reach below the channel top in \d+ cells",
        ),
        (
            '[load]\nelastic_thickness = "-5 km"\n',
            None,
            r"load.elastic_thickness must not be "
            r"negative",
        ),
        ('[load]\nsmoothing = "-5 km"\n', None, r"load.smoothing must not be negative"),
    ],
)
def test_bad_load_inputs_exit_2(scenario_dir, capsys, extra, setup, message):
    (scenario_dir / "bad.toml").write_text(SCENARIO + extra)
    code = main(
        ["run", str(scenario_dir / "bad.toml"), "--out", str(scenario_dir / "out"), "--quiet"]
    )
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and re.search(message, err), err
    assert not (scenario_dir / "out").exists()


def test_channel_base_above_top_exit_2(scenario_dir, capsys):
    text = SCENARIO.replace(
        'thickness = "15 km"\n', 'placement = "depths"\ntop_depth = "30 km"\nbase_depth = "20 km"\n'
    )
    (scenario_dir / "bad.toml").write_text(text)
    code = main(["run", str(scenario_dir / "bad.toml"), "--out", str(scenario_dir / "out")])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "base lies above its top" in err and len(err.splitlines()) == 1
