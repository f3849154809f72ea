"""The load model's options from the scenario file: roof layers, density grids, channel placement and
load filters (Gaussian smoothing, a thin elastic upper crust).

The physics lives in :mod:`crustflow.physics.column` (density columns, placement) and
:mod:`crustflow.physics.flexure`
(filters); this module parses the ``[[roof.layers]]``, ``[densities] crust``, ``[channel] placement``
and ``[load]`` keys and applies them to a block of cells.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from crustflow.errors import CrustflowInputError
from crustflow.physics.column import PLACEMENTS
from crustflow.scenario.channel import _grid_or_value
from crustflow.units import parse_quantity

__all__ = ["LoadSetup", "parse_load", "LOAD_KEYS"]

#: Keys of the [load] table.
LOAD_KEYS = (
    "smoothing",
    "elastic_thickness",
    "youngs_modulus",
    "poissons_ratio",
    "density_contrast",
)


@dataclass(frozen=True)
class LoadSetup:
    """Load-model options in SI.

    Attributes
    ----------
    layers : tuple
        Roof layers from the top down: (name, thickness m or None, density kg/m^3 or None); None
        where the value is a grid (``grids['roof_thickness_<i>']``, ``grids['roof_density_<i>']``).
    placement : str
        "crust-base" (default), "depths" or "fixed-depth" (crustflow.physics.column.PLACEMENTS).
    top_depth, base_depth : float or None
        Channel top and base depths below sea level, m (scalars; grids in ``grids``).
    smoothing : float or None
        Standard deviation of a Gaussian applied to the load, m.
    elastic_thickness : float or None
        Thickness of a thin elastic upper crust, m.
    youngs_modulus, poissons_ratio : float
        Elastic moduli of that crust (Pa; dimensionless).
    density_contrast : float or None
        Restoring density contrast under the elastic crust, kg/m^3 (default: mantle - crust).
    grids : dict
        Name -> crustflow.scenario.channel.GridInput.
    """

    layers: tuple = ()
    placement: str = "crust-base"
    top_depth: float | None = None
    base_depth: float | None = None
    smoothing: float | None = None
    elastic_thickness: float | None = None
    youngs_modulus: float = 1e11
    poissons_ratio: float = 0.25
    density_contrast: float | None = None
    grids: dict = field(default_factory=dict)

    @property
    def filtered(self) -> bool:
        """Does the load go through a filter over the whole grid?"""
        return bool(self.smoothing) or bool(self.elastic_thickness)

    @property
    def layered(self) -> bool:
        """Is the column more than water over uniform crust?"""
        return bool(self.layers) or "rho_crust" in self.grids

    def describe(self) -> dict:
        """JSON-ready summary for the run manifest."""
        return {
            "roof_layers": [
                {"name": n, "thickness_m": t, "density_kg_m3": d} for n, t, d in self.layers
            ],
            "placement": self.placement,
            "top_depth_m": self.top_depth,
            "base_depth_m": self.base_depth,
            "smoothing_sigma_m": self.smoothing,
            "elastic_thickness_m": self.elastic_thickness,
            "youngs_modulus_Pa": self.youngs_modulus,
            "poissons_ratio": self.poissons_ratio,
            "density_contrast_kg_m3": self.density_contrast,
            "grids": {k: str(g.path) for k, g in self.grids.items()},
        }

    def layers_for(self, cell: dict) -> list[tuple[str, object, object]]:
        """Roof layers with grid values filled in from ``cell`` (SI arrays of a block)."""
        out = []
        for i, (name, thickness, density) in enumerate(self.layers):
            out.append(
                (
                    name,
                    cell.get(f"roof_thickness_{i}", thickness),
                    cell.get(f"roof_density_{i}", density),
                )
            )
        return out


def parse_load(raw: dict, channel: dict, base: Path) -> LoadSetup:
    """Parse ``[[roof.layers]]``, ``[densities] crust`` (grid), ``[channel]`` placement keys and
    ``[load]`` from the scenario dict."""

    grids: dict = {}
    layers = []
    roof = raw.get("roof", {})
    if roof:
        if set(roof) - {"layers"} or not isinstance(roof.get("layers"), list):
            raise CrustflowInputError(
                "roof layers are written as [[roof.layers]] tables with name, thickness and density"
            )
        for i, layer in enumerate(roof["layers"]):
            if not isinstance(layer, dict):
                raise CrustflowInputError("each [[roof.layers]] entry must be a table")
            unknown = set(layer) - {"name", "thickness", "density"}
            if unknown or "thickness" not in layer or "density" not in layer:
                raise CrustflowInputError(
                    f"[[roof.layers]] number {i + 1} needs thickness and density (and a name)"
                    + (f"; unknown key(s) {sorted(unknown)}" if unknown else "")
                )
            name = str(layer.get("name", f"layer {i + 1}"))
            thickness = _grid_or_value(
                layer["thickness"],
                f"roof.layers[{name}].thickness",
                "length",
                base,
                f"roof_thickness_{i}",
                grids,
            )
            density = _grid_or_value(
                layer["density"],
                f"roof.layers[{name}].density",
                "density",
                base,
                f"roof_density_{i}",
                grids,
            )
            if thickness is not None and thickness < 0:
                raise CrustflowInputError(f"roof.layers[{name}].thickness must not be negative")
            if density is not None and not density > 0:
                raise CrustflowInputError(f"roof.layers[{name}].density must be positive")
            layers.append((name, thickness, density))
    crust = raw.get("densities", {}).get("crust")
    if isinstance(crust, dict):
        _grid_or_value(crust, "densities.crust", "density", base, "rho_crust", grids)
    placement = channel.get("placement", "crust-base")
    if placement not in PLACEMENTS:
        raise CrustflowInputError(
            f"channel.placement = {placement!r} is not one of {', '.join(PLACEMENTS)}"
        )
    top = base_depth = None
    needs = {
        "crust-base": (),
        "depths": ("top_depth", "base_depth"),
        "fixed-depth": ("top_depth",),
    }[placement]
    for key in ("top_depth", "base_depth"):
        if key in channel and key not in needs:
            raise CrustflowInputError(
                f"channel.{key} is not used with placement = "
                f"{placement!r}; remove it or change the placement"
            )
        if key in needs and key not in channel:
            raise CrustflowInputError(
                f"channel.placement = {placement!r} needs channel.{key}, "
                f'e.g. {key} = {{ grid = "{key}.tif", units = "km" }}'
            )
    if "top_depth" in channel:
        top = _grid_or_value(
            channel["top_depth"], "channel.top_depth", "length", base, "top_depth", grids
        )
    if "base_depth" in channel:
        base_depth = _grid_or_value(
            channel["base_depth"], "channel.base_depth", "length", base, "base_depth", grids
        )
    if top is not None and base_depth is not None and base_depth <= top:
        raise CrustflowInputError(
            "channel.base_depth must be deeper than channel.top_depth (the "
            "channel base lies above its top)"
        )
    table = raw.get("load", {})
    kinds = {
        "smoothing": "length",
        "elastic_thickness": "length",
        "youngs_modulus": "pressure",
        "density_contrast": "density",
    }
    values = {}
    for key, kind in kinds.items():
        if key in table:
            values[key] = parse_quantity(table[key], f"load.{key}", kind)
    if "poissons_ratio" in table:
        nu = table["poissons_ratio"]
        if isinstance(nu, bool) or not isinstance(nu, int | float) or not 0 <= nu < 0.5:
            raise CrustflowInputError(
                "load.poissons_ratio must be a number from 0 to 0.5, e.g. 0.25"
            )
        values["poissons_ratio"] = float(nu)
    for key in ("smoothing", "elastic_thickness"):
        if key in values and values[key] < 0:
            raise CrustflowInputError(
                f"load.{key} must not be negative (got {table[key]!r}); use "
                "0 or leave it out for none"
            )
    if "youngs_modulus" in values and not values["youngs_modulus"] > 0:
        raise CrustflowInputError("load.youngs_modulus must be positive")
    return LoadSetup(
        layers=tuple(layers),
        placement=placement,
        top_depth=top,
        base_depth=base_depth,
        grids=grids,
        **values,
    )
