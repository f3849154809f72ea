"""Ensembles: how sure are the maps? Sample uncertain scalar parameters and map the spread of the results.

An ensemble varies scalar scenario values (viscosity, channel thickness, densities, wall velocity,
gravity, the Airy reference thickness) according to stated probability distributions, runs the model
for every sampled member and reduces the members cell by cell to percentiles, mean, standard deviation
and exceedance probabilities, and feature by feature to distributions of the volume budgets.

Two engines give the same numbers (``tests/test_ensemble.py``):

* **Fast path.** For a Newtonian channel of uniform parameters every output is a combination of a few
  base maps with per-member scalars (see :func:`fast_fields`), so each member costs a few multiply-adds
  per cell. Cells are processed in chunks of a strip of rows, never holding members x cells for the whole
  grid; the strips are read with halo rows as :mod:`crustflow.stream` does.
* **Fallback.** Anything else (parameter grids, other rheologies) loops over the members and calls
  :func:`crustflow.fields.fields_si` on each strip. It is slower, by about the ratio of a full model
  run to a few multiply-adds per cell.

Conventions
-----------
- SI inside; practical units at the edges: the units of :data:`crustflow.fields.VARIABLES` in files,
  and the units named in the column headers of the sampled values.
- Percentiles: numpy's ``"linear"`` method (definition 7 of Hyndman & Fan 1996), over the members of a
  cell. The order statistics are taken on the member values rounded to float32, the precision of the
  output files; rounding is monotone, so they are the float64 order statistics rounded, and the linear
  interpolation between them is done in float64.
- Standard deviation: the sample standard deviation over members (``ddof = 1``).
- Exceedance: the share of members whose value is strictly greater than the threshold (0 to 1).
- A cell that is nodata for a variable has no statistics (NaN).
- Members are numbered from 0, in sampling order.

References
----------
.. [1] McKay, M. D., Beckman, R. J. & Conover, W. J. (1979). A comparison of three methods for
   selecting values of input variables in the analysis of output from a computer code.
   Technometrics 21(2), 239-245.
.. [2] Hyndman, R. J. & Fan, Y. (1996). Sample quantiles in statistical packages. The American
   Statistician 50(4), 361-365.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import ensemble_report as report
from .channel import channel_flow
from .constants import SECONDS_PER_YEAR
from .errors import CrustflowInputError
from .fields import VARIABLES, crust_thickness_of, fields_si
from .maps import divergence, gradient, grid_geometry
from .scenario import ModelParameters
from .units import parse_quantity

__all__ = [
    "Distribution",
    "VectorDistribution",
    "EnsembleSpec",
    "parse_ensemble",
    "sample_members",
    "run_ensemble",
    "fast_fields",
    "fast_path_obstacle",
    "SAMPLING",
    "DISTRIBUTIONS",
    "VARIABLE_KEYS",
    "MEMORY_BYTES",
]

#: Sampling designs ``[ensemble] sampling`` may name.
SAMPLING = ("latin-hypercube", "random")

#: Distributions and the keys each needs and allows (besides ``distribution``).
DISTRIBUTIONS = {
    "uniform": (("low", "high"), ()),
    "log-uniform": (("low", "high"), ()),
    "normal": (("mean", "sd"), ("min", "max")),
}

#: Percentiles and report variables when ``[ensemble.report]`` does not give them.
DEFAULT_PERCENTILES = (5.0, 50.0, 95.0)
DEFAULT_VARIABLES = ("flux_magnitude", "thickening_rate", "uplift_rate")

#: Percentiles the figure needs (median and the 5-95 % spread), computed in any case.
FIGURE_PERCENTILES = (5.0, 50.0, 95.0)

#: Variables without a meaningful percentile: directions wrap around at north.
CIRCULAR = ("flux_azimuth",)

#: Variables that need the whole grid at once (crustflow.fields.whole_grid_load), not available
#: strip by strip for every member.
WHOLE_GRID = ("thin_channel_warning",)

#: Working memory for the member-by-cell arrays, bytes. Project choice: 1 GiB keeps a 1000-member
#: run of a 1000 x 1000 grid far below 4 GB with chunks large enough to keep numpy busy.
MEMORY_BYTES = 1 << 30

#: Member-by-cell float64 arrays alive at once on the fast path (named buffers, the float32 sort
#: copy, a comparison mask), and with the full one-cell solution (peak speed, drag, backflow). Peak
#: traced by tracemalloc over one chunk of 9,000 cells and 200 members: 5.8 and 36 arrays; rounded up.
FAST_ARRAYS, FULL_ARRAYS = 8, 40

#: Open interval the uniform deviates are clipped to before an inverse CDF (the normal's is infinite
#: at 0 and 1): the smallest positive float64 and the largest float64 below 1.
U_LOW, U_HIGH = float(np.finfo(float).tiny), float(np.nextafter(1.0, 0.0))


@dataclass(frozen=True)
class _Key:
    fields: tuple[str, ...]  #: ModelParameters field(s)
    kind: str  #: units kind of crustflow.units.DIMENSIONS
    unit: str  #: practical unit of the sampled values (column headers)
    factor: float  #: practical = SI x factor
    bound: str | None  #: "positive", "non-negative" or None (any sign)


#: Scenario keys an ensemble may vary: fields of ModelParameters, units and physical bounds.
VARIABLE_KEYS: dict[str, _Key] = {
    "channel.viscosity": _Key(("viscosity",), "viscosity", "Pa_s", 1.0, "positive"),
    "channel.thickness": _Key(("channel_thickness",), "length", "km", 1e-3, "positive"),
    "densities.crust": _Key(("rho_crust",), "density", "kg_per_m3", 1.0, "positive"),
    "densities.mantle": _Key(("rho_mantle",), "density", "kg_per_m3", 1.0, "positive"),
    "densities.water": _Key(("rho_water",), "density", "kg_per_m3", 1.0, "non-negative"),
    "densities.channel": _Key(("rho_channel",), "density", "kg_per_m3", 1.0, "positive"),
    "walls.upper_velocity": _Key(
        ("wall_east", "wall_north"), "velocity", "mm_per_yr", 1e3 * SECONDS_PER_YEAR, None
    ),
    "constants.gravity": _Key(("gravity",), "acceleration", "m_per_s2", 1.0, "positive"),
    "grids.reference_thickness": _Key(("reference_thickness",), "length", "km", 1e-3, "positive"),
}


# ----------------------------------------------------------------------------------------------
# distributions and the spec


@dataclass(frozen=True)
class Distribution:
    """A probability distribution of one scalar parameter, in SI units.

    Parameters
    ----------
    kind : {"uniform", "log-uniform", "normal"}
    low, high : float, optional
        Bounds of a uniform or log-uniform distribution (log-uniform: uniform in ``ln x``).
    mean, sd : float, optional
        Mean and standard deviation of the parent normal distribution.
    min, max : float, optional
        Truncation bounds of a normal distribution (None: not truncated on that side).

    Notes
    -----
    Inverse CDFs: uniform ``low + u (high - low)``; log-uniform ``exp(ln low + u ln(high / low))``;
    normal, truncated to [min, max], ``scipy.stats.truncnorm.ppf(u, a, b, mean, sd)`` with
    ``a = (min - mean) / sd`` and ``b = (max - mean) / sd``. The mean and sd of a truncated normal
    are those of its parent, not of the truncated distribution. Values are clipped to the bounds
    (rounding could otherwise step one unit in the last place beyond them).
    """

    kind: str
    low: float | None = None
    high: float | None = None
    mean: float | None = None
    sd: float | None = None
    min: float | None = None
    max: float | None = None

    def _standard_bounds(self) -> tuple[float, float]:
        a = -math.inf if self.min is None else (self.min - self.mean) / self.sd
        b = math.inf if self.max is None else (self.max - self.mean) / self.sd
        return a, b

    def _clip(self, x: np.ndarray) -> np.ndarray:
        if self.kind == "normal":
            lo = -np.inf if self.min is None else self.min
            hi = np.inf if self.max is None else self.max
            return np.clip(x, lo, hi)
        return np.clip(x, self.low, self.high)

    def ppf(self, u) -> np.ndarray:
        """Inverse cumulative distribution function at probabilities ``u`` (0 < u < 1), SI."""
        u = np.asarray(u, dtype=float)
        if self.kind == "uniform":
            x = self.low + u * (self.high - self.low)
        elif self.kind == "log-uniform":
            x = np.exp(math.log(self.low) + u * math.log(self.high / self.low))
        else:
            from scipy.stats import truncnorm

            x = truncnorm.ppf(u, *self._standard_bounds(), loc=self.mean, scale=self.sd)
        return self._clip(x)

    def cdf(self, x) -> np.ndarray:
        """Cumulative distribution function at values ``x`` (SI)."""
        x = np.asarray(x, dtype=float)
        if self.kind == "uniform":
            u = (x - self.low) / (self.high - self.low)
        elif self.kind == "log-uniform":
            u = np.log(x / self.low) / math.log(self.high / self.low)
        else:
            from scipy.stats import truncnorm

            u = truncnorm.cdf(x, *self._standard_bounds(), loc=self.mean, scale=self.sd)
        return np.clip(u, 0.0, 1.0)

    def describe(self) -> dict:
        """The distribution as a JSON-ready dict (SI)."""
        return {k: v for k, v in dataclasses.asdict(self).items() if v is not None}


@dataclass(frozen=True)
class VectorDistribution:
    """Independent distributions of the east and north components of a vector parameter (SI)."""

    east: Distribution
    north: Distribution

    def describe(self) -> dict:
        """The distributions as a JSON-ready dict (SI)."""
        return {"east": self.east.describe(), "north": self.north.describe()}


@dataclass(frozen=True)
class _Dimension:
    """One sampled scalar: a scenario key (and vector component) and its distribution."""

    key: str
    field: str
    component: str | None
    distribution: Distribution

    @property
    def label(self) -> str:
        """Column header of the sampled values, practical unit included."""
        spec = VARIABLE_KEYS[self.key]
        part = f"_{self.component}" if self.component else ""
        return f"{self.key}{part}_{spec.unit}"


@dataclass(frozen=True)
class EnsembleSpec:
    """A parsed ``[ensemble]`` table (SI).

    Attributes
    ----------
    members : int
        Number of members, at least 2.
    seed : int
        Seed of the random generator (``numpy.random.PCG64``).
    sampling : {"latin-hypercube", "random"}
    vary : dict
        Scenario key -> :class:`Distribution` (:class:`VectorDistribution` for
        ``walls.upper_velocity``), in the order written.
    percentiles : tuple of float
        Requested percentiles, 0 to 100, ascending.
    variables : tuple of str
        Output variables to summarise (names of :data:`crustflow.fields.VARIABLES`).
    exceedance_variable : str or None
        Variable whose exceedance probabilities are mapped.
    thresholds : tuple of float
        Its thresholds, SI.
    written : dict
        The table as written (provenance).
    """

    members: int
    seed: int
    sampling: str
    vary: dict
    percentiles: tuple[float, ...] = DEFAULT_PERCENTILES
    variables: tuple[str, ...] = DEFAULT_VARIABLES
    exceedance_variable: str | None = None
    thresholds: tuple[float, ...] = ()
    written: dict = field(default_factory=dict, compare=False, repr=False)

    def dimensions(self) -> list[_Dimension]:
        """The sampled scalars in sampling order (a vector key gives east, then north)."""
        dims = []
        for key, dist in self.vary.items():
            spec = VARIABLE_KEYS[key]
            if isinstance(dist, VectorDistribution):
                dims += [
                    _Dimension(key, spec.fields[0], "east", dist.east),
                    _Dimension(key, spec.fields[1], "north", dist.north),
                ]
            else:
                dims.append(_Dimension(key, spec.fields[0], None, dist))
        return dims

    def describe(self) -> dict:
        """The spec as a JSON-ready dict (SI), for run manifests."""
        return {
            "members": self.members,
            "seed": self.seed,
            "sampling": self.sampling,
            "vary": {k: d.describe() for k, d in self.vary.items()},
            "percentiles": list(self.percentiles),
            "variables": list(self.variables),
            "exceedance": {
                "variable": self.exceedance_variable,
                "thresholds_SI": list(self.thresholds),
            },
            "percentile_method": report.PERCENTILE_METHOD,
        }


# ----------------------------------------------------------------------------------------------
# parsing


def _unknown(key: str, valid, where: str, extra: str = "") -> CrustflowInputError:
    close = difflib.get_close_matches(str(key), list(valid), n=1, cutoff=0.5)
    hint = f"did you mean '{close[0]}'?" if close else f"valid keys: {', '.join(valid)}"
    return CrustflowInputError(f"unknown key '{key}' in {where}; {hint}{extra}")


def _check_keys(table: dict, valid, where: str) -> None:
    for key in table:
        if key not in valid:
            raise _unknown(key, valid, where)


def _integer(value, key: str, example: str, least: int) -> int:
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
    _check_keys(raw, ("members", "seed", "sampling", "vary", "report"), "[ensemble]")
    if "members" not in raw:
        raise CrustflowInputError(
            "[ensemble] needs members = N (an integer of at least 2, e.g. 1000)"
        )
    members = _integer(raw["members"], "ensemble.members", "members = 1000", 2)
    if "seed" not in raw:
        raise CrustflowInputError(
            "[ensemble] needs seed = N (an integer, e.g. seed = 20261201) so that the ensemble can "
            "be repeated exactly"
        )
    seed = _integer(raw["seed"], "ensemble.seed", "seed = 20261201", 0)
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
    vary = {key: _parse_varied(key, table, parameters) for key, table in vary_raw.items()}
    rep = raw.get("report", {})
    if not isinstance(rep, dict):
        raise CrustflowInputError("ensemble.report must be a table ([ensemble.report])")
    _check_keys(rep, ("percentiles", "variables", "exceedance"), "[ensemble.report]")
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


def _parse_varied(key: str, table, parameters: ModelParameters):
    if key not in VARIABLE_KEYS:
        raise _unknown(
            key,
            VARIABLE_KEYS,
            "[ensemble.vary]",
            f"; the keys that can vary: {', '.join(VARIABLE_KEYS)}",
        )
    spec = VARIABLE_KEYS[key]
    where = f'ensemble.vary."{key}"'
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
    _check_keys(
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


def _distribution(kind: str, values: dict, where: str, part: str, spec: _Key) -> Distribution:
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


def _example_min(spec: _Key) -> str:
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
        raise _unknown(name, valid, where)
    return name


def _parse_exceedance(table) -> tuple[str, tuple[float, ...]]:
    where = "ensemble.report.exceedance"
    if not isinstance(table, dict):
        raise CrustflowInputError(
            f'{where} must be a table, e.g. {{ variable = "uplift_rate", thresholds = '
            '["1 mm/yr"] }'
        )
    _check_keys(table, ("variable", "thresholds"), where)
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
    return name, tuple(_parse_threshold(v, f"{where}.thresholds", name) for v in values)


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


def _parse_threshold(value, key: str, name: str) -> float:
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

    from .units import _registry  # the project's one pint registry (parse_quantity's own)

    try:
        quantity = _registry().Quantity(value.strip())
        practical = float(quantity.to(_PINT_UNITS.get(var.units, var.units)).magnitude)
    except (pint.errors.PintError, ValueError, TypeError, AttributeError, SyntaxError):
        raise CrustflowInputError(
            f"{key} has {value!r}, not a value in units of {name} ({var.units}); write e.g. "
            f"{example}"
        ) from None
    return practical / var.factor


# ----------------------------------------------------------------------------------------------
# sampling


def _unit_samples(spec: EnsembleSpec, dims: int) -> np.ndarray:
    rng = np.random.Generator(np.random.PCG64(spec.seed))
    if spec.sampling == "random":
        u = rng.random((spec.members, dims))
    else:
        from scipy.stats import qmc

        try:
            engine = qmc.LatinHypercube(d=dims, rng=rng)
        except TypeError:  # scipy < 1.15 names the generator argument seed
            engine = qmc.LatinHypercube(d=dims, seed=rng)
        u = engine.random(spec.members)
    return np.clip(u, U_LOW, U_HIGH)


def sample_members(spec: EnsembleSpec, parameters: ModelParameters):
    """Draw the members of an ensemble.

    Parameters
    ----------
    spec : EnsembleSpec
    parameters : ModelParameters
        The scenario's parameters (SI); the values not varied are kept.

    Returns
    -------
    members : list of ModelParameters
        One per member, SI.
    table : pandas.DataFrame
        Column ``member`` (0-based) and one column per sampled scalar in practical units, named
        ``<key>[_east|_north]_<unit>`` (e.g. ``channel.thickness_km``,
        ``walls.upper_velocity_east_mm_per_yr``).

    Raises
    ------
    CrustflowInputError
        A member whose parameters are inconsistent (e.g. a mantle no denser than the crust).

    Notes
    -----
    Uniform deviates ``u`` come from ``numpy.random.Generator(PCG64(seed))``: directly
    (``"random"``), or through ``scipy.stats.qmc.LatinHypercube`` with that generator
    (``"latin-hypercube"``: each of the N equal-probability strata of every parameter holds exactly
    one member [1]_). Each column is mapped through its distribution's inverse CDF
    (:meth:`Distribution.ppf`). The same seed, sampling and ``[ensemble.vary]`` table (in the same
    order) give the same members.

    References
    ----------
    .. [1] McKay, Beckman & Conover (1979), Technometrics 21(2), 239-245.
    """
    import pandas as pd

    dims = spec.dimensions()
    u = _unit_samples(spec, len(dims))
    values = np.column_stack([d.distribution.ppf(u[:, j]) for j, d in enumerate(dims)])
    if not np.all(np.isfinite(values)):
        bad = dims[int(np.flatnonzero(~np.isfinite(values).all(axis=0))[0])]
        raise CrustflowInputError(
            f'ensemble.vary."{bad.key}": the distribution gives non-finite values (truncation '
            "bounds far in the tail?); bring min and max closer to the mean"
        )
    members = []
    for i in range(spec.members):
        changes = {d.field: float(values[i, j]) for j, d in enumerate(dims)}
        try:
            members.append(dataclasses.replace(parameters, **changes))
        except CrustflowInputError as exc:
            raise CrustflowInputError(
                f"ensemble member {i}: {exc}; narrow the ranges in [ensemble.vary]"
            ) from None
    table = pd.DataFrame({"member": np.arange(spec.members)})
    for j, d in enumerate(dims):
        table[d.label] = values[:, j] * VARIABLE_KEYS[d.key].factor
    return members, table


# ----------------------------------------------------------------------------------------------
# the fast path: base maps and per-member scalars


@dataclass(frozen=True)
class _Scalars:
    """Per-member scalars of the fast path, arrays over members (SI)."""

    h: np.ndarray
    eta: np.ndarray
    ue: np.ndarray
    un: np.ndarray
    rho_c: np.ndarray
    rho_ch: np.ndarray
    rho_w: np.ndarray
    rho_m: np.ndarray
    g: np.ndarray
    t0: np.ndarray
    a: np.ndarray
    b: np.ndarray
    airy: bool

    @classmethod
    def of(cls, members, airy: bool) -> _Scalars:
        def get(name):  # None (a parameter the rheology does not use) becomes NaN
            return np.array([getattr(p, name) for p in members], dtype=float)

        rho_c, rho_m, rho_w = get("rho_crust"), get("rho_mantle"), get("rho_water")
        zero = np.zeros(len(members))
        if airy:  # Airy: T = T0 + a H on land, T0 + b H under water (load.crust_thickness_airy)
            t0, a, b = (
                get("reference_thickness"),
                rho_m / (rho_m - rho_c),
                (rho_m - rho_w) / (rho_m - rho_c),
            )
        else:
            t0, a, b = zero, zero, zero
        return cls(
            get("channel_thickness"),
            get("viscosity"),
            get("wall_east"),
            get("wall_north"),
            rho_c,
            get("rho_channel"),
            rho_w,
            rho_m,
            get("gravity"),
            t0,
            a,
            b,
            airy,
        )

    @property
    def vectors(self) -> tuple[str, ...]:
        """Base gradient maps: of the thickness grid (not in the Airy case), of H+ and of H-."""
        return ("Hp", "Hm") if self.airy else ("Tg", "Hp", "Hm")

    @property
    def gamma(self) -> list[np.ndarray]:
        """Coefficients of the base gradients in G, Pa/m per (m/m), one per :attr:`vectors`."""
        d = self.rho_c - self.rho_ch
        gp = self.g * (d * self.a + self.rho_ch)
        gm = self.g * (d * self.b + self.rho_ch - self.rho_w)
        return [gp, gm] if self.airy else [self.g * d, gp, gm]


def _terms(name: str, s: _Scalars) -> list[tuple[str, np.ndarray]]:
    """(base map, per-member coefficient) pairs whose sum is variable ``name`` (SI)."""
    k = -(s.h**3) / (12.0 * s.eta)
    w_e, w_n = 0.5 * s.h * s.ue, 0.5 * s.h * s.un
    vec, gam = s.vectors, s.gamma
    tg = np.zeros_like(s.h) if s.airy else np.ones_like(s.h)
    if name in ("flux_east", "flux_north"):
        side = name.split("_")[1]
        return [("one", w_e if side == "east" else w_n)] + [
            (f"{v}_{side}", k * gm) for v, gm in zip(vec, gam, strict=True)
        ]
    if name in ("drive_east", "drive_north"):
        side = name.split("_")[1]
        return [(f"{v}_{side}", gm) for v, gm in zip(vec, gam, strict=True)]
    if name == "thickening_rate":
        return [("E", -w_e), ("N", -w_n)] + [
            (f"D_{v}", -k * gm) for v, gm in zip(vec, gam, strict=True)
        ]
    if name == "uplift_rate":
        land = 1.0 - s.rho_ch / s.rho_m
        sea = (s.rho_m - s.rho_ch) / (s.rho_m - s.rho_w)
        thick = _terms("thickening_rate", s)
        return [(f"{c}_land", v * land) for c, v in thick] + [
            (f"{c}_sea", v * sea) for c, v in thick
        ]
    if name == "crust_thickness":
        return [("one", s.t0), ("Tg", tg), ("Hp", s.a), ("Hm", s.b)]
    if name == "channel_top_depth":
        return [("one", s.t0 - s.h), ("Tg", tg), ("Hp", s.a - 1.0), ("Hm", s.b - 1.0)]
    if name == "overburden_pressure":
        gc = s.g * s.rho_c
        return [
            ("one", gc * (s.t0 - s.h)),
            ("Tg", gc * tg),
            ("Hp", gc * s.a),
            ("Hm", s.g * (s.rho_c * s.b - s.rho_w)),
        ]
    if name == "channel_thickness":
        return [("one", s.h)]
    raise KeyError(name)


#: Variables that are sums of base maps times member scalars.
LINEAR = (
    "flux_east",
    "flux_north",
    "drive_east",
    "drive_north",
    "thickening_rate",
    "uplift_rate",
    "crust_thickness",
    "channel_top_depth",
    "overburden_pressure",
    "channel_thickness",
)
#: Variables of the one-cell solution computed by crustflow.channel.channel_flow.
SOLUTION = (
    "mean_velocity_east",
    "mean_velocity_north",
    "peak_speed",
    "peak_speed_height",
    "upper_wall_drag_east",
    "upper_wall_drag_north",
    "lower_wall_drag_east",
    "lower_wall_drag_north",
    "backflow",
    "wall_driven_share",
)
#: Everything the fast path computes; other variables need the fallback.
FAST_VARIABLES = LINEAR + SOLUTION + ("flux_magnitude",)
#: Variables defined wherever the inputs are (the rest also need a finite driving gradient).
_ON_VALID = ("crust_thickness", "channel_top_depth", "overburden_pressure", "channel_thickness")


def _block_basis(H: np.ndarray, T: np.ndarray | None, geom) -> dict[str, np.ndarray]:
    """Base maps of one block of rows (a grid, or a strip with halo rows), SI.

    ``T`` is the crustal thickness grid (None in the Airy case). Returns the masks ``valid`` and
    ``live`` (as :func:`crustflow.fields.fields_si` defines them) and the maps named in
    :func:`_terms`: ``one``, ``Tg``, ``Hp = max(H, 0)``, ``Hm = min(H, 0)``, their gradients
    ``<v>_east``/``<v>_north``, the divergences ``D_<v>`` of those gradient fields and ``E``/``N``
    of unit east/north fields, and ``land`` (1 where H >= 0). NaN where not valid/live.
    """
    airy = T is None
    valid = np.isfinite(H) if airy else np.isfinite(H) & np.isfinite(T)
    out = {"valid": valid, "land": (H >= 0).astype(float)}
    out["Hp"] = np.where(valid, np.maximum(H, 0.0), np.nan)
    out["Hm"] = np.where(valid, np.minimum(H, 0.0), np.nan)
    out["Tg"] = np.where(valid, 0.0 if airy else T, np.nan)
    out["one"] = np.where(valid, 1.0, np.nan)
    vectors = ("Hp", "Hm") if airy else ("Tg", "Hp", "Hm")
    live = valid.copy()
    for v in vectors:
        out[f"{v}_east"], out[f"{v}_north"] = gradient(out[v], geom)
        live &= np.isfinite(out[f"{v}_east"]) & np.isfinite(out[f"{v}_north"])
    for v in vectors:  # gradients of fields sharing one nodata pattern share theirs
        out[f"D_{v}"] = divergence(out[f"{v}_east"], out[f"{v}_north"], geom)
    unit, zero = np.where(live, 1.0, np.nan), np.where(live, 0.0, np.nan)
    out["E"] = divergence(unit, zero, geom)
    out["N"] = divergence(zero, unit, geom)
    out["live"] = live
    return out


class _Buffers:
    """Named (cells, members) work arrays, allocated once and reused: fresh arrays of this size cost
    more in page faults than the arithmetic done on them."""

    def __init__(self, members: int) -> None:
        self.members, self._arrays = members, {}

    def get(self, name: str, cells: int, dtype=np.float64) -> np.ndarray:
        arr = self._arrays.get(name)
        if arr is None or arr.shape[0] < cells:
            arr = self._arrays[name] = np.empty((cells, self.members), dtype=dtype)
        return arr[:cells]


class _Chunk:
    """Member values of a chunk of cells on the fast path, as (cells, members) float64 arrays."""

    def __init__(self, columns: dict, scalars: _Scalars, buffers: _Buffers) -> None:
        self.columns, self.s, self.buf = columns, scalars, buffers
        self.cells = columns["valid"].size
        self._cache: dict[str, np.ndarray] = {}

    def _column(self, name: str) -> np.ndarray:
        col = self.columns.get(name)
        if col is None:
            base, _, side = name.rpartition("_")
            land = self.columns["land"]
            col = self.columns[base] * (land if side == "land" else 1.0 - land)
            self.columns[name] = col
        return col

    def _linear(self, name: str, slot: str) -> np.ndarray:
        terms = _terms(name, self.s)
        basis = np.stack([np.nan_to_num(self._column(c), nan=0.0) for c, _ in terms], axis=1)
        coef = np.stack([np.broadcast_to(v, (self.buf.members,)) for _, v in terms])
        return np.matmul(basis, coef, out=self.buf.get(slot, self.cells))

    def values(self, name: str) -> np.ndarray:
        """Member values of ``name`` (SI), NaN on rows (cells) where it is nodata."""
        if name in self._cache:
            return self._cache[name]
        keep = name in ("flux_east", "flux_north", "drive_east", "drive_north")
        if name in LINEAR:
            vals = self._linear(name, name if keep else "work")
        elif name == "flux_magnitude":
            qe, qn = self.values("flux_east"), self.values("flux_north")
            vals = np.multiply(qe, qe, out=self.buf.get("work", self.cells))
            tmp = np.multiply(qn, qn, out=self.buf.get("tmp", self.cells))
            np.sqrt(np.add(vals, tmp, out=vals), out=vals)
        elif name in SOLUTION:
            vals = self._solution()[name]
        else:
            raise KeyError(f"the fast path does not compute {name}")
        rows = self.columns["valid" if name in _ON_VALID else "live"]
        vals[~rows] = np.nan
        if keep:
            self._cache[name] = vals
        return vals

    def _solution(self) -> dict:
        if "solution" not in self._cache:
            s = self.s
            sol = channel_flow(
                self.values("drive_east"),
                self.values("drive_north"),
                s.h[None],
                s.eta[None],
                wall_east=s.ue[None],
                wall_north=s.un[None],
            )
            out = {k: np.asarray(v, dtype=float) for k, v in sol.as_dict().items()}
            self._cache["solution"] = out
        return self._cache["solution"]


def fast_fields(
    elevation, geometry, members, *, crust_thickness=None, moho_depth=None, wanted=None
) -> dict[str, np.ndarray]:
    """Output variables of many members at once on one block of cells, by the fast path.

    Parameters
    ----------
    elevation : ndarray
        H, m, NaN for nodata, on ``geometry``'s cells.
    geometry : crustflow.maps.GridGeometry
    members : sequence of ModelParameters
        SI; each a Newtonian channel of uniform parameters.
    crust_thickness, moho_depth : ndarray, optional
        At most one, m; with neither, Airy isostasy from each member's ``reference_thickness``.
    wanted : iterable of str, optional
        Variables (default: the flux, drive, load, thickening and uplift variables).

    Returns
    -------
    dict
        Name -> array (members, nrow, ncol) in SI, equal to :func:`crustflow.fields.fields_si` per
        member to rounding.

    Notes
    -----
    With ``W = max(0, -H) = -H-``, ``H = H+ + H-``, ``z_top = T - H - h`` and
    ``P_top = g (rho_w W + rho_c (T - h))`` (crustflow.load), the drive
    ``G = grad(P_top) - rho_ch g grad(z_top)`` becomes, for uniform h and densities,

    ``G = g [(rho_c - rho_ch) grad(T) + rho_ch grad(H+) + (rho_ch - rho_w) grad(H-)]``.

    With a thickness grid, ``grad(T)`` is one base map; in the Airy case
    ``T = T0 + a H+ + b H-`` (``a = rho_m / (rho_m - rho_c)``, ``b = (rho_m - rho_w) / (rho_m - rho_c)``),
    so ``grad(T) = a grad(H+) + b grad(H-)``. Either way G is a sum of two or three base gradient
    maps times per-member scalars. Then ``q = U h / 2 - h^3 G / (12 eta)`` adds a uniform field,
    and the finite-volume divergence (linear, with one nodata pattern for every member) gives
    ``-dT/dt = (h U_e / 2) div(e) + (h U_n / 2) div(n) + sum_k c_k div(B_k)`` from the divergences of
    the base maps ``B_k`` and of unit east and north fields ``e``, ``n`` (not zero on geographic
    grids: meridians converge). The uplift rate multiplies by the land or sea factor of
    :func:`crustflow.load.uplift_rate`. The magnitude and the one-cell solution (peak speed,
    drags, backflow) are computed from q and G member by member, cell by cell.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002), Geodynamics, 2nd ed., sections 2.2 and 6.2.
    """
    members = list(members)
    H = np.asarray(elevation, dtype=float)
    airy = crust_thickness is None and moho_depth is None
    T = (
        None
        if airy
        else crust_thickness_of(
            H, members[0], crust_thickness=crust_thickness, moho_depth=moho_depth
        )
    )
    names = list(
        wanted
        or (
            "flux_east",
            "flux_north",
            "flux_magnitude",
            "drive_east",
            "drive_north",
            "thickening_rate",
            "uplift_rate",
            "crust_thickness",
            "channel_top_depth",
            "overburden_pressure",
        )
    )
    basis = _block_basis(H, T, geometry)
    cells = np.flatnonzero(basis["valid"])
    chunk = _Chunk(
        {k: v.ravel()[cells] for k, v in basis.items()},
        _Scalars.of(members, airy),
        _Buffers(len(members)),
    )
    out = {}
    for name in names:
        full = np.full((len(members), H.size), np.nan)
        full[:, cells] = chunk.values(name).T
        out[name] = full.reshape((len(members), *H.shape))
    return out


def fast_path_obstacle(scenario, spec: EnsembleSpec) -> str | None:
    """Why the fast path does not apply to this scenario and ensemble, or None when it does."""
    channel = getattr(scenario, "channel", None)
    if channel is not None and getattr(channel, "rheology", "newtonian") != "newtonian":
        return f"the channel is {channel.rheology}, not Newtonian"
    if channel is not None and getattr(channel, "grids", None):
        return f"channel parameters are grids ({', '.join(channel.grids)})"
    load_model = getattr(scenario, "load", None)
    if load_model is not None and load_model != type(load_model)():
        return "the load model is not a uniform crust with the channel at its base"
    needed = set(spec.variables) | {spec.exceedance_variable} - {None}
    other = sorted(needed - set(FAST_VARIABLES))
    if other:
        return f"the fast path does not compute {', '.join(other)}"
    return None


# ----------------------------------------------------------------------------------------------
# reading strips


class _Strip:
    def __init__(self, r0, r1, a, arrays, geom, cell) -> None:
        self.r0, self.r1, self.arrays, self.geom, self.cell = r0, r1, arrays, geom, cell
        self.crop = slice(r0 - a, r1 - a)
        self.H = arrays["topography"]

    def thickness(self, parameters) -> np.ndarray:
        return crust_thickness_of(
            self.H,
            parameters,
            crust_thickness=self.arrays.get("crust_thickness"),
            moho_depth=self.arrays.get("moho_depth"),
        )


class _Grid:
    """The scenario's grids, read strip by strip with halo rows (as crustflow.stream does)."""

    def __init__(self, scenario) -> None:
        from .grids import open_sources

        self.scenario = scenario
        self.sources = open_sources(scenario)
        topo = self.sources["topography"]
        self.x, self.y = topo.coords()
        self.crs, self.transform = topo.crs, topo.transform
        self.height, self.width = topo.height, topo.width
        self.airy = scenario.crust_thickness is None and scenario.moho_depth is None
        self.cell_grids = {}
        for setup in (getattr(scenario, "channel", None), getattr(scenario, "load", None)):
            self.cell_grids.update(getattr(setup, "grids", None) or {})

    def strips(self, rows: int):
        from .stream import HALO_ROWS

        t = self.transform
        for r0 in range(0, self.height, rows):
            r1 = min(self.height, r0 + rows)
            a, b = max(0, r0 - HALO_ROWS), min(self.height, r1 + HALO_ROWS)
            arrays = {key: src.read(a, b) for key, src in self.sources.items()}
            cell = {k: g.to_si(arrays[k]) for k, g in self.cell_grids.items()}
            geom = grid_geometry(self.x, self.y[a:b], self.crs, spacing=(t.a, t.e))
            yield _Strip(r0, r1, a, arrays, geom, cell)

    def close(self) -> None:
        from .grids import close_sources

        close_sources(self.sources)


def _member_fields(strip: _Strip, parameters, scenario, wanted) -> dict[str, np.ndarray]:
    """fields_si of one member on one strip, cropped to the strip's own rows (the fallback).

    The strip is checked as :mod:`crustflow.stream` checks it: a channel not thinner than the
    crust, and roof layers reaching below the channel top, are errors.
    """
    T = strip.thickness(parameters)
    h = strip.cell.get("channel_thickness", parameters.channel_thickness)
    if h is not None:  # None: the channel is placed by depths
        with np.errstate(invalid="ignore"):
            bad = (np.isfinite(T) & np.isfinite(strip.H) & (T <= h))[strip.crop]
        if bad.any():
            raise CrustflowInputError(
                f"the channel is not thinner than the crust in {int(bad.sum())} cells for an "
                "ensemble member; narrow channel.thickness (or the densities) in [ensemble.vary]"
            )
    kw: dict = {"cell": strip.cell}
    for key, attr in (("setup", "channel"), ("load_setup", "load")):
        if getattr(scenario, attr, None) is not None:
            kw[key] = getattr(scenario, attr)
    diagnostics: dict = {}
    if "load_setup" in kw:
        kw["diagnostics"] = diagnostics
    si = fields_si(strip.H, T, strip.geom, parameters, wanted=set(wanted), **kw)
    roof_bad = diagnostics.get("roof_bad")
    if roof_bad is not None and roof_bad[strip.crop].any():
        from .load_setup import ColumnCheck

        check = ColumnCheck()
        check.update(roof_bad[strip.crop], 0)
        check.finish()
    return {n: si[n][strip.crop] for n in wanted}


def _scan(grid: _Grid, rows: int, bar) -> dict:
    """First pass: the input checks of a run and the extremes the thickness check needs."""
    from .grids import GridChecks

    checks = GridChecks(grid.sources)
    cells = None
    if grid.cell_grids:
        from .channel_setup import CellInputCheck

        cells = CellInputCheck()
    low = {"H": np.inf, "T": np.inf}
    p = grid.scenario.parameters
    for strip in grid.strips(rows):
        crop = {k: v[strip.crop] for k, v in strip.arrays.items()}
        checks.update(crop)
        if cells is not None:
            cells.update({k: v[strip.crop] for k, v in strip.cell.items()})
        H = crop["topography"]
        ok = np.isfinite(H)
        if ok.any():
            low["H"] = min(low["H"], float(H[ok].min()))
        if not grid.airy:
            T = strip.thickness(p)[strip.crop]
            ok &= np.isfinite(T)
            if ok.any():
                low["T"] = min(low["T"], float(T[ok].min()))
        bar.update(strip.r1 - strip.r0)
    checks.finish()
    if cells is not None:
        cells.finish()
    return low


def _check_thickness(members, low: dict, airy: bool, varied: bool) -> None:
    """Every member's channel must be thinner than its thinnest crust (as crustflow.solve checks)."""
    s = _Scalars.of(members, airy)
    if airy:
        thinnest = s.t0 + (s.a if low["H"] >= 0 else s.b) * low["H"]
    else:
        thinnest = np.full_like(s.h, low["T"])
    bad = np.flatnonzero(s.h >= thinnest)
    if bad.size:
        i = int(bad[0])
        fix = (
            'set max in [ensemble.vary]."channel.thickness" below the thinnest crust'
            if varied
            else "give a thinner channel or narrow the varied densities and reference thickness in "
            "[ensemble.vary]"
        )
        raise CrustflowInputError(
            f"channel.thickness is not less than the thinnest crust in {bad.size} of "
            f"{len(members)} ensemble members (member {i}: channel {s.h[i] / 1e3:.4g} km, crust "
            f"{thinnest[i] / 1e3:.4g} km); {fix}"
        )


# ----------------------------------------------------------------------------------------------
# the run


def run_ensemble(
    scenario,
    spec: EnsembleSpec,
    folder,
    *,
    progress: bool = False,
    strip_rows: int | None = None,
    fast: bool | None = None,
    memory_bytes: int = MEMORY_BYTES,
) -> dict:
    """Run an ensemble of a scenario and write its maps, tables and figures into ``folder``.

    Parameters
    ----------
    scenario : Scenario
    spec : EnsembleSpec
        From :func:`parse_ensemble`.
    folder : path
        An existing (temporary) folder; see :func:`crustflow.ensemble_report.write_tables` and
        :class:`crustflow.ensemble_report.MapWriter` for the files. ``[output] formats`` of the
        scenario chooses NetCDF, GeoTIFF and figures; the CSV tables are always written.
    progress : bool
        Progress bars on stderr (cells done and time left; members done on the fallback).
    strip_rows : int, optional
        Rows per strip (default: :func:`crustflow.stream.strip_rows_for` on the fast path, from
        ``memory_bytes`` on the fallback).
    fast : bool, optional
        Force the fast path (True; an error where it does not apply) or the fallback (False);
        default: the fast path wherever :func:`fast_path_obstacle` finds nothing against it.
    memory_bytes : int
        Budget for the member-by-cell work arrays, bytes (default :data:`MEMORY_BYTES`).

    Returns
    -------
    dict
        ``written`` (file names), ``fast_path`` (bool), ``fast_path_obstacle`` (str or None),
        ``samples`` (DataFrame of :func:`sample_members`), ``member_budgets`` (DataFrame of the
        volume flux of each feature per member, m^3/yr, or None), ``budget_statistics``
        (DataFrame or None), ``timings`` (seconds per stage), ``shape``, ``strip_rows``,
        ``chunk_cells``, ``provenance`` (grid alignment), ``spec`` (:meth:`EnsembleSpec.describe`),
        ``members``, ``percentile_method``, and ``manifest``: the JSON-ready entries (no
        DataFrames; budget statistics as records) for a run manifest.

    Raises
    ------
    CrustflowInputError
        Every check of a run (grids, features), a member whose channel is not thinner than its
        crust, and ``fast=True`` where the fast path does not apply.

    Notes
    -----
    Fast path: a first pass checks the grids; then each strip of rows is read with two halo rows,
    its base maps are computed (:func:`fast_fields`), its valid cells are cut into chunks of
    ``memory_bytes / (8 members FAST_ARRAYS)`` cells, and each chunk's member values are formed by
    one matrix product per variable and reduced at once
    (:class:`crustflow.ensemble_report.Reducer`). Budgets are linear in
    the flux: the budgets of the two or three base flux fields and of the unit wall fields
    (:func:`crustflow.budgets.budget_table`) combine with the member scalars.
    Fallback: strips of ``memory_bytes / (8 members (variables + 2) width)`` rows; each member runs
    :func:`crustflow.fields.fields_si` on each strip; budgets come from ``budget_table`` on each
    member's whole-grid flux.
    """
    from tqdm import tqdm

    from .grids import provenance as grid_provenance

    folder = Path(folder)
    timings: dict[str, float] = {}
    clock = [time.perf_counter()]

    def lap(stage: str) -> None:
        now = time.perf_counter()
        timings[stage] = timings.get(stage, 0.0) + now - clock[0]
        clock[0] = now

    def bar(total, unit, desc):
        return tqdm(
            total=total,
            unit=unit,
            desc=desc,
            leave=False,
            file=sys.stderr,
            disable=not progress,
            dynamic_ncols=True,
            unit_scale=True,
        )

    load_model = getattr(scenario, "load", None)
    if getattr(load_model, "filtered", False):
        raise CrustflowInputError(
            "ensembles do not support [load] smoothing or elastic_thickness yet (the filtered load "
            "is a whole-grid computation for every member); remove them from the scenario"
        )
    members, samples = sample_members(spec, scenario.parameters)
    obstacle = fast_path_obstacle(scenario, spec)
    if fast is None:
        fast = obstacle is None
    elif fast and obstacle:
        raise CrustflowInputError(f"the fast path does not apply: {obstacle}; leave fast unset")
    lap("sample members")
    grid = _Grid(scenario)
    try:
        from .stream import strip_rows_for

        M = spec.members
        names = list(spec.variables)
        needed = (
            list(dict.fromkeys(names + [spec.exceedance_variable]))
            if spec.exceedance_variable
            else names
        )
        full = bool(set(needed) & set(SOLUTION))
        rows = strip_rows or strip_rows_for(grid.width)
        with bar(grid.height, " rows", "checking grids") as b:
            low = _scan(grid, rows, b)
        features = _read_features(scenario, grid.crs)
        if not grid.cell_grids:
            _check_thickness(members, low, grid.airy, "channel.thickness" in spec.vary)
        lap("check grids")
        percentiles = tuple(sorted(set(spec.percentiles) | set(FIGURE_PERCENTILES)))
        buffers = _Buffers(M)
        reducer = report.Reducer(
            names, spec.exceedance_variable, spec.thresholds, percentiles, M, buffers.get
        )
        if fast:
            chunk = max(1, memory_bytes // (8 * M * (FULL_ARRAYS if full else FAST_ARRAYS)))
        else:
            rows = strip_rows or max(1, memory_bytes // (8 * M * (len(needed) + 2) * grid.width))
            chunk = max(1, memory_bytes // (8 * M * 2 * (len(needed) + 2)))
        writer = report.MapWriter(folder, grid, scenario, spec, percentiles, rows)
        try:
            if fast:
                with bar(grid.height * grid.width, " cells", f"ensemble ({M} members)") as b:
                    _fast_maps(grid, members, needed, reducer, writer, rows, chunk, buffers, b)
            else:
                with bar(
                    M * -(-grid.height // rows),
                    " member-strips",
                    f"ensemble ({M} members, fallback)",
                ) as b:
                    _fallback_maps(grid, members, needed, reducer, writer, rows, chunk, b)
            written = writer.close()
        except BaseException:
            writer.abort()
            raise
        lap("maps")
        member_budgets = None
        if features:
            with bar(None, " fields", "budgets") as b:
                member_budgets = _member_budgets(
                    grid, members, features, fast, rows, memory_bytes, b
                )
            lap("budgets")
        provenance = grid_provenance(grid.sources)
    finally:
        grid.close()
    written += report.write_tables(folder, samples, member_budgets, spec)
    stats = report.budget_statistics(member_budgets, spec.percentiles, M)
    if "figure" in scenario.formats:
        written += writer.figures(folder, stats, member_budgets)
    lap("tables and figures")
    summary = {
        "fast_path": bool(fast),
        "fast_path_obstacle": obstacle,
        "members": M,
        "spec": spec.describe(),
        "percentile_method": report.PERCENTILE_METHOD,
        "timings": {k: round(v, 4) for k, v in timings.items()},
        "shape": [grid.height, grid.width],
        "strip_rows": rows,
        "chunk_cells": chunk,
        "provenance": provenance,
    }
    budget_records = None if member_budgets is None else stats.to_dict(orient="records")
    return dict(
        summary,
        written=written,
        samples=samples,
        member_budgets=member_budgets,
        budget_statistics=stats if member_budgets is not None else None,
        manifest=dict(summary, outputs=list(written), budget_statistics=budget_records),
    )


def _fast_maps(grid, members, needed, reducer, writer, rows, chunk, buffers, bar) -> None:
    scalars = _Scalars.of(members, grid.airy)
    for strip in grid.strips(rows):
        T = None if grid.airy else strip.thickness(grid.scenario.parameters)
        basis = _block_basis(strip.H, T, strip.geom)
        flat = {k: v[strip.crop].ravel() for k, v in basis.items()}
        cells = np.flatnonzero(flat["valid"])
        reducer.start(flat["valid"].size)
        for c0 in range(0, cells.size, chunk):
            idx = cells[c0 : c0 + chunk]
            part = _Chunk({k: v[idx] for k, v in flat.items()}, scalars, buffers)
            for name in needed:
                rows_ok = part.columns["valid" if name in _ON_VALID else "live"]
                reducer.add(name, part.values(name), idx, rows_ok)
            bar.update(idx.size)
        bar.update(flat["valid"].size - cells.size)
        writer.write(strip.r0, strip.r1, reducer.maps)


def _fallback_maps(grid, members, needed, reducer, writer, rows, chunk, bar) -> None:
    M = len(members)
    for strip in grid.strips(rows):
        n = (strip.r1 - strip.r0) * grid.width
        stacks = {name: np.empty((M, n)) for name in needed}
        for m, p in enumerate(members):
            si = _member_fields(strip, p, grid.scenario, needed)
            for name in needed:
                stacks[name][m] = si[name].ravel()
            bar.update(1)
        reducer.start(n)
        cells = np.flatnonzero(np.isfinite(strip.H[strip.crop]).ravel())
        for c0 in range(0, cells.size, chunk):
            idx = cells[c0 : c0 + chunk]
            for name in needed:
                vals = np.ascontiguousarray(stacks[name][:, idx].T)
                reducer.add(name, vals, idx, np.isfinite(vals).all(axis=1))
        writer.write(strip.r0, strip.r1, reducer.maps)


# ----------------------------------------------------------------------------------------------
# budgets


def _read_features(scenario, crs) -> dict:
    from .budgets import read_features

    out = {}
    for kind in ("sections", "regions"):
        path = getattr(scenario, kind, None)
        if path is not None:
            out[kind] = read_features(path, kind, crs)
    return out


def _member_budgets(grid, members, features, fast: bool, rows: int, memory: int, bar):
    """Volume flux of every feature for every member (DataFrame, m^3/yr, one column per feature)."""
    import pandas as pd

    wanted = ("flux_east", "flux_north", "thickening_rate")
    if fast:
        s = _Scalars.of(members, grid.airy)
        k = -(s.h**3) / (12.0 * s.eta)
        coefs = [0.5 * s.h * s.ue, 0.5 * s.h * s.un] + [k * gm for gm in s.gamma]
        jobs = [("one", None), (None, "one")] + [(f"{v}_east", f"{v}_north") for v in s.vectors]

        def fields(strip, j, cache):
            if "basis" not in cache:
                T = None if grid.airy else strip.thickness(grid.scenario.parameters)
                cache["basis"] = _block_basis(strip.H, T, strip.geom)
            base = cache["basis"]
            live = base["live"]
            east, north = jobs[j]
            qe = np.where(live, base[east] if east else 0.0, np.nan)
            qn = np.where(live, base[north] if north else 0.0, np.nan)
            thick = -divergence(qe, qn, strip.geom)
            return [v[strip.crop] for v in (qe, qn, thick)]

        n_jobs = len(jobs)
    else:

        def fields(strip, j, cache):
            si = _member_fields(strip, members[j], grid.scenario, wanted)
            return [si[n] for n in wanted]

        n_jobs = len(members)
    tables = _whole_grid_budgets(grid, n_jobs, fields, features, rows, memory, bar)
    labels = report.budget_labels(tables[0])
    totals = np.array([t["volume_flux_m3_per_yr"].to_numpy() for t in tables])
    if fast:
        totals = np.column_stack(coefs) @ totals
    frame = pd.DataFrame(totals, columns=labels)
    frame.attrs.update(names=list(tables[0]["name"]), kinds=list(tables[0]["kind"]))
    return frame


def _whole_grid_budgets(grid, n_jobs, fields, features, rows, memory, bar):
    """budget_table of each job's whole-grid flux, as many jobs per pass over the grid as fit."""
    import rioxarray  # noqa: F401  (registers the .rio accessor)
    import xarray as xr

    from .budgets import budget_table
    from .fields import to_practical

    names = ("flux_east", "flux_north", "thickening_rate")
    per_pass = max(1, memory // (8 * len(names) * grid.height * grid.width))
    tables = []
    for j0 in range(0, n_jobs, per_pass):
        jobs = range(j0, min(n_jobs, j0 + per_pass))
        store = np.empty((len(jobs), len(names), grid.height, grid.width))
        for strip in grid.strips(rows):
            cache: dict = {}
            for i, j in enumerate(jobs):
                for k, values in enumerate(fields(strip, j, cache)):
                    store[i, k, strip.r0 : strip.r1] = values
        for i in range(len(jobs)):
            ds = xr.Dataset(
                {n: (("y", "x"), to_practical(n, store[i, k])) for k, n in enumerate(names)},
                coords={"y": grid.y, "x": grid.x},
            ).rio.write_crs(grid.crs)
            tables.append(budget_table(ds, features.get("sections"), features.get("regions")))
            bar.update(1)
    return tables
