"""The ``[fit]`` table: parsed into SI dataclasses with the documented defaults, the priors parsed as
``[ensemble.vary]`` is, and every error message pinned.

The scenario text is invented test data. Unit checks use the Julian year (1 yr = 365.25 d,
SCIENCE.md).
"""

from __future__ import annotations

import pytest
from conftest import SCENARIO

import crustflow
from crustflow import CrustflowInputError
from crustflow.scenario.ensemble_spec import Distribution
from crustflow.scenario.fit import DEFAULT_SAMPLER, FitSpec

MM_YR = 1e-3 / (365.25 * 86400.0)  #: 1 mm/yr in m/s

POINTS = """
[fit]
[[fit.observations]]
file = "uplift_points.gpkg"
variable = "uplift_rate"
value = "rate"
sigma = "rate_sd"
units = "mm/yr"
[fit.parameters]
"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", high = "1e21 Pa*s" }
[fit.sampler]
seed = 11
"""


def _load(tmp_path, text):
    (tmp_path / "s.toml").write_text(SCENARIO + text)
    return crustflow.load_scenario(tmp_path / "s.toml")


def test_points_set_priors_and_default_sampler(tmp_path):
    spec = _load(tmp_path, POINTS).fit
    assert isinstance(spec, FitSpec)
    (obs,) = spec.observations
    assert obs.kind == "points" and obs.variable == "uplift_rate"
    assert obs.path == tmp_path / "uplift_points.gpkg"
    assert obs.value == "rate" and obs.sigma_attribute == "rate_sd" and obs.sigma is None
    assert obs.scale == pytest.approx(MM_YR, rel=1e-12)
    assert obs.label == "uplift_points"
    assert spec.parameters["channel.viscosity"] == Distribution("log-uniform", low=1e18, high=1e21)
    s = spec.sampler
    assert s.seed == 11
    assert (s.walkers, s.steps, s.burn_in, s.thin, s.likelihood) == (
        DEFAULT_SAMPLER["walkers"],
        DEFAULT_SAMPLER["steps"],
        DEFAULT_SAMPLER["burn_in"],
        DEFAULT_SAMPLER["thin"],
        "gaussian",
    )
    assert spec.variables == ("uplift_rate",)
    assert [d.field for d in spec.dimensions()] == ["viscosity"]
    assert spec.input_paths == [tmp_path / "uplift_points.gpkg"]
    assert spec.describe()["sampler"]["seed"] == 11


def test_sigma_as_a_value_raster_set_and_student_t(tmp_path):
    text = POINTS.replace('sigma = "rate_sd"', 'sigma = "0.3 mm/yr"') + (
        'walkers = 12\nsteps = 400\nburn_in = 100\nthin = 2\nlikelihood = "student-t"\n'
        "degrees_of_freedom = 3\n"
    )
    text = text.replace(
        "[fit.parameters]",
        '[[fit.observations]]\nname = "insar"\ngrid = "los.tif"\nsigma = { grid = "los_sd.tif" }\n'
        'variable = "thickening_rate"\nunits = "m/Myr"\ncorrelation_length = "20 km"\n'
        "[fit.parameters]\n"
        '"walls.upper_velocity" = { distribution = "normal", mean = ["5 mm/yr", "0 mm/yr"], '
        'sd = ["2 mm/yr", "2 mm/yr"] }',
    )
    spec = _load(tmp_path, text).fit
    points, raster = spec.observations
    assert points.sigma == pytest.approx(0.3 * MM_YR, rel=1e-12)
    assert raster.kind == "raster" and raster.label == "insar"
    assert raster.sigma_grid == tmp_path / "los_sd.tif"
    assert raster.scale == pytest.approx(1e-3 * MM_YR, rel=1e-12)  # 1 m/Myr = 1e-3 mm/yr
    assert raster.correlation_length == 20e3
    assert [d.label for d in spec.dimensions()] == [
        "walls.upper_velocity_east_mm_per_yr",
        "walls.upper_velocity_north_mm_per_yr",
        "channel.viscosity_Pa_s",
    ]
    s = spec.sampler
    assert (s.walkers, s.steps, s.burn_in, s.thin) == (12, 400, 100, 2)
    assert (s.likelihood, s.degrees_of_freedom) == ("student-t", 3.0)
    assert spec.variables == ("uplift_rate", "thickening_rate")


def _bad():
    swap = POINTS.replace
    return {
        "no seed": (swap("seed = 11", ""), r"\[fit.sampler\] needs seed = N"),
        "bad likelihood": (
            swap("seed = 11", 'seed = 11\nlikelihood = "cauchy"'),
            r"likelihood = 'cauchy' is not one of gaussian, student-t",
        ),
        "odd walkers": (swap("seed = 11", "seed = 11\nwalkers = 9"), r"walkers = 9 must be even"),
        "too few walkers": (
            swap("seed = 11", "seed = 11\nwalkers = 4").replace(
                "[fit.sampler]",
                '"channel.thickness" = { distribution = "uniform", low = "10 km", high = "20 km" }'
                "\n[fit.sampler]",
            ),
            r"walkers = 4 is too few for 2 sampled values; give at least 6",
        ),
        "burn-in too long": (
            swap("seed = 11", "seed = 11\nsteps = 100\nburn_in = 100"),
            r"burn_in = 100 leaves no steps of 100",
        ),
        "no observations": (
            "\n[fit]\n[fit.parameters]\n"
            '"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", '
            'high = "1e21 Pa*s" }\n[fit.sampler]\nseed = 1\n',
            r"\[fit\] needs at least one \[\[fit.observations\]\] set",
        ),
        "file and grid": (
            swap('file = "uplift_points.gpkg"', 'file = "a.gpkg"\ngrid = "b.tif"'),
            r"give either file = .* or grid = .*not both or neither",
        ),
        "unknown set key": (
            swap('units = "mm/yr"', 'units = "mm/yr"\nsigmaa = 1'),
            r"unknown key 'sigmaa' in \[\[fit.observations\]\] set 0; did you mean 'sigma'",
        ),
        "bad variable": (
            swap('"uplift_rate"', '"uplift"'),
            r"unknown key 'uplift' in fit.observations\[0\].variable; did you mean 'uplift_rate'",
        ),
        "direction variable": (
            swap('"uplift_rate"', '"flux_azimuth"'),
            r"flux_azimuth cannot be fitted",
        ),
        "units of another dimension": (
            swap('units = "mm/yr"', 'units = "MPa"'),
            r"fit.observations\[0\].units has '1 MPa', not a value in units of uplift_rate",
        ),
        "no units": (swap('units = "mm/yr"', ""), r'needs units = "..." for its values'),
        "negative sigma": (
            swap('sigma = "rate_sd"', 'sigma = "-0.3 mm/yr"'),
            r"fit.observations\[0\].sigma = '-0.3 mm/yr' must be positive",
        ),
        "raster without spacing": (
            swap('file = "uplift_points.gpkg"', 'grid = "u.tif"')
            .replace('value = "rate"\n', "")
            .replace('sigma = "rate_sd"', 'sigma = "0.5 mm/yr"'),
            r"neighbouring pixels of a raster are not independent; give decimate = N",
        ),
        "unknown prior key": (
            swap('"channel.viscosity" =', '"channel.viscosty" ='),
            r"unknown key 'channel.viscosty' in \[fit.parameters\]; did you mean "
            r"'channel.viscosity'",
        ),
        "prior without units": (
            swap('low = "1e18 Pa*s"', "low = 1e18"),
            r"fit.parameters.\"channel.viscosity\".low = 1e\+18 has no units",
        ),
        "no priors": (
            POINTS.split("[fit.parameters]")[0] + "[fit.sampler]\nseed = 1\n",
            r"\[fit.parameters\] is missing or empty",
        ),
        "duplicate set names": (
            swap(
                "[fit.parameters]",
                '[[fit.observations]]\nfile = "uplift_points.gpkg"\n'
                'variable = "uplift_rate"\nvalue = "rate"\nsigma = "rate_sd"\nunits = "mm/yr"\n'
                "[fit.parameters]",
            ),
            r"two \[\[fit.observations\]\] sets are named 'uplift_points'; give each a distinct name",
        ),
        "no value attribute": (
            swap('value = "rate"\n', ""),
            r'needs value = "..." naming the attribute',
        ),
        "no sigma": (swap('sigma = "rate_sd"\n', ""), r'needs sigma = "<attribute>" or a value'),
        "decimate on points": (
            swap('units = "mm/yr"', 'units = "mm/yr"\ndecimate = 2'),
            r"fit.observations\[0\].decimate applies to rasters only; remove it",
        ),
        "value on a raster": (
            swap('file = "uplift_points.gpkg"', 'grid = "u.tif"\ndecimate = 2'),
            r"fit.observations\[0\].value applies to point files only; remove it",
        ),
        "raster sigma attribute": (
            swap('file = "uplift_points.gpkg"', 'grid = "u.tif"\ndecimate = 2').replace(
                'value = "rate"\n', ""
            ),
            r"fit.observations\[0\].sigma must be \{ grid = \"sd.tif\" \} or a value with units",
        ),
        "zero correlation length": (
            swap('file = "uplift_points.gpkg"', 'grid = "u.tif"\ncorrelation_length = "0 km"')
            .replace('value = "rate"\n', "")
            .replace('sigma = "rate_sd"', 'sigma = "0.5 mm/yr"'),
            r"correlation_length must be positive",
        ),
        "bad degrees of freedom": (
            swap("seed = 11", "seed = 11\ndegrees_of_freedom = 0"),
            r"degrees_of_freedom = 0 must be a positive number",
        ),
        "variables not a list": (
            swap("[fit]\n", '[fit]\nvariables = "uplift_rate"\n'),
            r"fit.variables must be a list of names",
        ),
        "unknown fit key": (
            swap("[fit.sampler]", "[fit.samplr]"),
            r"unknown key 'samplr' in \[fit\]",
        ),
    }


@pytest.mark.parametrize("case", list(_bad()))
def test_bad_fit_tables_are_one_line_errors(tmp_path, case):
    text, message = _bad()[case]
    with pytest.raises(CrustflowInputError, match=message) as info:
        _load(tmp_path, text)
    assert "\n" not in str(info.value)


def test_fit_must_be_a_table(tmp_path):
    (tmp_path / "s.toml").write_text('fit = "yes"\n' + SCENARIO)
    with pytest.raises(CrustflowInputError, match=r"\[fit\] must be a table"):
        crustflow.load_scenario(tmp_path / "s.toml")
