"""Profiles equal the map at their site, for every load model and sample (one code path).

Reference: the map the command writes (``crustflow run``), read back at the site's cell. Profiles and
maps both read their rows with the one block reader (crustflow.engine.blocks); these tests pin that
they agree within 1 % (float32 files against float64 profiles) on the salt wedge, on the plateau with
``[load] smoothing`` (a whole-grid step) and on the lon/lat plateau.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import rasterio

from crustflow.analyses.profiles import velocity_profiles
from crustflow.cli import main
from crustflow.samples import demo_scenario
from crustflow.scenario import load_scenario


def _map_value(folder, name, x, y):
    with rasterio.open(folder / f"{name}.tif") as src:
        row, col = src.index(x, y)
        return float(src.read(1)[row, col])


def _scenario_with(tmp_path, sample: str, extra: str = ""):
    source = demo_scenario(sample)
    text = source.read_text()
    # absolute grid paths, so the copy can live anywhere
    text = re.sub(
        r'= "([^"]+\.(tif|geojson))"', lambda m: f'= "{source.parent / m.group(1)}"', text
    )
    path = tmp_path / f"{sample}.toml"
    path.write_text(text + "\n" + extra)
    return path


@pytest.mark.parametrize(
    ("sample", "extra", "site"),
    [
        ("wedge", "", (385000.0, 3139000.0)),
        ("plateau", '[load]\nsmoothing = "40 km"\n', (400000.0, 3700000.0)),
        ("plateau", "", (400000.0, 3700000.0)),
        ("plateau-lonlat", "", None),
    ],
)
def test_profile_equals_the_map_at_the_site(tmp_path, sample, extra, site):
    path = _scenario_with(tmp_path, sample, extra)
    scenario = load_scenario(path)
    out = tmp_path / "run"
    assert main(["run", str(path), "--out", str(out), "--quiet"]) == 0
    if site is None:  # the middle of the lon/lat grid
        with rasterio.open(out / "flux_east.tif") as src:
            site = src.xy(src.height // 2, src.width // 2)
    ds = velocity_profiles(scenario, [("here", site[0], site[1], None)])
    for name in ("flux_east", "flux_north", "upper_wall_drag_east", "lower_wall_drag_north"):
        on_map = _map_value(out, name, *site)
        profile = float(ds[name].sel(site="here"))
        scale = max(abs(on_map), 1e-3 * _map_value(out, "flux_magnitude", *site))
        assert math.isclose(profile, on_map, abs_tol=0.01 * scale), (name, profile, on_map)


def test_profile_command_on_every_sample(tmp_path):
    for sample, at in (
        ("wedge", ("385000", "3139000")),
        ("plateau", ("400000", "3700000")),
        ("plateau-lonlat", ("-32.5", "33.5")),
    ):
        out = tmp_path / sample
        args = ["profile", str(demo_scenario(sample)), "--at", *at, "--out", str(out), "--quiet"]
        assert main(args) == 0, sample
        assert list(out.glob("profile_*.csv"))


def test_profile_heights_span_the_channel(tmp_path):
    scenario = load_scenario(demo_scenario("plateau"))
    ds = velocity_profiles(scenario, [("a", 400000.0, 3700000.0, None)], samples=11)
    height = ds.height.sel(site="a").values
    assert height[0] == 0.0
    assert np.isclose(height[-1], float(ds.channel_thickness.sel(site="a")) * 1e3)
