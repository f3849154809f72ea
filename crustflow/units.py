"""Reading quantities with units from scenario files (SI inside, practical units at the edges).

Every dimensional value in a scenario file is a string with units, for example ``"15 km"``,
``"1e19 Pa*s"``, ``"5 mm/yr"`` or ``"2800 kg/m^3"``. They are parsed with pint and converted to SI once,
on the way in. ``yr`` is the Julian year, 365.25 d (pint's definition, and crustflow's everywhere).
"""

from __future__ import annotations

from functools import lru_cache

from .errors import CrustflowInputError

__all__ = ["DIMENSIONS", "parse_quantity", "parse_vector"]

#: The kinds of quantity scenario keys take: pint dimensionality, SI unit, and an example for messages.
DIMENSIONS: dict[str, tuple[str, str, str]] = {
    "length": ("[length]", "m", '"15 km"'),
    "density": ("[mass] / [length] ** 3", "kg/m^3", '"2800 kg/m^3"'),
    "viscosity": ("[mass] / [length] / [time]", "Pa*s", '"1e19 Pa*s"'),
    "velocity": ("[length] / [time]", "m/s", '"5 mm/yr"'),
    "acceleration": ("[length] / [time] ** 2", "m/s^2", '"9.81 m/s^2"'),
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
