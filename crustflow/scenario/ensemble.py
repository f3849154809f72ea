"""Parsing and checking the ``[ensemble]`` table of a scenario into an
:class:`crustflow.scenario.ensemble_spec.EnsembleSpec`.

Part of :mod:`crustflow.analyses.ensemble.run`, which re-exports :func:`parse_ensemble`, :data:`SAMPLING` and
:data:`DISTRIBUTIONS`. Every error names the key and the fix.
"""

from __future__ import annotations

import difflib

from crustflow.errors import CrustflowInputError
from crustflow.scenario.ensemble_spec import (
    DEFAULT_PERCENTILES,
    DEFAULT_VARIABLES,
    VARIABLE_KEYS,
    Distribution,
    EnsembleSpec,
    VariedKey,
    VectorDistribution,
)
from crustflow.scenario.parameters import ModelParameters
from crustflow.units import parse_quantity
from crustflow.units import quantity as checked_quantity  # the grammar, then pint
from crustflow.variables import VARIABLES

#: Sampling designs ``[ensemble] sampling`` may name.
SAMPLING = ("latin-hypercube", "random")

#: Distributions and the keys each needs and allows (besides ``distribution``).
DISTRIBUTIONS = {
    "uniform": (("low", "high"), ()),
    "log-uniform": (("low", "high"), ()),
    "normal": (("mean", "sd"), ("min", "max")),
}

#: Variables without a meaningful percentile: directions wrap around at north.
CIRCULAR = ("flux_azimuth",)

#: Variables that need the whole grid at once (crustflow.engine.fields.whole_grid_load), not available
#: strip by strip for every member.
WHOLE_GRID = ("thin_channel_warning",)


# ----------------------------------------------------------------------------------------------
# parsing


def unknown_key_error(key: str, valid, where: str, extra: str = "") -> CrustflowInputError:
    close = difflib.get_close_matches(str(key), list(valid), n=1, cutoff=0.5)
    hint = f"did you mean '{close[0]}'?" if close else f"valid keys: {', '.join(valid)}"
    return CrustflowInputError(f"unknown key '{key}' in {where}; {hint}{extra}")


def check_keys(table: dict, valid, where: str) -> None:
    for key in table:
        if key not in valid:
            raise unknown_key_error(key, valid, where)


def parse_integer(value, key: str, example: str, least: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < least:
        raise CrustflowInputError(
            f"{key} = {value!r} is not an integer of at least {least}; write e.g. {example}"
        )
    return value


def parse_ensemble(raw: dict, parameters: ModelParameters) -> EnsembleSpec:
    """Parse and check the ``[ensemble]`` table of a scenario.

    Parameters
    ----------
    raw : dict
        The ``[ensemble]`` table as read from TOML (keys ``members``, ``seed``, ``sampling``,
        ``vary``, ``report``).
    parameters : ModelParameters
        The scenario's parameters (SI): they tell which values are scalars that can vary.

    Returns
    -------
    EnsembleSpec

    Raises
    ------
    CrustflowInputError
        One line naming the key and the fix: unknown keys (with the closest valid one), an unknown
        varied key (with the keys that can vary), numbers without units, an unknown distribution,
        fewer than 2 members, a distribution that can give non-physical values (a normal without
        ``min`` for a positive quantity, bounds at or below zero), percentiles outside 0..100, an
        unknown report variable.

    Notes
    -----
    Example (the key names are a contract)::

        [ensemble]
        members = 1000
        seed = 20261201
        sampling = "latin-hypercube"      # or "random"
        [ensemble.vary]
        "channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", high = "1e20 Pa*s" }
        "channel.thickness" = { distribution = "normal", mean = "15 km", sd = "3 km", min = "5 km" }
        "walls.upper_velocity" = { distribution = "normal", mean = ["5 mm/yr", "0 mm/yr"],
                                   sd = ["2 mm/yr", "2 mm/yr"] }
        [ensemble.report]
        percentiles = [5, 50, 95]
        variables = ["flux_magnitude", "thickening_rate", "uplift_rate"]
        exceedance = { variable = "uplift_rate", thresholds = ["0.5 mm/yr", "1 mm/yr"] }

    A varied ``densities.crust`` does not move ``densities.channel``; vary both when the channel is
    meant to follow its roof.
    """
    if not isinstance(raw, dict):
        raise CrustflowInputError("[ensemble] must be a table (an [ensemble] section)")
    check_keys(raw, ("members", "seed", "sampling", "vary", "report"), "[ensemble]")
    if "members" not in raw:
        raise CrustflowInputError(
            "[ensemble] needs members = N (an integer of at least 2, e.g. 1000)"
        )
    members = parse_integer(raw["members"], "ensemble.members", "members = 1000", 2)
    if "seed" not in raw:
        raise CrustflowInputError(
            "[ensemble] needs seed = N (an integer, e.g. seed = 20261201) so that the ensemble can "
            "be repeated exactly"
        )
    seed = parse_integer(raw["seed"], "ensemble.seed", "seed = 20261201", 0)
    sampling = raw.get("sampling", "latin-hypercube")
    if sampling not in SAMPLING:
        raise CrustflowInputError(
            f"ensemble.sampling = {sampling!r} is not one of {', '.join(SAMPLING)}; write e.g. "
            'sampling = "latin-hypercube"'
        )
    vary_raw = raw.get("vary")
    if not isinstance(vary_raw, dict) or not vary_raw:
        raise CrustflowInputError(
            '[ensemble.vary] is missing or empty; vary at least one value, e.g. "channel.viscosity" '
            '= { distribution = "log-uniform", low = "1e18 Pa*s", high = "1e20 Pa*s" }'
        )
    vary = {key: parse_varied(key, table, parameters) for key, table in vary_raw.items()}
    rep = raw.get("report", {})
    if not isinstance(rep, dict):
        raise CrustflowInputError("ensemble.report must be a table ([ensemble.report])")
    check_keys(rep, ("percentiles", "variables", "exceedance"), "[ensemble.report]")
    percentiles = _parse_percentiles(rep.get("percentiles", list(DEFAULT_PERCENTILES)))
    variables = rep.get("variables", list(DEFAULT_VARIABLES))
    if not isinstance(variables, list) or not variables:
        raise CrustflowInputError(
            'ensemble.report.variables must be a non-empty list of names, e.g. ["uplift_rate"]'
        )
    variables = tuple(
        dict.fromkeys(_report_variable(v, "ensemble.report.variables") for v in variables)
    )
    exceedance, thresholds = None, ()
    if "exceedance" in rep:
        exceedance, thresholds = _parse_exceedance(rep["exceedance"])
    return EnsembleSpec(
        members=members,
        seed=seed,
        sampling=sampling,
        vary=vary,
        percentiles=percentiles,
        variables=variables,
        exceedance_variable=exceedance,
        thresholds=thresholds,
        written=raw,
    )


def parse_varied(key: str, table, parameters: ModelParameters, section: str = "ensemble.vary"):
    """One varied key of ``[<section>]`` (``ensemble.vary``; ``fit.parameters`` reuses it)."""
    if key not in VARIABLE_KEYS:
        raise unknown_key_error(
            key,
            VARIABLE_KEYS,
            f"[{section}]",
            f"; the keys that can vary: {', '.join(VARIABLE_KEYS)}",
        )
    spec = VARIABLE_KEYS[key]
    where = f'{section}."{key}"'
    if any(getattr(parameters, f) is None for f in spec.fields):
        why = (
            "the scenario has a crust thickness or Moho grid (it is for the Airy case only)"
            if key == "grids.reference_thickness"
            else "the scenario gives it as a grid or its rheology does not use it"
        )
        raise CrustflowInputError(f"{where}: {key} cannot vary as a scalar: {why}; remove it")
    if not isinstance(table, dict):
        raise CrustflowInputError(
            f'{where} must be a table, e.g. "{key}" = {{ distribution = "uniform", low = "...", '
            'high = "..." }'
        )
    check_keys(
        table, ("distribution",) + tuple(k for n, o in DISTRIBUTIONS.values() for k in n + o), where
    )
    kind = table.get("distribution")
    if kind not in DISTRIBUTIONS:
        raise CrustflowInputError(
            f"{where}: distribution = {kind!r} is not one of {', '.join(DISTRIBUTIONS)}; write "
            'e.g. distribution = "uniform"'
        )
    needs, allows = DISTRIBUTIONS[kind]
    for name in needs:
        if name not in table:
            raise CrustflowInputError(
                f'{where}: a {kind} distribution needs {" and ".join(needs)}; add {name} = "..."'
            )
    for name in table:
        if name != "distribution" and name not in needs + allows:
            raise CrustflowInputError(
                f"{where}: {name} does not apply to a {kind} distribution (it takes "
                f"{', '.join(needs + allows)}); remove it"
            )
    if len(spec.fields) == 2:
        parts = []
        for i, comp in enumerate(("east", "north")):
            values = {}
            for name, value in table.items():
                if name == "distribution":
                    continue
                if not isinstance(value, list) or len(value) != 2:
                    raise CrustflowInputError(
                        f"{where}.{name} must be a list of two values with units (east, north), "
                        f'e.g. {name} = ["5 mm/yr", "0 mm/yr"]'
                    )
                values[name] = value[i]
            parts.append(_distribution(kind, values, where, f"[{i}] ({comp})", spec))
        return VectorDistribution(*parts)
    return _distribution(
        kind, {k: v for k, v in table.items() if k != "distribution"}, where, "", spec
    )


def _distribution(kind: str, values: dict, where: str, part: str, spec: VariedKey) -> Distribution:
    si = {
        name: parse_quantity(value, f"{where}.{name}{part}", spec.kind)
        for name, value in values.items()
    }
    head = f"{where}{part}"
    if kind in ("uniform", "log-uniform") and not si["low"] < si["high"]:
        raise CrustflowInputError(f"{head}: low must be less than high; swap or fix them")
    if kind == "normal":
        if not si["sd"] > 0:
            raise CrustflowInputError(f'{head}: sd must be positive; give e.g. sd = "..."')
        if "min" in si and "max" in si and not si["min"] < si["max"]:
            raise CrustflowInputError(f"{head}: min must be less than max; swap or fix them")
    lowest = si.get("low") if kind != "normal" else si.get("min")
    if kind == "log-uniform" and not si["low"] > 0:
        raise CrustflowInputError(
            f"{head}: a log-uniform distribution needs a positive low; give low > 0"
        )
    if spec.bound is not None:
        strict = spec.bound == "positive"
        word = "positive" if strict else "non-negative"
        if lowest is None:
            raise CrustflowInputError(
                f"{head}: a normal distribution can give values that are not {word} (min not "
                f'set); add a lower truncation bound, e.g. min = "{_example_min(spec)}", or '
                "use a log-uniform distribution"
            )
        if lowest < 0 or (strict and lowest == 0):
            name = "low" if kind != "normal" else "min"
            raise CrustflowInputError(
                f"{head}: {name} must be {word} (the quantity cannot be {'<= 0' if strict else '< 0'}"
                "); raise it"
            )
    return Distribution(kind, **si)


def _example_min(spec: VariedKey) -> str:
    return {
        "length": "5 km",
        "viscosity": "1e17 Pa*s",
        "density": "2500 kg/m^3",
        "acceleration": "9.7 m/s^2",
    }.get(spec.kind, "...")


def _parse_percentiles(values) -> tuple[float, ...]:
    if not isinstance(values, list) or not values:
        raise CrustflowInputError(
            "ensemble.report.percentiles must be a non-empty list of numbers, e.g. [5, 50, 95]"
        )
    out = []
    for p in values:
        if isinstance(p, bool) or not isinstance(p, int | float) or not 0 <= p <= 100:
            raise CrustflowInputError(
                f"ensemble.report.percentiles has {p!r}, outside 0..100; give percentiles between "
                "0 and 100, e.g. [5, 50, 95]"
            )
        out.append(float(p))
    return tuple(sorted(set(out)))


def _report_variable(name, where: str) -> str:
    if name in CIRCULAR:
        raise CrustflowInputError(
            f"{where}: {name} is a direction (it wraps around at north), so its percentiles are "
            "not defined; summarise flux_east and flux_north instead"
        )
    if name in WHOLE_GRID:
        raise CrustflowInputError(
            f"{where}: {name} needs the whole grid for every member and is not available in "
            "ensembles; leave it out"
        )
    valid = [v for v in VARIABLES if v not in CIRCULAR + WHOLE_GRID]
    if not isinstance(name, str) or name not in VARIABLES:
        raise unknown_key_error(name, valid, where)
    return name


def _parse_exceedance(table) -> tuple[str, tuple[float, ...]]:
    where = "ensemble.report.exceedance"
    if not isinstance(table, dict):
        raise CrustflowInputError(
            f'{where} must be a table, e.g. {{ variable = "uplift_rate", thresholds = '
            '["1 mm/yr"] }'
        )
    check_keys(table, ("variable", "thresholds"), where)
    if "variable" not in table or "thresholds" not in table:
        raise CrustflowInputError(
            f'{where} needs variable and thresholds, e.g. {{ variable = "uplift_rate", '
            'thresholds = ["1 mm/yr"] }'
        )
    name = _report_variable(table["variable"], f"{where}.variable")
    values = table["thresholds"]
    if not isinstance(values, list) or not values:
        raise CrustflowInputError(
            f'{where}.thresholds must be a non-empty list of values with units, e.g. ["1 mm/yr"]'
        )
    return name, tuple(parse_threshold(v, f"{where}.thresholds", name) for v in values)


#: pint spellings of the UDUNITS units of VARIABLES.
_PINT_UNITS = {
    "km": "km",
    "MPa": "MPa",
    "Pa m-1": "Pa/m",
    "m2 yr-1": "m**2/yr",
    "mm yr-1": "mm/yr",
    "degree": "degree",
    "Pa s": "Pa*s",
    "1": "dimensionless",
}


def parse_threshold(value, key: str, name: str) -> float:
    """A threshold of variable ``name`` in SI, from a string with units (a number if unitless)."""
    var = VARIABLES[name]
    if var.units == "1":
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise CrustflowInputError(f"{key}: {name} is a number without units; write e.g. 0.5")
        return float(value)
    example = f'"1 {var.units.replace(" yr-1", "/yr").replace("m2", "m^2")}"'
    if isinstance(value, bool) or not isinstance(value, str):
        raise CrustflowInputError(
            f"{key} has {value!r} without units; write it as a string with units, e.g. {example}"
        )
    import pint

    try:
        quantity = checked_quantity(value, key, example)
        practical = float(quantity.to(_PINT_UNITS.get(var.units, var.units)).magnitude)
    except (pint.errors.PintError, ValueError, TypeError, AttributeError, SyntaxError):
        raise CrustflowInputError(
            f"{key} has {value!r}, not a value in units of {name} ({var.units}); write e.g. "
            f"{example}"
        ) from None
    return practical / var.factor
