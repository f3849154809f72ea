"""Image-level checks of the map figures: panels, titles, axis and colour-bar labels, furniture
and file formats, read from the matplotlib Figure objects the drawing functions return (no pixel
comparisons). Data are small invented grids (analytic shapes) exercising the code paths.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np
import pytest
import rioxarray  # noqa: F401
import xarray as xr
from PIL import Image

from crustflow.figures.common import save_figure
from crustflow.figures.ensemble import draw_ensemble_map, draw_exceedance_map
from crustflow.figures.flux import draw_flux_map
from crustflow.figures.furniture import nice_number
from crustflow.figures.rates import draw_rates_map
from crustflow.io.colour_ramps import ROBUST_PERCENTILE


def _fields(crs="EPSG:32633", geographic=False):
    ny, nx = 40, 60
    if geographic:
        x = 10.0 + 0.05 * np.arange(nx)
        y = 45.0 - 0.05 * np.arange(ny)
    else:
        x = 300e3 + 5e3 * np.arange(nx)
        y = 5200e3 - 5e3 * np.arange(ny)
    xx, yy = np.meshgrid(np.linspace(-1, 1, nx), np.linspace(-1, 1, ny))
    elevation = 3000 * np.exp(-(xx**2 + yy**2) * 3) - 500  # a plateau with a sea around it
    qe, qn = 800 * xx * np.exp(-(xx**2 + yy**2)), 800 * yy * np.exp(-(xx**2 + yy**2))
    thick = 50 * (1 - 4 * (xx**2 + yy**2)) * np.exp(-(xx**2 + yy**2) * 2)
    ds = xr.Dataset(
        {
            "flux_east": (("y", "x"), qe),
            "flux_north": (("y", "x"), qn),
            "flux_magnitude": (("y", "x"), np.hypot(qe, qn)),
            "thickening_rate": (("y", "x"), thick),
            "uplift_rate": (("y", "x"), thick * (1 - 2800 / 3300)),
            "elevation": (("y", "x"), elevation),
        },
        coords={"x": x, "y": y},
        attrs={"title": "Invented test plateau"},
    )
    return ds.rio.write_crs(crs)


def _colorbar_labels(fig):
    return [ax.get_ylabel() for ax in fig.axes if ax.get_label() == "<colorbar>"]


def _map_axes(fig):
    return [ax for ax in fig.axes if ax.get_label() != "<colorbar>" and ax.get_visible()]


def test_flux_map_has_context_key_scale_bar_and_crs_axes():
    fig = draw_flux_map(_fields())
    (ax,) = _map_axes(fig)
    assert ax.get_title(loc="left") == "Invented test plateau"
    assert ax.get_xlabel().startswith("Easting (km), WGS 84 / UTM zone 33N")
    assert ax.get_ylabel() == "Northing (km)"
    (bar,) = _colorbar_labels(fig)
    assert bar == "Channel volume flux per unit width, magnitude (m²/yr), log scale"
    texts = [t.get_text() for t in ax.texts]
    assert any(t.endswith(" km") for t in texts)  # scale bar
    keys = [a for a in ax.get_children() if type(a).__name__ == "QuiverKey"]
    assert len(keys) == 1 and keys[0].text.get_text().endswith(" m²/yr")
    key = keys[0].U  # a round magnitude no larger than the largest flux
    assert key == nice_number(key) and key <= _fields()["flux_magnitude"].max()
    assert ax.collections  # quiver and contours (elevation, coastline)
    coast = [
        c
        for c in ax.collections
        if type(c).__name__ == "QuadContourSet" and list(c.levels) == [0.0]
    ]
    assert coast, "the coastline (0 m contour) is drawn"
    assert fig.texts and "no basis for hazard" in fig.texts[-1].get_text()  # the caution


def test_flux_map_norm_options_and_geographic_graticule():
    fig = draw_flux_map(_fields("EPSG:4326", geographic=True), norm="power")
    (ax,) = _map_axes(fig)
    assert ax.get_xlabel().startswith("Longitude") and ax.get_ylabel() == "Latitude"
    fig.canvas.draw()
    labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
    assert labels and all(t.endswith("°E") for t in labels)
    assert type(ax.images[0].norm).__name__ == "PowerNorm"
    assert _colorbar_labels(fig)[0].endswith("power scale")
    with pytest.raises(ValueError, match="norm 'cubic' is not one of log, power, linear"):
        draw_flux_map(_fields(), norm="cubic")


def test_rates_map_panels_are_centred_on_zero_with_robust_limits():
    ds = _fields()
    fig = draw_rates_map(ds)
    axes = _map_axes(fig)
    assert [ax.get_title() for ax in axes] == ["Crustal thickening", "Isostatic surface uplift"]
    assert _colorbar_labels(fig) == [
        "Crustal thickening rate, -div(q) (mm/yr)",
        "Isostatic surface uplift rate from thickening (mm/yr)",
    ]
    for ax, name in zip(axes, ("thickening_rate", "uplift_rate"), strict=True):
        norm = ax.images[0].norm
        limit = np.percentile(np.abs(ds[name].values), ROBUST_PERCENTILE)  # numpy reference
        assert norm.vmin == pytest.approx(-limit) and norm.vmax == pytest.approx(limit)
        assert ax.get_xlabel().startswith("Easting (km)")
    assert fig.get_suptitle() == "Invented test plateau"


def test_ensemble_figures_name_every_panel():
    ds = _fields()
    median = ds["thickening_rate"].values
    fig = draw_ensemble_map(
        median, np.abs(median) / 3, ds.x.values, ds.y.values, ds.rio.crs, "thickening_rate"
    )
    assert [ax.get_title() for ax in _map_axes(fig)] == [
        "Median over the members",
        "Spread: 95th minus 5th percentile",
    ]
    assert all(label.endswith("(mm/yr)") for label in _colorbar_labels(fig))
    prob = np.stack([np.clip(median / 50, 0, 1), np.clip(median / 80, 0, 1)])
    fig = draw_exceedance_map(prob, [0.5, 1.0], ds.x.values, ds.y.values, ds.rio.crs, "uplift_rate")
    assert [ax.get_title() for ax in _map_axes(fig)] == ["Above 0.5 mm/yr", "Above 1 mm/yr"]
    assert all(ax.images[0].norm.vmin == 0 and ax.images[0].norm.vmax == 1 for ax in _map_axes(fig))


def test_save_figure_writes_every_format_at_the_dpi(tmp_path):
    names = save_figure(
        draw_rates_map(_fields()), tmp_path, "rates_map", formats=("png", "svg", "pdf"), dpi=72
    )
    assert names == ["rates_map.png", "rates_map.svg", "rates_map.pdf"]
    with Image.open(tmp_path / "rates_map.png") as img:
        assert img.info["dpi"] == pytest.approx((72, 72), abs=0.01)
    assert ET.parse(tmp_path / "rates_map.svg").getroot().tag.endswith("svg")
    assert (tmp_path / "rates_map.pdf").read_bytes().startswith(b"%PDF")
    with pytest.raises(ValueError, match="figure format 'tiff' is not one of png, svg, pdf"):
        save_figure(draw_rates_map(_fields()), tmp_path, "x", formats=("tiff",))


def test_nice_numbers():
    assert [nice_number(v) for v in (0.9, 1.0, 3.7, 64.0, 180.0, 999.0)] == [
        0.5,
        1,
        2,
        50,
        100,
        500,
    ]
