"""``crustflow evolve`` end to end on the bundled plateau sample, the API, and bad input."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
import rasterio
import xarray as xr

import crustflow
from crustflow.cli import main
from crustflow.errors import CrustflowInputError
from crustflow.scenario.document import load_scenario

SAMPLE = Path(__file__).resolve().parents[2] / "sample_grids" / "plateau"

EVOLUTION = """
[evolution]
duration = "0.4 Myr"
save_every = "0.2 Myr"
[evolution.boundaries]
west = "fixed"
south = { inflow = "300 m^2/yr" }
"""


def _copy(tmp_path: Path, extra: str, name: str = "scenario.toml") -> Path:
    folder = tmp_path / "in"
    if not folder.exists():
        shutil.copytree(SAMPLE, folder)
    text = (SAMPLE / "scenario.toml").read_text() + extra
    (folder / name).write_text(text)
    return folder / name


@pytest.fixture(scope="module")
def evolve_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("evolve")
    scenario = _copy(tmp, EVOLUTION)
    out = tmp / "out"
    assert main(["evolve", str(scenario), "--out", str(out)]) == 0
    return out


def test_command_writes_every_output(evolve_run, capsys):
    names = {p.name for p in evolve_run.iterdir()}
    expected = {"evolution.nc", "run.json", "elevation_profiles.png", "elevation_animation.gif"}
    expected |= {
        f"{v}_through_time.tif"
        for v in ("elevation", "crust_thickness", "thickening_rate", "uplift_rate")
        + ("flux_east", "flux_north")
    }
    assert expected <= names


def test_netcdf_has_time_in_myr(evolve_run):
    # CF-1.8: a time coordinate with a units attribute; variables with grid_mapping (written
    # and read back with xarray/netCDF4, a general-purpose library).
    with xr.open_dataset(evolve_run / "evolution.nc", decode_times=False) as ds:
        assert ds.time.attrs["units"] == "Myr"
        np.testing.assert_allclose(ds.time.values, [0.0, 0.2, 0.4], rtol=1e-9)
        assert ds["elevation"].dims == ("time", "y", "x")
        assert ds["crust_thickness"].attrs["units"] == "km"
        assert ds["uplift_rate"].attrs["units"] == "mm yr-1"
        assert ds["flux_east"].attrs["units"] == "m2 yr-1"
        assert ds["elevation"].attrs["grid_mapping"] == "spatial_ref"


def test_geotiff_bands_name_their_time(evolve_run):
    with rasterio.open(evolve_run / "elevation_through_time.tif") as src:
        assert src.count == 3
        assert src.descriptions[1] == "elevation, t = 0.2 Myr"
        assert src.units[0] == "m"
        assert src.crs is not None


def test_manifest_volume_balance(evolve_run):
    # Volume change = edge inflow + exchange through fixed edges (finite-volume invariant).
    manifest = json.loads((evolve_run / "run.json").read_text())
    balance = manifest["evolution"]["volume_balance"]
    assert abs(balance["imbalance_relative"]) < 1e-9
    # m^2/yr x south edge length x time, km^3; the south-west cell is fixed (west edge): 199 cells
    inflow = 300.0 * 199 * 4000.0 * 0.4e6 / 1e9
    assert balance["edge_inflow_km3"] == pytest.approx(inflow, rel=1e-3)
    assert manifest["evolution"]["stepping"]["steps"] > 0


def test_duration_zero_reproduces_run(tmp_path):
    # One code path: the snapshot at t = 0 is compute_fields on the same grids, bit for bit.
    scenario = load_scenario(_copy(tmp_path, '\n[evolution]\nduration = "0 Myr"\n'))
    maps = crustflow.solve(scenario)
    ds = crustflow.evolve(scenario)
    assert ds.sizes["time"] == 1
    names = ("crust_thickness", "thickening_rate", "uplift_rate", "flux_east", "flux_north")
    for name in names:
        np.testing.assert_array_equal(
            ds[name].values[0], maps[name].values.astype("float32"), err_msg=name
        )
    # and in float64, straight from the state (the stored snapshots are float32)
    from crustflow.analyses.evolution.evolve import setup_from_scenario

    setup, _ = setup_from_scenario(scenario)
    state = setup.fields(setup.thickness0, names)
    for name in names:
        np.testing.assert_array_equal(state[name], maps[name].values, err_msg=name)


def test_steady_mode_writes_dynamic_topography(tmp_path, capsys):
    extra = '\n[evolution]\nmode = "steady"\n[evolution.boundaries]\nwest = "fixed"\n'
    out = tmp_path / "steady"
    assert main(["evolve", str(_copy(tmp_path, extra)), "--out", str(out), "--quiet"]) == 0
    with xr.open_dataset(out / "steady.nc") as ds:
        assert set(ds.data_vars) >= {"elevation", "crust_thickness", "dynamic_topography"}
        assert ds["dynamic_topography"].attrs["units"] == "m"
        # steady: the fluxes no longer converge anywhere, the thickening rate of the maps ~ 0
        scenario = load_scenario(_copy(tmp_path, "", "plain.toml"))
    steady = json.loads((out / "run.json").read_text())["evolution"]
    assert steady["mode"] == "steady"
    # at the steady state what enters through the edges leaves through the fixed edge
    balance = steady["volume_balance"]
    assert abs(balance["imbalance_relative"]) < 1e-6
    assert scenario.evolution is None


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        ("", "the scenario has no \\[evolution\\] table"),
        ('\n[evolution]\nduraton = "1 Myr"\n', "did you mean 'duration'"),
        (
            '\n[evolution]\nmode = "steady"\n[evolution.boundaries]\nsouth = { inflow = "1 m^2/yr" }\n',
            'needs a "fixed" edge',
        ),
        (
            '\n[load]\nelastic_thickness = "10 km"\n[evolution]\nduration = "1 Myr"\n',
            "remove \\[load\\] smoothing and elastic_thickness",
        ),
        (
            '\n[evolution]\nduration = "1 Myr"\n[evolution.boundaries]\nwest = "open"\n',
            'is not "closed", "fixed"',
        ),
    ],
)
def test_bad_input_exit_2_one_line_no_output(tmp_path, capsys, extra, message):
    out = tmp_path / "out"
    assert main(["evolve", str(_copy(tmp_path, extra)), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert pytest.importorskip("re").search(message, err)
    assert not out.exists()


def test_whole_globe_has_no_west_edge():
    import rioxarray  # noqa: F401

    from crustflow.analyses.evolution.model import build_setup
    from crustflow.scenario.evolution import EdgeCondition, EvolutionSpec
    from crustflow.scenario.parameters import ModelParameters

    lon, lat = np.arange(36) * 10 + 5.0, 85 - np.arange(18) * 10.0
    topo = xr.DataArray(np.full((18, 36), 1000.0), dims=("y", "x"), coords={"y": lat, "x": lon})
    topo = topo.rio.write_crs("EPSG:4326")
    topo = topo.rio.write_transform(topo.rio.transform(recalc=True))
    spec = EvolutionSpec(duration=1.0, save_every=1.0)
    spec.boundaries["west"] = EdgeCondition("fixed")
    with pytest.raises(CrustflowInputError, match="wraps around the globe in longitude"):
        build_setup(
            topo,
            parameters=ModelParameters(channel_thickness=15e3, viscosity=1e19),
            spec=spec,
            crust_thickness=topo.copy(data=np.full((18, 36), 40e3)),
        )


def test_steady_search_that_does_not_settle_says_what_to_do(tmp_path, capsys, monkeypatch):
    # The pseudo-time iteration gives up (simulated: it raises at once): one line, exit 2, no
    # output folder, and the advice names the transient mode.
    from crustflow.analyses.evolution import evolve as evolve_module

    def gives_up(*args, **kwargs):
        raise RuntimeError("no steady state reached")

    monkeypatch.setattr(evolve_module, "steady_state", gives_up)
    extra = '\n[evolution]\nmode = "steady"\n[evolution.boundaries]\nwest = "fixed"\n'
    out = tmp_path / "out"
    assert main(["evolve", str(_copy(tmp_path, extra)), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and 'use mode = "transient"' in err
    assert "80 pseudo-time steps" in err and not out.exists()


def test_steady_search_reports_its_steps(tmp_path, caplog, monkeypatch):
    # Off a terminal the steady search logs pseudo-time steps, not a model time that stays at 0.
    import logging

    from crustflow.commands import evolve as command
    from crustflow.engine.progress import Progress

    class EveryStep(Progress):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **dict(kwargs, log_every=0.0))

    monkeypatch.setattr(command, "Progress", EveryStep)
    caplog.set_level(logging.INFO)
    extra = '\n[evolution]\nmode = "steady"\n[evolution.boundaries]\nwest = "fixed"\n'
    out = tmp_path / "out"
    assert main(["evolve", str(_copy(tmp_path, extra)), "--out", str(out), "--quiet"]) == 0
    lines = [r.getMessage() for r in caplog.records if "steady-state search" in r.getMessage()]
    assert lines and re.match(r"steady-state search: \d+ pseudo-time steps, ", lines[-1])


def test_power_law_steady_search_settles_on_the_plateau(tmp_path):
    # The bundled plateau with a power-law channel, the west edge fixed and inflow from the south:
    # its stagnant flats made the steady search wander until its Newton solves stopped on the
    # residual at long pseudo-time steps. At the steady state what enters leaves (value derived:
    # the volume balance of a state that no longer changes).
    power = (
        '\n[channel]\nthickness = "15 km"\nrheology = "power-law"\nstress_exponent = 3\n'
        'prefactor = "2.5e-32 Pa^-3 s^-1"\n'
    )
    text = (SAMPLE / "scenario.toml").read_text()
    text = re.sub(r"\[channel\]\n(.*\n)*?(?=\n\[)", "", text)
    text = re.sub(r"\[walls\]\n(.*\n)*?(?=\n\[)", "", text) + power
    text += '\n[evolution]\nmode = "steady"\n[evolution.boundaries]\nwest = "fixed"\n'
    text += 'south = { inflow = "300 m^2/yr" }\n'
    folder = tmp_path / "in"
    shutil.copytree(SAMPLE, folder)
    (folder / "power.toml").write_text(text)
    out = tmp_path / "out"
    assert main(["evolve", str(folder / "power.toml"), "--out", str(out), "--quiet"]) == 0
    steady = json.loads((out / "run.json").read_text())["evolution"]
    assert abs(steady["volume_balance"]["imbalance_relative"]) < 1e-3
