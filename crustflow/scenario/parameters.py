"""Scalar model parameters in SI units, checked on construction."""

from __future__ import annotations

from dataclasses import dataclass

from crustflow import constants
from crustflow.errors import CrustflowInputError
from crustflow.units import parse_quantity

__all__ = ["ModelParameters"]

#: Attribute -> (scenario key, kind of quantity) for values given as strings with units.
_KINDS = {
    "channel_thickness": ("channel.thickness", "length"),
    "viscosity": ("channel.viscosity", "viscosity"),
    "rho_crust": ("densities.crust", "density"),
    "rho_mantle": ("densities.mantle", "density"),
    "rho_water": ("densities.water", "density"),
    "rho_channel": ("densities.channel", "density"),
    "wall_east": ("walls.upper_velocity (east)", "velocity"),
    "wall_north": ("walls.upper_velocity (north)", "velocity"),
    "gravity": ("constants.gravity", "acceleration"),
    "reference_thickness": ("grids.reference_thickness", "length"),
}


def _sci(value: float) -> str:
    return f"{value:.0e}".replace("e+", "e")


@dataclass(frozen=True)
class ModelParameters:
    """Scalar model parameters, all in SI units.

    Every value may also be given as a string with units, as in a scenario file
    (``ModelParameters(channel_thickness="15 km", viscosity="1e19 Pa*s")``); it is converted to SI.

    Attributes
    ----------
    channel_thickness : float or None
        Channel thickness h, m (None: given as a grid).
    viscosity : float or None
        Channel viscosity eta, Pa s (Newtonian, uniform; None: a grid, or another rheology).
    rho_crust, rho_mantle, rho_water, rho_channel : float
        Densities, kg/m^3.
    wall_east, wall_north : float
        Velocity of the upper wall relative to the lower wall, m/s.
    gravity : float
        Gravitational acceleration, m/s^2.
    reference_thickness : float or None
        Airy case only: crustal thickness where topography is at sea level, m.
    """

    channel_thickness: float | None
    viscosity: float | None
    rho_crust: float = constants.RHO_CRUST
    rho_mantle: float = constants.RHO_MANTLE
    rho_water: float = constants.RHO_WATER
    rho_channel: float | None = None
    wall_east: float = 0.0
    wall_north: float = 0.0
    gravity: float = constants.GRAVITY
    reference_thickness: float | None = None

    def __post_init__(self) -> None:
        for name, (key, kind) in _KINDS.items():
            value = getattr(self, name)
            if isinstance(value, str):  # "15 km", as in a scenario file
                object.__setattr__(self, name, parse_quantity(value, key, kind))
        if self.rho_channel is None:
            object.__setattr__(self, "rho_channel", self.rho_crust)
        checks = [
            ("channel.thickness", self.channel_thickness, '"15 km"'),
            ("channel.viscosity", self.viscosity, '"1e19 Pa*s"'),
            ("densities.crust", self.rho_crust, '"2800 kg/m^3"'),
            ("densities.mantle", self.rho_mantle, '"3300 kg/m^3"'),
            ("densities.channel", self.rho_channel, '"2800 kg/m^3"'),
            ("constants.gravity", self.gravity, '"9.81 m/s^2"'),
        ]
        for key, value, example in checks:
            if value is None and key in ("channel.thickness", "channel.viscosity"):
                continue  # given as a grid, or not used by the rheology
            if not value > 0:  # also catches NaN
                raise CrustflowInputError(
                    f"{key} must be positive (got {value:g} in SI); e.g. {example}"
                )
        low, high = constants.VISCOSITY_RANGE
        if self.viscosity is not None and not low <= self.viscosity <= high:
            raise CrustflowInputError(
                f"channel.viscosity = {self.viscosity:.3g} Pa s lies outside {_sci(low)}-{_sci(high)} "
                'Pa s, the range of crustal channels and salt (see the README); e.g. "1e19 Pa*s"'
            )
        if not self.rho_water >= 0:
            raise CrustflowInputError('densities.water must not be negative; e.g. "1030 kg/m^3"')
        if not self.rho_mantle > max(self.rho_crust, self.rho_channel, self.rho_water):
            raise CrustflowInputError(
                "densities.mantle must exceed the crust, channel and water densities for isostasy "
                f"(mantle {self.rho_mantle:g}, crust {self.rho_crust:g}, channel {self.rho_channel:g} "
                "kg/m^3); check the values"
            )
        if self.reference_thickness is not None and not self.reference_thickness > 0:
            raise CrustflowInputError('grids.reference_thickness must be positive, e.g. "35 km"')
