"""The channel's rheology and its cell-by-cell inputs, from the scenario file to the per-cell solvers.

The ``[channel]`` table chooses the rheology (``"newtonian"``, ``"power-law"``, ``"flow-law"``) and may
give the thickness, the viscosity and the wall temperatures as grids. This module parses those keys
and dispatches each block of cells to the right solver of :mod:`crustflow.physics.channel` or
:mod:`crustflow.physics.rheology`, returning the same variables for every rheology.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from crustflow.errors import CrustflowInputError
from crustflow.physics import flowlaws
from crustflow.physics.flowlaws import MAX_TEMPERATURE
from crustflow.units import parse_prefactor, parse_quantity, unit_conversion

__all__ = [
    "GridInput",
    "ChannelSetup",
    "RHEOLOGIES",
    "parse_channel",
    "TEMPERATURE_KEYS",
]

#: Rheologies a scenario may name.
RHEOLOGIES = ("newtonian", "power-law", "flow-law")

#: Keys of [channel.temperature].
TEMPERATURE_KEYS = (
    "top",
    "base",
    "surface_heat_flow",
    "conductivity",
    "heat_production",
    "heat_production_depth",
    "surface_temperature",
)

#: Default geotherm parameters (common practice, no source; Turcotte & Schubert 2002, ch. 4 use
#: values of this size): conductivity W/m/K, heat production length scale m, surface temperature K.
GEOTHERM_DEFAULTS = {
    "conductivity": 2.5,
    "heat_production": 0.0,
    "heat_production_depth": 10e3,
    "surface_temperature": 283.15,
}


@dataclass(frozen=True)
class GridInput:
    """A model parameter given as a grid: file, and how its values convert to SI.

    ``si = (10 ** value if log10 else value) * scale + offset``.
    """

    key: str
    path: Path
    scale: float = 1.0
    offset: float = 0.0
    log10: bool = False

    def to_si(self, values: np.ndarray) -> np.ndarray:
        """Convert grid values to SI."""
        v = np.power(10.0, values) if self.log10 else values
        return v * self.scale + self.offset if (self.scale, self.offset) != (1.0, 0.0) else v


@dataclass(frozen=True)
class ChannelSetup:
    """Rheology and per-cell inputs of the channel (SI).

    Attributes
    ----------
    rheology : str
        One of :data:`RHEOLOGIES`.
    stress_exponent : float or None
        n of a power-law or flow-law channel.
    prefactor : float or None
        Simple-shear prefactor A of a power-law channel, Pa^-n s^-1 (``du/dzeta = A |tau|^(n-1) tau``).
    law : crustflow.physics.flowlaws.FlowLaw or None
        Laboratory flow law (axial form; converted to simple shear as in SCIENCE.md).
    reference_strain_rate : float or None
        1/s; reported only (effective Newtonian viscosity of the law at the wall temperatures).
    temperature_top, temperature_base : float or None
        Wall temperatures, K (scalars; grids are in ``grids``).
    geotherm : dict or None
        Steady geotherm parameters (SI) when the wall temperatures come from surface heat flow.
    grids : dict
        Parameter name -> :class:`GridInput` (``channel_thickness``, ``viscosity``,
        ``temperature_top``, ``temperature_base``, ``surface_heat_flow``).
    """

    rheology: str = "newtonian"
    stress_exponent: float | None = None
    prefactor: float | None = None
    law: object | None = None
    reference_strain_rate: float | None = None
    temperature_top: float | None = None
    temperature_base: float | None = None
    geotherm: dict | None = None
    grids: dict = field(default_factory=dict)

    @property
    def uses_temperature(self) -> bool:
        return self.rheology == "flow-law"

    def describe(self) -> dict:
        """JSON-ready summary for the run manifest."""
        out = {"rheology": self.rheology}
        if self.stress_exponent is not None:
            out["stress_exponent"] = self.stress_exponent
        if self.prefactor is not None:
            out["prefactor_Pa^-n_s^-1"] = self.prefactor
        if self.law is not None:
            law = self.law
            out["flow_law"] = {
                "name": law.name,
                "A_axial_SI": law.axial_prefactor_si,
                "n": law.stress_exponent,
                "Q_J_per_mol": law.activation_energy,
                "reference": law.reference,
                "read_from": law.read_from,
                "conversion": "A_shear = 3^((n+1)/2) A_axial (SCIENCE.md)",
            }
        for key in ("temperature_top", "temperature_base", "reference_strain_rate"):
            if getattr(self, key) is not None:
                out[key] = getattr(self, key)
        if self.geotherm:
            out["geotherm"] = self.geotherm
        out["grids"] = {k: str(g.path) for k, g in self.grids.items()}
        return out


def grid_or_value(
    value, key: str, kind: str, base: Path, name: str, grids: dict, allow_log10: bool = False
):
    """A scalar in SI, or None after registering a grid in ``grids``."""
    if isinstance(value, dict):
        unknown = set(value) - {"grid", "units", "log10"}
        if unknown or "grid" not in value:
            raise CrustflowInputError(
                f'{key} as a grid is written {{ grid = "file.tif", units = "..." }}'
                + (' or { grid = "file.tif", log10 = true }' if allow_log10 else "")
                + (f"; unknown key(s) {sorted(unknown)}" if unknown else "")
            )
        if not isinstance(value["grid"], str):
            raise CrustflowInputError(f"{key}.grid must be a file path in quotes")
        path = Path(value["grid"]).expanduser()
        path = path if path.is_absolute() else base / path
        log10 = bool(value.get("log10", False))
        if log10 and not allow_log10:
            raise CrustflowInputError(f"{key}: log10 grids are for the viscosity only")
        if log10:
            scale, offset = 1.0, 0.0
            if "units" in value:
                scale, offset = unit_conversion(value["units"], f"{key}.units", kind)
        elif "units" not in value:
            raise CrustflowInputError(
                f'{key}: give the grid\'s units, e.g. {{ grid = "{path.name}", units = "..." }}'
            )
        else:
            scale, offset = unit_conversion(value["units"], f"{key}.units", kind)
        grids[name] = GridInput(name, path, scale, offset, log10)
        return None
    return parse_quantity(value, key, kind)


def parse_channel(raw: dict, base: Path) -> tuple[float | None, float | None, ChannelSetup]:
    """Parse the ``[channel]`` table.

    Parameters
    ----------
    raw : dict
        The table as read from TOML.
    base : Path
        Folder against which grid paths resolve.

    Returns
    -------
    thickness, viscosity : float or None
        Scalar values in SI (None where given as a grid or not needed).
    setup : ChannelSetup
    """

    grids: dict = {}
    rheology = raw.get("rheology", "newtonian")
    if rheology not in RHEOLOGIES:
        raise CrustflowInputError(
            f"channel.rheology = {rheology!r} is not one of {', '.join(RHEOLOGIES)}"
        )
    thickness = _parse_thickness(raw, base, grids)
    viscosity = _parse_viscosity(raw, rheology, base, grids)
    n, prefactor, law, strain_rate = _parse_rheology(raw, rheology)
    t_top, t_base, geotherm = _parse_wall_temperatures(raw, rheology, base, grids)
    setup = ChannelSetup(
        rheology=rheology,
        stress_exponent=n,
        prefactor=prefactor,
        law=law,
        reference_strain_rate=strain_rate,
        temperature_top=t_top,
        temperature_base=t_base,
        geotherm=geotherm,
        grids=grids,
    )
    return thickness, viscosity, setup


def _parse_thickness(raw: dict, base: Path, grids: dict) -> float | None:
    """``thickness``: needed where the channel is the base of the crust, else given by depths."""
    placement = raw.get("placement", "crust-base")
    if placement != "crust-base":
        if "thickness" in raw:
            raise CrustflowInputError(
                f"channel.thickness is not used with placement = {placement!r} "
                "(the depths give it); remove it"
            )
        return None
    if "thickness" not in raw:
        raise CrustflowInputError('the scenario needs [channel] thickness = "15 km" (or a grid)')
    return grid_or_value(
        raw["thickness"], "channel.thickness", "length", base, "channel_thickness", grids
    )


def _parse_viscosity(raw: dict, rheology: str, base: Path, grids: dict) -> float | None:
    """``viscosity`` of a newtonian channel (a value or a grid, possibly of log10 values)."""
    if rheology != "newtonian":
        if "viscosity" in raw:
            raise CrustflowInputError(
                f"channel.viscosity is for a newtonian channel; a {rheology} "
                "channel takes its viscosity from its law: remove it"
            )
        return None
    if "viscosity" not in raw:
        raise CrustflowInputError(
            'the scenario needs [channel] viscosity = "1e19 Pa*s" (or a '
            "grid) for a newtonian channel"
        )
    return grid_or_value(
        raw["viscosity"],
        "channel.viscosity",
        "viscosity",
        base,
        "viscosity",
        grids,
        allow_log10=True,
    )


def _parse_rheology(raw: dict, rheology: str):
    """Stress exponent, prefactor (power law) or flow law and reference strain rate."""
    n = prefactor = law = strain_rate = None
    if rheology == "power-law":
        for key in ("stress_exponent", "prefactor"):
            if key not in raw:
                example = {"stress_exponent": "3", "prefactor": '"4e-34 Pa^-3 s^-1"'}[key]
                raise CrustflowInputError(f"a power-law channel needs [channel] {key} = {example}")
        n = _exponent(raw["stress_exponent"], "channel.stress_exponent")
        prefactor = parse_prefactor(raw["prefactor"], "channel.prefactor", n)
        if not prefactor > 0:
            raise CrustflowInputError("channel.prefactor must be positive")
    if rheology == "flow-law":
        table = raw.get("flow_law")
        if not isinstance(table, dict):
            raise CrustflowInputError(
                "a flow-law channel needs a [channel.flow_law] table with "
                'preset = "wet-quartzite" (or A, n, activation_energy)'
            )
        law, strain_rate = _parse_law(table, flowlaws)
        n = law.stress_exponent
    elif "flow_law" in raw:
        raise CrustflowInputError('[channel.flow_law] needs channel.rheology = "flow-law"')
    return n, prefactor, law, strain_rate


def _parse_wall_temperatures(raw: dict, rheology: str, base: Path, grids: dict):
    """``[channel.temperature]`` of a flow-law channel: wall temperatures or a geotherm."""
    temperature = raw.get("temperature")
    if rheology != "flow-law":
        if temperature is not None:
            raise CrustflowInputError(
                "[channel.temperature] is used by a flow-law channel only; set "
                'channel.rheology = "flow-law" or remove it'
            )
        return None, None, None
    if not isinstance(temperature, dict):
        raise CrustflowInputError(
            "a flow-law channel needs [channel.temperature] with top = "
            '"550 degC" and base = "750 degC" (or a geotherm)'
        )
    return _parse_temperature(temperature, base, grids)


def _exponent(value, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise CrustflowInputError(f"{key} must be a number (dimensionless), e.g. {key} = 3")
    if not value >= 1:
        raise CrustflowInputError(f"{key} = {value} must be at least 1 (1 is Newtonian)")
    return float(value)


def _parse_law(table: dict, flowlaws):
    allowed = {"preset", "A", "n", "activation_energy", "reference_strain_rate"}
    for key in table:
        if key not in allowed:
            import difflib

            close = difflib.get_close_matches(key, sorted(allowed), n=1)
            hint = (
                f"did you mean '{close[0]}'?"
                if close
                else f"valid keys: {', '.join(sorted(allowed))}"
            )
            raise CrustflowInputError(f"unknown key '{key}' in [channel.flow_law]; {hint}")
    strain_rate = None
    if "reference_strain_rate" in table:
        strain_rate = parse_quantity(
            table["reference_strain_rate"], "channel.flow_law.reference_strain_rate", "strain_rate"
        )
    if "preset" in table:
        if set(table) & {"A", "n", "activation_energy"}:
            raise CrustflowInputError(
                "[channel.flow_law]: give either preset or A, n and activation_energy, not both"
            )
        return flowlaws.flow_law(table["preset"]), strain_rate
    missing = [k for k in ("A", "n", "activation_energy") if k not in table]
    if missing:
        raise CrustflowInputError(
            f'[channel.flow_law] needs preset = "wet-quartzite" or all of '
            f"A, n, activation_energy (missing: {', '.join(missing)})"
        )
    n = _exponent(table["n"], "channel.flow_law.n")
    q = parse_quantity(
        table["activation_energy"], "channel.flow_law.activation_energy", "molar_energy"
    )
    a_si = parse_prefactor(table["A"], "channel.flow_law.A", n)
    law = flowlaws.FlowLaw(
        name="scenario flow law",
        axial_prefactor=a_si,
        axial_prefactor_units="Pa^-n s^-1",
        stress_exponent=n,
        activation_energy=q,
        reference="given in the scenario file",
        read_from="original",
    )
    return law, strain_rate


def _parse_temperature(table: dict, base: Path, grids: dict):
    for key in table:
        if key not in TEMPERATURE_KEYS:
            import difflib

            close = difflib.get_close_matches(key, TEMPERATURE_KEYS, n=1)
            hint = (
                f"did you mean '{close[0]}'?"
                if close
                else f"valid keys: {', '.join(TEMPERATURE_KEYS)}"
            )
            raise CrustflowInputError(f"unknown key '{key}' in [channel.temperature]; {hint}")
    if "top" in table or "base" in table:
        if "surface_heat_flow" in table:
            raise CrustflowInputError(
                "[channel.temperature]: give top and base, or a geotherm "
                "(surface_heat_flow ...), not both"
            )
        if "top" not in table or "base" not in table:
            raise CrustflowInputError(
                "[channel.temperature] needs both top and base, e.g. top = "
                '"550 degC", base = "750 degC"'
            )
        top = grid_or_value(
            table["top"], "channel.temperature.top", "temperature", base, "temperature_top", grids
        )
        bottom = grid_or_value(
            table["base"],
            "channel.temperature.base",
            "temperature",
            base,
            "temperature_base",
            grids,
        )
        for key, value in (("top", top), ("base", bottom)):
            _check_temperature(value, f"channel.temperature.{key}")
        return top, bottom, None
    if "surface_heat_flow" not in table:
        raise CrustflowInputError(
            '[channel.temperature] needs top and base (e.g. "550 degC") or '
            'surface_heat_flow = "65 mW/m^2" for a steady geotherm'
        )
    geotherm = dict(GEOTHERM_DEFAULTS)
    geotherm["surface_heat_flow"] = grid_or_value(
        table["surface_heat_flow"],
        "channel.temperature.surface_heat_flow",
        "heat_flow",
        base,
        "surface_heat_flow",
        grids,
    )
    kinds = {
        "conductivity": "conductivity",
        "heat_production": "heat_production",
        "heat_production_depth": "length",
        "surface_temperature": "temperature",
    }
    for key, kind in kinds.items():
        if key in table:
            geotherm[key] = parse_quantity(table[key], f"channel.temperature.{key}", kind)
    if not geotherm["conductivity"] > 0:
        raise CrustflowInputError("channel.temperature.conductivity must be positive")
    return None, None, geotherm


def _check_temperature(value, key: str) -> None:

    if value is not None and not 0 < value <= MAX_TEMPERATURE:
        raise CrustflowInputError(
            f"{key} = {value - 273.15:.6g} degC is outside 0 K to "
            f"{MAX_TEMPERATURE - 273.15:g} degC; check the value and its units"
        )
