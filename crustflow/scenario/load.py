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
from crustflow.scenario.channel import grid_or_value
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
    layers = _parse_roof(raw.get("roof", {}), base, grids)
    crust = raw.get("densities", {}).get("crust")
    if isinstance(crust, dict):
        grid_or_value(crust, "densities.crust", "density", base, "rho_crust", grids)
    placement, top, base_depth = _parse_placement(channel, base, grids)
    return LoadSetup(
        layers=tuple(layers),
        placement=placement,
        top_depth=top,
        base_depth=base_depth,
        grids=grids,
        **_parse_filters(raw.get("load", {})),
    )


def _parse_roof(roof: dict, base: Path, grids: dict) -> list[tuple]:
    """``[[roof.layers]]``: (name, thickness, density) per layer, values in SI or None for grids."""
    if not roof:
        return []
    if set(roof) - {"layers"} or not isinstance(roof.get("layers"), list):
        raise CrustflowInputError(
            "roof layers are written as [[roof.layers]] tables with name, thickness and density"
        )
    layers = []
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
        where = f"roof.layers[{name}]"
        thickness = grid_or_value(
            layer["thickness"], f"{where}.thickness", "length", base, f"roof_thickness_{i}", grids
        )
        density = grid_or_value(
            layer["density"], f"{where}.density", "density", base, f"roof_density_{i}", grids
        )
        if thickness is not None and thickness < 0:
            raise CrustflowInputError(f"{where}.thickness must not be negative")
        if density is not None and not density > 0:
            raise CrustflowInputError(f"{where}.density must be positive")
        layers.append((name, thickness, density))
    return layers


#: Depth keys each channel placement needs.
_PLACEMENT_NEEDS = {
    "crust-base": (),
    "depths": ("top_depth", "base_depth"),
    "fixed-depth": ("top_depth",),
}


def _parse_placement(channel: dict, base: Path, grids: dict):
    """``[channel] placement``, ``top_depth`` and ``base_depth`` (m, or None for grids)."""
    placement = channel.get("placement", "crust-base")
    if placement not in PLACEMENTS:
        raise CrustflowInputError(
            f"channel.placement = {placement!r} is not one of {', '.join(PLACEMENTS)}"
        )
    needs = _PLACEMENT_NEEDS[placement]
    depths = {"top_depth": None, "base_depth": None}
    for key in depths:
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
        if key in channel:
            depths[key] = grid_or_value(channel[key], f"channel.{key}", "length", base, key, grids)
    top, base_depth = depths["top_depth"], depths["base_depth"]
    if top is not None and base_depth is not None and base_depth <= top:
        raise CrustflowInputError(
            "channel.base_depth must be deeper than channel.top_depth (the "
            "channel base lies above its top)"
        )
    return placement, top, base_depth


#: Dimensional keys of ``[load]`` and their kinds of unit.
_FILTER_KINDS = {
    "smoothing": "length",
    "elastic_thickness": "length",
    "youngs_modulus": "pressure",
    "density_contrast": "density",
}


def _parse_filters(table: dict) -> dict:
    """``[load]``: smoothing and the thin elastic crust, SI."""
    values = {}
    for key, kind in _FILTER_KINDS.items():
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
    return values
