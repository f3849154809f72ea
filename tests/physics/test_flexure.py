"""Thin elastic lid and Gaussian smoothing in the wavenumber domain (sources named per test)."""

from __future__ import annotations

import logging
import math
import warnings

import numpy as np
import pytest
from pyproj import Geod
from scipy import ndimage

from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import WGS84, GridGeometry
from crustflow.physics import flexure

G = 9.81
DRHO = 600.0  # restoring density contrast, kg/m^3 (invented test value)


def projected(nx, ny, cell, cell_y=None):
    """A bare metre grid whose first cell edge lies at 0, so cosines with whole half-periods across
    the grid are exact mirror-symmetric continuations."""
    cell_y = cell if cell_y is None else cell_y
    x = cell * (np.arange(nx) + 0.5)
    y = cell_y * (np.arange(ny) + 0.5)
    return GridGeometry(kind="projected", x=x, y=y), *np.meshgrid(x, y)


def test_rigidity_and_flexural_parameter_by_hand():
    # Turcotte & Schubert (2002) ch. 3: D = E Te^3 / (12 (1 - nu^2)), alpha = (4 D / (drho g))^(1/4);
    # hand values for E = 1e11 Pa, nu = 0.25, Te = 10 km.
    d = flexure.flexural_rigidity(10e3)
    assert d == pytest.approx(1e11 * 1e12 / (12 * 0.9375), rel=1e-14)
    assert flexure.flexural_parameter(d, DRHO, G) == pytest.approx(
        (4 * d / (DRHO * G)) ** 0.25, rel=1e-14
    )


def test_zero_elastic_thickness_returns_input_exactly():
    # Definition: with no elastic lid (D = 0) the whole load reaches the channel.
    geom, x, y = projected(30, 20, 2e3)
    load = np.sin(x / 7e3) * np.cos(y / 5e3) * 1e7
    load[3, 4] = np.nan
    out = flexure.flexural_filter(
        load, geom, elastic_thickness=0.0, density_contrast=DRHO, gravity=G
    )
    np.testing.assert_array_equal(out, load)
    assert out is not load


def test_response_is_one_half_where_d_k4_equals_drho_g():
    # Turcotte & Schubert (2002) ch. 3 / SCIENCE.md: response 1 / (1 + D k^4 / (drho g)) = 1/2 at
    # k = (drho g / D)^(1/4) (value derived). A cosine with 6 whole periods across the grid is an
    # exact mirror-symmetric continuation, so the response is reproduced to rounding.
    te = 15e3
    d = flexure.flexural_rigidity(te)
    k0 = (DRHO * G / d) ** 0.25
    periods, nx = 6, 240
    cell = periods * 2 * np.pi / k0 / nx
    geom, x, _ = projected(nx, 8, cell, cell_y=3e3)
    load = 5e6 * np.cos(k0 * x)
    out = flexure.flexural_filter(
        load, geom, elastic_thickness=te, density_contrast=DRHO, gravity=G
    )
    np.testing.assert_allclose(out, 0.5 * load, rtol=0, atol=1e-9 * 5e6)


def test_line_load_first_zero_at_three_quarters_pi_alpha():
    # Turcotte & Schubert (2002) ch. 3, continuous (unbroken) plate under a line load V0:
    # w = w0 exp(-|x|/alpha) (cos(x/alpha) + sin(|x|/alpha)), w0 = V0 alpha^3 / (8 D); first zero at
    # x = 3 pi alpha / 4. (The broken plate, w ~ exp(-x/alpha) cos(x/alpha), has it at pi alpha / 2.)
    # Derivation of the test: D w'''' + drho g w = q gives w_k = q_k / (drho g (1 + D k^4 / (drho g))),
    # i.e. the deflection is the filtered load divided by drho g.
    te = 20e3
    d = flexure.flexural_rigidity(te)
    alpha = flexure.flexural_parameter(d, DRHO, G)
    cell, nx = 1e3, 2001  # +-1000 km, about 11 alpha each way: mirror images negligible
    geom, x, _ = projected(nx, 3, cell)
    v0 = 1e12  # N/m, line load per unit length
    centre = nx // 2
    load = np.zeros(geom.shape)
    load[:, centre] = v0 / cell  # the line load spread over one cell
    out = flexure.flexural_filter(
        load, geom, elastic_thickness=te, density_contrast=DRHO, gravity=G
    )
    w = out[1] / (DRHO * G)
    dist = x[1] - x[1, centre]
    right = w[centre:]
    i = int(np.argmax(right < 0))  # first cell past the zero crossing
    zero = dist[centre + i - 1] + cell * right[i - 1] / (right[i - 1] - right[i])
    assert abs(zero - 3 * np.pi * alpha / 4) < 0.01 * alpha
    assert w[centre] == pytest.approx(v0 * alpha**3 / (8 * d), rel=0.01)
    np.testing.assert_allclose(w[::-1], w, rtol=0, atol=1e-12 * w[centre])  # symmetric
    # The whole profile, same source: within 1e-4 of w0 (the one-cell load width and the mirror
    # images at +-2000 km are the only differences from the ideal line load on an infinite plate).
    s = np.abs(dist) / alpha
    analytic = v0 * alpha**3 / (8 * d) * np.exp(-s) * (np.cos(s) + np.sin(s))
    np.testing.assert_allclose(w, analytic, rtol=0, atol=1e-4 * analytic.max())


def test_uniform_load_passes_unchanged():
    # Definition: the response is 1 at k = 0 (Turcotte & Schubert 2002 ch. 3; Airy limit).
    geom, _, _ = projected(40, 25, 4e3)
    load = np.full(geom.shape, 3.2e8)
    out = flexure.flexural_filter(
        load, geom, elastic_thickness=30e3, density_contrast=DRHO, gravity=G
    )
    np.testing.assert_allclose(out, load, rtol=1e-13)


def test_dct_equals_fft_of_the_mirrored_grid():
    # General-purpose library as second opinion: numpy.fft on the grid mirrored to twice its size
    # (Makhoul 1980: the DCT-II is the FFT of the even-mirrored sequence).
    rng = np.random.default_rng(1)
    geom, _, _ = projected(36, 22, 3e3, cell_y=2e3)
    field = rng.normal(size=geom.shape)
    sigma = 5e3
    ours = flexure.gaussian_smoothing(field, geom, sigma=sigma)
    mirrored = np.block([[field, field[:, ::-1]], [field[::-1], field[::-1, ::-1]]])
    ky = 2 * np.pi * np.fft.fftfreq(mirrored.shape[0], d=2e3)
    kx = 2 * np.pi * np.fft.fftfreq(mirrored.shape[1], d=3e3)
    k2 = ky[:, None] ** 2 + kx[None, :] ** 2
    ref = np.fft.ifft2(np.fft.fft2(mirrored) * np.exp(-0.5 * sigma**2 * k2)).real[:22, :36]
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12)


def test_gaussian_preserves_mean_and_damps_sine_by_exp():
    # Analytic: a Gaussian of standard deviation sigma multiplies the amplitude of a sinusoid of
    # wavenumber k by exp(-k^2 sigma^2 / 2) and leaves the mean unchanged.
    geom, x, y = projected(120, 90, 2e3)
    sigma = 6e3
    k = 2 * np.pi * 5 / (120 * 2e3)  # 5 whole periods along x
    field = 100.0 + 40.0 * np.cos(k * x)
    out = flexure.gaussian_smoothing(field, geom, sigma=sigma)
    expected = 100.0 + 40.0 * np.exp(-0.5 * k**2 * sigma**2) * np.cos(k * x)
    np.testing.assert_allclose(out, expected, rtol=0, atol=1e-6)
    rng = np.random.default_rng(7)
    noisy = rng.normal(50.0, 10.0, geom.shape)
    assert flexure.gaussian_smoothing(noisy, geom, sigma=sigma).mean() == pytest.approx(
        noisy.mean(), rel=1e-12
    )


def test_gaussian_against_scipy_ndimage():
    # General-purpose library as second opinion: scipy.ndimage.gaussian_filter, mode "reflect"
    # (the same half-sample mirror), kernel truncated at 10 sigma; differences come from sampling
    # the kernel and are far below 1e-6 of the field for sigma = 4 cells.
    rng = np.random.default_rng(3)
    geom, _, _ = projected(64, 48, 1e3)
    field = ndimage.gaussian_filter(rng.normal(size=geom.shape), 2.0)
    ours = flexure.gaussian_smoothing(field, geom, sigma=4e3)
    ref = ndimage.gaussian_filter(field, 4.0, mode="reflect", truncate=10.0)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-6 * np.abs(field).max())


def test_nodata_filled_and_restored():
    # Definition of the nodata handling (module docstring): nearest-cell fill, NaN restored.
    geom, _, _ = projected(30, 20, 2e3)
    field = np.full(geom.shape, 7.0)
    field[5:9, 10:14] = np.nan
    field[0, 0] = np.nan
    for out in (
        flexure.gaussian_smoothing(field, geom, sigma=5e3),
        flexure.flexural_filter(
            field, geom, elastic_thickness=10e3, density_contrast=DRHO, gravity=G
        ),
    ):
        np.testing.assert_array_equal(np.isnan(out), np.isnan(field))
        np.testing.assert_allclose(out[~np.isnan(out)], 7.0, rtol=1e-13)
    assert np.isnan(field[0, 0])  # input untouched


def geographic(lat0, span, cells=40):
    step = span / cells
    lon = -20.0 + step * (np.arange(cells) + 0.5)
    lat = lat0 + span / 2 - step * (np.arange(cells) + 0.5)  # north to south
    return GridGeometry(kind="geographic", x=lon, y=lat, ellipsoid=WGS84)


def test_local_frame_error_small_grid_against_pyproj(caplog):
    # pyproj.Geod (WGS84) as second opinion: the east spacing along the edge rows vs the central
    # latitude gives the frame's relative error; 1 x 1 degree at 45 N: about tan(45) * 0.49 deg,
    # i.e. 0.86 %, well under the warning level.
    geom = geographic(45.0, 1.0)
    frame = flexure.local_frame(geom)
    geod = Geod(ellps="WGS84")
    step = 1.0 / 40

    def east(lat):
        return geod.inv(0.0, lat, step, lat)[2]

    lat_c = 45.0
    worst = max(abs(east(lat) / east(lat_c) - 1) for lat in (geom.y[0], geom.y[-1]))
    assert frame.central_latitude == pytest.approx(lat_c)
    assert frame.dx == pytest.approx(east(lat_c), rel=1e-8)
    assert frame.dy == pytest.approx(
        geod.inv(0, lat_c - step / 2, 0, lat_c + step / 2)[2], rel=1e-6
    )
    assert frame.relative_error == pytest.approx(worst, rel=1e-4)
    assert frame.relative_error < 0.01
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with caplog.at_level(logging.DEBUG, logger="crustflow.physics.flexure"):
            out = flexure.gaussian_smoothing(np.ones(geom.shape), geom, sigma=5e3)
    assert "relative spacing error 0.00" in caplog.text
    np.testing.assert_allclose(out, 1.0, rtol=1e-13)


def test_local_frame_error_warned_for_large_grid():
    # Definition (flexure.LOCAL_FRAME_WARNING): a 40-degree span of latitude changes the east
    # spacing by far more than 5 %.
    geom = geographic(40.0, 40.0)
    assert flexure.local_frame(geom).relative_error > 0.3
    with pytest.warns(UserWarning, match=r"spacings change by up to \d+\.\d % across the grid"):
        flexure.gaussian_smoothing(np.ones(geom.shape), geom, sigma=50e3)


def test_projected_frame_has_no_error():
    # Definition: projected metres are used as they are (maps.py: scale error not corrected).
    geom, _, _ = projected(5, 4, 2e3, cell_y=3e3)
    assert flexure.local_frame(geom) == flexure.LocalFrame(2e3, 3e3, None, 0.0)


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (
            lambda g, f: flexure.flexural_filter(
                f, g, elastic_thickness=-5e3, density_contrast=DRHO, gravity=G
            ),
            r"load\.elastic_thickness is -5000\.0; give a length >= 0",
        ),
        (
            lambda g, f: flexure.gaussian_smoothing(f, g, sigma=-1e3),
            r"load\.smoothing is -1000\.0; give the Gaussian's standard deviation",
        ),
        (
            lambda g, f: flexure.flexural_filter(
                f, g, elastic_thickness=5e3, density_contrast=-100.0, gravity=G
            ),
            r"density contrast -100 kg/m\^3 under the elastic lid must be positive",
        ),
        (
            lambda g, f: flexure.flexural_filter(
                f, g, elastic_thickness=5e3, density_contrast=DRHO, gravity=G, poissons_ratio=0.5
            ),
            r"load\.poissons_ratio is 0\.5; give a number between -1 and 0\.5",
        ),
        (
            lambda g, f: flexure.gaussian_smoothing(f[:-1], g, sigma=1e3),
            r"field has shape \(3, 5\) but the grid is \(4, 5\)",
        ),
    ],
)
def test_bad_input(call, match):
    # Error messages (STYLE.md 6: name the input, what was expected, the fix).
    geom, _, _ = projected(5, 4, 2e3)
    with pytest.raises(CrustflowInputError, match=match):
        call(geom, np.zeros(geom.shape))


def test_negative_rigidity_refused():
    # Error message pinned (STYLE.md 6).
    with pytest.raises(CrustflowInputError, match=r"flexural rigidity must be finite and >= 0"):
        flexure.flexural_parameter(-1.0, DRHO, G)
    with pytest.raises(CrustflowInputError, match=r"load\.elastic_thickness is -1; give"):
        flexure.flexural_rigidity(-1)
    assert math.isclose(flexure.flexural_parameter(0.0, DRHO, G), 0.0)
