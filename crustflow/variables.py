"""The output variables: names, long names, practical units and the factors from SI.

:data:`VARIABLES` is the single table used by the API, NetCDF, GeoTIFF, figures and the README.
Rates use the Julian year (365.25 d, :data:`crustflow.constants.SECONDS_PER_YEAR`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crustflow.constants import SECONDS_PER_YEAR

__all__ = ["Variable", "VARIABLES", "CAUTION", "to_practical", "variable_attrs"]


@dataclass(frozen=True)
class Variable:
    """An output variable: CF metadata and the factor from SI to its practical unit."""

    long_name: str
    units: str  #: UDUNITS form, as written to files
    factor: float  #: value in ``units`` = value in SI x factor
    flag: bool = False  #: 0/1 flag variable
    flag_meanings: str = "no_backflow backflow"
    standard_name: str | None = None


_MM_YR = 1e3 * SECONDS_PER_YEAR


_M2_YR = SECONDS_PER_YEAR


#: Every variable crustflow writes, in output order. Rates use the Julian year (365.25 d).
VARIABLES: dict[str, Variable] = {
    "crust_thickness": Variable("crustal thickness, surface to Moho", "km", 1e-3),
    "channel_thickness": Variable("channel thickness", "km", 1e-3),
    "channel_top_depth": Variable("depth of the channel top below sea level", "km", 1e-3),
    "overburden_pressure": Variable("lithostatic pressure at the channel top", "MPa", 1e-6),
    "drive_east": Variable(
        "horizontal pressure gradient in the channel, east component", "Pa m-1", 1.0
    ),
    "drive_north": Variable(
        "horizontal pressure gradient in the channel, north component", "Pa m-1", 1.0
    ),
    "flux_east": Variable("channel volume flux per unit width, east component", "m2 yr-1", _M2_YR),
    "flux_north": Variable(
        "channel volume flux per unit width, north component", "m2 yr-1", _M2_YR
    ),
    "flux_magnitude": Variable("channel volume flux per unit width, magnitude", "m2 yr-1", _M2_YR),
    "flux_azimuth": Variable("direction of channel flux, clockwise from true north", "degree", 1.0),
    "mean_velocity_east": Variable("channel mean velocity, east component", "mm yr-1", _MM_YR),
    "mean_velocity_north": Variable("channel mean velocity, north component", "mm yr-1", _MM_YR),
    "peak_speed": Variable("largest speed within the channel", "mm yr-1", _MM_YR),
    "peak_speed_height": Variable("height of the largest speed above the channel base", "km", 1e-3),
    "upper_wall_drag_east": Variable(
        "shear traction of the channel on its upper wall, east", "MPa", 1e-6
    ),
    "upper_wall_drag_north": Variable(
        "shear traction of the channel on its upper wall, north", "MPa", 1e-6
    ),
    "lower_wall_drag_east": Variable(
        "shear traction of the channel on its lower wall, east", "MPa", 1e-6
    ),
    "lower_wall_drag_north": Variable(
        "shear traction of the channel on its lower wall, north", "MPa", 1e-6
    ),
    "backflow": Variable(
        "flow reversal: some height in the channel moves against the net flux", "1", 1.0, flag=True
    ),
    "wall_driven_share": Variable(
        "share of the flux carried by wall motion, |q_wall| / (|q_wall| + |q_pressure|)", "1", 1.0
    ),
    "thickening_rate": Variable("crustal thickening rate, -div(q)", "mm yr-1", _MM_YR),
    "uplift_rate": Variable("isostatic surface uplift rate from thickening", "mm yr-1", _MM_YR),
    "effective_viscosity": Variable(
        "depth-averaged effective viscosity of the channel, h / integral of 1/eta", "Pa s", 1.0
    ),
    "thin_channel_warning": Variable(
        "load varies on wavelengths shorter than 3 channel thicknesses (thin-channel limit)",
        "1",
        1.0,
        flag=True,
        flag_meanings="valid_thin_channel short_wavelength_load",
    ),
    "solver_converged": Variable(
        "per-cell solver converged (power-law and flow-law channels; 1 for closed forms)",
        "1",
        1.0,
        flag=True,
        flag_meanings="not_converged converged",
    ),
}


#: One-line caution carried by every output.
CAUTION = (
    "Research estimate of a simplified model (thin channel, rigid walls, lithostatic load, "
    "idealised rheology); no basis for hazard or engineering decisions without local, licensed "
    "review."
)


def to_practical(name: str, values: np.ndarray) -> np.ndarray:
    """Convert a variable from SI to the practical unit of :data:`VARIABLES`."""
    factor = VARIABLES[name].factor
    return values if factor == 1.0 else values * factor


def variable_attrs(name: str) -> dict:
    """CF attributes of a variable (``long_name``, ``units``, flag attributes)."""
    var = VARIABLES[name]
    attrs = {"long_name": var.long_name, "units": var.units}
    if var.flag:
        attrs.update(flag_values=np.array([0, 1], dtype="int8"), flag_meanings=var.flag_meanings)
    return attrs
