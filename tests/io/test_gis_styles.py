"""GIS styling of the outputs: .qml sidecars, statistics, overviews, flag colour tables,
GeoPackage layer styles and the grid azimuth of arrows.

References: numpy for statistics and block means (GDAL's average resampling is the mean of the
valid cells); the OGC/GDAL ``layer_styles`` column list; ``pyproj.Proj.get_factors`` for the
meridian convergence.
"""

from __future__ import annotations

import sqlite3
import xml.etree.ElementTree as ET

import geopandas as gpd
import numpy as np
import pyproj
import pytest
import rasterio
import shapely
from rasterio.transform import Affine

from crustflow.io.colour_ramps import colour_scale, flag_categories
from crustflow.io.styles import (
    arrow_style,
    overview_factors,
    preview_sample,
    region_style,
    section_style,
    write_layer_styles,
)
from crustflow.io.writers import GeotiffWriter
from crustflow.variables import CAUTION, variable_attrs

UTM = "EPSG:32633"

#: Columns of the GeoPackage layer_styles table (GDAL GPKG driver documentation, "Layer styles";
#: the convention QGIS writes).
LAYER_STYLE_COLUMNS = {
    "id",
    "f_table_catalog",
    "f_table_schema",
    "f_table_name",
    "f_geometry_column",
    "styleName",
    "styleQML",
    "styleSLD",
    "useAsDefault",
    "description",
    "owner",
    "ui",
    "update_time",
}


def _write(path, name, data, strip_rows=40):
    writer = GeotiffWriter(
        path,
        crs=UTM,
        transform=Affine(1000.0, 0, 300e3, 0, -1000.0, 5200e3),
        height=data.shape[0],
        width=data.shape[1],
        attrs=dict(variable_attrs(name), caution=CAUTION),
    )
    for r0 in range(0, data.shape[0], strip_rows):  # strip by strip, as a run writes
        writer.write_rows(r0, data[r0 : r0 + strip_rows])
    writer.close()


@pytest.fixture
def rate_tif(tmp_path):
    rng = np.random.default_rng(7)
    data = rng.normal(0.0, 10.0, (160, 200)).astype("float32")
    data[5, 5] = np.nan
    data[100, 100] = 500.0  # one outlier: the robust limit ignores it
    path = tmp_path / "thickening_rate.tif"
    _write(path, "thickening_rate", data)
    return path, data


def test_geotiff_statistics_equal_numpy(rate_tif):
    path, data = rate_tif
    with rasterio.open(path) as src:
        tags = src.tags(1)
    v = data[np.isfinite(data)].astype(float)
    assert float(tags["STATISTICS_MINIMUM"]) == pytest.approx(v.min())
    assert float(tags["STATISTICS_MAXIMUM"]) == pytest.approx(v.max())
    assert float(tags["STATISTICS_MEAN"]) == pytest.approx(v.mean(), rel=1e-9)
    assert float(tags["STATISTICS_STDDEV"]) == pytest.approx(v.std(), rel=1e-6)
    assert float(tags["STATISTICS_VALID_PERCENT"]) == pytest.approx(100 * v.size / data.size)
    sample = preview_sample(path)  # read back from the file: the writer's sample is the same
    assert float(tags["crustflow_sample_median"]) == np.median(sample[np.isfinite(sample)])


def test_continuous_overviews_average_the_cells(rate_tif):
    path, data = rate_tif
    with rasterio.open(path) as src:
        assert src.overviews(1) == overview_factors(160, 200) == [2]
        assert src.tags(ns="rio_overview")["resampling"] == "average"
        half = src.read(1, out_shape=(80, 100))  # served from the 2x overview
    blocks = data.astype(float).reshape(80, 2, 100, 2)
    with np.errstate(invalid="ignore"):
        want = np.nanmean(blocks, axis=(1, 3))  # mean of the valid cells of each 2 x 2 block
    np.testing.assert_allclose(half, want, rtol=1e-5, atol=1e-4)


def test_qml_sidecar_holds_the_figure_ramp_and_limits(rate_tif):
    path, _ = rate_tif
    root = ET.parse(path.with_suffix(".qml")).getroot()
    assert root.tag == "qgis"
    renderer = root.find("pipe/rasterrenderer")
    assert renderer.get("type") == "singlebandpseudocolor"
    items = renderer.findall("rastershader/colorrampshader/item")
    want = colour_scale("thickening_rate", preview_sample(path))  # the figures' rule
    assert float(items[0].get("value")) == pytest.approx(want.vmin)
    assert float(items[-1].get("value")) == pytest.approx(want.vmax)
    assert want.vmax < 100.0  # the 500 outlier does not set the limit
    assert [i.get("color") for i in items] == [c for _, c in want.stops(len(items))]
    assert items[0].get("label").endswith("mm/yr")


def test_flag_raster_has_colour_table_categories_and_paletted_style(tmp_path):
    data = np.zeros((40, 50), dtype="float32")
    data[10:20, 10:20] = 1.0
    data[0, 0] = np.nan
    path = tmp_path / "backflow.tif"
    _write(path, "backflow", data)
    cats = flag_categories("backflow", "no_backflow backflow")
    with rasterio.open(path) as src:
        table = src.colormap(1)
        tags = src.tags(1)
        assert src.read(1)[0, 0] == 255 and src.nodata == 255
    for value, label, colour in cats:
        h = colour.lstrip("#")
        assert table[value] == tuple(int(h[i : i + 2], 16) for i in (0, 2, 4)) + (255,)
        assert tags[f"CATEGORY_{value}"] == label
    assert table[255][3] == 0  # nodata transparent
    root = ET.parse(path.with_suffix(".qml")).getroot()
    renderer = root.find("pipe/rasterrenderer")
    assert renderer.get("type") == "paletted"
    entries = renderer.findall("colorPalette/paletteEntry")
    assert [(int(e.get("value")), e.get("label")) for e in entries] == [
        (0, "no backflow"),
        (1, "backflow"),
    ]


def test_geopackage_layer_styles_table(tmp_path):
    path = tmp_path / "layers.gpkg"
    lines = gpd.GeoDataFrame(
        {"name": ["a"]}, geometry=[shapely.LineString([(0, 0), (1, 1)])], crs=UTM
    )
    polys = gpd.GeoDataFrame({"name": ["b"]}, geometry=[shapely.box(0, 0, 1, 1)], crs=UTM)
    lines.to_file(path, layer="sections", driver="GPKG")
    polys.to_file(path, layer="regions", driver="GPKG")
    lines.to_file(path, layer="arrows", driver="GPKG")
    write_layer_styles(path, [section_style(), region_style(), arrow_style()])
    write_layer_styles(path, [arrow_style()])  # rewriting replaces, never duplicates
    con = sqlite3.connect(path)
    try:
        columns = {row[1] for row in con.execute("PRAGMA table_info(layer_styles)")}
        rows = con.execute(
            "SELECT f_table_name, f_geometry_column, styleQML, styleSLD, useAsDefault "
            "FROM layer_styles ORDER BY f_table_name"
        ).fetchall()
        kind = con.execute(
            "SELECT data_type FROM gpkg_contents WHERE table_name = 'layer_styles'"
        ).fetchone()
    finally:
        con.close()
    assert columns == LAYER_STYLE_COLUMNS
    assert kind == ("attributes",)
    assert [r[0] for r in rows] == ["arrows", "regions", "sections"]
    for _, geom_column, qml, sld, default in rows:
        assert geom_column == "geom" and default == 1
        ET.fromstring(qml)
        ET.fromstring(sld.split("?>", 1)[1])
    arrows = ET.fromstring(rows[0][2])
    assert arrows.find(".//layer").get("class") == "ArrowLine"  # drawn with heads
    assert "grid_azimuth" in rows[0][3]  # the SLD head rotates by the grid azimuth


def test_arrow_grid_azimuth_is_true_azimuth_minus_convergence(scenario_dir):
    from crustflow.engine.api import solve
    from crustflow.io.features import arrow_layers
    from crustflow.scenario import load_scenario

    fields = solve(load_scenario(scenario_dir / "scenario.toml"))
    arrows, _ = arrow_layers(fields)
    assert "grid_azimuth" in arrows
    starts = np.array([g.coords[0] for g in arrows.geometry])
    lon, lat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(
        starts[:, 0], starts[:, 1]
    )
    # pyproj's meridian convergence (grid north to true north); the grid reaches 200 km west of
    # the zone's central meridian, where it is near 2 degrees.
    gamma = pyproj.Proj(UTM).get_factors(lon, lat).meridian_convergence
    assert np.abs(gamma).max() > 1.5
    moving = arrows["flux_magnitude"].to_numpy() > 1e-3 * arrows["flux_magnitude"].max()
    diff = (arrows["flux_azimuth"] - arrows["grid_azimuth"] - gamma).to_numpy()[moving]
    diff = (diff + 180.0) % 360.0 - 180.0
    np.testing.assert_allclose(diff, 0.0, atol=1e-3)
