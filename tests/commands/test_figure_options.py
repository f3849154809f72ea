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
