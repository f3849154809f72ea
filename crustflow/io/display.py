"""Human-readable names and units of the output variables, for figures, style files and reports.

Derived from :data:`crustflow.variables.VARIABLES` (the one table of names, long names and
units): the UDUNITS unit strings written into files ("m2 yr-1") become the forms people read
("m²/yr"); titles are the long names with a capital letter.
"""

from __future__ import annotations

from crustflow.variables import VARIABLES

__all__ = ["display_units", "display_name", "axis_label", "UNIT_FORMS"]

#: Readable forms of the UDUNITS unit strings used in VARIABLES and the ensemble files.
UNIT_FORMS = {
    "m2 yr-1": "m²/yr",
    "mm yr-1": "mm/yr",
    "Pa m-1": "Pa/m",
    "Pa s": "Pa·s",
    "degree": "°",
    "percent": "%",
    "m3 yr-1": "m³/yr",
    "km3 Myr-1": "km³/Myr",
    "1": "",
}


def display_units(units: str) -> str:
    """The readable form of a UDUNITS unit string ("m2 yr-1" -> "m²/yr"; "1" -> "")."""
    return UNIT_FORMS.get(units, units)


def display_name(name: str) -> str:
    """A variable's long name with a capital first letter (the name itself if unknown)."""
    text = VARIABLES[name].long_name if name in VARIABLES else name.replace("_", " ")
    return text[:1].upper() + text[1:]


def axis_label(name: str, *, prefix: str = "") -> str:
    """ "Long name (unit)" for a colour bar or axis; no brackets for dimensionless variables."""
    units = display_units(VARIABLES[name].units) if name in VARIABLES else ""
    text = f"{prefix}{display_name(name) if not prefix else VARIABLES[name].long_name}"
    return f"{text} ({units})" if units else text
