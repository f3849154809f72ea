"""Scenario files (TOML): parse, validate and resolve to SI.

A scenario names the input grids and the model parameters. Key names are a contract that scripts rely
on; see the README for the reference. Every dimensional value is a string with units; relative paths are
resolved against the scenario file's folder; unknown keys are errors that suggest the closest valid key.
"""

from __future__ import annotations

import difflib
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from crustflow.errors import CrustflowInputError
from crustflow.scenario.channel import ChannelSetup, parse_channel
from crustflow.scenario.ensemble import parse_ensemble
from crustflow.scenario.evolution import EvolutionSpec, parse_evolution
from crustflow.scenario.fit import FitSpec, parse_fit
from crustflow.scenario.load import LoadSetup, parse_load
from crustflow.scenario.parameters import ModelParameters
from crustflow.scenario.toml import read_toml
from crustflow.units import parse_quantity, parse_vector
from crustflow.variables import VARIABLES

__all__ = [
    "ModelParameters",
    "Scenario",
    "load_scenario",
    "scenario_from_dict",
    "FORMATS",
    "FIGURE_FORMATS",
    "COMPRESSIONS",
]

#: Output formats an ``[output] formats`` list may name.
FORMATS = ("netcdf", "geotiff", "figure")

#: File formats of figures (``[output] figure_formats``); the first default.
FIGURE_FORMATS = ("png", "svg", "pdf")

#: Default and allowed range of ``[output] figure_dpi`` (dots per inch). Common practice, no
#: source: 72 is screen resolution, 600 covers print.
FIGURE_DPI, FIGURE_DPI_RANGE = 150, (50, 600)

#: Codecs an ``[output] compression`` may name (lossless; crustflow.io.writers maps them onto
#: GDAL and netCDF4 options). ``deflate`` (the default) is readable by every GIS and NetCDF reader.
COMPRESSIONS = ("deflate", "zstd", "lerc_zstd", "none")

# Table -> key -> kind ("path", "text", a units kind of crustflow.units.DIMENSIONS, "vector:<kind>",
# "list"). The nested tables are the scenario file's sections.
_SCHEMA: dict[str, Any] = {
    "title": "text",
    "grids": {
        "topography": "path",
        "crust_thickness": "path",
        "moho_depth": "path",
        "reference_thickness": "length",
        "crs": "text",
    },
    "densities": {
        "crust": "density|grid",
        "mantle": "density",
        "water": "density",
        "channel": "density",
    },
    "channel": {
        "thickness": "length|grid",
        "viscosity": "viscosity|grid",
        "rheology": "text",
        "stress_exponent": "number",
        "prefactor": "text",
        "placement": "text",
        "top_depth": "length|grid",
        "base_depth": "length|grid",
        "flow_law": "table",  # checked by crustflow.scenario.channel
        "temperature": "table",  # checked by crustflow.scenario.channel
    },
    "walls": {"upper_velocity": "vector:velocity"},
    "constants": {"gravity": "acceleration"},
    "output": {
        "variables": "list",
        "formats": "list",
        "figure_formats": "list",
        "figure_dpi": "number",
        "compression": "text",
    },
    "budgets": {"sections": "path", "regions": "path"},
    "roof": {"layers": "list"},  # checked by crustflow.scenario.load
    "ensemble": "table",  # checked by crustflow.analyses.ensemble.run.parse_ensemble
    "fit": "table",  # checked by crustflow.scenario.fit.parse_fit
    "evolution": "table",  # checked by crustflow.scenario.evolution
    "load": {
        "smoothing": "length",
        "elastic_thickness": "length",
        "youngs_modulus": "pressure",
        "poissons_ratio": "number",
        "density_contrast": "density",
    },
}


@dataclass(frozen=True)
class Scenario:
    """A parsed scenario: input grids, model parameters and output choices.

    Attributes
    ----------
    title : str
    topography, crust_thickness, moho_depth : Path or None
        Input grid paths (absolute). At most one of crust_thickness and moho_depth.
    crs : str or None
        CRS for grids that carry none of their own.
    parameters : ModelParameters
    variables : tuple of str or None
        Output variables (None: all).
    formats : tuple of str
        Output formats, from :data:`FORMATS`.
    figure_formats : tuple of str
        File formats of every figure, from :data:`FIGURE_FORMATS` (default PNG only).
    figure_dpi : int
        Resolution of every figure, dots per inch.
    compression : str
        Codec of the NetCDF and GeoTIFF outputs, from :data:`COMPRESSIONS` (default "deflate").
    source : Path or None
        The scenario file, if read from one.
    written : dict
        The scenario as written (for the run manifest).
    """

    title: str
    topography: Path
    parameters: ModelParameters
    crust_thickness: Path | None = None
    moho_depth: Path | None = None
    crs: str | None = None
    variables: tuple[str, ...] | None = None
    formats: tuple[str, ...] = FORMATS
    compression: str = "deflate"  #: output codec, from COMPRESSIONS
    source: Path | None = None
    written: dict = field(default_factory=dict, compare=False, repr=False)
    sections: Path | None = None
    regions: Path | None = None
    channel: ChannelSetup = field(default_factory=ChannelSetup)
    load: LoadSetup = field(default_factory=LoadSetup)
    ensemble: object | None = (
        None  #: crustflow.analyses.ensemble.run.EnsembleSpec when [ensemble] is given
    )
    fit: FitSpec | None = None  #: observations, priors and sampler when [fit] is given
    figure_formats: tuple[str, ...] = FIGURE_FORMATS[:1]
    figure_dpi: int = FIGURE_DPI
    evolution: EvolutionSpec | None = None  #: the [evolution] table, when given

    def resolved(self) -> dict:
        """The scenario resolved to SI units, as a JSON-ready dict."""
        out = {
            "title": self.title,
            "grids": {
                "topography": str(self.topography),
                "crust_thickness": str(self.crust_thickness) if self.crust_thickness else None,
                "moho_depth": str(self.moho_depth) if self.moho_depth else None,
                "crs": self.crs,
            },
            "parameters_SI": asdict(self.parameters),
            "channel": self.channel.describe(),
            "load": self.load.describe(),
            "budgets": {
                "sections": str(self.sections) if self.sections else None,
                "regions": str(self.regions) if self.regions else None,
            },
            "output": {
                "variables": list(self.variables) if self.variables else "all",
                "formats": list(self.formats),
                "figure_formats": list(self.figure_formats),
                "figure_dpi": self.figure_dpi,
                "compression": self.compression,
            },
        }
        return out

    @property
    def input_paths(self) -> list[Path]:
        """Every input file the scenario names."""
        paths = (
            self.topography,
            self.crust_thickness,
            self.moho_depth,
            self.sections,
            self.regions,
        )
        grids = tuple(g.path for g in (*self.channel.grids.values(), *self.load.grids.values()))
        return [p for p in paths + grids if p is not None]


def _unknown_key(key: str, valid: list[str], where: str) -> CrustflowInputError:
    close = difflib.get_close_matches(key, valid, n=1, cutoff=0.5)
    hint = f"did you mean '{close[0]}'?" if close else f"valid keys: {', '.join(sorted(valid))}"
    return CrustflowInputError(f"unknown key '{key}' in {where}; {hint}")


def _check_keys(raw: dict, schema: dict, where: str) -> None:
    for key, value in raw.items():
        if key not in schema:
            raise _unknown_key(key, list(schema), where)
        if isinstance(schema[key], dict):
            if not isinstance(value, dict):
                raise CrustflowInputError(
                    f"[{key}] must be a table (a [{key}] section), not a value"
                )
            _check_keys(value, schema[key], f"[{key}]")
        elif isinstance(value, dict) and not schema[key].endswith(("|grid", "table")):
            raise CrustflowInputError(
                f"{where.strip('[]') or 'top level'} key '{key}' takes a value, not a table"
            )


def _path(value: object, key: str, base: Path) -> Path:
    if not isinstance(value, str) or not value.strip():
        raise CrustflowInputError(f'{key} must be a file path in quotes, e.g. {key} = "topo.tif"')
    path = Path(value).expanduser()
    return path if path.is_absolute() else (base / path)


def scenario_from_dict(
    raw: dict, base_dir: str | Path = ".", source: Path | None = None
) -> Scenario:
    """Build a :class:`Scenario` from a dict shaped like the TOML file.

    Parameters
    ----------
    raw : dict
        The scenario as nested tables (what :func:`tomllib.load` returns).
    base_dir : path
        Folder against which relative grid paths are resolved.
    source : Path, optional
        The file the dict came from (recorded in outputs).

    Returns
    -------
    Scenario

    Raises
    ------
    CrustflowInputError
        Unknown keys, missing required keys, bare numbers for dimensional keys, bad values.
    """
    base = Path(base_dir).resolve()
    _check_keys(raw, _SCHEMA, "the scenario's top level")
    chan = raw.get("channel", {})
    thickness, viscosity, channel_setup = parse_channel(chan, base)
    grids = _parse_grids(raw.get("grids"), base)
    params = _parse_parameters(raw, thickness, viscosity, grids.pop("reference_thickness"))
    title = raw.get("title", source.stem if source else "crustflow scenario")
    if not isinstance(title, str):
        raise CrustflowInputError('title must be a string in quotes, e.g. title = "My plateau"')
    return Scenario(
        title=title,
        parameters=params,
        channel=channel_setup,
        load=parse_load(raw, chan, base),
        **grids,
        **_parse_output(raw.get("output", {})),
        **_parse_budgets(raw.get("budgets", {}), base),
        ensemble=_parse_ensemble_table(raw, params),
        fit=parse_fit(raw["fit"], params, base) if "fit" in raw else None,
        evolution=parse_evolution(raw.get("evolution")),
        source=source,
        written=raw,
    )


def _parse_grids(grids: dict | None, base: Path) -> dict:
    """``[grids]``: input paths, the CRS and (Airy case) the reference thickness."""
    if not grids or "topography" not in grids:
        raise CrustflowInputError(
            'the scenario needs [grids] topography = "topo.tif" (a raster of '
            "surface elevation in m)"
        )
    if "crust_thickness" in grids and "moho_depth" in grids:
        raise CrustflowInputError(
            "give at most one of grids.crust_thickness and grids.moho_depth; remove the other"
        )
    reference = None
    if "reference_thickness" in grids:
        if "crust_thickness" in grids or "moho_depth" in grids:
            raise CrustflowInputError(
                "grids.reference_thickness is for the Airy case only; remove it or "
                "remove grids.crust_thickness / grids.moho_depth"
            )
        reference = parse_quantity(
            grids["reference_thickness"], "grids.reference_thickness", "length"
        )
    elif "crust_thickness" not in grids and "moho_depth" not in grids:
        raise CrustflowInputError(
            "with neither grids.crust_thickness nor grids.moho_depth, give "
            'grids.reference_thickness (e.g. "35 km") for Airy isostasy'
        )
    crs = grids.get("crs")
    if crs is not None and not isinstance(crs, str):
        raise CrustflowInputError('grids.crs must be a string, e.g. crs = "EPSG:32633"')
    optional = {
        key: _path(grids[key], f"grids.{key}", base) if key in grids else None
        for key in ("crust_thickness", "moho_depth")
    }
    return {
        "topography": _path(grids["topography"], "grids.topography", base),
        **optional,
        "crs": crs,
        "reference_thickness": reference,
    }


def _parse_parameters(raw: dict, thickness, viscosity, reference) -> ModelParameters:
    """``[densities]``, ``[walls]`` and ``[constants]`` with the channel's scalar values."""
    dens = raw.get("densities", {})
    wall = (0.0, 0.0)
    if "upper_velocity" in raw.get("walls", {}):
        wall = parse_vector(raw["walls"]["upper_velocity"], "walls.upper_velocity", "velocity")
    kw = {}
    for key, name in (
        ("crust", "rho_crust"),
        ("mantle", "rho_mantle"),
        ("water", "rho_water"),
        ("channel", "rho_channel"),
    ):
        if key in dens and not (key == "crust" and isinstance(dens[key], dict)):
            kw[name] = parse_quantity(dens[key], f"densities.{key}", "density")
    if "gravity" in raw.get("constants", {}):
        kw["gravity"] = parse_quantity(
            raw["constants"]["gravity"], "constants.gravity", "acceleration"
        )
    return ModelParameters(
        channel_thickness=thickness,
        viscosity=viscosity,
        wall_east=wall[0],
        wall_north=wall[1],
        reference_thickness=reference,
        **kw,
    )


def _parse_output(output: dict) -> dict:
    """``[output]``: the variables and formats to write."""
    variables = output.get("variables")
    if variables is not None:
        if not isinstance(variables, list) or not all(isinstance(v, str) for v in variables):
            raise CrustflowInputError(
                'output.variables must be a list of names, e.g. ["flux_east"]'
            )
        for name in variables:
            if name not in VARIABLES:
                raise _unknown_key(name, list(VARIABLES), "output.variables")
        variables = tuple(dict.fromkeys(variables))
    formats = output.get("formats", list(FORMATS))
    if not isinstance(formats, list) or not all(isinstance(f, str) for f in formats):
        raise CrustflowInputError(
            'output.formats must be a list, e.g. ["netcdf", "geotiff", "figure"]'
        )
    for name in formats:
        if name not in FORMATS:
            raise _unknown_key(name, list(FORMATS), "output.formats")
    compression = output.get("compression", "deflate")
    if compression not in COMPRESSIONS:
        raise CrustflowInputError(
            f"output.compression is {compression!r}; give one of "
            f'{", ".join(repr(c) for c in COMPRESSIONS)} ("deflate", the default, is read '
            'everywhere; "zstd" writes faster)'
        )
    return {
        "variables": variables,
        "formats": tuple(dict.fromkeys(formats)),
        "compression": compression,
        **_parse_figure_options(output),
    }


def _parse_figure_options(output: dict) -> dict:
    """``[output] figure_formats`` and ``figure_dpi``."""
    formats = output.get("figure_formats", list(FIGURE_FORMATS[:1]))
    if not isinstance(formats, list) or not formats or not all(isinstance(f, str) for f in formats):
        raise CrustflowInputError(
            'output.figure_formats must be a non-empty list, e.g. ["png", "svg", "pdf"]'
        )
    for name in formats:
        if name.lower() not in FIGURE_FORMATS:
            raise CrustflowInputError(
                f"output.figure_formats: '{name}' is not a figure format; use any of "
                + ", ".join(f'"{f}"' for f in FIGURE_FORMATS)
            )
    dpi = output.get("figure_dpi", FIGURE_DPI)
    low, high = FIGURE_DPI_RANGE
    if isinstance(dpi, bool) or not isinstance(dpi, int | float) or dpi != int(dpi):
        raise CrustflowInputError(
            f"output.figure_dpi must be a whole number of dots per inch, e.g. figure_dpi = "
            f"{FIGURE_DPI}; got {dpi!r}"
        )
    if not low <= dpi <= high:
        raise CrustflowInputError(
            f"output.figure_dpi is {dpi:g}; give {low} to {high} dots per inch "
            f"(e.g. 150 for screens, 300 for print)"
        )
    return {
        "figure_formats": tuple(dict.fromkeys(f.lower() for f in formats)),
        "figure_dpi": int(dpi),
    }


def _parse_budgets(budgets: dict, base: Path) -> dict:
    """``[budgets]``: the section and region files."""
    return {
        key: _path(budgets[key], f"budgets.{key}", base) if key in budgets else None
        for key in ("sections", "regions")
    }


def _parse_ensemble_table(raw: dict, params: ModelParameters):
    """``[ensemble]``: the parameter distributions (see :mod:`crustflow.scenario.ensemble`)."""
    if "ensemble" not in raw:
        return None
    if not isinstance(raw["ensemble"], dict):
        raise CrustflowInputError(
            "[ensemble] must be a table with members, seed and [ensemble.vary]"
        )
    return parse_ensemble(raw["ensemble"], params)


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario file (TOML).

    Parameters
    ----------
    path : path
        The scenario file. Relative grid paths inside it resolve against its folder.

    Returns
    -------
    Scenario

    Raises
    ------
    CrustflowInputError
        Missing or unreadable file, TOML syntax errors, and every check of :func:`scenario_from_dict`.
    """
    path = Path(path).expanduser()
    if not path.is_file():
        raise CrustflowInputError(f"scenario file not found: {path}; check the path")
    raw = read_toml(path)
    return scenario_from_dict(raw, base_dir=path.parent, source=path.resolve())
