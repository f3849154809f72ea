"""What a run of the plateau sample leaves for readers: figures in every requested format and
resolution, the GIS styles, and ``report.html`` (parsed here, and opened in headless Chromium
when the system has it).

The plateau is the invented sample scenario (crustflow.samples). Figure files are checked at the
file level (PNG dpi through PIL, SVG parsed with xml.etree, PDF header), not by pixels.
"""

from __future__ import annotations

import json
import re
import sqlite3
import subprocess
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import rasterio
from PIL import Image

from crustflow.cli import main
from crustflow.commands.report_page import CONTENT_POLICY
from crustflow.samples import demo_scenario
from crustflow.scenario import load_scenario
from crustflow.variables import CAUTION, VARIABLES

CHROMIUM = Path("/usr/bin/chromium")

#: Every figure stem the plateau run writes (two sections in its margins file).
FIGURES = [
    "flux_map",
    "rates_map",
    "budget_map",
    "section_Varnessa_Scarp",
    "section_Eastern_flank",
]


def _scenario_with(tmp_path: Path, extra: str) -> Path:
    source = demo_scenario("plateau")
    text = re.sub(
        r'= "([^"]+\.(tif|geojson))"',
        lambda m: f'= "{source.parent / m.group(1)}"',
        source.read_text(),
    )
    path = tmp_path / "plateau.toml"
    path.write_text(text + "\n" + extra)
    return path


@pytest.fixture(scope="module")
def plateau_run(tmp_path_factory):
    """The plateau sample with every figure format at 200 dpi."""
    tmp = tmp_path_factory.mktemp("plateau")
    scenario = _scenario_with(
        tmp, '[output]\nfigure_formats = ["png", "svg", "pdf"]\nfigure_dpi = 200\n'
    )
    out = tmp / "out"
    assert main(["run", str(scenario), "--out", str(out), "--quiet"]) == 0
    return out


def test_every_figure_in_every_format_at_the_dpi(plateau_run):
    names = {p.name for p in plateau_run.iterdir()}
    assert "rates_map.png" in names
    for stem in FIGURES:
        assert {f"{stem}.png", f"{stem}.svg", f"{stem}.pdf"} <= names, stem
        with Image.open(plateau_run / f"{stem}.png") as img:
            assert img.info["dpi"] == pytest.approx((200, 200), abs=0.01)
        assert ET.parse(plateau_run / f"{stem}.svg").getroot().tag.endswith("svg")
        assert (plateau_run / f"{stem}.pdf").read_bytes()[:5] == b"%PDF-"
    manifest = json.loads((plateau_run / "run.json").read_text())
    assert {f"{s}.{f}" for s in FIGURES for f in ("png", "svg", "pdf")} <= set(manifest["outputs"])
    output = manifest["scenario_resolved_SI"]["output"]
    assert output["figure_formats"] == ["png", "svg", "pdf"] and output["figure_dpi"] == 200


def test_every_geotiff_has_a_style_statistics_and_overviews(plateau_run):
    tifs = sorted(plateau_run.glob("*.tif"))
    assert {p.stem for p in tifs} == set(VARIABLES)
    outputs = json.loads((plateau_run / "run.json").read_text())["outputs"]
    for tif in tifs:
        qml = tif.with_suffix(".qml")
        assert qml.name in outputs
        renderer = ET.parse(qml).getroot().find("pipe/rasterrenderer")
        flag = VARIABLES[tif.stem].flag
        assert renderer.get("type") == ("paletted" if flag else "singlebandpseudocolor")
        with rasterio.open(tif) as src:
            assert "STATISTICS_MEAN" in src.tags(1) and src.overviews(1)
            if flag:
                assert src.colormap(1)[1][3] == 255 and "CATEGORY_1" in src.tags(1)


def test_geopackages_carry_layer_styles(plateau_run):
    for name, layers in (
        ("budgets.gpkg", {"sections", "regions"}),
        ("flux_arrows.gpkg", {"arrows"}),
    ):
        con = sqlite3.connect(plateau_run / name)
        try:
            styled = {r[0] for r in con.execute("SELECT f_table_name FROM layer_styles")}
        finally:
            con.close()
        assert styled == layers


class _Page(HTMLParser):
    """Collects the references, images, tables and text of a page."""

    def __init__(self):
        super().__init__()
        self.refs, self.images, self.tables, self.text, self.meta = [], [], [], [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        for key in ("src", "href", "action", "data", "poster"):
            if key in attrs:
                self.refs.append((tag, key, attrs[key]))
        if tag == "img":
            self.images.append(attrs.get("src", ""))
        if tag == "table":
            self.tables.append(attrs.get("class", ""))
        if tag == "meta" and attrs.get("http-equiv") == "Content-Security-Policy":
            self.meta.append(attrs.get("content"))

    def handle_data(self, data):
        self.text.append(data)


def test_report_is_self_contained_and_complete(plateau_run):
    html = (plateau_run / "report.html").read_text(encoding="utf-8")
    parsed = _Page()
    parsed.feed(html)
    text = " ".join(" ".join(parsed.text).split())
    assert len(parsed.images) == len(FIGURES)  # each figure once, PNG preferred
    assert all(src.startswith("data:image/png;base64,") for src in parsed.images)
    for tag, key, value in parsed.refs:  # nothing but data: URIs and in-page anchors
        assert value.startswith(("data:", "#")), (tag, key, value[:60])
    assert not re.search(r"(?i)(https?:)?//[a-z0-9.-]+\.[a-z]{2,}", html.split("<body>", 1)[1])
    assert parsed.meta == [CONTENT_POLICY]
    assert CAUTION in text
    assert "budgets" in parsed.tables and "Varnessa Scarp" in text
    assert "Warnings" in text and "backflow" in text
    assert "Plateau interior" in text and "km³/Myr" in text
    assert "Varnessa Plateau (invented)" in text and "SHA-256" in text
    manifest = json.loads((plateau_run / "run.json").read_text())
    for path, info in manifest["inputs"].items():
        assert path in text and info["sha256"] in text
    assert manifest["versions"]["GDAL"] in text
    assert "report.html" in manifest["outputs"]
    assert "@media print" in html


def test_report_warns_about_thin_channel_cells_and_uncovered_features(tmp_path):
    import pandas as pd

    from crustflow.commands.report import write_report

    table = pd.DataFrame(
        [
            {
                "name": "offshore line",
                "kind": "section",
                "volume_flux_km3_per_Myr": 1.0,
                "volume_flux_m3_per_yr": 1000.0,
                "length_km": 10.0,
                "area_km2": None,
                "covered_fraction": 0.5,
            }
        ]
    )
    result = {"table": table, "thin_channel_cells": 12, "unconverged_cells": 3, "shape": [2, 2]}
    scenario = load_scenario(_scenario_with(tmp_path, ""))
    write_report(tmp_path, {"created": "now"}, result, scenario, [])
    page = (tmp_path / "report.html").read_text()
    assert "12 cells where the load varies on wavelengths shorter" in page
    assert "3 cells where the per-cell solver did not converge" in page
    assert "section &#x27;offshore line&#x27;: only 50.0% lies on cells with data" in page


_CHECK_SCRIPT = """<script>
window.addEventListener('securitypolicyviolation', function () {
  document.body.setAttribute('data-violations',
    String(Number(document.body.getAttribute('data-violations') || 0) + 1));
});
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var shown = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; });
  var remote = performance.getEntriesByType('resource').filter(function (e) {
    return /^https?:/.test(e.name); });
  document.body.setAttribute('data-images', String(imgs.length));
  document.body.setAttribute('data-shown', String(shown.length));
  document.body.setAttribute('data-remote', String(remote.length));
});
</script>"""


@pytest.mark.skipif(
    not CHROMIUM.exists(), reason="needs /usr/bin/chromium (apt-get install chromium)"
)
def test_report_renders_in_headless_chromium(plateau_run, tmp_path):
    html = (plateau_run / "report.html").read_text(encoding="utf-8")
    # The report forbids scripts; a copy for this test allows only the inline check script.
    checked = html.replace(CONTENT_POLICY, CONTENT_POLICY + "; script-src 'unsafe-inline'")
    checked = checked.replace("</body>", _CHECK_SCRIPT + "</body>")
    page = tmp_path / "report_check.html"
    page.write_text(checked, encoding="utf-8")
    flags = [
        str(CHROMIUM),
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}",
        "--virtual-time-budget=5000",
    ]
    dom = subprocess.run(
        flags + ["--dump-dom", page.as_uri()], capture_output=True, text=True, timeout=120
    ).stdout
    body = re.search(r"<body([^>]*)>", dom).group(1)
    attrs = dict(re.findall(r'data-([a-z-]+)="([^"]*)"', body))
    assert attrs["images"] == str(len(FIGURES)) and attrs["shown"] == attrs["images"]
    assert attrs["remote"] == "0" and "violations" not in attrs
    # The report itself (scripts forbidden) renders to a screenshot.
    shot = tmp_path / "report.png"
    subprocess.run(
        flags
        + [
            "--window-size=1366,900",
            f"--screenshot={shot}",
            (plateau_run / "report.html").as_uri(),
        ],
        capture_output=True,
        timeout=120,
    )
    with Image.open(shot) as img:
        grey = np.asarray(img.convert("L"))
    assert grey.shape == (900, 1366) and np.unique(grey).size > 10  # not a blank page
    # ... and prints (the print style sheet applies): a PDF of several pages.
    pdf = tmp_path / "report.pdf"
    subprocess.run(
        flags
        + [
            "--no-pdf-header-footer",
            f"--print-to-pdf={pdf}",
            (plateau_run / "report.html").as_uri(),
        ],
        capture_output=True,
        timeout=120,
    )
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF") and len(re.findall(rb"/Type\s*/Page[^s]", data)) > 1
