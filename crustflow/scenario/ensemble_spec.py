"""What an ensemble varies and how its members are drawn: the scenario keys that can vary, their
probability distributions, the parsed ``[ensemble]`` table and the sampling of the members.

Part of :mod:`crustflow.analyses.ensemble.run`, which re-exports the public names; the ``[ensemble]`` table is
parsed by :mod:`crustflow.scenario.ensemble`. Conventions in :mod:`crustflow.analyses.ensemble.run`.

References
----------
.. [1] McKay, M. D., Beckman, R. J. & Conover, W. J. (1979). A comparison of three methods for
   selecting values of input variables in the analysis of output from a computer code.
   Technometrics 21(2), 239-245.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from crustflow.constants import SECONDS_PER_YEAR
from crustflow.errors import CrustflowInputError
from crustflow.scenario.parameters import ModelParameters

#: Percentiles and report variables when ``[ensemble.report]`` does not give them.
DEFAULT_PERCENTILES = (5.0, 50.0, 95.0)
DEFAULT_VARIABLES = ("flux_magnitude", "thickening_rate", "uplift_rate")

#: Open interval the uniform deviates are clipped to before an inverse CDF (the normal's is infinite
#: at 0 and 1): the smallest positive float64 and the largest float64 below 1.
U_LOW, U_HIGH = float(np.finfo(float).tiny), float(np.nextafter(1.0, 0.0))


@dataclass(frozen=True)
class VariedKey:
    fields: tuple[str, ...]  #: ModelParameters field(s)
    kind: str  #: units kind of crustflow.units.DIMENSIONS
    unit: str  #: practical unit of the sampled values (column headers)
    factor: float  #: practical = SI x factor
    bound: str | None  #: "positive", "non-negative" or None (any sign)


#: Scenario keys an ensemble may vary: fields of ModelParameters, units and physical bounds.
VARIABLE_KEYS: dict[str, VariedKey] = {
    "channel.viscosity": VariedKey(("viscosity",), "viscosity", "Pa_s", 1.0, "positive"),
    "channel.thickness": VariedKey(("channel_thickness",), "length", "km", 1e-3, "positive"),
    "densities.crust": VariedKey(("rho_crust",), "density", "kg_per_m3", 1.0, "positive"),
    "densities.mantle": VariedKey(("rho_mantle",), "density", "kg_per_m3", 1.0, "positive"),
    "densities.water": VariedKey(("rho_water",), "density", "kg_per_m3", 1.0, "non-negative"),
    "densities.channel": VariedKey(("rho_channel",), "density", "kg_per_m3", 1.0, "positive"),
    "walls.upper_velocity": VariedKey(
        ("wall_east", "wall_north"), "velocity", "mm_per_yr", 1e3 * SECONDS_PER_YEAR, None
    ),
    "constants.gravity": VariedKey(("gravity",), "acceleration", "m_per_s2", 1.0, "positive"),
    "grids.reference_thickness": VariedKey(
        ("reference_thickness",), "length", "km", 1e-3, "positive"
    ),
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
        Output variables to summarise (names of :data:`crustflow.variables.VARIABLES`).
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
            "percentile_method": PERCENTILE_METHOD,
        }


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


#: How the percentile maps are computed (also a NetCDF attribute).
PERCENTILE_METHOD = (
    "numpy.percentile method 'linear' (Hyndman & Fan 1996, definition 7) over the members of each "
    "cell, on member values rounded to float32"
)
