"""Sampling a fit's posterior: a maximum-a-posteriori start, the affine-invariant ensemble sampler,
and convergence diagnostics.

References
----------
.. [1] Goodman, J. & Weare, J. (2010). Ensemble samplers with affine invariance. Communications in
   Applied Mathematics and Computational Science 5(1), 65-80.
.. [2] Foreman-Mackey, D., Hogg, D. W., Lang, D. & Goodman, J. (2013). emcee: the MCMC hammer.
   Publications of the Astronomical Society of the Pacific 125, 306-312.
.. [3] Gelman, A., Carlin, J. B., Stern, H. S., Dunson, D. B., Vehtari, A. & Rubin, D. B. (2013).
   *Bayesian Data Analysis*, 3rd ed., CRC Press, section 11.4 (split R-hat, effective sample size).
.. [4] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Buerkner, P.-C. (2021). Rank-normalization,
   folding, and localization: an improved R-hat for assessing convergence of MCMC. Bayesian
   Analysis 16(2), 667-718.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crustflow.errors import CrustflowInputError

__all__ = ["Chain", "find_map", "run_sampler", "diagnostics", "split_rhat"]

#: Prior draws tried before the local optimisation of the MAP start. Project choice: enough to land
#: in the basin of the mode of the 1-3 parameter fits this tool is for.
MAP_TRIES = 256

#: The same on the fallback, where every try is a full solve of the strips holding observations.
FALLBACK_MAP_TRIES = 24

#: Half-width of the ball of walkers around the MAP, as a share of each prior's 5-95 % width.
#: Common practice (Foreman-Mackey et al. 2013, section 4: start in a small ball), no source for the value.
BALL_SHARE = 1e-2

#: A chain is long enough when its kept steps span at least this many autocorrelation times
#: (Foreman-Mackey et al. 2013; the emcee documentation's rule of thumb is 50).
MIN_TAU_SPAN = 50.0

#: R-hat above this flags a chain. Project choice between Gelman et al. (2013)'s 1.1 and Vehtari
#: et al. (2021)'s 1.01: the walkers of an ensemble sampler are not independent chains, so their
#: split R-hat stays near 1 + tau / (kept steps) even for a healthy run.
MAX_RHAT = 1.05

#: Mean acceptance below this flags a chain (Foreman-Mackey et al. 2013, section 4: 0.2-0.5 is
#: healthy; much lower means the walkers are stuck).
MIN_ACCEPTANCE = 0.1


@dataclass
class Chain:
    """The sampler's output.

    Attributes
    ----------
    theta : ndarray, shape (steps, walkers, ndim)
        Every step of every walker, sampling coordinates.
    log_prob : ndarray, shape (steps, walkers)
    acceptance : ndarray, shape (walkers,)
        Acceptance fraction of each walker.
    burn_in, thin : int
    map_theta : ndarray, shape (ndim,)
        The maximum-a-posteriori start.
    map_log_prob : float
    """

    theta: np.ndarray
    log_prob: np.ndarray
    acceptance: np.ndarray
    burn_in: int
    thin: int
    map_theta: np.ndarray
    map_log_prob: float

    def kept(self) -> np.ndarray:
        """Retained samples (after burn-in, thinned), shape (samples, ndim), walker-major per step."""
        return self.theta[self.burn_in :: self.thin].reshape(-1, self.theta.shape[-1])

    def kept_log_prob(self) -> np.ndarray:
        """Log posterior of the retained samples."""
        return self.log_prob[self.burn_in :: self.thin].reshape(-1)


def find_map(posterior, rng: np.random.Generator) -> tuple[np.ndarray, float]:
    """Maximum-a-posteriori point: the best of :data:`MAP_TRIES` prior draws, polished by
    Nelder-Mead (scipy.optimize.minimize) inside the prior's support.

    Returns
    -------
    theta : ndarray
    log_prob : float
    """
    from scipy.optimize import minimize

    prior = posterior.prior
    tries = MAP_TRIES if getattr(posterior.model, "fast", True) else FALLBACK_MAP_TRIES
    u = rng.uniform(0.02, 0.98, size=(tries, prior.ndim))
    tries = prior.quantiles(u)
    values = posterior(tries)
    if not np.isfinite(values).any():
        raise CrustflowInputError(
            "no prior draw gives model values at the observations (every draw is unphysical or "
            "off the model's valid cells); widen [fit.parameters] or check the observations"
        )
    start = tries[int(np.argmax(values))]
    bounds = list(zip(prior.low, prior.high, strict=True))
    res = minimize(
        lambda t: -float(posterior(t[None])[0]),
        start,
        method="Nelder-Mead",
        bounds=[
            (lo if np.isfinite(lo) else None, hi if np.isfinite(hi) else None) for lo, hi in bounds
        ],
        options={"xatol": 1e-8, "fatol": 1e-8, "maxiter": 2000 * prior.ndim},
    )
    best = res.x if np.isfinite(res.fun) and -res.fun >= values.max() else start
    return np.asarray(best, dtype=float), float(posterior(best[None])[0])


def _start(posterior, centre: np.ndarray, walkers: int, rng: np.random.Generator) -> np.ndarray:
    """Walkers in a small ball around ``centre``, each with a finite posterior."""
    prior = posterior.prior
    scale = BALL_SHARE * prior.width()
    out = centre + scale * rng.standard_normal((walkers, prior.ndim))
    for _ in range(100):
        bad = ~np.isfinite(posterior(out))
        if not bad.any():
            return out
        scale = scale / 2
        out[bad] = centre + scale * rng.standard_normal((int(bad.sum()), prior.ndim))
    out[~np.isfinite(posterior(out))] = centre
    return out


def run_sampler(posterior, settings, *, progress: bool = False) -> Chain:
    """Sample the posterior with emcee's affine-invariant ensemble sampler from a MAP start.

    Parameters
    ----------
    posterior : crustflow.analyses.fitting.likelihood.Posterior
        Vectorised log posterior in sampling coordinates.
    settings : crustflow.scenario.fit.SamplerSettings
        Seed, walkers, steps, burn-in and thinning.
    progress : bool
        emcee's progress bar.

    Returns
    -------
    Chain

    Notes
    -----
    One ``numpy.random.Generator(PCG64(seed))`` draws the MAP tries and the walkers' start; the
    sampler's own moves use ``numpy.random.RandomState(seed)``. The same seed, settings,
    observations and priors give the same chain. The stretch move (Goodman & Weare 2010) with
    ``a = 2`` updates the walkers in two halves, each half evaluated in one vectorised call.
    """
    import emcee

    rng = np.random.Generator(np.random.PCG64(settings.seed))
    map_theta, map_lp = find_map(posterior, rng)
    start = _start(posterior, map_theta, settings.walkers, rng)
    sampler = emcee.EnsembleSampler(
        settings.walkers, posterior.prior.ndim, posterior, vectorize=True
    )
    sampler.random_state = np.random.RandomState(settings.seed).get_state()
    sampler.run_mcmc(start, settings.steps, progress=progress)
    return Chain(
        theta=sampler.get_chain(),
        log_prob=sampler.get_log_prob(),
        acceptance=np.asarray(sampler.acceptance_fraction),
        burn_in=settings.burn_in,
        thin=settings.thin,
        map_theta=map_theta,
        map_log_prob=map_lp,
    )


def split_rhat(chains: np.ndarray) -> float:
    """Split R-hat of one quantity, shape (steps, chains) (Gelman et al. 2013, section 11.4).

    Notes
    -----
    Each chain is split into halves; with ``n`` steps per half, ``W`` the mean of the
    within-half variances and ``B / n`` the variance of the half means,
    ``var+ = (n - 1) / n W + B / n`` and ``R-hat = sqrt(var+ / W)``.
    """
    n = chains.shape[0] // 2
    if n < 2:
        return float("nan")
    halves = np.concatenate([chains[:n], chains[-n:]], axis=1)
    w = halves.var(axis=0, ddof=1).mean()
    b_over_n = halves.mean(axis=0).var(ddof=1)
    if not w > 0:
        return float("nan")
    return float(np.sqrt(((n - 1) / n * w + b_over_n) / w))


def diagnostics(chain: Chain, values: np.ndarray) -> dict:
    """Convergence diagnostics of one quantity over the chain.

    Parameters
    ----------
    chain : Chain
    values : ndarray, shape (steps, walkers)
        The quantity at every step of every walker (a parameter or a derived quantity).

    Returns
    -------
    dict
        ``tau`` (integrated autocorrelation time, steps; emcee's estimator), ``ess`` (effective
        sample size ``walkers x kept steps / tau``), ``r_hat`` (split R-hat with walkers as chains),
        ``acceptance`` (mean acceptance fraction) and ``flags`` (text: why the chain is not
        trusted, empty when it is).
    """
    import emcee

    kept = values[chain.burn_in :]
    steps, walkers = kept.shape
    tau = float(emcee.autocorr.integrated_time(kept[:, :, None], tol=0, quiet=True)[0])
    acceptance = float(np.mean(chain.acceptance))
    r_hat = split_rhat(kept)
    flags = []
    if not steps >= MIN_TAU_SPAN * tau:
        flags.append(
            f"chain too short: {steps} kept steps < {MIN_TAU_SPAN:g} autocorrelation times "
            f"({tau:.1f} steps); run more steps"
        )
    if not r_hat <= MAX_RHAT:
        flags.append(f"R-hat {r_hat:.3f} > {MAX_RHAT}")
    if not acceptance >= MIN_ACCEPTANCE:
        flags.append(f"acceptance {acceptance:.2f} < {MIN_ACCEPTANCE}")
    return {
        "tau": tau,
        "ess": float(walkers * steps / tau) if tau > 0 else float("nan"),
        "r_hat": r_hat,
        "acceptance": acceptance,
        "flags": "; ".join(flags),
    }
