"""Fitting: the posterior against an analytic one-dimensional posterior by quadrature, calibration
over repeated synthetic data sets, the h^3/eta trade-off, reproducibility, convergence flags, the
fast path against the full solve, the error models against scipy.stats, raster observations,
dropped observations and the power-law fallback.

Grids and observations here are invented test data (conftest's cos^2 plateau and Airy crust; the
observations are model values plus seeded noise), used only to exercise the code paths. The checks
are exact references named beside each (crustflow.solve, scipy.integrate, scipy.stats) and
statistical properties of Bayesian posteriors (Cook, Gelman & Rubin 2006, J. Comput. Graph. Stat.
15(3): intervals of a correctly computed posterior cover truths drawn from the prior at their
nominal rate).
"""

from __future__ import annotations

import dataclasses
import math

import geopandas as gpd
import numpy as np
import pytest
from conftest import SCENARIO, UTM, airy, bump, write_grid
from scipy import integrate, stats

import crustflow
from crustflow import CrustflowInputError
from crustflow.analyses.fitting.forward import SiteModel
from crustflow.analyses.fitting.likelihood import Posterior, Prior, log_likelihood
from crustflow.analyses.fitting.run import fit
from crustflow.analyses.fitting.sampler import run_sampler, split_rhat
from crustflow.scenario.fit import SamplerSettings

MM_YR = 1e-3 / (365.25 * 86400.0)  #: 1 mm/yr in m/s (Julian year, SCIENCE.md)


def _grids(folder, *, hole=False):
    topo = bump()
    crust = airy(topo)
    if hole:  # nodata in a corner block
        topo = topo.copy()
        topo[:6, :6] = np.nan
    write_grid(folder / "topo.tif", topo)
    write_grid(folder / "crust.tif", crust)
    return topo


def _sites(scenario, count, seed=0, variable="uplift_rate"):
    """Cells with a clearly non-zero model value: (x, y, model value SI, row, col)."""
    ds = crustflow.solve(scenario)
    values = ds[variable].values / crustflow.VARIABLES[variable].factor
    rows, cols = np.nonzero(np.abs(values) > 0.2 * np.nanmax(np.abs(values)))
    pick = np.random.default_rng(seed).choice(rows.size, count, replace=False)
    r, c = rows[pick], cols[pick]
    return ds.x.values[c], ds.y.values[r], values[r, c], r, c


def _points(path, x, y, values_mm, sd_mm, crs=UTM, names=None):
    names = names or [f"S{i}" for i in range(len(x))]
    frame = gpd.GeoDataFrame(
        {"name": names, "rate": values_mm, "rate_sd": sd_mm},
        geometry=gpd.points_from_xy(x, y),
        crs=crs,
    )
    frame.to_file(path, driver="GPKG")
    return path


def _scenario(folder, priors: str, sampler: str, extra: str = "", observations: str = ""):
    text = SCENARIO + extra
    text += observations or (
        '[fit]\n[[fit.observations]]\nfile = "obs.gpkg"\nvariable = "uplift_rate"\n'
        'value = "rate"\nsigma = "rate_sd"\nunits = "mm/yr"\n'
    )
    text += f"[fit.parameters]\n{priors}\n[fit.sampler]\n{sampler}\n"
    (folder / "fit.toml").write_text(text)
    return crustflow.load_scenario(folder / "fit.toml")


def _base(folder, **kw):
    _grids(folder, **kw)
    (folder / "base.toml").write_text(SCENARIO)
    return crustflow.load_scenario(folder / "base.toml")


ETA = (
    '"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", high = "1e21 Pa*s" }'
)


# ----------------------------------------------------------------------------------------------
# one parameter: the analytic posterior by quadrature


def _quadrature_quantiles(d, s, c, low, high, probs):
    """Quantiles in theta = ln(eta) of p(theta | d) ~ exp(-sum((d - c e^-theta)^2 / (2 s^2))) on
    [ln low, ln high] (flat prior in theta: log-uniform eta), by scipy.integrate.cumulative_trapezoid.
    Also returns the CDF as a function, for comparing sample quantiles in probability."""
    theta = np.linspace(math.log(low), math.log(high), 200001)
    pred = c[None, :] * np.exp(-theta)[:, None]
    logp = -0.5 * np.sum(((d[None, :] - pred) / s[None, :]) ** 2, axis=1)
    dens = np.exp(logp - logp.max())
    cdf = integrate.cumulative_trapezoid(dens, theta, initial=0.0)
    cdf /= cdf[-1]
    return np.interp(probs, cdf, theta), (lambda t: np.interp(t, theta, cdf))


def test_one_parameter_posterior_matches_quadrature(tmp_path):
    # Uplift of a Newtonian channel with no wall motion is c_i / eta (flux ~ h^3 / (12 eta):
    # Turcotte & Schubert 2002, section 6.2), so with Gaussian errors and a log-uniform prior the
    # posterior of ln(eta) is known up to a constant; its quantiles come from quadrature.
    base = _base(tmp_path)
    x, y, u19, _, _ = _sites(base, 12)  # model uplift at eta = 1e19 Pa s
    c = u19 * 1e19  # uplift = c / eta (value derived)
    eta_true = 3e19
    sd = np.full(c.size, 0.4 * np.mean(np.abs(c / eta_true)))
    d = c / eta_true + np.random.default_rng(5).normal(0.0, sd)
    _points(tmp_path / "obs.gpkg", x, y, d / MM_YR, sd / MM_YR)
    scenario = _scenario(
        tmp_path, ETA, "seed = 3\nwalkers = 16\nsteps = 2500\nburn_in = 500\nthin = 1"
    )
    result = crustflow.fit(scenario)
    row = result.summary.set_index("parameter").loc["channel.viscosity"]
    assert row["units"] == "Pa*s"
    assert row["flags"] == ""
    (q05, q50, q95), cdf = _quadrature_quantiles(d, sd, c, 1e18, 1e21, [0.05, 0.5, 0.95])
    # Sampling error of a quantile in probability: sqrt(p (1 - p) / ESS); allow 4 of them.
    for p, value in ((0.05, row["p05"]), (0.5, row["median"]), (0.95, row["p95"])):
        assert abs(cdf(math.log(value)) - p) < 4 * math.sqrt(p * (1 - p) / row["ess"]) + 1e-3
    assert math.log(row["median"]) == pytest.approx(q50, abs=0.05 * (q95 - q05))
    # The MAP is the mode of the same density (Nelder-Mead; value derived from the grid above).
    theta = np.linspace(q05 - 1, q95 + 1, 20001)
    logp = -0.5 * np.sum(((d[None] - c[None] * np.exp(-theta)[:, None]) / sd) ** 2, axis=1)
    assert math.log(row["map"]) == pytest.approx(theta[np.argmax(logp)], abs=1e-3)


def test_coverage_of_90_percent_intervals(tmp_path):
    # Simulation-based calibration (Cook, Gelman & Rubin 2006): with truths drawn from the prior and
    # data from the model, the posterior's 90 % interval holds the truth in 90 % of data sets.
    base = _base(tmp_path)
    x, y, u19, rows, cols = _sites(base, 6, seed=2)
    c = u19 * 1e19
    model = SiteModel(base, rows, cols, ["uplift_rate"] * rows.size)
    sd = np.full(c.size, 0.3 * np.mean(np.abs(c / 1e19)))
    prior = Prior(_one_prior_dims(tmp_path, x, y))
    rng = np.random.default_rng(17)
    trials, hits = 40, 0
    for k in range(trials):
        eta = math.exp(rng.uniform(math.log(1e18), math.log(1e20)))
        d = c / eta + rng.normal(0.0, sd)
        post = Posterior(prior, model, d, sd)
        chain = run_sampler(
            post, SamplerSettings(seed=k, walkers=8, steps=300, burn_in=100, thin=1)
        )
        lo, hi = np.percentile(chain.kept()[:, 0], [5, 95])
        hits += lo <= math.log(eta) <= hi
    # Binomial(40, 0.9): mean 36, sd 1.9; P(hits <= 30) = 0.006 (value derived).
    assert hits >= 31, hits


def _one_prior_dims(folder, x, y):
    _points(folder / "obs.gpkg", x, y, np.ones(len(x)), np.ones(len(x)))
    prior = '"channel.viscosity" = { distribution = "log-uniform", low = "1e18 Pa*s", high = "1e20 Pa*s" }'
    return _scenario(folder, prior, "seed = 1").fit.dimensions()


# ----------------------------------------------------------------------------------------------
# two parameters: the h^3 / eta trade-off


def test_thickness_and_viscosity_trade_off_and_transmissivity_is_tight(tmp_path):
    # Uplift depends on h and eta only through h^3 / (12 eta) (SCIENCE.md, "Fitting"; Turcotte &
    # Schubert 2002, 6.2): the posterior is a ridge ln h = ln(eta) / 3 + const (slope 1/3, value
    # derived) and the transmissivity is tight while h and eta are not.
    base = _base(tmp_path)
    x, y, u, _, _ = _sites(base, 20, seed=4)  # truth: h 15 km, eta 1e19 Pa s
    sd = 0.05 * np.abs(u).mean() * np.ones(u.size)
    d = u + np.random.default_rng(8).normal(0.0, sd)
    _points(tmp_path / "obs.gpkg", x, y, d / MM_YR, sd / MM_YR)
    priors = (
        ETA + '\n"channel.thickness" = { distribution = "uniform", low = "8 km", high = "25 km" }'
    )
    result = fit(_scenario(tmp_path, priors, "seed = 5\nwalkers = 16\nsteps = 1500\nburn_in = 500"))
    s = result.samples
    log_h, log_eta = np.log(s["channel.thickness"]), np.log(s["channel.viscosity"])
    assert np.corrcoef(log_h, log_eta)[0, 1] > 0.98
    assert np.polyfit(log_eta, log_h, 1)[0] == pytest.approx(1 / 3, abs=0.02)
    rows = result.summary.set_index("parameter")
    t = rows.loc["channel.transmissivity"]
    assert t["units"] == "m**3/(Pa*s)"
    assert (t["p95"] - t["p05"]) / t["median"] < 0.05
    assert t["median"] == pytest.approx(15e3**3 / (12 * 1e19), rel=0.03)
    assert rows.loc["channel.viscosity", "p95"] / rows.loc["channel.viscosity", "p05"] > 3


# ----------------------------------------------------------------------------------------------
# reproducibility and diagnostics


def test_same_seed_same_samples_and_short_chain_is_flagged(tmp_path):
    base = _base(tmp_path)
    x, y, u, _, _ = _sites(base, 8)
    _points(tmp_path / "obs.gpkg", x, y, u / MM_YR, 0.2 * np.abs(u / MM_YR).mean() * np.ones(8))
    short = "walkers = 8\nsteps = 30\nburn_in = 10\nthin = 1"
    a = fit(_scenario(tmp_path, ETA, f"seed = 7\n{short}"))
    b = fit(_scenario(tmp_path, ETA, f"seed = 7\n{short}"))
    c = fit(_scenario(tmp_path, ETA, f"seed = 8\n{short}"))
    assert a.samples.equals(b.samples)
    assert not a.samples.equals(c.samples)
    flags = a.summary.set_index("parameter").loc["channel.viscosity", "flags"]
    assert "chain too short" in flags


def test_sampling_in_logarithms_keeps_a_uniform_prior_uniform(tmp_path):
    # A uniform prior on h is sampled in ln h with the Jacobian x (likelihood.Prior); with
    # uninformative data the samples must follow the prior itself: uniform on [8, 25] km
    # (Kolmogorov-Smirnov test against scipy.stats.uniform), and a log-uniform eta uniform in ln eta.
    base = _base(tmp_path)
    x, y, u, rows, cols = _sites(base, 4, seed=1)
    _points(tmp_path / "obs.gpkg", x, y, np.ones(4), np.ones(4))
    priors = (
        ETA + '\n"channel.thickness" = { distribution = "uniform", low = "8 km", high = "25 km" }'
    )
    dims = _scenario(tmp_path, priors, "seed = 1").fit.dimensions()
    prior = Prior(dims)
    assert prior.logged == [True, True]
    model = SiteModel(base, rows, cols, ["uplift_rate"] * 4)
    post = Posterior(prior, model, u, np.full(4, 1e3 * np.abs(u).max()))  # errors >> signal
    chain = run_sampler(post, SamplerSettings(seed=2, walkers=16, steps=2000, burn_in=400, thin=10))
    h, ln_eta = np.exp(chain.kept()[:, 1]), chain.kept()[:, 0]
    assert stats.kstest(h, stats.uniform(8e3, 17e3).cdf).pvalue > 1e-3
    lo, hi = math.log(1e18), math.log(1e21)
    assert stats.kstest(ln_eta, stats.uniform(lo, hi - lo).cdf).pvalue > 1e-3


def test_split_rhat_flags_chains_that_disagree():
    # Split R-hat (Gelman et al. 2013, BDA3 section 11.4): ~1 for chains from one distribution,
    # well above 1 for chains centred apart.
    rng = np.random.default_rng(0)
    same = rng.normal(size=(2000, 8))
    apart = same + np.arange(8)[None, :]
    assert split_rhat(same) == pytest.approx(1.0, abs=0.01)
    assert split_rhat(apart) > 1.5


# ----------------------------------------------------------------------------------------------
# one code path: fast path, fallback and crustflow.solve agree at the sites


@pytest.mark.parametrize("airy_case", [False, True])
def test_site_values_fast_and_fallback_equal_the_full_solve(tmp_path, airy_case):
    base = _base(tmp_path)
    if airy_case:
        text = SCENARIO.replace('crust_thickness = "crust.tif"', 'reference_thickness = "35 km"')
        (tmp_path / "airy.toml").write_text(text)
        base = crustflow.load_scenario(tmp_path / "airy.toml")
    names = ["uplift_rate", "thickening_rate", "flux_magnitude", "flux_east"] * 3
    x, y, _, rows, cols = _sites(base, len(names), seed=9)
    fast = SiteModel(base, rows, cols, names)
    slow = SiteModel(base, rows, cols, names, fast=False)
    assert fast.fast and not slow.fast
    members = [
        dataclasses.replace(base.parameters, viscosity=v, channel_thickness=h, **kw)
        for v, h, kw in (
            (1e19, 15e3, {}),
            (3e18, 9e3, {"wall_east": 5 * MM_YR, "wall_north": -2 * MM_YR}),
            (2e20, 22e3, {"rho_channel": 2750.0, "rho_crust": 2850.0}),
        )
    ]
    reference = []
    for p in members:  # crustflow.solve: the API; equal to `crustflow run` (tests/test_stream.py)
        ds = crustflow.solve(dataclasses.replace(base, parameters=p))
        reference.append(
            [
                ds[n].values[r, c] / crustflow.VARIABLES[n].factor
                for n, r, c in zip(names, rows, cols, strict=True)
            ]
        )
    reference = np.array(reference)
    np.testing.assert_allclose(fast.predict_members(members), reference, rtol=1e-9, atol=1e-25)
    np.testing.assert_allclose(slow.predict_members(members), reference, rtol=1e-9, atol=1e-25)


def test_log_likelihood_equals_the_gaussian_density_of_the_solve(tmp_path):
    # The fit's likelihood at the sites is that of crustflow.solve's values there (the API, equal
    # to `crustflow run`: tests/test_stream.py), with scipy.stats.norm as the second opinion.
    base = _base(tmp_path)
    x, y, _, rows, cols = _sites(base, 9, seed=6)
    prior = Prior(_fields_dims(tmp_path, x, y))
    model = SiteModel(base, rows, cols, ["uplift_rate"] * rows.size)
    etas = np.array([1e19, 4e18, 7e19])
    reference = []
    for eta in etas:
        p = dataclasses.replace(base.parameters, viscosity=eta)
        ds = crustflow.solve(dataclasses.replace(base, parameters=p))
        reference.append(
            ds["uplift_rate"].values[rows, cols] / crustflow.VARIABLES["uplift_rate"].factor
        )
    reference = np.array(reference)
    obs = reference[0] * 1.1
    sd = np.abs(reference[0]) * 0.2
    theta = prior.to_theta(etas[:, None])
    post = Posterior(prior, model, obs, sd)
    got = post(theta) - prior.log_density(theta)
    expected = [stats.norm.logpdf(obs, loc=ref, scale=sd).sum() for ref in reference]
    np.testing.assert_allclose(got, expected, rtol=1e-9)


def _fields_dims(folder, x, y):
    _points(folder / "obs.gpkg", x, y, np.ones(len(x)), np.ones(len(x)))
    return _scenario(folder, ETA, "seed = 1").fit.dimensions()


def test_error_models_against_scipy_stats():
    # Gaussian and Student-t log densities with scale sigma (Gelman et al. 2013, 17.2) against
    # scipy.stats.norm.logpdf and scipy.stats.t.logpdf.
    rng = np.random.default_rng(1)
    obs, sd = rng.normal(size=7), rng.uniform(0.5, 2.0, size=7)
    pred = rng.normal(size=(3, 7))
    g = log_likelihood(obs, sd, pred)
    t = log_likelihood(obs, sd, pred, kind="student-t", dof=3.5)
    for i in range(3):
        assert g[i] == pytest.approx(stats.norm.logpdf(obs, pred[i], sd).sum(), rel=1e-12)
        assert t[i] == pytest.approx(stats.t.logpdf(obs, 3.5, pred[i], sd).sum(), rel=1e-12)
    assert log_likelihood(obs, sd, np.full((1, 7), np.nan))[0] == -np.inf


def test_student_t_resists_an_outlier(tmp_path):
    base = _base(tmp_path)
    x, y, u, _, _ = _sites(base, 10, seed=3)
    sd = 0.05 * np.abs(u).mean() * np.ones(u.size)
    d = u.copy()
    d[0] += 40 * sd[0]  # one gross outlier (invented)
    _points(tmp_path / "obs.gpkg", x, y, d / MM_YR, sd / MM_YR)
    run = "walkers = 8\nsteps = 600\nburn_in = 200"
    g = fit(_scenario(tmp_path, ETA, f"seed = 2\n{run}"))
    t = fit(_scenario(tmp_path, ETA, f'seed = 2\n{run}\nlikelihood = "student-t"'))
    err = [abs(math.log(r.summary.loc[0, "median"] / 1e19)) for r in (g, t)]
    assert err[1] < err[0]
    assert err[1] < 0.02


# ----------------------------------------------------------------------------------------------
# observations: dropped by name, rasters, fallback


def test_observations_off_grid_and_on_nodata_are_dropped_by_name(tmp_path):
    base = _base(tmp_path, hole=True)
    x, y, u, _, _ = _sites(base, 5)
    x = np.append(x, [0.0, 300e3 + 2.5e3])  # far west of the grid; in the nodata corner block
    y = np.append(y, [0.0, 5200e3 - 2.5e3])
    u = np.append(u, [u[0], u[0]])
    names = [f"S{i}" for i in range(5)] + ["far away", "in the hole"]
    _points(tmp_path / "obs.gpkg", x, y, u / MM_YR, np.ones(7), names=names)
    result = fit(_scenario(tmp_path, ETA, "seed = 1\nwalkers = 4\nsteps = 20\nburn_in = 5"))
    reasons = dict(result.dropped)
    assert reasons["far away"] == "outside the grid"
    assert reasons["in the hole"].startswith("on nodata")
    assert list(result.observations["name"]) == names[:5]


def test_no_observation_on_the_grid_is_an_error(tmp_path):
    _base(tmp_path)
    _points(tmp_path / "obs.gpkg", [0.0, 1.0], [0.0, 1.0], [1.0, 1.0], [1.0, 1.0])
    scenario = _scenario(tmp_path, ETA, "seed = 1")
    with pytest.raises(CrustflowInputError, match="no observation lies on the grid"):
        fit(scenario)


def test_raster_observations_are_decimated(tmp_path):
    base = _base(tmp_path)
    ds = crustflow.solve(base)
    uplift = ds["uplift_rate"].values  # mm/yr on the grid
    write_grid(tmp_path / "insar.tif", uplift)
    write_grid(tmp_path / "insar_sd.tif", np.full(uplift.shape, 0.05))
    obs = (
        '[fit]\n[[fit.observations]]\ngrid = "insar.tif"\nsigma = { grid = "insar_sd.tif" }\n'
        'variable = "uplift_rate"\nunits = "mm/yr"\ncorrelation_length = "20 km"\n'
    )
    scenario = _scenario(
        tmp_path, ETA, "seed = 1\nwalkers = 4\nsteps = 200\nburn_in = 50", observations=obs
    )
    result = fit(scenario)
    # 20 km over 5 km cells: every 4th pixel, starting at pixel 2 (value derived): 10 x 12 cells
    # of the 40 x 50 grid, less those without a model value (the grid's edge rows and columns).
    kept, dropped = len(result.observations), len(result.dropped)
    assert kept + dropped == 10 * 12
    assert {r for _, r in result.dropped} <= {
        "on nodata or a grid edge (no model value at its cell)"
    }
    assert result.summary.loc[0, "median"] == pytest.approx(1e19, rel=0.01)


def test_power_law_channel_uses_the_fallback_and_reports_the_flux_coefficient(tmp_path):
    _grids(tmp_path)
    text = SCENARIO.replace(
        'viscosity = "1e19 Pa*s"',
        'rheology = "power-law"\nstress_exponent = 3\nprefactor = "4e-34 Pa^-3 s^-1"',
    )
    (tmp_path / "pl.toml").write_text(text)
    base = crustflow.load_scenario(tmp_path / "pl.toml")
    x, y, u, _, _ = _sites(base, 5)
    _points(tmp_path / "obs.gpkg", x, y, u / MM_YR, 0.1 * np.abs(u / MM_YR))
    (tmp_path / "fit.toml").write_text(
        text + '[fit]\n[[fit.observations]]\nfile = "obs.gpkg"\nvariable = "uplift_rate"\n'
        'value = "rate"\nsigma = "rate_sd"\nunits = "mm/yr"\n[fit.parameters]\n'
        '"channel.thickness" = { distribution = "uniform", low = "10 km", high = "20 km" }\n'
        "[fit.sampler]\nseed = 1\nwalkers = 4\nsteps = 6\nburn_in = 2\n"
    )
    result = fit(crustflow.load_scenario(tmp_path / "fit.toml"))
    assert not result.fast_path and "power-law" in result.fast_path_obstacle
    row = result.summary.set_index("parameter").loc["channel.flux_coefficient"]
    assert row["units"] == "m**5/(Pa**3*s)"
    h = result.samples["channel.thickness"] * 1e3
    # A h^(n+2) / (2^(n+1) (n+2)) (SCIENCE.md power-law flux between fixed walls; value derived).
    np.testing.assert_allclose(
        result.samples["channel.flux_coefficient"], 4e-34 * h**5 / (16 * 5), rtol=1e-12
    )


def test_api_returns_samples_and_summary(tmp_path):
    base = _base(tmp_path)
    x, y, u, _, _ = _sites(base, 6)
    _points(tmp_path / "obs.gpkg", x, y, u / MM_YR, 0.1 * np.abs(u / MM_YR))
    sampler = "seed = 1\nwalkers = 4\nsteps = 40\nburn_in = 10\nthin = 1"
    result = crustflow.fit(_scenario(tmp_path, ETA, sampler))
    assert list(result.summary.columns[:8]) == [
        "parameter", "units", "map", "median", "p05", "p95", "mean", "sd"
    ]  # fmt: skip
    assert {"ess", "acceptance", "r_hat"} <= set(result.summary.columns)
    assert len(result.samples) == 4 * 30
    with pytest.raises(CrustflowInputError, match="has no \\[fit\\] table"):
        crustflow.fit(base)


# ----------------------------------------------------------------------------------------------
# the command


def _plateau(tmp_path):
    """The invented plateau sample with invented observation points (model values plus noise)."""
    import shutil
    from pathlib import Path

    src = Path(__file__).resolve().parents[2] / "sample_grids" / "plateau"
    folder = tmp_path / "plateau"
    shutil.copytree(src, folder)
    base = crustflow.load_scenario(folder / "scenario.toml")
    x, y, u, _, _ = _sites(base, 25, seed=12)
    sd = 0.1 * np.abs(u).mean() * np.ones(u.size)
    d = u + np.random.default_rng(4).normal(0.0, sd)
    names = [f"invented {i}" for i in range(u.size)] + ["far away"]
    x, y = np.append(x, 5e6), np.append(y, 5e6)
    d, sd = np.append(d, d[0]), np.append(sd, sd[0])
    frame = gpd.GeoDataFrame(
        {"name": names, "rate": d / MM_YR, "rate_sd": sd / MM_YR, "note": "invented"},
        geometry=gpd.points_from_xy(x, y),
        crs=_grid_crs(base.topography),
    ).to_crs("EPSG:4326")
    frame.to_file(folder / "uplift_invented.geojson", driver="GeoJSON")
    text = (folder / "scenario.toml").read_text() + (
        '\n[fit]\n[[fit.observations]]\nfile = "uplift_invented.geojson"\nvariable = "uplift_rate"\n'
        'value = "rate"\nsigma = "rate_sd"\nunits = "mm/yr"\n[fit.parameters]\n' + ETA + "\n"
        "[fit.sampler]\nseed = 11\nwalkers = 8\nsteps = 300\nburn_in = 100\nthin = 2\n"
        "predictive_draws = 20\n"
    )
    (folder / "fit.toml").write_text(text)
    return folder


def _grid_crs(path):
    import rasterio

    with rasterio.open(path) as src:
        return src.crs


def test_fit_command_end_to_end_on_the_plateau(tmp_path, capsys):
    import json

    import pint
    import xarray as xr

    from crustflow.cli import main

    folder = _plateau(tmp_path)
    out = tmp_path / "fit_out"
    assert main(["fit", str(folder / "fit.toml"), "--out", str(out)]) == 0
    captured = capsys.readouterr()
    assert "dropped observation 'far away': outside the grid" in captured.err
    assert "fit: 25 observations, 1 sampled values; at the MAP chi-square" in captured.out
    files = {p.name for p in out.iterdir()}
    assert {
        "fit_summary.csv",
        "posterior.csv",
        "posterior_predictive.nc",
        "fit_residuals.gpkg",
        "fit_residuals.png",
        "fit_corner.png",
        "run.json",
    } <= files
    import pandas as pd

    summary = pd.read_csv(out / "fit_summary.csv", keep_default_na=False)
    assert list(summary.columns[:8]) == [
        "parameter",
        "units",
        "map",
        "median",
        "p05",
        "p95",
        "mean",
        "sd",
    ]
    ureg = pint.UnitRegistry()
    for units in summary["units"]:
        ureg.Unit(units)  # every units string parses
    eta = summary.set_index("parameter").loc["channel.viscosity"]
    assert eta["p05"] < 1e19 < eta["p95"]  # the invented data were made with 1e19 Pa s
    samples = pd.read_csv(out / "posterior.csv")
    assert len(samples) == 8 * 100
    layer = gpd.read_file(out / "fit_residuals.gpkg", layer="residuals")
    assert len(layer) == 25 and "far away" not in set(layer["name"])
    # The posterior-predictive median map (the ensemble's percentile writer over the posterior
    # draws) equals the site predictions (the fit's forward model over the same draws).
    with xr.open_dataset(out / "posterior_predictive.nc") as ds:
        assert list(ds["percentile"].values) == [5.0, 50.0, 95.0]
        median = ds["uplift_rate"].sel(percentile=50.0).values
        assert "posterior" in ds.attrs["fit_note"]
    np.testing.assert_allclose(
        median[layer["row"], layer["col"]], layer["predicted"], rtol=2e-6, atol=1e-9
    )
    manifest = json.loads((out / "run.json").read_text())
    assert manifest["fit"]["spec"]["sampler"]["seed"] == 11
    assert manifest["fit"]["fast_path"] is True
    assert manifest["fit"]["observations_dropped"] == [
        {"name": "far away", "reason": "outside the grid"}
    ]


def _bad_fit_cases(folder):
    good = (folder / "fit.toml").read_text()
    return {
        "no fit table": (good.split("[fit]")[0], r"the scenario has no \[fit\] table"),
        "missing file": (
            good.replace("uplift_invented.geojson", "nothere.gpkg"),
            r"observations file '.*nothere.gpkg' does not exist",
        ),
        "missing attribute": (
            good.replace('value = "rate"', 'value = "velocity"'),
            r"has no attribute 'velocity' \(the set's value\)",
        ),
        "everything off the grid": (
            good.replace("uplift_invented.geojson", "far.geojson"),
            r"no observation lies on the grid \(all 1 are outside it\)",
        ),
    }


@pytest.mark.parametrize(
    "case", ["no fit table", "missing file", "missing attribute", "everything off the grid"]
)
def test_fit_command_bad_input_exit_2_one_line_nothing_written(tmp_path, capsys, case):
    import re

    from crustflow.cli import main

    folder = _plateau(tmp_path)
    gpd.GeoDataFrame(
        {"name": ["nowhere"], "rate": [1.0], "rate_sd": [0.1]},
        geometry=gpd.points_from_xy([0.0], [0.0]),
        crs="EPSG:4326",
    ).to_file(folder / "far.geojson", driver="GeoJSON")
    text, message = _bad_fit_cases(folder)[case]
    (folder / "bad.toml").write_text(text)
    out = tmp_path / "out"
    assert main(["fit", str(folder / "bad.toml"), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1, err
    assert re.search(message, err), err
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]


def _bad_points(folder):
    """(writer of obs.gpkg, expected message) for each bad observation file."""
    x, y = [320e3, 330e3], [5150e3, 5140e3]

    def frame(**kw):
        data = {"name": ["A", "B"], "rate": [1.0, 2.0], "rate_sd": [0.1, 0.1]}
        data.update(kw.pop("data", {}))
        return gpd.GeoDataFrame(data, geometry=kw.pop("geometry", gpd.points_from_xy(x, y)), **kw)

    import shapely

    line = [shapely.LineString([(x[0], y[0]), (x[1], y[1])])] * 2
    return {
        "no crs": (lambda: frame(crs=None), r"has no CRS; assign one in your GIS"),
        "lines": (
            lambda: frame(geometry=line, crs=UTM),
            r"holds LineString geometries; observations must be Point features",
        ),
        "text values": (
            lambda: frame(data={"rate": ["1.0", "fast"]}, crs=UTM),
            r"attribute 'rate' is not a number in 1 features \(first: feature 1\)",
        ),
        "zero sigma": (
            lambda: frame(data={"rate_sd": [0.1, 0.0]}, crs=UTM),
            r"the error \(sigma\) of 1 observations is not positive \(first: 'B'\)",
        ),
        "duplicate names": (
            lambda: frame(data={"name": ["A", "A"]}, crs=UTM),
            r"observation name 'A' is used twice",
        ),
        "not a vector file": (None, r"is not a vector file GDAL can read"),
    }


@pytest.mark.filterwarnings("ignore:'crs' was not provided")
@pytest.mark.parametrize("case", list(_bad_points(None)))
def test_bad_observation_files_are_one_line_errors(tmp_path, case):
    _grids(tmp_path)
    write, message = _bad_points(tmp_path)[case]
    if write is None:
        (tmp_path / "obs.gpkg").write_text("not a GeoPackage")
    else:
        write().to_file(tmp_path / "obs.gpkg", driver="GPKG")
    scenario = _scenario(tmp_path, ETA, "seed = 1")
    with pytest.raises(CrustflowInputError, match=message) as info:
        fit(scenario)
    assert "\n" not in str(info.value)


def test_forcing_the_fast_path_where_it_does_not_apply_is_an_error(tmp_path):
    _grids(tmp_path)
    text = SCENARIO.replace(
        'viscosity = "1e19 Pa*s"',
        'rheology = "power-law"\nstress_exponent = 3\nprefactor = "4e-34 Pa^-3 s^-1"',
    )
    (tmp_path / "pl.toml").write_text(text)
    base = crustflow.load_scenario(tmp_path / "pl.toml")
    with pytest.raises(
        CrustflowInputError, match="the fast path does not apply: the channel is power-law"
    ):
        SiteModel(base, [10], [10], ["uplift_rate"], fast=True)


def test_a_sampler_too_large_for_memory_is_refused_before_work(tmp_path, capsys, monkeypatch):
    # The chain of every walker and step is kept (8 bytes per parameter and log-probability):
    # 10^4 walkers x 10^9 steps cannot fit; refused with exit 2 before any sampling.
    import crustflow.commands.fit as fit_command
    from crustflow.cli import main

    base = _base(tmp_path)
    x, y, u, _, _ = _sites(base, 4)
    _points(tmp_path / "obs.gpkg", x, y, u / MM_YR, 0.1 * np.abs(u / MM_YR))
    sampler = "seed = 1\nwalkers = 10000\nsteps = 1000000000\nburn_in = 10\nthin = 1"
    path = _scenario(tmp_path, ETA, sampler).source
    monkeypatch.setattr(fit_command, "run_fit", lambda *a, **k: pytest.fail("work started"))
    out = tmp_path / "out"
    assert main(["fit", str(path), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "10000 walkers x 1000000000 steps need at least" in err
    assert err.endswith("use fewer [fit.sampler] steps or walkers, or a larger thin")
    assert not out.exists()
