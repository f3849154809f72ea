"""``[output] figure_formats`` and ``figure_dpi``: defaults, parsing and the error messages."""

from __future__ import annotations

import pytest

from crustflow.errors import CrustflowInputError
from crustflow.scenario import scenario_from_dict


def _scenario(**output):
    raw = {
        "grids": {"topography": "topo.tif", "crust_thickness": "crust.tif"},
        "channel": {"thickness": "15 km", "viscosity": "1e19 Pa*s"},
    }
    if output:
        raw["output"] = output
    return scenario_from_dict(raw)


def test_defaults_are_png_at_150_dpi():
    s = _scenario()
    assert s.figure_formats == ("png",) and s.figure_dpi == 150
    assert s.resolved()["output"]["figure_formats"] == ["png"]


def test_formats_and_dpi_are_read():
    s = _scenario(figure_formats=["PNG", "svg", "pdf", "svg"], figure_dpi=200)
    assert s.figure_formats == ("png", "svg", "pdf") and s.figure_dpi == 200


@pytest.mark.parametrize(
    ("output", "message"),
    [
        ({"figure_formats": "png"}, r"output.figure_formats must be a non-empty list, e.g. \["),
        ({"figure_formats": []}, r"output.figure_formats must be a non-empty list"),
        (
            {"figure_formats": ["png", "tiff"]},
            r"output.figure_formats: 'tiff' is not a figure format; use any of \"png\", "
            r"\"svg\", \"pdf\"",
        ),
        ({"figure_dpi": "high"}, r"output.figure_dpi must be a whole number of dots per inch"),
        ({"figure_dpi": 150.5}, r"output.figure_dpi must be a whole number"),
        ({"figure_dpi": True}, r"output.figure_dpi must be a whole number"),
        ({"figure_dpi": 10}, r"output.figure_dpi is 10; give 50 to 600 dots per inch"),
        ({"figure_dpl": 100}, r"unknown key 'figure_dpl' in \[output\]; did you mean 'figure_dpi'"),
    ],
)
def test_bad_figure_options_name_the_fix(output, message):
    with pytest.raises(CrustflowInputError, match=message):
        _scenario(**output)


def test_profile_command_honours_figure_formats_and_dpi(tmp_path):
    # Every command's figures follow [output]: here `crustflow profile` on the invented plateau.
    import re
    import xml.etree.ElementTree as ET

    from crustflow.cli import main
    from crustflow.samples import demo_scenario

    source = demo_scenario("plateau")
    text = re.sub(
        r'= "([^"]+\.(tif|geojson))"',
        lambda m: f'= "{source.parent / m.group(1)}"',
        source.read_text(),
    )
    scenario = tmp_path / "plateau.toml"
    scenario.write_text(text + '\n[output]\nfigure_formats = ["svg", "pdf"]\nfigure_dpi = 90\n')
    out = tmp_path / "out"
    args = ["profile", str(scenario), "--at", "400000", "3700000", "--out", str(out), "--quiet"]
    assert main(args) == 0
    names = sorted(p.name for p in out.iterdir())
    assert [n for n in names if n.endswith(".png")] == []
    (svg,) = [n for n in names if n.endswith(".svg")]
    (pdf,) = [n for n in names if n.endswith(".pdf")]
    assert ET.parse(out / svg).getroot().tag.endswith("svg")
    assert (out / pdf).read_bytes().startswith(b"%PDF")
