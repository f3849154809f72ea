"""Rheology in the scenario file: grids of thickness and viscosity, power-law and flow-law channels,
profiles, and their bad inputs (sources named per test)."""

from __future__ import annotations

import re

import numpy as np
import pytest
import xarray as xr
from conftest import SCENARIO, bump, write_grid

import crustflow
from crustflow.cli import main
from crustflow.constants import SECONDS_PER_YEAR
from crustflow.physics.flowlaws import GAS_CONSTANT, flow_law

BASE = SCENARIO.split("[channel]")[0]


def scenario(tmp_path, channel: str, name="s.toml"):
    (tmp_path / name).write_text(BASE + channel)
    return tmp_path / name


def run(path, out, *extra):
    assert main(["run", str(path), "--out", str(out), "--quiet", *extra]) == 0
    return xr.open_dataset(out / "fields.nc")


def test_constant_grids_equal_scalars(scenario_dir):
    # Invariant: a grid holding one value everywhere gives the same maps as that value.
    shape = bump().shape
    write_grid(scenario_dir / "h.tif", np.full(shape, 15.0))  # km
    write_grid(scenario_dir / "eta.tif", np.full(shape, 19.0))  # log10 Pa s
    scalar = run(scenario_dir / "scenario.toml", scenario_dir / "o1")
    grids = scenario(
        scenario_dir,
        '[channel]\nthickness = { grid = "h.tif", units = "km" }\n'
        'viscosity = { grid = "eta.tif", log10 = true }\n',
    )
    gridded = run(grids, scenario_dir / "o2")
    for name in ("flux_east", "flux_north", "thickening_rate", "peak_speed"):
        np.testing.assert_allclose(
            gridded[name].values, scalar[name].values, rtol=1e-6, equal_nan=True
        )
    np.testing.assert_allclose(
        gridded.effective_viscosity.values[np.isfinite(gridded.effective_viscosity.values)],
        1e19,
        rtol=1e-6,
    )


def test_linear_flow_law_equals_newtonian(scenario_dir):
    # n = 1 laboratory law at uniform temperature: eta = 1/(3 A_ax exp(-Q/RT)), the Trouton ratio
    # of the conversion A = 3^((n+1)/2) A_ax (SCIENCE.md); must equal the closed-form channel.
    a_ax, q, temp_c = 1e-10, 200e3, 650.0  # invented law: A in Pa^-1 s^-1, Q in J/mol
    eta = 1.0 / (3.0 * a_ax * np.exp(-q / (GAS_CONSTANT * (temp_c + 273.15))))
    law = scenario(
        scenario_dir,
        f'[channel]\nthickness = "15 km"\nrheology = "flow-law"\n'
        f'[channel.flow_law]\nA = "{a_ax} Pa^-1 s^-1"\nn = 1\n'
        f'activation_energy = "{q / 1e3} kJ/mol"\n'
        f'[channel.temperature]\ntop = "{temp_c} degC"\nbase = "{temp_c} degC"\n',
    )
    newt = scenario(
        scenario_dir,
        f'[channel]\nthickness = "15 km"\nviscosity = "{float(eta)!r} Pa*s"\n',
        "n.toml",
    )
    a = run(law, scenario_dir / "o1")
    b = run(newt, scenario_dir / "o2")
    assert (a.solver_converged.values[np.isfinite(a.flux_east.values)] == 1).all()
    for name in ("flux_east", "flux_north", "thickening_rate", "upper_wall_drag_east"):
        np.testing.assert_allclose(
            a[name].values, b[name].values, rtol=1e-5, atol=1e-9, equal_nan=True
        )


def test_power_law_poiseuille_in_a_map(scenario_dir):
    # Closed form of SCIENCE.md: q = -2 A |G|^(n-1) G (h/2)^(n+2) / (n+2), fixed walls.
    path = scenario(
        scenario_dir,
        '[channel]\nthickness = "15 km"\nrheology = "power-law"\n'
        'stress_exponent = 3\nprefactor = "4e-34 Pa^-3 s^-1"\n',
    )
    ds = run(path, scenario_dir / "o")
    ge, gn = ds.drive_east.values.astype(float), ds.drive_north.values.astype(float)
    g = np.hypot(ge, gn)
    q = -2 * 4e-34 * g**2 * ge * 7.5e3**5 / 5 * SECONDS_PER_YEAR
    ok = np.isfinite(q) & (np.abs(q) > 1e-3 * np.nanmax(np.abs(q)))
    np.testing.assert_allclose(ds.flux_east.values[ok], q[ok], rtol=1e-5)


def test_strips_match_whole_grid_for_flow_law(scenario_dir):
    # The per-cell Newton solver works in blocks of cells, so strips and the whole grid agree to the
    # solver's tolerance (1e-9 of the velocity scale), not bit for bit as the closed forms do.
    path = scenario(
        scenario_dir,
        '[channel]\nthickness = "15 km"\nrheology = "flow-law"\n'
        '[channel.flow_law]\npreset = "wet-quartzite"\n'
        '[channel.temperature]\ntop = "500 degC"\nbase = "700 degC"\n'
        '[walls]\nupper_velocity = ["3 mm/yr", "1 mm/yr"]\n',
    )
    ds = run(path, scenario_dir / "o", "--strip-rows", "3")
    whole = crustflow.solve(crustflow.load_scenario(path))
    for name in ("flux_east", "thickening_rate", "effective_viscosity", "peak_speed"):
        want = whole[name].values.astype("float32")
        scale = np.nanmax(np.abs(want))
        np.testing.assert_allclose(
            ds[name].values, want, rtol=1e-5, atol=1e-6 * scale, equal_nan=True
        )


def test_profile_matches_closed_form_and_map(scenario_dir, capsys):
    # Newtonian profile: u(zeta) = U zeta/h + G (zeta^2 - h zeta)/(2 eta) (Turcotte & Schubert 2002,
    # section 6.2); its flux equals the map's flux at that cell.
    text = SCENARIO + '[walls]\nupper_velocity = ["2 mm/yr", "-1 mm/yr"]\n'
    (scenario_dir / "w.toml").write_text(text)
    scen = crustflow.load_scenario(scenario_dir / "w.toml")
    fields = crustflow.solve(scen)
    x, y = float(fields.x[20]), float(fields.y[15])
    assert (
        main(
            [
                "profile",
                str(scenario_dir / "w.toml"),
                "--at",
                str(x),
                str(y),
                "--out",
                str(scenario_dir / "p"),
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    assert "flux east" in out
    from crustflow.analyses.profiles import velocity_profiles

    ds = velocity_profiles(scen, [("a", x, y, None)]).sel(site="a")
    zeta = ds.height.values
    h, eta = 15e3, 1e19
    ge = float(ds.drive_east)
    ue = 2e-3 / SECONDS_PER_YEAR * zeta / h + ge * (zeta**2 - h * zeta) / (2 * eta)
    np.testing.assert_allclose(
        ds.velocity_east.values, ue * 1e3 * SECONDS_PER_YEAR, rtol=1e-9, atol=1e-12
    )
    from scipy.integrate import simpson

    flux = simpson(ds.velocity_east.values, x=zeta) / 1e3  # m2/yr (Simpson: exact for quadratics)
    assert flux == pytest.approx(float(fields.flux_east[15, 20]), rel=1e-4)
    csv = (scenario_dir / "p").glob("profile_*.csv")
    import pandas as pd

    frame = pd.read_csv(next(csv))
    assert {
        "height_m",
        "velocity_east_mm_per_yr",
        "shear_stress_east_MPa",
        "viscosity_Pa_s",
        "temperature_degC",
    } <= set(frame.columns)


@pytest.mark.parametrize(
    ("channel", "setup", "message"),
    [
        (
            '[channel]\nthickness = "15 km"\nrheology = "power-law"\nstress_exponent = 0.5\n'
            'prefactor = "4e-34 Pa^-3 s^-1"\n',
            None,
            r"stress_exponent = 0.5 must be at least 1",
        ),
        (
            '[channel]\nthickness = "15 km"\nrheology = "flow-law"\n[channel.flow_law]\n'
            'preset = "wet-quartzite"\n[channel.temperature]\ntop = "500 degC"\nbase = "2500 degC"\n',
            None,
            r"channel.temperature.base = 2500 degC is outside",
        ),
        (
            '[channel]\nthickness = "15 km"\nrheology = "flow-law"\n[channel.flow_law]\n'
            'preset = "wet-quartzit"\n[channel.temperature]\ntop = "500 degC"\nbase = "700 degC"\n',
            None,
            r"wet-quartzite",
        ),
        (
            '[channel]\nthickness = "15 km"\nviscosity = { grid = "eta.tif", units = "Pa*s" }\n',
            "zeros",
            r"channel.viscosity grid has \d+ cells that are zero or negative",
        ),
        (
            '[channel]\nthickness = "15 km"\nrheology = "plastic"\n',
            None,
            r"channel.rheology = 'plastic' is not one of newtonian, power-law, flow-law",
        ),
    ],
)
def test_bad_rheology_inputs_exit_2(scenario_dir, capsys, channel, setup, message):
    if setup == "zeros":
        eta = np.full(bump().shape, 1e19)
        eta[3:6, 3:6] = 0.0
        eta[10, 10] = -5e18
        write_grid(scenario_dir / "eta.tif", eta)
    path = scenario(scenario_dir, channel)
    code = main(["run", str(path), "--out", str(scenario_dir / "out"), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and re.search(message, err), err
    assert not (scenario_dir / "out").exists()


def test_unknown_preset_lists_the_known_ones():
    with pytest.raises(crustflow.CrustflowInputError, match=r"wet-anorthite.*dry-diabase|known"):
        flow_law("granite-ish")
