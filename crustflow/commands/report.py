"""``report.html``: one page a colleague can open to see what a run did and what came out.

Gathers the run's manifest (scenario as written and resolved, inputs with checksums, versions),
its summary (cell counts behind the warnings), the statistics of every output GeoTIFF, the budget
table and the figures, and lays them out with :mod:`crustflow.commands.report_page`.
"""

from __future__ import annotations

import json
from html import escape
from pathlib import Path

import numpy as np

from crustflow.commands import report_page as page
from crustflow.io.display import display_name, display_units
from crustflow.io.styles import SAMPLE_MEDIAN_TAG, preview_sample
from crustflow.variables import CAUTION, VARIABLES

__all__ = ["write_report", "REPORT", "figure_caption"]

#: File name of the report page.
REPORT = "report.html"

#: SI units of the resolved parameters (crustflow.scenario.parameters.ModelParameters).
PARAMETER_UNITS = {
    "channel_thickness": "m",
    "viscosity": "Pa·s",
    "rho_crust": "kg/m³",
    "rho_mantle": "kg/m³",
    "rho_water": "kg/m³",
    "rho_channel": "kg/m³",
    "wall_east": "m/s",
    "wall_north": "m/s",
    "gravity": "m/s²",
    "reference_thickness": "m",
}

#: Captions of the figures, by file stem (prefix match for per-feature and per-variable names).
CAPTIONS = {
    "flux_map": "Channel volume flux per unit width (colours, log scale) and its direction "
    "(arrows, length proportional to magnitude), over elevation contours and the coastline.",
    "rates_map": "Crustal thickening rate (left) and isostatic surface uplift rate (right); "
    "colours centred on zero with symmetric limits at the 98th percentile of |value|.",
    "budget_map": "Volume budgets: sections labelled with their volume flux (positive to the "
    "right of the line's direction), regions with their net inflow.",
    "section_": "Normal flux along a section (positive to the right-hand side walking from the "
    "first to the last vertex) with its total.",
    "ensemble_budgets": "Histograms of the members' volume budgets with mean and percentiles.",
    "ensemble_": "Median over the ensemble members and spread (95th minus 5th percentile).",
    "_exceedance": "Probability (share of members) that the variable exceeds each threshold.",
    "profile_": "Velocity and shear stress across the channel at a site.",
}

#: Share of a budget feature on cells with data below which the report warns (the rest is
#: dropped from its budget). Project choice: 0.1 % tolerates round-off at the grid's edge.
COVERED_ENOUGH = 0.999

#: Figures shown first, in this order; the others follow in the order written.
FIRST_FIGURES = ("flux_map", "rates_map", "budget_map")

#: Figure formats embedded, in order of preference (PDF cannot be shown inline).
EMBEDDABLE = (("png", "image/png"), ("svg", "image/svg+xml"))


def figure_caption(stem: str) -> str:
    """The caption of a figure file stem."""
    for key, text in CAPTIONS.items():
        if (
            stem == key
            or (key.endswith("_") and stem.startswith(key))
            or (key.startswith("_") and stem.endswith(key))
        ):
            return text
    return "Figure of the run."


def _number(value) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "–"
    if isinstance(value, int | np.integer):
        return f"{value:,}"
    return f"{float(value):.4g}"


def _variable_rows(folder: Path, written: list[str], ranges: dict) -> list[list]:
    """Min, median, max, mean and unit of every output variable (from its GeoTIFF's statistics and
    the decimated sample that sets its colours; else from the run's summary ranges)."""
    import rasterio

    rows = []
    for name, var in VARIABLES.items():
        tif = folder / f"{name}.tif"
        units = display_units(var.units) or "–"
        if f"{name}.tif" in written and tif.is_file():
            with rasterio.open(tif) as src:
                tags = src.tags(1)
            if SAMPLE_MEDIAN_TAG in tags:  # written by the GeoTIFF writer: no read-back
                median = float(tags[SAMPLE_MEDIAN_TAG])
            else:
                sample = preview_sample(tif)
                finite = sample[np.isfinite(sample)]
                median = float(np.median(finite)) if finite.size else None
            low, high = (
                float(tags[f"STATISTICS_{k}"]) if f"STATISTICS_{k}" in tags else None
                for k in ("MINIMUM", "MAXIMUM")
            )
            mean = float(tags["STATISTICS_MEAN"]) if "STATISTICS_MEAN" in tags else None
            rows.append(
                [
                    display_name(name),
                    name,
                    _number(low),
                    _number(median),
                    _number(high),
                    _number(mean),
                    units,
                ]
            )
        elif name in (ranges or {}):
            low, high = ranges[name]
            rows.append([display_name(name), name, _number(low), "–", _number(high), "–", units])
    return rows


def _warnings(result: dict, budget_table) -> list[str]:
    out = []
    counts = (
        (
            "thin_channel_cells",
            "cells where the load varies on wavelengths shorter than three "
            "channel thicknesses (thin-channel limit; see thin_channel_warning.tif)",
        ),
        (
            "unconverged_cells",
            "cells where the per-cell solver did not converge (see solver_converged.tif)",
        ),
        (
            "excluded_cells",
            "cells left out because their column is not valid "
            "(channel above the surface or below the Moho)",
        ),
    )
    for key, text in counts:
        value = result.get(key)
        if isinstance(value, dict):
            value = sum(int(v) for v in value.values() if isinstance(v, int | np.integer))
        if value:
            out.append(f"{int(value):,} {text}.")
    for name in result.get("skipped_variables") or []:
        out.append(f"{name} was not written: it needs the whole grid in memory.")
    if budget_table is not None and len(budget_table):
        for _, row in budget_table.iterrows():
            covered = row.get("covered_fraction")
            if covered is not None and np.isfinite(covered) and covered < COVERED_ENOUGH:
                out.append(
                    f"{row['kind']} '{row['name']}': only {covered:.1%} lies on cells with data; "
                    "the part outside the data is dropped from its budget."
                )
    return out


def _budget_html(budget_table) -> str:
    if budget_table is None:
        return page.paragraph("The scenario names no sections or regions ([budgets]).")
    if not len(budget_table):
        return page.paragraph("No budget features.")
    header = [
        "name",
        "kind",
        "volume flux (km³/Myr)",
        "volume flux (m³/yr)",
        "length (km)",
        "area (km²)",
        "covered by data",
    ]
    rows = [
        [
            r["name"],
            r["kind"],
            _number(r["volume_flux_km3_per_Myr"]),
            _number(r["volume_flux_m3_per_yr"]),
            _number(r.get("length_km")),
            _number(r.get("area_km2")),
            f"{r['covered_fraction']:.0%}",
        ]
        for _, r in budget_table.iterrows()
    ]
    note = page.paragraph(
        "Sections: positive towards the right-hand side walking from the first to the last "
        "vertex. Regions: net inflow (positive = volume gained)."
    )
    return page.table(header, rows, numeric={2, 3, 4, 5, 6}, cls="budgets") + note


def _figures_html(folder: Path, written: list[str]) -> str:
    stems = list(
        dict.fromkeys(Path(n).stem for n in written if n.endswith((".png", ".svg", ".pdf")))
    )
    stems = [s for s in FIRST_FIGURES if s in stems] + [s for s in stems if s not in FIRST_FIGURES]
    blocks = []
    for stem in stems:
        for suffix, mime in EMBEDDABLE:
            path = folder / f"{stem}.{suffix}"
            if f"{stem}.{suffix}" in written and path.is_file():
                blocks.append(
                    page.figure_block(path.read_bytes(), mime, stem, figure_caption(stem))
                )
                break
        else:
            blocks.append(page.paragraph(f"{stem}: written as PDF only (not shown here)."))
    return "\n".join(blocks) or page.paragraph("No figures were asked for ([output] formats).")


def _scenario_html(manifest: dict) -> str:
    resolved = manifest.get("scenario_resolved_SI", {})
    params = resolved.get("parameters_SI", {})
    rows = [[k, _number(v), PARAMETER_UNITS.get(k, "")] for k, v in params.items() if v is not None]
    parts = [
        "<h3>Model parameters, resolved to SI units</h3>",
        page.table(["parameter", "value", "unit"], rows, numeric={1}),
    ]
    for key in ("channel", "load", "output"):
        flat = [(f"{key}.{k}", json.dumps(v)) for k, v in resolved.get(key, {}).items()]
        if flat:
            parts += [f"<h3>[{key}] as resolved</h3>", page.definition_list(flat, mono=True)]
    written = json.dumps(manifest.get("scenario_as_written", {}), indent=2)
    parts += [
        "<h3>Scenario as written (units as given)</h3>",
        f'<pre class="mono">{escape(written)}</pre>',
    ]
    return "\n".join(parts)


def _inputs_html(manifest: dict) -> str:
    inputs = [[path, info.get("sha256", "")] for path, info in manifest.get("inputs", {}).items()]
    versions = list(manifest.get("versions", {}).items())
    return (
        page.table(["input file", "SHA-256"], inputs, cls="mono")
        + "<h3>Versions</h3>"
        + page.definition_list(versions)
    )


def _job_line(manifest: dict, scenario, result: dict) -> str:
    shape = result.get("shape") or manifest.get("grid", {}).get("shape") or ["?", "?"]
    crs = manifest.get("alignment", {}).get("topography", {}).get("crs") or scenario.crs or "?"
    rheology = manifest.get("scenario_resolved_SI", {}).get("channel", {}).get("rheology", "?")
    return (
        f"crustflow run of \u201c{scenario.title}\u201d on a {shape[0]} \u00d7 {shape[1]} grid "
        f"({crs}), {rheology} channel, created {manifest.get('created', '?')}."
    )


def write_report(folder: str | Path, manifest: dict, result: dict, scenario, written) -> str:
    """Write ``report.html`` into a run folder; returns its file name.

    Parameters
    ----------
    folder : path
        The run's (temporary) folder, holding the outputs listed in ``written``.
    manifest : dict
        The run manifest (:func:`crustflow.io.folders.base_manifest` plus run entries).
    result : dict
        The strip run's result (cell counts, ranges, shape) with ``table`` (budgets or None).
    scenario : Scenario
    written : list of str
        The files of the run.
    """
    from crustflow._version import __version__

    folder = Path(folder)
    table = result.get("table")
    summary_rows = _variable_rows(folder, list(written), result.get("ranges", {}))
    summary = page.table(
        ["variable", "name in files", "minimum", "median", "maximum", "mean", "unit"],
        summary_rows,
        numeric={2, 3, 4, 5},
    ) + page.paragraph(
        "Minimum, maximum and mean over every cell with data (GeoTIFF statistics); median over "
        "the decimated sample (at most 800 cells a side) that also sets the colour limits. "
        "Rates use the Julian year (365.25 d)."
    )
    warnings = _warnings(result, table)
    warnings_html = (
        page.bullet_list(warnings, cls="warning")
        if warnings
        else page.paragraph(
            "None: no thin-channel, unconverged or excluded cells, no dropped features."
        )
    )
    if result.get("backflow_cells"):
        warnings_html += page.paragraph(
            f"For information: {result['backflow_cells']:,} of {result.get('valid_cells', 0):,} "
            "cells have backflow (part of the channel moves against the net flux)."
        )
    html = page.render_page(
        title=f"crustflow run: {scenario.title}",
        job=_job_line(manifest, scenario, result),
        caution=CAUTION,
        summary=summary,
        warnings=warnings_html,
        budgets=_budget_html(table),
        figures=_figures_html(folder, list(written)),
        scenario=_scenario_html(manifest),
        inputs=_inputs_html(manifest),
        footer=f"Written by crustflow {__version__}. Files of this run: "
        + ", ".join(list(written) + ["run.json"]),
        generator=f"crustflow {__version__}",
    )
    (folder / REPORT).write_text(html, encoding="utf-8")
    return REPORT
