"""Making outputs open well in a desktop GIS: style sidecars, statistics, overviews, layer styles.

* A ``.qml`` sidecar beside each GeoTIFF (same base name; the XML style format that QGIS reads
  automatically): a single-band pseudocolour ramp with the colours and limits of the figures
  (:func:`crustflow.io.colour_ramps.colour_scale`), or paletted categories for flag rasters.
* ``STATISTICS_*`` band tags (minimum, maximum, mean, standard deviation, valid percent) and
  internal overviews (average resampling for continuous variables, nearest for flags), added after
  the strip writer has closed the file, reading it back a window of rows at a time.
* The OGC GeoPackage ``layer_styles`` table (the convention GDAL and QGIS share) with a QML and an
  SLD style per layer: budget sections and regions, and flux arrows drawn with heads.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np

from crustflow.io.colour_ramps import ColourScale, colour_scale, flag_categories
from crustflow.io.display import display_units

__all__ = [
    "PREVIEW_CELLS",
    "SAMPLE_MEDIAN_TAG",
    "finish_geotiff",
    "BandStatistics",
    "sidecars",
    "raster_qml",
    "preview_sample",
    "LayerStyle",
    "write_layer_styles",
    "section_style",
    "region_style",
    "arrow_style",
]

#: Largest side, in cells, of the decimated sample that sets colour limits; the run's figure is
#: drawn from the same decimation (crustflow.engine.strips.FIGURE_CELLS), so limits agree.
PREVIEW_CELLS = 800

#: Overviews are added while the coarser level keeps at least this many cells on its longer
#: side. Common practice, no source.
OVERVIEW_MIN_CELLS = 64

#: Band tags holding the median of the decimated sample and its decimation step.
SAMPLE_MEDIAN_TAG, SAMPLE_STEP_TAG = "crustflow_sample_median", "crustflow_sample_step"

#: Rows read at a time when computing statistics (bounded memory).
STAT_ROWS = 256

#: QGIS version written into style headers (the oldest release whose style reader we target).
QGIS_STYLE_VERSION = "3.28.0"


def preview_step(height: int, width: int, cells: int = PREVIEW_CELLS) -> int:
    """Decimation step so that the longer side keeps at most ``cells`` cells."""
    return max(1, -(-max(height, width) // cells))


class BandStatistics:
    """Statistics of a band folded in a block of rows at a time: count, min, max, mean, standard
    deviation (``STATISTICS_*`` tags), and the decimated sample (rows ``0::step``, columns
    ``step//2::step`` of the whole band, as the run's figure) that sets the colour limits.

    Rows must arrive in order; NaN marks nodata.
    """

    def __init__(self, height: int, width: int) -> None:
        self.shape = (height, width)
        self.step = preview_step(height, width)
        self.n, self.total, self.total2 = 0, 0.0, 0.0
        self.low, self.high = np.inf, -np.inf
        self._sample: list[np.ndarray] = []

    def add(self, r0: int, block: np.ndarray) -> None:
        """Fold in rows ``r0 : r0 + len(block)``."""
        block = np.asarray(block, dtype="float64")
        step = self.step
        # a copy: a view would keep the whole block alive until the end
        self._sample.append(block[(-r0) % step :: step, step // 2 :: step].copy())
        v = block[np.isfinite(block)]
        if v.size:
            self.n += v.size
            self.total += float(v.sum())
            self.total2 += float((v * v).sum())
            self.low, self.high = min(self.low, float(v.min())), max(self.high, float(v.max()))

    @property
    def sample(self) -> np.ndarray:
        """The decimated sample (float64, NaN nodata)."""
        if not self._sample:
            return np.empty((0, 0))
        return np.concatenate(self._sample, axis=0)

    def tags(self) -> dict:
        """GDAL's ``STATISTICS_*`` band tags (only the valid share when no cell has data)."""
        height, width = self.shape
        out = {"STATISTICS_VALID_PERCENT": repr(100.0 * self.n / max(height * width, 1))}
        if self.n:
            mean = self.total / self.n
            out.update(
                STATISTICS_MINIMUM=repr(self.low),
                STATISTICS_MAXIMUM=repr(self.high),
                STATISTICS_MEAN=repr(mean),
                STATISTICS_STDDEV=repr(float(np.sqrt(max(self.total2 / self.n - mean**2, 0.0)))),
            )
        return out


def _read_statistics(dst) -> BandStatistics:
    """:class:`BandStatistics` of an open band, read :data:`STAT_ROWS` rows at a time."""
    from rasterio.windows import Window

    stats = BandStatistics(dst.height, dst.width)
    nodata = dst.nodata
    for r0 in range(0, dst.height, STAT_ROWS):
        rows = min(STAT_ROWS, dst.height - r0)
        block = dst.read(1, window=Window(0, r0, dst.width, rows)).astype("float64")
        if nodata is not None and not np.isnan(nodata):
            block[block == nodata] = np.nan
        stats.add(r0, block)
    return stats


def _sample_tags(sample: np.ndarray, step: int) -> dict:
    """Median of the decimated sample and its step, as band tags (read by the run's report)."""
    finite = sample[np.isfinite(sample)]
    tags = {SAMPLE_STEP_TAG: str(step)}
    if finite.size:
        tags[SAMPLE_MEDIAN_TAG] = repr(float(np.median(finite)))
    return tags


def overview_factors(height: int, width: int) -> list[int]:
    """Overview decimation factors 2, 4, 8, ... while the level keeps
    :data:`OVERVIEW_MIN_CELLS` cells on its longer side."""
    factors, f = [], 2
    while max(height, width) // f >= OVERVIEW_MIN_CELLS:
        factors.append(f)
        f *= 2
    return factors


def preview_sample(path: str | Path) -> np.ndarray:
    """The decimated sample of a single-band raster that sets its colour limits (NaN nodata)."""
    import rasterio

    with rasterio.open(path) as src:
        return _read_statistics(src).sample


#: DEFLATE level of the overviews (zlib 1-9), dimensionless. Project choice, as for the full
#: resolution (crustflow.io.writers): level 1 halves the time of building them (1.1 s against 2.1 s
#: for 8,000 x 8,000 float32 cells, measured) for slightly larger files.
OVERVIEW_DEFLATE_LEVEL = 1


def finish_geotiff(
    path: str | Path,
    *,
    variable: str,
    attrs: dict,
    scale: ColourScale | None = None,
    statistics: BandStatistics | None = None,
) -> list[str]:
    """Add statistics and overviews to a closed GeoTIFF and write its ``.qml`` sidecar.

    Parameters
    ----------
    path : path
        A single-band GeoTIFF written by :class:`crustflow.io.writers.GeotiffWriter`.
    variable : str
        The variable it holds (picks the ramp: :func:`crustflow.io.colour_ramps.colour_scale`).
    attrs : dict
        ``long_name``, ``units`` and, for flags, ``flag_meanings``.
    scale : ColourScale, optional
        Colours and limits to use instead of those from the raster's decimated sample.
    statistics : BandStatistics, optional
        Gathered while the rows were written (saves reading the band back).

    Returns
    -------
    list of str
        The file names written beside the raster (the ``.qml``).

    Notes
    -----
    Memory stays bounded: statistics come from the writer (or the band is read back
    :data:`STAT_ROWS` rows at a time), and GDAL builds the overviews from the file. Continuous
    variables use average resampling (the mean of the valid cells; nearest would alias), flags
    nearest.
    """
    import rasterio
    from rasterio.enums import Resampling

    path = Path(path)
    flag = "flag_meanings" in attrs
    overview_options = {
        "COMPRESS_OVERVIEW": "DEFLATE",
        "ZLEVEL_OVERVIEW": OVERVIEW_DEFLATE_LEVEL,
        "PREDICTOR_OVERVIEW": 2 if flag else 3,
        "GDAL_NUM_THREADS": "ALL_CPUS",
    }
    with rasterio.Env(**overview_options), rasterio.open(path, "r+") as dst:
        stats = statistics if statistics is not None else _read_statistics(dst)
        sample = stats.sample
        dst.update_tags(1, **stats.tags(), **_sample_tags(sample, stats.step))
        factors = overview_factors(dst.height, dst.width)
        method = Resampling.nearest if flag else Resampling.average
        if factors:
            dst.build_overviews(factors, method)
            dst.update_tags(ns="rio_overview", resampling=method.name)
    if flag:
        qml = raster_qml(categories=flag_categories(variable, attrs["flag_meanings"]))
    else:
        units = display_units(attrs.get("units", ""))
        qml = raster_qml(scale or colour_scale(variable, sample), label=units)
    qml_path = path.with_suffix(".qml")
    qml_path.write_text(qml, encoding="utf-8")
    return [qml_path.name]


def sidecars(folder: str | Path, written: list[str]) -> list[str]:
    """The ``.qml`` sidecars that exist beside the GeoTIFFs named in ``written``."""
    folder = Path(folder)
    names = [Path(n).with_suffix(".qml").name for n in written if n.endswith(".tif")]
    return [n for n in names if (folder / n).is_file() and n not in written]


def _rgba(hex_colour: str, alpha: int = 255) -> str:
    h = hex_colour.lstrip("#")
    return ",".join(str(int(h[i : i + 2], 16)) for i in (0, 2, 4)) + f",{alpha}"


def raster_qml(
    scale: ColourScale | None = None, *, categories=None, label: str = "", stops: int = 17
) -> str:
    """A QGIS raster style (``.qml``): pseudocolour ramp or paletted categories.

    Parameters
    ----------
    scale : ColourScale, optional
        Ramp, limits and norm of a continuous variable (ramp items at :meth:`ColourScale.stops`).
    categories : list of (int, str, str), optional
        Value, label and ``#rrggbb`` of each class of a flag raster.
    label : str
        Unit appended to the ramp items' labels.
    stops : int
        Ramp items (dense enough to follow a log or power norm with linear interpolation).

    Returns
    -------
    str
        The XML text.
    """
    if categories is not None:
        entries = "\n".join(
            f"        <paletteEntry value={quoteattr(str(v))} label={quoteattr(text)} "
            f'color="{colour}" alpha="255"/>'
            for v, text, colour in categories
        )
        renderer = (
            '    <rasterrenderer type="paletted" band="1" opacity="1" alphaBand="-1" '
            'nodataColor="">\n'
            "      <rasterTransparency/>\n"
            f"      <colorPalette>\n{entries}\n      </colorPalette>\n"
            "    </rasterrenderer>"
        )
    else:
        items = "\n".join(
            f'            <item alpha="255" value="{v!r}" color="{c}" '
            f"label={quoteattr(f'{v:.4g} {label}'.strip())}/>"
            for v, c in scale.stops(stops)
        )
        lo, hi = repr(scale.vmin), repr(scale.vmax)
        renderer = (
            '    <rasterrenderer type="singlebandpseudocolor" band="1" opacity="1" '
            f'alphaBand="-1" classificationMin="{lo}" classificationMax="{hi}" nodataColor="">\n'
            "      <rasterTransparency/>\n"
            "      <minMaxOrigin><limits>None</limits><extent>WholeRaster</extent>"
            "<statAccuracy>Exact</statAccuracy></minMaxOrigin>\n"
            "      <rastershader>\n"
            '        <colorrampshader colorRampType="INTERPOLATED" classificationMode="1" '
            f'clip="0" minimumValue="{lo}" maximumValue="{hi}" labelPrecision="4">\n'
            f"{items}\n"
            "        </colorrampshader>\n"
            "      </rastershader>\n"
            "    </rasterrenderer>"
        )
    return (
        f'<qgis version="{QGIS_STYLE_VERSION}" styleCategories="Symbology">\n'
        "  <pipe>\n"
        f"{renderer}\n"
        '    <brightnesscontrast brightness="0" contrast="0" gamma="1"/>\n'
        '    <huesaturation saturation="0" grayscaleMode="0" colorizeOn="0"/>\n'
        "  </pipe>\n"
        "  <blendMode>0</blendMode>\n"
        "</qgis>\n"
    )


# ----------------------------------------------------------------------------------------------
# GeoPackage layer styles


@dataclass(frozen=True)
class LayerStyle:
    """A style for one GeoPackage layer, as a QML and an SLD document."""

    layer: str
    name: str
    qml: str
    sld: str
    description: str = ""


def _options(values: dict) -> str:
    body = "".join(
        f'<Option type="QString" name="{k}" value={quoteattr(str(v))}/>' for k, v in values.items()
    )
    return f'<Option type="Map">{body}</Option>'


def _vector_qml(symbol_type: str, layers: str) -> str:
    return (
        f'<qgis version="{QGIS_STYLE_VERSION}" styleCategories="Symbology">\n'
        '  <renderer-v2 type="singleSymbol" symbollevels="0" enableorderby="0" forceraster="0">\n'
        "    <symbols>\n"
        f'      <symbol type="{symbol_type}" name="0" alpha="1" clip_to_extent="1" force_rhr="0">\n'
        f"{layers}\n"
        "      </symbol>\n"
        "    </symbols>\n"
        "  </renderer-v2>\n"
        "</qgis>\n"
    )


def _sld(layer: str, rule: str) -> str:
    return (
        '<?xml version="1.0" encoding="UTF-8"?>\n'
        '<StyledLayerDescriptor version="1.1.0" xmlns="http://www.opengis.net/sld" '
        'xmlns:se="http://www.opengis.net/se" xmlns:ogc="http://www.opengis.net/ogc">\n'
        f"  <NamedLayer><se:Name>{escape(layer)}</se:Name><UserStyle>"
        f"<se:Name>{escape(layer)}</se:Name>\n"
        f"    <se:FeatureTypeStyle><se:Rule>{rule}</se:Rule></se:FeatureTypeStyle>\n"
        "  </UserStyle></NamedLayer>\n"
        "</StyledLayerDescriptor>\n"
    )


def _stroke(colour: str, width: float, dash: str = "") -> str:
    dashes = f'<se:SvgParameter name="stroke-dasharray">{dash}</se:SvgParameter>' if dash else ""
    return (
        f'<se:Stroke><se:SvgParameter name="stroke">{colour}</se:SvgParameter>'
        f'<se:SvgParameter name="stroke-width">{width}</se:SvgParameter>{dashes}</se:Stroke>'
    )


def section_style(layer: str = "sections") -> LayerStyle:
    """Sections: a dark line with a light core (reads on dark and light backgrounds)."""
    lines = "\n".join(
        f'        <layer class="SimpleLine" enabled="1" pass="0" locked="0">'
        f"{_options({'line_color': colour, 'line_width': width, 'line_width_unit': 'MM', 'capstyle': 'round'})}"
        "</layer>"
        for colour, width in (("20,20,20,255", 1.2), ("255,255,255,255", 0.5))
    )
    sld = _sld(layer, f"<se:LineSymbolizer>{_stroke('#141414', 3)}</se:LineSymbolizer>")
    return LayerStyle(layer, "crustflow sections", _vector_qml("line", lines), sld)


def region_style(layer: str = "regions") -> LayerStyle:
    """Regions: no fill, a dashed dark outline."""
    fill = (
        '        <layer class="SimpleFill" enabled="1" pass="0" locked="0">'
        + _options(
            {
                "style": "no",
                "color": "0,0,0,0",
                "outline_color": "20,20,20,255",
                "outline_style": "dash",
                "outline_width": "0.6",
                "outline_width_unit": "MM",
            }
        )
        + "</layer>"
    )
    rule = "<se:PolygonSymbolizer>" + _stroke("#141414", 1.5, "6 3") + "</se:PolygonSymbolizer>"
    return LayerStyle(layer, "crustflow regions", _vector_qml("fill", fill), _sld(layer, rule))


def arrow_style(layer: str = "arrows", colour: str = "#141414") -> LayerStyle:
    """Flux arrows: each LineString drawn as an arrow with a filled head at its end.

    The QML uses QGIS's arrow line symbol layer; the SLD draws the shaft and a triangle mark at the
    end point, rotated by the ``grid_azimuth`` attribute (degrees clockwise from grid north).
    """
    rgba = _rgba(colour)
    head_fill = (
        '<symbol type="fill" name="@0@0" alpha="1" clip_to_extent="1" force_rhr="0">'
        '<layer class="SimpleFill" enabled="1" pass="0" locked="0">'
        + _options({"color": rgba, "outline_style": "no", "style": "solid"})
        + "</layer></symbol>"
    )
    arrow = (
        '        <layer class="ArrowLine" enabled="1" pass="0" locked="0">'
        + _options(
            {
                "arrow_type": "0",
                "head_type": "0",
                "arrow_width": "0.25",
                "arrow_width_unit": "MM",
                "arrow_start_width": "0.25",
                "arrow_start_width_unit": "MM",
                "head_length": "1.6",
                "head_length_unit": "MM",
                "head_thickness": "1.0",
                "head_thickness_unit": "MM",
                "is_curved": "0",
                "is_repeated": "0",
            }
        )
        + head_fill
        + "</layer>"
    )
    rule = (
        f"<se:LineSymbolizer>{_stroke(colour, 1)}</se:LineSymbolizer>"
        '<se:PointSymbolizer><se:Geometry><ogc:Function name="endPoint">'
        "<ogc:PropertyName>geom</ogc:PropertyName></ogc:Function></se:Geometry>"
        "<se:Graphic><se:Mark><se:WellKnownName>triangle</se:WellKnownName>"
        f'<se:Fill><se:SvgParameter name="fill">{colour}</se:SvgParameter></se:Fill></se:Mark>'
        "<se:Size>7</se:Size><se:Rotation><ogc:PropertyName>grid_azimuth</ogc:PropertyName>"
        "</se:Rotation></se:Graphic></se:PointSymbolizer>"
    )
    return LayerStyle(layer, "crustflow flux arrows", _vector_qml("line", arrow), _sld(layer, rule))


_LAYER_STYLES_SQL = """
CREATE TABLE IF NOT EXISTS layer_styles (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    f_table_catalog TEXT(256),
    f_table_schema TEXT(256),
    f_table_name TEXT(256),
    f_geometry_column TEXT(256),
    styleName TEXT(30),
    styleQML TEXT,
    styleSLD TEXT,
    useAsDefault BOOLEAN,
    description TEXT,
    owner TEXT(30),
    ui TEXT(30),
    update_time DATETIME DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ','now'))
)
"""


def write_layer_styles(gpkg: str | Path, styles: list[LayerStyle]) -> None:
    """Store default styles for layers of a GeoPackage in its ``layer_styles`` table.

    Parameters
    ----------
    gpkg : path
        An existing GeoPackage (written by crustflow).
    styles : list of LayerStyle
        One per layer; layers missing from the file are skipped.

    Notes
    -----
    The table and its columns follow the convention GDAL documents for GeoPackage layer styles
    (``f_table_catalog``, ``f_table_schema``, ``f_table_name``, ``f_geometry_column``,
    ``styleName``, ``styleQML``, ``styleSLD``, ``useAsDefault``, ``description``, ``owner``,
    ``ui``, ``update_time``); it is registered in ``gpkg_contents`` as an attributes table, as the
    GeoPackage standard asks of non-spatial tables (OGC 12-128r18, section 2.4).
    """
    con = sqlite3.connect(str(gpkg))
    try:
        geometry = dict(con.execute("SELECT table_name, column_name FROM gpkg_geometry_columns"))
        con.execute(_LAYER_STYLES_SQL)
        con.execute(
            "INSERT OR IGNORE INTO gpkg_contents (table_name, data_type, identifier, description) "
            "VALUES ('layer_styles', 'attributes', 'layer_styles', 'default styles of the layers')"
        )
        for s in styles:
            if s.layer not in geometry:
                continue
            con.execute("DELETE FROM layer_styles WHERE f_table_name = ?", (s.layer,))
            con.execute(
                "INSERT INTO layer_styles (f_table_catalog, f_table_schema, f_table_name, "
                "f_geometry_column, styleName, styleQML, styleSLD, useAsDefault, description, "
                "owner, ui) VALUES ('', '', ?, ?, ?, ?, ?, 1, ?, 'crustflow', NULL)",
                (s.layer, geometry[s.layer], s.name, s.qml, s.sld, s.description or s.name),
            )
        con.commit()
    finally:
        con.close()
