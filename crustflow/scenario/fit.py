"""Parsing the ``[fit]`` table of a scenario: observation sets, priors and sampler settings (SI).

A fit turns observations of output variables (uplift rates from GNSS, InSAR or dated terraces,
thickening rates, fluxes) into a posterior distribution of the scenario's scalar parameters. This
module only parses and checks the table; files are read by :mod:`crustflow.io.observations` and the
posterior is sampled by :mod:`crustflow.analyses.fitting`.

The priors use the keys and distributions of ``[ensemble.vary]`` and are parsed by the same
function (:func:`crustflow.scenario.ensemble._parse_varied`). Every error names the key and the fix.

References
----------
.. [1] Foreman-Mackey, D., Hogg, D. W., Lang, D. & Goodman, J. (2013). emcee: the MCMC hammer.
   Publications of the Astronomical Society of the Pacific 125, 306-312.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from crustflow.errors import CrustflowInputError
from crustflow.scenario.ensemble import (
    CIRCULAR,
    WHOLE_GRID,
    check_keys,
    parse_integer,
    parse_threshold,
    parse_varied,
    unknown_key_error,
)
from crustflow.scenario.ensemble_spec import EnsembleSpec
from crustflow.scenario.parameters import ModelParameters
from crustflow.units import parse_quantity
from crustflow.variables import VARIABLES

__all__ = ["FitSpec", "ObservationSet", "SamplerSettings", "parse_fit", "LIKELIHOODS"]

#: Error models ``[fit.sampler] likelihood`` may name.
LIKELIHOODS = ("gaussian", "student-t")

#: Keys of one ``[[fit.observations]]`` set.
OBSERVATION_KEYS = (
    "file",
    "grid",
    "variable",
    "value",
    "sigma",
    "units",
    "name",
    "decimate",
    "correlation_length",
)

#: Sampler defaults. Project choice (common practice, no source): 32 walkers, 3000 steps of which
#: the first 1000 are discarded, every 5th kept; with the MAP start these converge (R-hat < 1.01,
#: >= 50 autocorrelation times) on the sample scenarios' 1-3 parameter fits (tests/analyses).
DEFAULT_SAMPLER = {
    "walkers": 32,
    "steps": 3000,
    "burn_in": 1000,
    "thin": 5,
    "likelihood": "gaussian",
    "degrees_of_freedom": 4.0,
    "predictive_draws": 200,
}


@dataclass(frozen=True)
class ObservationSet:
    """One ``[[fit.observations]]`` set (SI).

    Attributes
    ----------
    label : str
        Name of the set (``name`` key, else the file's stem).
    variable : str
        Observed output variable (a name of :data:`crustflow.variables.VARIABLES`).
    path : Path
        Points file (``file``) or raster (``grid``).
    kind : {"points", "raster"}
    value : str or None
        Points: attribute holding the observed value (in ``units``).
    sigma_attribute : str or None
        Points: attribute holding the 1-sigma error (in ``units``).
    sigma : float or None
        A 1-sigma error for every observation, SI.
    sigma_grid : Path or None
        Raster: a raster of 1-sigma errors (in ``units``).
    units : str
        Units of the values and errors in the files, as written.
    scale : float
        SI value of one ``units`` of the variable.
    decimate : int
        Raster: keep every ``decimate``-th pixel along rows and columns.
    correlation_length : float or None
        Raster: distance, m, over which errors are correlated; sets the stride when given.
    """

    label: str
    variable: str
    path: Path
    kind: str
    units: str
    scale: float
    value: str | None = None
    sigma_attribute: str | None = None
    sigma: float | None = None
    sigma_grid: Path | None = None
    decimate: int = 1
    correlation_length: float | None = None

    def describe(self) -> dict:
        """JSON-ready summary (paths as text, SI)."""
        out = {k: getattr(self, k) for k in ("label", "variable", "kind", "units", "value")}
        out.update(
            path=str(self.path),
            sigma_attribute=self.sigma_attribute,
            sigma_SI=self.sigma,
            sigma_grid=str(self.sigma_grid) if self.sigma_grid else None,
            decimate=self.decimate,
            correlation_length_m=self.correlation_length,
        )
        return out


@dataclass(frozen=True)
class SamplerSettings:
    """``[fit.sampler]``: the affine-invariant ensemble sampler's settings.

    Attributes
    ----------
    seed : int
        Seed of the random generator (walker start, moves, posterior-predictive draws).
    walkers : int
        Number of walkers (even, at least twice the number of sampled dimensions plus 2).
    steps : int
        Steps per walker, burn-in included.
    burn_in : int
        Steps discarded at the start of every walker.
    thin : int
        Keep every ``thin``-th step after the burn-in.
    likelihood : {"gaussian", "student-t"}
    degrees_of_freedom : float
        Of the Student-t error model (ignored for Gaussian errors).
    predictive_draws : int
        Posterior samples used for the posterior-predictive maps.
    """

    seed: int
    walkers: int = DEFAULT_SAMPLER["walkers"]
    steps: int = DEFAULT_SAMPLER["steps"]
    burn_in: int = DEFAULT_SAMPLER["burn_in"]
    thin: int = DEFAULT_SAMPLER["thin"]
    likelihood: str = DEFAULT_SAMPLER["likelihood"]
    degrees_of_freedom: float = DEFAULT_SAMPLER["degrees_of_freedom"]
    predictive_draws: int = DEFAULT_SAMPLER["predictive_draws"]


@dataclass(frozen=True)
class FitSpec:
    """A parsed ``[fit]`` table.

    Attributes
    ----------
    observations : tuple of ObservationSet
    parameters : dict
        Scenario key -> prior (:class:`crustflow.scenario.ensemble_spec.Distribution`, or
        ``VectorDistribution`` for ``walls.upper_velocity``), in the order written.
    sampler : SamplerSettings
    variables : tuple of str
        Variables of the posterior-predictive maps (default: the observed ones).
    written : dict
        The table as written (provenance).
    """

    observations: tuple[ObservationSet, ...]
    parameters: dict
    sampler: SamplerSettings
    variables: tuple[str, ...]
    written: dict = field(default_factory=dict, compare=False, repr=False)

    def prior_spec(self, members: int = 2) -> EnsembleSpec:
        """The priors as an ensemble spec (its dimensions are the sampled scalars, in order)."""
        return EnsembleSpec(
            members=members,
            seed=self.sampler.seed,
            sampling="random",
            vary=self.parameters,
            percentiles=(5.0, 50.0, 95.0),
            variables=self.variables,
        )

    def dimensions(self) -> list:
        """The sampled scalars (``walls.upper_velocity`` gives east, then north)."""
        return self.prior_spec().dimensions()

    @property
    def input_paths(self) -> list[Path]:
        """Every observation file (inputs: never inside an output folder)."""
        paths = [s.path for s in self.observations]
        return paths + [s.sigma_grid for s in self.observations if s.sigma_grid is not None]

    def describe(self) -> dict:
        """JSON-ready summary for the run manifest (SI)."""
        return {
            "observations": [s.describe() for s in self.observations],
            "parameters": {k: d.describe() for k, d in self.parameters.items()},
            "sampler": vars(self.sampler).copy(),
            "variables": list(self.variables),
        }


# ----------------------------------------------------------------------------------------------
# parsing


def parse_fit(raw: dict, parameters: ModelParameters, base: Path) -> FitSpec:
    """Parse and check the ``[fit]`` table of a scenario.

    Parameters
    ----------
    raw : dict
        The ``[fit]`` table as read from TOML.
    parameters : ModelParameters
        The scenario's parameters (SI): they tell which values can vary.
    base : Path
        Folder relative paths resolve against.

    Returns
    -------
    FitSpec

    Raises
    ------
    CrustflowInputError
        One line naming the key and the fix.

    Notes
    -----
    Example (the key names are a contract)::

        [fit]
        [[fit.observations]]
        file = "uplift_points.gpkg"    # points, any vector format, any CRS
        variable = "uplift_rate"
        value = "rate"                 # attribute with the observed value
        sigma = "rate_sd"              # attribute with its 1-sigma error, or "0.3 mm/yr"
        units = "mm/yr"
        [fit.parameters]               # priors: keys and distributions of [ensemble.vary]
        "channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", high = "1e21 Pa*s" }
        [fit.sampler]
        seed = 11
    """
    if not isinstance(raw, dict):
        raise CrustflowInputError(
            "[fit] must be a table with [[fit.observations]] and [fit.sampler]"
        )
    check_keys(raw, ("observations", "parameters", "sampler", "variables"), "[fit]")
    sets = raw.get("observations")
    if not isinstance(sets, list) or not sets or not all(isinstance(s, dict) for s in sets):
        raise CrustflowInputError(
            '[fit] needs at least one [[fit.observations]] set, e.g. file = "uplift.gpkg", '
            'variable = "uplift_rate", value = "rate", sigma = "rate_sd", units = "mm/yr"'
        )
    observations = tuple(_observation_set(s, i, base) for i, s in enumerate(sets))
    labels = [s.label for s in observations]
    for label in labels:
        if labels.count(label) > 1:
            raise CrustflowInputError(
                f"two [[fit.observations]] sets are named {label!r}; give each a distinct name = "
                '"..."'
            )
    priors = raw.get("parameters")
    if not isinstance(priors, dict) or not priors:
        raise CrustflowInputError(
            "[fit.parameters] is missing or empty; give a prior for at least one value, e.g. "
            '"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", '
            'high = "1e21 Pa*s" }'
        )
    priors = {
        key: parse_varied(key, table, parameters, section="fit.parameters")
        for key, table in priors.items()
    }
    sampler = _sampler(raw.get("sampler"))
    dims = sum(2 if k == "walls.upper_velocity" else 1 for k in priors)
    if sampler.walkers < 2 * dims + 2:
        raise CrustflowInputError(
            f"fit.sampler.walkers = {sampler.walkers} is too few for {dims} sampled values; give "
            f"at least {2 * dims + 2} (twice the number of values plus 2)"
        )
    observed = tuple(dict.fromkeys(s.variable for s in observations))
    variables = raw.get("variables", list(observed))
    if not isinstance(variables, list) or not variables:
        raise CrustflowInputError('fit.variables must be a list of names, e.g. ["uplift_rate"]')
    variables = tuple(dict.fromkeys(_variable(v, "fit.variables") for v in variables))
    return FitSpec(observations, priors, sampler, variables, written=raw)


def _variable(name, where: str) -> str:
    if name in CIRCULAR or name in WHOLE_GRID:
        raise CrustflowInputError(
            f"{where}: {name} cannot be fitted or summarised over samples (a direction or a "
            "whole-grid warning); choose e.g. uplift_rate"
        )
    valid = [v for v in VARIABLES if v not in CIRCULAR + WHOLE_GRID and not VARIABLES[v].flag]
    if not isinstance(name, str) or name not in valid:
        raise unknown_key_error(name, valid, where)
    return name


def _observation_set(table: dict, index: int, base: Path) -> ObservationSet:
    where = f"fit.observations[{index}]"
    check_keys(table, OBSERVATION_KEYS, f"[[fit.observations]] set {index}")
    if ("file" in table) == ("grid" in table):
        raise CrustflowInputError(
            f'{where}: give either file = "points.gpkg" (points) or grid = "uplift.tif" '
            "(a raster), not both or neither"
        )
    kind = "points" if "file" in table else "raster"
    key = "file" if kind == "points" else "grid"
    path = _path(table[key], f"{where}.{key}", base)
    if "variable" not in table:
        raise CrustflowInputError(f'{where} needs variable = "..." (e.g. "uplift_rate")')
    variable = _variable(table["variable"], f"{where}.variable")
    units = table.get("units")
    if not isinstance(units, str) or not units.strip():
        raise CrustflowInputError(
            f'{where} needs units = "..." for its values and errors, e.g. units = "mm/yr"'
        )
    scale = parse_threshold(f"1 {units.strip()}", f"{where}.units", variable)
    label = table.get("name", path.stem)
    if not isinstance(label, str) or not label:
        raise CrustflowInputError(f'{where}.name must be a text, e.g. name = "gnss"')
    kw: dict = {}
    sigma = table.get("sigma")
    if kind == "points":
        value = table.get("value")
        if not isinstance(value, str) or not value:
            raise CrustflowInputError(
                f'{where} needs value = "..." naming the attribute that holds the observed values'
            )
        kw["value"] = value
        if not isinstance(sigma, str) or not sigma.strip():
            raise CrustflowInputError(
                f'{where} needs sigma = "<attribute>" or a value with units such as "0.3 mm/yr"'
            )
        if _has_number(sigma):
            kw["sigma"] = _positive_sigma(sigma, f"{where}.sigma", variable)
        else:
            kw["sigma_attribute"] = sigma
        for extra in ("decimate", "correlation_length"):
            if extra in table:
                raise CrustflowInputError(f"{where}.{extra} applies to rasters only; remove it")
    else:
        if "value" in table:
            raise CrustflowInputError(f"{where}.value applies to point files only; remove it")
        if isinstance(sigma, dict) and set(sigma) == {"grid"}:
            kw["sigma_grid"] = _path(sigma["grid"], f"{where}.sigma.grid", base)
        elif isinstance(sigma, str) and _has_number(sigma):
            kw["sigma"] = _positive_sigma(sigma, f"{where}.sigma", variable)
        else:
            raise CrustflowInputError(
                f'{where}.sigma must be {{ grid = "sd.tif" }} or a value with units such as '
                '"0.5 mm/yr"'
            )
        kw.update(_spacing(table, where))
    return ObservationSet(label, variable, path, kind, units.strip(), scale, **kw)


def _spacing(table: dict, where: str) -> dict:
    out: dict = {}
    if "decimate" in table:
        out["decimate"] = parse_integer(table["decimate"], f"{where}.decimate", "decimate = 4", 1)
    if "correlation_length" in table:
        out["correlation_length"] = parse_quantity(
            table["correlation_length"], f"{where}.correlation_length", "length"
        )
        if not out["correlation_length"] > 0:
            raise CrustflowInputError(f'{where}.correlation_length must be positive, e.g. "20 km"')
    if not out:
        raise CrustflowInputError(
            f"{where}: neighbouring pixels of a raster are not independent; give decimate = N "
            '(keep every N-th pixel) or correlation_length = "20 km"'
        )
    return out


def _has_number(text: str) -> bool:
    head = text.strip().split(" ")[0]
    try:
        float(head)
    except ValueError:
        return False
    return True


def _positive_sigma(text: str, key: str, variable: str) -> float:
    value = parse_threshold(text, key, variable)
    if not value > 0:
        raise CrustflowInputError(f'{key} = {text!r} must be positive, e.g. "0.3 mm/yr"')
    return value


def _path(value, key: str, base: Path) -> Path:
    if not isinstance(value, str) or not value.strip():
        raise CrustflowInputError(f'{key} must be a file path in quotes, e.g. "uplift.gpkg"')
    path = Path(value).expanduser()
    return path if path.is_absolute() else base / path


def _sampler(raw) -> SamplerSettings:
    if not isinstance(raw, dict) or "seed" not in raw:
        raise CrustflowInputError(
            "[fit.sampler] needs seed = N (an integer, e.g. seed = 11) so that the fit can be "
            "repeated exactly"
        )
    check_keys(raw, ("seed",) + tuple(DEFAULT_SAMPLER), "[fit.sampler]")
    kw = {"seed": parse_integer(raw["seed"], "fit.sampler.seed", "seed = 11", 0)}
    for key, least in (
        ("walkers", 4),
        ("steps", 2),
        ("burn_in", 0),
        ("thin", 1),
        ("predictive_draws", 2),
    ):
        if key in raw:
            kw[key] = parse_integer(
                raw[key], f"fit.sampler.{key}", f"{key} = {DEFAULT_SAMPLER[key]}", least
            )
    if kw.get("walkers", DEFAULT_SAMPLER["walkers"]) % 2:
        raise CrustflowInputError(
            f"fit.sampler.walkers = {kw['walkers']} must be even (the walkers move in two halves); "
            f"give {kw['walkers'] + 1}"
        )
    steps = kw.get("steps", DEFAULT_SAMPLER["steps"])
    burn = kw.get("burn_in", min(DEFAULT_SAMPLER["burn_in"], steps // 3))
    if burn >= steps:
        raise CrustflowInputError(
            f"fit.sampler.burn_in = {burn} leaves no steps of {steps}; give burn_in < steps"
        )
    kw["burn_in"] = burn
    likelihood = raw.get("likelihood", "gaussian")
    if likelihood not in LIKELIHOODS:
        raise CrustflowInputError(
            f"fit.sampler.likelihood = {likelihood!r} is not one of {', '.join(LIKELIHOODS)}; "
            'write e.g. likelihood = "student-t"'
        )
    kw["likelihood"] = likelihood
    if "degrees_of_freedom" in raw:
        dof = raw["degrees_of_freedom"]
        if isinstance(dof, bool) or not isinstance(dof, int | float) or not dof > 0:
            raise CrustflowInputError(
                f"fit.sampler.degrees_of_freedom = {dof!r} must be a positive number, e.g. 4"
            )
        kw["degrees_of_freedom"] = float(dof)
    return SamplerSettings(**kw)
