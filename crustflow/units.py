"""Reading quantities with units from scenario files (SI inside, practical units at the edges).

Every dimensional value in a scenario file is a string with units, for example ``"15 km"``,
``"1e19 Pa*s"``, ``"5 mm/yr"`` or ``"2800 kg/m^3"``. They are parsed with pint and converted to SI once,
on the way in. ``yr`` is the Julian year, 365.25 d (pint's definition, and crustflow's everywhere).
"""

from __future__ import annotations

import math
import re
from functools import lru_cache

from crustflow.errors import CrustflowInputError

__all__ = [
    "DIMENSIONS",
    "parse_quantity",
    "parse_vector",
    "unit_conversion",
    "parse_prefactor",
    "split_quantity",
    "checked_units",
    "quantity",
]

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


# ---------------------------------------------------------------------------------------------
# the grammar of a value with units (checked before pint sees the text)

#: Longest value with units accepted (characters); scenario values are short.
MAX_VALUE_LENGTH = 120

#: Largest exponent a unit may carry (``m^3``, ``MPa^-4.7``); flow-law stress exponents stay below 10
#: (Ranalli 1995, table 10.3: n 1.9-5.1), so 10 leaves room without allowing huge powers.
MAX_UNIT_EXPONENT = 10

#: Deepest nesting of parentheses in a unit expression.
MAX_UNIT_DEPTH = 2

_NUMBER = re.compile(r"\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d{1,4})?)")
_NON_FINITE = re.compile(r"\s*[+-]?(inf(inity)?|nan)\b", re.IGNORECASE)
_NAME = re.compile(r"(?:[^\W\d]|°)(?:\w|°)*")
_EXPONENT = re.compile(r"\s*([+-]?\d{1,2}(?:\.\d{1,3})?)")
_SPACE = re.compile(r"\s+")


def _unit_problem(text: str) -> str | None:
    """Why ``text`` is not a unit expression of the grammar (None when it is one).

    Grammar: ``expr := factor ((* | / | space) factor)*``; ``factor := (NAME | 1 | ( expr ))
    [(^ | **) EXPONENT]``; EXPONENT a signed number of at most two digits (and three decimals) with
    absolute value at most :data:`MAX_UNIT_EXPONENT`; parentheses at most :data:`MAX_UNIT_DEPTH`
    deep. Nothing else (no calls, attributes, quotes, brackets or nested powers) passes.
    """
    pos, depth, operand, powered = 0, 0, True, False  # operand: a factor is expected next
    while pos < len(text):
        space = _SPACE.match(text, pos)
        if space:
            pos = space.end()
            continue
        char = text[pos]
        if operand:
            name = _NAME.match(text, pos)
            if name or char == "1":
                pos, operand = (name.end() if name else pos + 1), False
            elif char == "(":
                depth += 1
                if depth > MAX_UNIT_DEPTH:
                    return f"parentheses nested deeper than {MAX_UNIT_DEPTH}"
                pos += 1
            else:
                return f"unexpected {char!r} where a unit name was expected"
            continue
        if text.startswith("**", pos) or char == "^":
            if powered:
                return "a power of a power"
            pos += 2 if char == "*" else 1
            exponent = _EXPONENT.match(text, pos)
            if not exponent or abs(float(exponent.group(1))) > MAX_UNIT_EXPONENT:
                return f"a unit power must be a small number (at most {MAX_UNIT_EXPONENT})"
            pos, powered = exponent.end(), True
            continue
        powered = False
        if char == ")":
            depth -= 1
            if depth < 0:
                return "unbalanced parentheses"
            pos += 1
        elif char in "*/":
            pos, operand = pos + 1, True
        elif _NAME.match(text, pos) or char in "1(":
            operand = True  # a space between units multiplies, as in "Pa s"
        else:
            return f"unexpected {char!r}"
    if depth:
        return "unbalanced parentheses"
    if operand:
        return "the units end with an operator"
    return None


def _shown(value: str) -> str:
    return repr(value if len(value) <= 60 else value[:57] + "...")


def split_quantity(value: str, key: str, example: str) -> tuple[float, str]:
    """Split a value such as ``"1e19 Pa*s"`` into its number and its unit text, by the grammar
    (a number: optional sign, decimals, exponent; then a unit expression, see
    :func:`_unit_problem`). Only text that passes is later handed to pint.

    Raises
    ------
    CrustflowInputError
        Naming ``key``, what is wrong and an ``example`` of a valid value; for values that are not
        finite (``inf``, ``nan``, ``1e999``) too.
    """
    if len(value) > MAX_VALUE_LENGTH:
        raise CrustflowInputError(
            f"{key} = {_shown(value)} is too long for a number with units; write e.g. "
            f"{key} = {example}"
        )
    if _NON_FINITE.match(value):
        raise CrustflowInputError(
            f"{key} = {_shown(value)} is not a finite number; write e.g. {key} = {example}"
        )
    number = _NUMBER.match(value)
    if not number:
        raise CrustflowInputError(
            f"{key} = {_shown(value)} does not start with a number; write a number and units, "
            f"e.g. {key} = {example}"
        )
    magnitude = float(number.group(1))
    if not math.isfinite(magnitude):
        raise CrustflowInputError(
            f"{key} = {_shown(value)} is not a finite number; write e.g. {key} = {example}"
        )
    unit = value[number.end() :].strip()
    problem = _unit_problem(unit) if unit else None
    if problem:
        raise CrustflowInputError(
            f"{key} = {_shown(value)} is not a number followed by units ({problem}); write e.g. "
            f"{key} = {example}"
        )
    return magnitude, unit


def checked_units(units: str, key: str, example: str) -> str:
    """Unit text (no number) checked by the grammar of :func:`split_quantity`; returned stripped."""
    text = units.strip()
    problem = _unit_problem(text) if len(text) <= MAX_VALUE_LENGTH else "too long"
    if problem:
        raise CrustflowInputError(
            f"{key}: units {_shown(units)} are not understood ({problem}); write e.g. "
            f"units = {example}"
        )
    return text


def quantity(value: str, key: str, example: str):
    """A pint Quantity of a value that passed the grammar of :func:`split_quantity`."""
    magnitude, unit = split_quantity(value, key, example)
    ureg = _registry()
    return ureg.Quantity(magnitude, unit) if unit else ureg.Quantity(magnitude)


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
    magnitude, unit = split_quantity(value, key, example)
    import pint

    ureg = _registry()
    try:
        # number and unit apart: offset units (degC) need it, and pint sees only checked units
        quantity = ureg.Quantity(magnitude, unit) if unit else magnitude
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
    si = float(quantity.to(si_unit).magnitude)
    if not math.isfinite(si):
        raise CrustflowInputError(
            f"{key} = {value!r} is too large to represent; write e.g. {key} = {example}"
        )
    return si


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
    text = checked_units(units, key, example.split()[-1])
    try:
        zero = ureg.Quantity(0.0, text)
        one = ureg.Quantity(1.0, text)
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
    magnitude, unit = split_quantity(value, key, example)
    try:
        quantity = ureg.Quantity(magnitude, unit)
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
