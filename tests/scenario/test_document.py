"""Scenario files: units, defaults, unknown keys, paths (messages pinned)."""

from __future__ import annotations

import pytest

from crustflow import CrustflowInputError, load_scenario, scenario_from_dict
from crustflow.constants import SECONDS_PER_YEAR
from crustflow.units import parse_quantity

BASE = {
    "grids": {"topography": "t.tif", "crust_thickness": "c.tif"},
    "channel": {"thickness": "15 km", "viscosity": "1e19 Pa*s"},
}


def with_(**tables):
    raw = {k: dict(v) for k, v in BASE.items()}
    for key, value in tables.items():
        raw.setdefault(key, {}).update(value)
    return raw


def test_units_to_si():
    # Julian year, 365.25 d (IAU convention), as used everywhere in crustflow.
    assert parse_quantity("5 mm/yr", "k", "velocity") == pytest.approx(5e-3 / SECONDS_PER_YEAR)
    assert parse_quantity("15 km", "k", "length") == 15e3
    assert parse_quantity("1e19 Pa*s", "k", "viscosity") == 1e19
    assert parse_quantity("2.8 g/cm^3", "k", "density") == pytest.approx(2800.0)


def test_defaults_and_resolution(tmp_path):
    s = scenario_from_dict(with_(), base_dir=tmp_path)
    p = s.parameters
    assert (p.rho_crust, p.rho_mantle, p.rho_water) == (2800.0, 3300.0, 1030.0)
    assert p.rho_channel == p.rho_crust  # channel defaults to crust
    assert p.gravity == 9.81
    assert (p.wall_east, p.wall_north) == (0.0, 0.0)
    assert s.topography == tmp_path.resolve() / "t.tif"
    assert s.formats == ("netcdf", "geotiff", "figure")


def test_relative_paths_resolve_against_the_scenario_folder(tmp_path):
    sub = tmp_path / "case"
    sub.mkdir()
    (sub / "s.toml").write_text(
        '[grids]\ntopography = "g/t.tif"\nreference_thickness = "35 km"\n'
        '[channel]\nthickness = "10 km"\nviscosity = "1e20 Pa*s"\n'
    )
    s = load_scenario(sub / "s.toml")
    assert s.topography == sub.resolve() / "g" / "t.tif"
    assert s.parameters.reference_thickness == 35e3


def test_wall_velocity_vector():
    s = scenario_from_dict(with_(walls={"upper_velocity": ["5 mm/yr", "-2 mm/yr"]}))
    assert s.parameters.wall_east == pytest.approx(5e-3 / SECONDS_PER_YEAR)
    assert s.parameters.wall_north == pytest.approx(-2e-3 / SECONDS_PER_YEAR)


@pytest.mark.parametrize(
    ("tables", "message"),
    [
        ({"channel": {"thickness": 15}}, r"channel.thickness = 15 has no units; .*\"15 km\""),
        ({"channel": {"viscosity": "1e19"}}, r"channel.viscosity = '1e19' has no units"),
        ({"channel": {"viscosity": "1e19 kg"}}, r"expected a viscosity"),
        ({"channel": {"viscosity": "-1e19 Pa*s"}}, r"channel.viscosity must be positive"),
        ({"channel": {"viscosity": "0 Pa*s"}}, r"channel.viscosity must be positive"),
        (
            {"channel": {"thicknes": "15 km"}},
            r"unknown key 'thicknes' in \[channel\]; did you mean "
            r"'thickness'\?",
        ),
        (
            {"densitys": {"crust": "2800 kg/m^3"}},
            r"unknown key 'densitys'.*did you mean 'densities'",
        ),
        ({"densities": {"mantle": "2700 kg/m^3"}}, r"densities.mantle must exceed"),
        ({"walls": {"upper_velocity": ["5 mm/yr"]}}, r"list of two values"),
        ({"output": {"formats": ["netcdf", "shapefile"]}}, r"unknown key 'shapefile'"),
        ({"output": {"variables": ["flux_est"]}}, r"did you mean 'flux_east'"),
        (
            {"grids": {"moho_depth": "m.tif"}},
            r"at most one of grids.crust_thickness and "
            r"grids.moho_depth",
        ),
    ],
)
def test_bad_values_name_the_key_and_the_fix(tables, message):
    with pytest.raises(CrustflowInputError, match=message):
        scenario_from_dict(with_(**tables))


def test_missing_required():
    with pytest.raises(CrustflowInputError, match=r"needs \[grids\] topography"):
        scenario_from_dict({"channel": BASE["channel"]})
    with pytest.raises(CrustflowInputError, match=r"needs \[channel\] viscosity"):
        scenario_from_dict({"grids": BASE["grids"], "channel": {"thickness": "15 km"}})
    with pytest.raises(CrustflowInputError, match=r"give grids.reference_thickness"):
        scenario_from_dict({"grids": {"topography": "t.tif"}, "channel": BASE["channel"]})


def test_missing_and_broken_files(tmp_path):
    with pytest.raises(CrustflowInputError, match="scenario file not found"):
        load_scenario(tmp_path / "nope.toml")
    (tmp_path / "bad.toml").write_text("[grids\ntopography = 1")
    with pytest.raises(CrustflowInputError, match="is not valid TOML"):
        load_scenario(tmp_path / "bad.toml")
