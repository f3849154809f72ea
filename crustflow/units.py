"""Reading quantities with units from scenario files (SI inside, practical units at the edges).

Every dimensional value in a scenario file is a string with units, for example ``"15 km"``,
``"1e19 Pa*s"``, ``"5 mm/yr"`` or ``"2800 kg/m^3"``. They are parsed with pint and converted to SI once,
on the way in. ``yr`` is the Julian year, 365.25 d (pint's definition, and crustflow's everywhere).
"""

from __future__ import annotations

from functools import lru_cache

from crustflow.errors import CrustflowInputError

__all__ = ["DIMENSIONS", "parse_quantity", "parse_vector", "unit_conversion", "parse_prefactor"]

#: The kinds of quantity scenario keys take: pint dimensionality, SI unit, and an example for messages.
DIMENSIONS: dict[str, tuple[str, str, str]] = {
    "length": ("[length]", "m", '"15 km"'),
    "density": ("[mass] / [length] ** 3", "kg/m^3", '"2800 kg/m^3"'),
    "viscosity": ("[mass] / [length] / [time]", "Pa*s", '"1e19 Pa*s"'),
    "velocity": ("[length] / [time]", "m/s", '"5 mm/yr"'),
    "acceleration": ("[length] / [time] ** 2", "m/s^2", '"9.81 m/s^2"'),
    "temperature": ("[temperature]", "K", '"550 degC"'),
    "heat_flow": ("[mass] / [time] ** 3", "W/m^2", '"65 mW/m^2"'),
    "conductivity": ("[mass] * [length] / [time] ** 3 / [temperature]", "W/m/K", '"2.5 W/m/K"'),
    "heat_production": ("[mass] / [length] / [time] ** 3", "W/m^3", '"1 uW/m^3"'),
    "molar_energy": ("[mass] * [length] ** 2 / [time] ** 2 / [substance]", "J/mol", '"223 kJ/mol"'),
    "strain_rate": ("1 / [time]", "1/s", '"1e-14 1/s"'),
    "pressure": ("[mass] / [length] / [time] ** 2", "Pa", '"100 GPa"'),
    "time": ("[time]", "s", '"2 Myr"'),
    "flux": ("[length] ** 2 / [time]", "m^2/s", '"300 m^2/yr"'),
}


@lru_cache(maxsize=1)
def _registry():
    import pint

    return pint.UnitRegistry()


def parse_quantity(value: object, key: str, kind: str) -> float:
    """Convert a scenario value such as ``"15 km"`` to a float in SI units.

    Parameters
    ----------
    value : str
        Number and units, e.g. ``"1e19 Pa*s"``.
    key : str
        Dotted scenario key, used in error messages (``"channel.viscosity"``).
    kind : str
        One of :data:`DIMENSIONS` (``"length"``, ``"density"``, ``"viscosity"``, ``"velocity"``,
        ``"acceleration"``).

    Returns
    -------
    float
        The value in SI units (m, kg/m^3, Pa s, m/s, m/s^2).

    Raises
    ------
    CrustflowInputError
        For a bare number, unparseable text or units of the wrong dimension.
    """
    dimensionality, si_unit, example = DIMENSIONS[kind]
    if isinstance(value, bool) or not isinstance(value, str):
        if isinstance(value, int | float):
            raise CrustflowInputError(
                f"{key} = {value!r} has no units; write it as a string with units, e.g. {key} = {example}"
            )
        raise CrustflowInputError(f"{key} must be a string with units, e.g. {key} = {example}")
    import pint

    ureg = _registry()
    try:
        number, _, unit = value.strip().partition(" ")
        if kind == "temperature" and unit.strip():  # offset units (degC) need number and unit apart
            quantity = ureg.Quantity(float(number), unit.strip())
        else:
            quantity = ureg.Quantity(value.strip())
    except (pint.errors.PintError, ValueError, TypeError, AttributeError, SyntaxError) as exc:
        raise CrustflowInputError(
            f"{key} = {value!r} is not a number with units ({exc.__class__.__name__}); "
            f"write e.g. {key} = {example}"
        ) from None
    if isinstance(quantity, int | float) or quantity.dimensionless:
        raise CrustflowInputError(
            f"{key} = {value!r} has no units; write it with units, e.g. {key} = {example}"
        )
    if not quantity.check(dimensionality):
        raise CrustflowInputError(
            f"{key} = {value!r} has units of {quantity.dimensionality}, expected a {kind} "
            f"such as {example}"
        )
    return float(quantity.to(si_unit).magnitude)


def unit_conversion(units: object, key: str, kind: str) -> tuple[float, float]:
    """Scale and offset that take values in ``units`` to SI: ``si = value * scale + offset``.

    Parameters
    ----------
    units : str
        Units of a grid's values, e.g. ``"km"`` or ``"degC"``.
    key, kind
        As for :func:`parse_quantity`.
    """
    dimensionality, si_unit, example = DIMENSIONS[kind]
    if not isinstance(units, str) or not units.strip():
        raise CrustflowInputError(
            f"{key}: units must be a string, e.g. units = {example.split()[-1]}"
        )
    import pint

    ureg = _registry()
    try:
        zero = ureg.Quantity(0.0, units.strip())
        one = ureg.Quantity(1.0, units.strip())
    except (pint.errors.PintError, ValueError, TypeError, AttributeError, SyntaxError):
        raise CrustflowInputError(
            f"{key}: units {units!r} are not understood; write e.g. units = {example.split()[-1]}"
        ) from None
    if not one.check(dimensionality):
        raise CrustflowInputError(
            f"{key}: units {units!r} are not a {kind}; write e.g. units = {example.split()[-1]}"
        )
    offset = float(zero.to(si_unit).magnitude)
    return float(one.to(si_unit).magnitude) - offset, offset


def parse_prefactor(value: object, key: str, stress_exponent: float) -> float:
    """A power-law prefactor such as ``"4e-34 Pa^-3 s^-1"`` in SI, Pa^-n s^-1."""
    example = f'"4e-34 Pa^-{stress_exponent:g} s^-1"'
    if not isinstance(value, str):
        raise CrustflowInputError(f"{key} must be a string with units, e.g. {key} = {example}")
    import pint

    ureg = _registry()
    try:
        quantity = ureg.Quantity(value.strip())
        target = ureg.Quantity(1.0, "Pa") ** (-stress_exponent) / ureg.Quantity(1.0, "s")
        return float((quantity / target).to("dimensionless").magnitude)
    except (pint.errors.PintError, ValueError, TypeError, AttributeError, SyntaxError):
        raise CrustflowInputError(
            f"{key} = {value!r} is not in units of stress^-n time^-1 with "
            f"n = {stress_exponent:g}; write e.g. {key} = {example}"
        ) from None


def parse_vector(value: object, key: str, kind: str) -> tuple[float, float]:
    """Convert a two-component list of strings with units (east, north) to SI floats.

    Parameters
    ----------
    value : list of str
        ``["5 mm/yr", "-2 mm/yr"]``: east and north components.
    key, kind
        As for :func:`parse_quantity`.

    Returns
    -------
    tuple of float
        (east, north) in SI units.
    """
    example = DIMENSIONS[kind][2]
    if not isinstance(value, list | tuple) or len(value) != 2:
        raise CrustflowInputError(
            f"{key} must be a list of two values with units (east, north), e.g. "
            f"{key} = [{example}, {example}]"
        )
    east = parse_quantity(value[0], f"{key}[0] (east)", kind)
    north = parse_quantity(value[1], f"{key}[1] (north)", kind)
    return east, north
