"""Fitting the channel to observations: the posterior of scalar parameters, its summary, and the
files of ``crustflow fit``.

:func:`fit` samples the posterior of the ``[fit.parameters]`` given the ``[[fit.observations]]``
and returns the samples and a summary table; :func:`run_fit` also writes the outputs into a folder.

A fit of a simplified model is a consistency test, not a measurement: the posterior says which
parameter values make *this* model (thin channel, rigid walls, lithostatic load) agree with the
observations within their stated errors. Uplift and thickening rates of a Newtonian channel depend
on its thickness h and viscosity eta only through the transmissivity ``h^3 / (12 eta)`` (and the wall
term ``U h / 2``), so they constrain that combination, not h and eta apart; it is reported beside
the parameters.

Conventions
-----------
- Summary values are in each row's ``units`` (pint spelling); ``p05``/``p95`` are the 5th and 95th
  percentiles of the retained samples (numpy's "linear" method); ``sd`` uses ``ddof = 1``.
- Residuals are ``observed - predicted`` (predicted: the posterior-predictive median at the site);
  normalised residuals divide by the observation's 1-sigma error. The chi-square line uses the MAP.
- Observations are compared with the model value of the grid cell that contains them.

References
----------
.. [1] Foreman-Mackey, D., Hogg, D. W., Lang, D. & Goodman, J. (2013). emcee: the MCMC hammer.
   PASP 125, 306-312.
.. [2] Goodman, J. & Weare, J. (2010). Ensemble samplers with affine invariance. CAMCoS 5(1), 65-80.
"""

from __future__ import annotations

import dataclasses
import logging
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from crustflow.analyses.ensemble import report
from crustflow.analyses.ensemble.engine import EnsembleGrid, fallback_maps, fast_maps
from crustflow.analyses.ensemble.fast import MemberBuffers
from crustflow.analyses.ensemble.run import FAST_ARRAYS, MEMORY_BYTES
from crustflow.analyses.fitting.forward import SilentBar, SiteModel, fit_obstacle
from crustflow.analyses.fitting.likelihood import Posterior, Prior
from crustflow.analyses.fitting.sampler import diagnostics, run_sampler
from crustflow.engine.progress import StageClock
from crustflow.engine.strips import strip_rows_for
from crustflow.errors import CrustflowInputError
from crustflow.figures.fitting import corner_figure, residual_figure
from crustflow.io.grids import file_checksum
from crustflow.io.observations import read_observations
from crustflow.scenario.ensemble_spec import VARIABLE_KEYS

__all__ = ["fit", "run_fit", "FitResult", "SUMMARY_COLUMNS"]

logger = logging.getLogger(__name__)

#: Columns of the summary table (``fit_summary.csv``).
SUMMARY_COLUMNS = (
    "parameter",
    "units",
    "map",
    "median",
    "p05",
    "p95",
    "mean",
    "sd",
    "ess",
    "acceptance",
    "r_hat",
    "tau",
    "flags",
)

#: pint spellings of the practical units of crustflow.scenario.ensemble_spec.VARIABLE_KEYS.
PINT_UNITS = {
    "Pa_s": "Pa*s",
    "km": "km",
    "kg_per_m3": "kg/m**3",
    "mm_per_yr": "mm/yr",
    "m_per_s2": "m/s**2",
}

#: Percentiles of the posterior-predictive maps and site predictions.
PREDICTIVE_PERCENTILES = (5.0, 50.0, 95.0)


@dataclass
class FitResult:
    """What :func:`fit` returns.

    Attributes
    ----------
    samples : pandas.DataFrame
        The retained posterior samples: one column per sampled value and derived quantity, in the
        summary's units (column ``<parameter>``), and ``log_posterior``.
    summary : pandas.DataFrame
        One row per parameter and derived quantity, columns :data:`SUMMARY_COLUMNS`.
    observations : pandas.DataFrame
        The observations kept, in their sets' units: observed, sigma, predicted (median, p05, p95
        of the posterior predictive at the site), predicted_map, residual, normalised_residual.
    dropped : list of tuple
        ``(name, reason)`` of the observations dropped.
    fast_path : bool
    fast_path_obstacle : str or None
    chi_square, rms : float
        At the MAP: sum of squared normalised residuals, and their root mean square.
    members : list
        ModelParameters of the posterior draws used for the predictive maps.
    manifest : dict
        JSON-ready settings and results for the run manifest.
    """

    samples: pd.DataFrame
    summary: pd.DataFrame
    observations: pd.DataFrame
    dropped: list
    fast_path: bool
    fast_path_obstacle: str | None
    chi_square: float
    rms: float
    members: list = field(repr=False)
    crs: object = field(repr=False, default=None)
    manifest: dict = field(default_factory=dict, repr=False)

    def summary_line(self) -> str:
        """The chi-square / RMS line printed at the end of ``crustflow fit``."""
        n, k = len(self.observations), int((~self.summary["derived"]).sum())
        dof = max(n - k, 1)
        return (
            f"{n} observations, {k} sampled values; at the MAP chi-square {self.chi_square:.4g} "
            f"(reduced {self.chi_square / dof:.3g} over {dof} degrees of freedom), RMS normalised "
            f"residual {self.rms:.3g}"
        )


# ----------------------------------------------------------------------------------------------
# the fit


def fit(scenario, *, fast: bool | None = None, progress: bool = False) -> FitResult:
    """Sample the posterior of a scenario's ``[fit.parameters]`` given its observations.

    Parameters
    ----------
    scenario : Scenario
        With a ``[fit]`` table (:class:`crustflow.scenario.fit.FitSpec`).
    fast : bool, optional
        Force the fast path (True) or the per-sample full solve (False); default: the fast path
        wherever it applies (Newtonian channel with scalar parameters and the default load).
    progress : bool
        A progress bar of the sampler on stderr.

    Returns
    -------
    FitResult

    Raises
    ------
    CrustflowInputError
        No ``[fit]`` table, unreadable observations, no observation left on the grid, a load model
        the fit does not support, ``fast=True`` where the fast path does not apply.

    Notes
    -----
    Posterior ``p(theta | d) ~ p(theta) prod_i p(d_i | m_i(theta))`` with Gaussian errors (or
    Student-t, ``[fit.sampler] likelihood``), sampled by the affine-invariant ensemble sampler
    (Goodman & Weare 2010) of emcee (Foreman-Mackey et al. 2013) from a MAP start. The model values
    ``m_i`` are those of :func:`crustflow.solve` at the observation cells (the same code path).
    """
    spec = _spec_of(scenario)
    clock = StageClock()
    clock("observations and base maps")
    table = _observations(scenario, spec)
    frame = table.frame
    model = SiteModel(scenario, frame["row"], frame["col"], frame["variable"], fast=fast)
    if not model.fast:
        logger.info("fast path not used (%s): every sample runs a full solve", model.obstacle)
    defined = model.defined()
    table.drop(~defined, "on nodata or a grid edge (no model value at its cell)")
    model.keep(defined)
    frame = table.frame
    for name, reason in table.dropped:
        logger.info("observation %r dropped: %s", name, reason)
    if len(frame) == 0:
        names = ", ".join(repr(n) for n, _ in table.dropped[:5])
        raise CrustflowInputError(
            f"no observation has a model value at its cell (dropped: {names}); place observations "
            "on valid cells away from nodata and the grid's edge"
        )
    s = spec.sampler
    prior = Prior(spec.dimensions())
    posterior = Posterior(
        prior,
        model,
        frame["observed"].to_numpy(),
        frame["sigma"].to_numpy(),
        kind=s.likelihood,
        dof=s.degrees_of_freedom,
    )
    clock("MAP and sampling")
    chain = run_sampler(posterior, s, progress=progress)
    clock("summary and site predictions")
    samples, summary = _summarise(scenario, prior, chain)
    rng = np.random.Generator(np.random.PCG64(s.seed + 1))
    kept = chain.kept()
    draws = kept[rng.choice(len(kept), size=min(s.predictive_draws, len(kept)), replace=False)]
    observations, chi2, rms = _site_table(frame, posterior, draws, chain.map_theta)
    members = _members(scenario, posterior, draws)
    timings = {stage: round(seconds, 4) for stage, seconds in clock.finish().items()}
    manifest = {
        "spec": spec.describe(),
        "fast_path": model.fast,
        "fast_path_obstacle": model.obstacle,
        "observations_kept": len(frame),
        "observations_dropped": [{"name": n, "reason": r} for n, r in table.dropped],
        "likelihood_evaluations": posterior.evaluations,
        "stage_seconds": timings,
        "map_log_posterior": chain.map_log_prob,
        "chi_square_at_map": chi2,
        "rms_normalised_residual_at_map": rms,
        "method": "emcee affine-invariant ensemble sampler (stretch move, a = 2), MAP start from "
        "scipy.optimize Nelder-Mead; sampling coordinates: ln x for priors with a positive "
        "support (Jacobian included)",
    }
    return FitResult(
        samples,
        summary,
        observations,
        list(table.dropped),
        model.fast,
        model.obstacle,
        chi2,
        rms,
        members,
        crs=table.crs,
        manifest=manifest,
    )


def _spec_of(scenario):
    spec = getattr(scenario, "fit", None)
    if spec is None:
        raise CrustflowInputError(
            "the scenario has no [fit] table; add [[fit.observations]], [fit.parameters] and "
            "[fit.sampler] seed (see the README)"
        )
    if getattr(scenario.load, "filtered", False):
        raise CrustflowInputError(
            "fits do not support [load] smoothing or elastic_thickness yet (a whole-grid "
            "computation for every sample); remove them from the scenario"
        )
    return spec


def _observations(scenario, spec):
    grid = EnsembleGrid(scenario)
    try:
        return read_observations(spec, grid.sources["topography"])
    finally:
        grid.close()


def _summarise(scenario, prior: Prior, chain) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The samples table and the summary rows (parameters, then derived quantities)."""
    si_chain = prior.to_si(chain.theta)
    si_map = prior.to_si(chain.map_theta)
    quantities = []
    for j, d in enumerate(prior.dims):
        key = VARIABLE_KEYS[d.key]
        name = d.key + (f"_{d.component}" if d.component else "")
        quantities.append(
            (
                name,
                PINT_UNITS[key.unit],
                si_chain[..., j] * key.factor,
                si_map[j] * key.factor,
                False,
            )
        )
    fields = {d.field: si_chain[..., j] for j, d in enumerate(prior.dims)}
    at_map = {d.field: si_map[j] for j, d in enumerate(prior.dims)}
    for name, units, values, best in _derived(scenario, fields, at_map):
        quantities.append((name, units, values, best, True))
    rows, columns = [], {}
    for name, units, values, best, derived in quantities:
        kept = values[chain.burn_in :: chain.thin].reshape(-1)
        p05, p50, p95 = np.percentile(kept, [5, 50, 95])
        diag = diagnostics(chain, values)
        rows.append(
            dict(
                parameter=name,
                units=units,
                map=float(best),
                median=p50,
                p05=p05,
                p95=p95,
                mean=kept.mean(),
                sd=kept.std(ddof=1),
                ess=diag["ess"],
                acceptance=diag["acceptance"],
                r_hat=diag["r_hat"],
                tau=diag["tau"],
                flags=diag["flags"],
                derived=derived,
            )
        )
        columns[name] = kept
    columns["log_posterior"] = chain.kept_log_prob()
    summary = pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS) + ["derived"])
    return pd.DataFrame(columns), summary


def _derived(scenario, fields: dict, at_map: dict):
    """Derived quantities the observations constrain: (name, units, values, value at the MAP).

    Notes
    -----
    Newtonian channel: transmissivity ``h^3 / (12 eta)``, m^3/(Pa s), the factor of the pressure
    gradient in the flux ``q = U h / 2 - h^3 G / (12 eta)`` (Turcotte & Schubert 2002, section 6.2).
    Power-law channel: flux coefficient ``A h^(n+2) / (2^(n+1) (n+2))``, m^(n+2)/(Pa^n s), with
    ``|q| = coefficient x |G|^n`` between fixed walls (SCIENCE.md; Bird 1991).
    """
    p, channel = scenario.parameters, scenario.channel
    if channel.grids:
        return
    if "channel_thickness" not in fields and "viscosity" not in fields:
        return
    h = fields.get("channel_thickness", p.channel_thickness)
    h_map = at_map.get("channel_thickness", p.channel_thickness)
    if channel.rheology == "newtonian":
        eta = fields.get("viscosity", p.viscosity)
        eta_map = at_map.get("viscosity", p.viscosity)
        yield (
            "channel.transmissivity",
            "m**3/(Pa*s)",
            np.broadcast_to(h**3 / (12.0 * eta), _shape(fields)),
            h_map**3 / (12.0 * eta_map),
        )
    elif channel.rheology == "power-law":
        n, a = channel.stress_exponent, channel.prefactor

        def coefficient(h):
            return a * h ** (n + 2) / (2 ** (n + 1) * (n + 2))

        yield (
            "channel.flux_coefficient",
            f"m**{n + 2:g}/(Pa**{n:g}*s)",
            np.broadcast_to(coefficient(h), _shape(fields)),
            coefficient(h_map),
        )


def _shape(fields: dict) -> tuple:
    return next(iter(fields.values())).shape


def _site_table(frame: pd.DataFrame, posterior, draws, map_theta):
    """Observations with posterior-predictive and MAP predictions and residuals, in set units."""
    pred = posterior.model.predict(posterior.fields(draws))
    best = posterior.model.predict(posterior.fields(map_theta[None]))[0]
    lo, mid, hi = np.nanpercentile(pred, PREDICTIVE_PERCENTILES, axis=0)
    scale = frame["scale"].to_numpy()
    out = frame[["name", "set", "variable", "x", "y", "row", "col", "units"]].copy()
    out["observed"] = frame["observed"] / scale
    out["sigma"] = frame["sigma"] / scale
    out["predicted"] = mid / scale
    out["predicted_p05"] = lo / scale
    out["predicted_p95"] = hi / scale
    out["predicted_map"] = best / scale
    out["residual"] = out["observed"] - out["predicted"]
    out["normalised_residual"] = out["residual"] / out["sigma"]
    r_map = (frame["observed"].to_numpy() - best) / frame["sigma"].to_numpy()
    return out, float(np.sum(r_map**2)), float(np.sqrt(np.mean(r_map**2)))


def _members(scenario, posterior, draws) -> list:
    values = posterior.fields(draws)
    return [
        dataclasses.replace(scenario.parameters, **{k: float(v[i]) for k, v in values.items()})
        for i in range(len(draws))
    ]


# ----------------------------------------------------------------------------------------------
# the files


def run_fit(scenario, folder, progress=None) -> dict:
    """Fit a scenario and write the outputs into ``folder``.

    Parameters
    ----------
    scenario : Scenario
        With a ``[fit]`` table.
    folder : path
        An existing (temporary) folder.
    progress : bool, optional
        Progress bars on stderr (default: none).

    Returns
    -------
    dict
        ``result`` (:class:`FitResult`), ``written`` (file names), ``summary_line`` and
        ``manifest`` (JSON-ready entries for ``run.json``).

    Notes
    -----
    Files: ``fit_summary.csv`` (:data:`SUMMARY_COLUMNS`), ``posterior.csv`` (retained samples),
    ``posterior_predictive.nc`` (percentiles 5, 50, 95, mean and sd of ``fit.variables`` over the
    posterior draws, written by the ensemble's map writer), ``fit_residuals.gpkg`` (layer
    ``residuals``), ``fit_residuals.png`` and ``fit_corner.png``.
    """
    folder = Path(folder)
    result = fit(scenario, progress=bool(progress))
    began = time.perf_counter()
    written = []
    summary = result.summary.drop(columns="derived")
    summary.to_csv(folder / "fit_summary.csv", index=False)
    result.samples.to_csv(folder / "posterior.csv", index=False)
    written += ["fit_summary.csv", "posterior.csv"]
    if "netcdf" in scenario.formats:
        written += _predictive_maps(scenario, result.members, folder)
    written += _residual_layer(result, folder)
    if "figure" in scenario.formats:
        residual_figure(
            result.observations, result.crs, folder / "fit_residuals.png", title=scenario.title
        )
        names = list(result.summary["parameter"])
        units = list(result.summary["units"])
        corner_figure(
            result.samples[names].to_numpy(),
            [f"{n} ({u})" for n, u in zip(names, units, strict=True)],
            folder / "fit_corner.png",
            best=result.summary["map"].to_numpy(),
            log=[_logged(n) for n in names],
        )
        written += ["fit_residuals.png", "fit_corner.png"]
    result.manifest["stage_seconds"]["files"] = round(time.perf_counter() - began, 4)
    manifest = dict(
        result.manifest,
        summary=summary.to_dict(orient="records"),
        outputs=list(written),
        inputs={str(p): {"sha256": file_checksum(p)} for p in scenario.fit.input_paths},
    )
    return {
        "result": result,
        "written": written,
        "summary_line": result.summary_line(),
        "manifest": manifest,
    }


def _logged(name: str) -> bool:
    return name in ("channel.viscosity", "channel.transmissivity", "channel.flux_coefficient")


def _predictive_maps(scenario, members, folder: Path) -> list[str]:
    """``posterior_predictive.nc``: the ensemble's percentile maps over the posterior draws."""
    spec = scenario.fit
    M = len(members)
    names = list(spec.variables)
    fast = fit_obstacle(scenario, names) is None
    grid = EnsembleGrid(scenario)
    try:
        rows = strip_rows_for(grid.width)
        buffers = MemberBuffers(M)
        reducer = report.Reducer(names, None, (), PREDICTIVE_PERCENTILES, M, buffers.get)
        nc_only = dataclasses.replace(scenario, formats=("netcdf",))
        writer = report.MapWriter(
            folder, grid, nc_only, spec.prior_spec(M), PREDICTIVE_PERCENTILES, rows
        )
        try:
            if fast:
                chunk = max(1, MEMORY_BYTES // (8 * M * FAST_ARRAYS))
                fast_maps(grid, members, names, reducer, writer, rows, chunk, buffers, SilentBar())
            else:
                chunk = max(1, MEMORY_BYTES // (8 * M * 2 * (len(names) + 2)))
                fallback_maps(grid, members, names, reducer, writer, rows, chunk, SilentBar())
            writer.close()
        except BaseException:
            writer.abort()
            raise
    finally:
        grid.close()
    path = folder / "posterior_predictive.nc"
    (folder / "ensemble.nc").rename(path)
    _describe_predictive(path, M)
    return [path.name]


def _describe_predictive(path: Path, members: int) -> None:
    import netCDF4

    with netCDF4.Dataset(path, "a") as ds:
        ds.history = ds.history.replace("crustflow ensemble", "crustflow fit")
        ds.fit_note = (
            f"posterior-predictive maps: the {members} 'ensemble members' are draws from the "
            "posterior of crustflow fit (ensemble_vary holds the priors, not the sampling); a fit "
            "of a simplified model is a consistency test, not a measurement"
        )


def _residual_layer(result: FitResult, folder: Path) -> list[str]:
    import geopandas as gpd

    obs = result.observations
    layer = gpd.GeoDataFrame(
        obs.drop(columns=["x", "y"]),
        geometry=gpd.points_from_xy(obs["x"], obs["y"]),
        crs=result.crs,
    )
    layer.to_file(
        folder / "fit_residuals.gpkg",
        layer="residuals",
        driver="GPKG",
        layer_options={
            "DESCRIPTION": "crustflow fit residuals: observed - predicted (posterior-predictive "
            "median at the cell containing the point), in each set's units; normalised by sigma"
        },
    )
    return ["fit_residuals.gpkg"]
