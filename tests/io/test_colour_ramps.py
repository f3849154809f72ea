"""crustflow's colour ramps: the colour science behind them, and the limits rule.

Checks against the published CIELAB and sRGB definitions (CIE 15:2004 section 8.2.1;
IEC 61966-2-1:1999), colour-vision-deficiency simulation matrices (Machado, Oliveira & Fernandes
2009, IEEE TVCG 15(6), severity 1.0), and numpy's percentile for the robust limits.
"""

from __future__ import annotations

import numpy as np
import pytest

from crustflow.io.colour_ramps import (
    RAMPS,
    ROBUST_PERCENTILE,
    colour_scale,
    flag_categories,
    lab_to_srgb,
    ramp_colours,
    srgb_to_lab,
)
from crustflow.io.display import axis_label, display_units

#: Linear-RGB simulation of protanopia and deuteranopia, severity 1.0 (Machado et al. 2009,
#: table of matrices; from memory).
PROTANOPIA = np.array(
    [
        [0.152286, 1.052583, -0.204868],
        [0.114503, 0.786281, 0.099216],
        [-0.003882, -0.048116, 1.051998],
    ]
)
DEUTERANOPIA = np.array(
    [
        [0.367322, 0.860646, -0.227968],
        [0.280085, 0.672501, 0.047413],
        [-0.011820, 0.042940, 0.968881],
    ]
)


def _linear(rgb):
    return np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)


def _encode(linear):
    linear = np.clip(linear, 0, 1)
    return np.where(linear <= 0.0031308, 12.92 * linear, 1.055 * linear ** (1 / 2.4) - 0.055)


def _simulate(rgb, matrix):
    return _encode(_linear(rgb) @ matrix.T)


def test_lab_conversion_matches_published_reference_colours():
    # D65 white is L* 100, a* = b* = 0 (CIE 15:2004 definition).
    np.testing.assert_allclose(lab_to_srgb([100.0, 0.0, 0.0]), [1, 1, 1], atol=2e-3)
    # sRGB red (1, 0, 0) is L* 53.24, a* 80.09, b* 67.20 (CIE 15 + IEC 61966-2-1; from memory).
    np.testing.assert_allclose(srgb_to_lab([1.0, 0.0, 0.0]), [53.24, 80.09, 67.20], atol=0.1)
    # Round trip through both conversions.
    lab = np.array([[20.0, 10.0, -30.0], [60.0, -20.0, 40.0], [90.0, 5.0, 5.0]])
    np.testing.assert_allclose(srgb_to_lab(lab_to_srgb(lab)), lab, atol=1e-6)


@pytest.mark.parametrize("ramp", sorted(RAMPS))
def test_ramps_stay_inside_the_srgb_gamut(ramp):
    # Unclipped conversion of the ramp's CIELAB line: every channel within 0..1 (no clipping).
    colours = ramp_colours(ramp, 257)
    lab = srgb_to_lab(colours)
    raw = lab_to_srgb(lab, clip=False)
    assert raw.min() >= 0.0 and raw.max() <= 1.0


def test_sequential_ramp_is_perceptually_uniform_and_monotonic():
    lab = srgb_to_lab(ramp_colours("sequential", 65))
    assert np.all(np.diff(lab[:, 0]) > 0)  # lightness rises
    steps = np.linalg.norm(np.diff(lab, axis=0), axis=1)  # Delta E*ab (CIE 1976)
    assert steps.std() / steps.mean() < 0.03  # equal steps, within 8-bit rounding


def test_diverging_ramp_is_symmetric_and_neutral_at_zero():
    lab = srgb_to_lab(ramp_colours("diverging", 257))
    np.testing.assert_allclose(lab[:, 0], lab[::-1, 0], atol=0.5)  # same lightness at -v and +v
    centre = lab[128]
    assert centre[0] > 94 and abs(centre[1]) < 1 and abs(centre[2]) < 1
    left = np.linalg.norm(np.diff(lab[:129], axis=0), axis=1).sum()
    right = np.linalg.norm(np.diff(lab[128:], axis=0), axis=1).sum()
    assert abs(left - right) / left < 0.02  # both arms equally long in CIELAB


@pytest.mark.parametrize("matrix", [PROTANOPIA, DEUTERANOPIA], ids=["protan", "deutan"])
def test_ramps_stay_readable_under_red_green_deficiencies(matrix):
    seq = srgb_to_lab(_simulate(ramp_colours("sequential", 33), matrix))
    assert np.all(np.diff(seq[:, 0]) > 0)  # order still readable from lightness
    assert np.linalg.norm(np.diff(seq, axis=0), axis=1).min() > 1.0  # neighbours still differ
    div = _simulate(ramp_colours("diverging", 257), matrix)
    for k in (32, 64, 96):  # |t| = 0.75, 0.5, 0.25: -v and +v stay apart (Delta E > 10)
        low, high = srgb_to_lab(div[k]), srgb_to_lab(div[256 - k])
        assert np.linalg.norm(low - high) > 10


def test_signed_variables_get_symmetric_robust_limits():
    rng = np.random.default_rng(3)
    values = np.concatenate([rng.normal(0, 5, 5000), [900.0, -700.0, np.nan]])
    scale = colour_scale("thickening_rate", values)
    m = np.nanpercentile(np.abs(values), ROBUST_PERCENTILE)  # numpy as reference
    assert scale.ramp == "diverging" and scale.vmin == -scale.vmax
    assert scale.vmax == pytest.approx(m)
    assert scale.positions([0.0])[0] == pytest.approx(0.5)


def test_flux_magnitude_defaults_to_a_log_scale():
    scale = colour_scale("flux_magnitude", [0.0, 0.5, 3.0, 30.0, 3000.0])
    assert scale.norm == "log" and scale.vmax == 3000.0 and scale.vmin == pytest.approx(3.0)
    values = [v for v, _ in scale.stops(5)]
    np.testing.assert_allclose(np.diff(np.log10(values)), 0.25 * np.log10(1000.0))
    power = colour_scale("flux_magnitude", [0.0, 100.0], norm="power", gamma=0.5)
    assert power.positions([25.0])[0] == pytest.approx(0.5)
    with pytest.raises(ValueError, match="norm 'cubic' is not one of"):
        colour_scale("flux_magnitude", [1.0], norm="cubic")


def test_flag_categories_highlight_the_value_that_needs_attention():
    cats = flag_categories("solver_converged", "not_converged converged")
    assert [c[1] for c in cats] == ["not converged", "converged"]
    assert cats[0][2] != cats[1][2]
    grey = cats[1][2]
    assert flag_categories("backflow", "no_backflow backflow")[0][2] == grey


def test_display_units_are_readable():
    assert display_units("m2 yr-1") == "m²/yr" and display_units("mm yr-1") == "mm/yr"
    assert display_units("1") == "" and display_units("km") == "km"
    assert axis_label("uplift_rate") == "Isostatic surface uplift rate from thickening (mm/yr)"
    assert axis_label("backflow").startswith("Flow reversal") and "(" not in axis_label("backflow")
