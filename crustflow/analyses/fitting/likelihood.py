"""The posterior of a fit: priors in their natural sampling space and the error model.

Sampled coordinates ``theta`` are the logarithms of the parameters whose prior support is positive
(log-uniform priors, whose density is flat there, and uniform or truncated normal priors with a
positive lower bound), and the values themselves otherwise (a wall velocity of either sign). The
posterior density is with respect to ``theta`` (the Jacobian ``dx/dtheta = x`` is included). In
logarithms the trade-off of channel thickness and viscosity, ``h^3 / eta = const``, is the straight
line ``3 ln h - ln eta = const``, which an affine-invariant sampler crosses as easily as an
uncorrelated posterior (Goodman & Weare 2010); in ``h`` itself it is curved and mixes slowly.

References
----------
.. [0] Goodman, J. & Weare, J. (2010). Ensemble samplers with affine invariance. CAMCoS 5(1), 65-80.
.. [1] Gelman, A., Carlin, J. B., Stern, H. S., Dunson, D. B., Vehtari, A. & Rubin, D. B. (2013).
   *Bayesian Data Analysis*, 3rd ed., CRC Press: sections 2.8 (priors, transformations) and 17.2
   (the Student-t error model for data with outliers).
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import gammaln

__all__ = ["Prior", "Posterior", "log_likelihood"]


class Prior:
    """Priors of the sampled scalars, in their natural space.

    Parameters
    ----------
    dimensions : list
        :meth:`crustflow.scenario.fit.FitSpec.dimensions`: each has ``field``, ``label``, ``key`` and
        ``distribution`` (:class:`crustflow.scenario.ensemble_spec.Distribution`, SI).

    Notes
    -----
    Prior densities in x: log-uniform ``1/x`` on ``[low, high]``; uniform, flat on ``[low, high]``;
    normal ``exp(-(x - mean)^2 / (2 sd^2))``, zero outside ``[min, max]``. Where the support is
    positive the sampling coordinate is ``theta = ln x`` and the density in ``theta`` is the density in
    x times ``x`` (so a log-uniform prior is flat in ``theta``); elsewhere ``theta = x``. Constant
    factors are dropped.
    """

    def __init__(self, dimensions) -> None:
        self.dims = list(dimensions)
        self.kinds = [d.distribution.kind for d in self.dims]
        lo, hi = [], []
        for d in self.dims:
            dist = d.distribution
            if dist.kind == "normal":
                lo.append(-math.inf if dist.min is None else dist.min)
                hi.append(math.inf if dist.max is None else dist.max)
            else:
                lo.append(dist.low)
                hi.append(dist.high)
        #: Whether each coordinate is the logarithm of its parameter (a positive support).
        self.logged = [k == "log-uniform" or low > 0 for k, low in zip(self.kinds, lo, strict=True)]
        self.low = self.to_theta(np.array(lo, dtype=float))
        self.high = self.to_theta(np.array(hi, dtype=float))

    @property
    def ndim(self) -> int:
        """Number of sampled scalars."""
        return len(self.dims)

    def to_theta(self, x: np.ndarray) -> np.ndarray:
        """SI values (last axis: dimensions) to sampling coordinates."""
        x = np.array(x, dtype=float)
        for j, logged in enumerate(self.logged):
            if logged:
                with np.errstate(divide="ignore", invalid="ignore"):
                    x[..., j] = np.log(x[..., j])
        return x

    def to_si(self, theta: np.ndarray) -> np.ndarray:
        """Sampling coordinates (last axis: dimensions) to SI values."""
        x = np.array(theta, dtype=float)
        for j, logged in enumerate(self.logged):
            if logged:
                x[..., j] = np.exp(x[..., j])
        return x

    def log_density(self, theta: np.ndarray) -> np.ndarray:
        """Log prior density of each row of ``theta`` (-inf outside the support)."""
        theta = np.atleast_2d(theta)
        out = np.zeros(theta.shape[0])
        inside = np.all((theta >= self.low) & (theta <= self.high), axis=1)
        x = self.to_si(theta)
        for j, d in enumerate(self.dims):
            if self.kinds[j] == "normal":
                z = (x[:, j] - d.distribution.mean) / d.distribution.sd
                out -= 0.5 * z * z
            if self.logged[j] and self.kinds[j] != "log-uniform":
                out += theta[:, j]  # ln |dx/dtheta| = ln x = theta
        return np.where(inside, out, -np.inf)

    def quantiles(self, u: np.ndarray) -> np.ndarray:
        """Sampling coordinates at prior probabilities ``u`` (rows of probabilities, 0 < u < 1)."""
        u = np.atleast_2d(u)
        x = np.column_stack([d.distribution.ppf(u[:, j]) for j, d in enumerate(self.dims)])
        return self.to_theta(x)

    def width(self) -> np.ndarray:
        """A scale of each prior in sampling coordinates (the 5-95 % range)."""
        return np.ptp(self.quantiles(np.array([[0.05] * self.ndim, [0.95] * self.ndim])), axis=0)


def log_likelihood(
    observed: np.ndarray,
    sigma: np.ndarray,
    predicted: np.ndarray,
    *,
    kind: str = "gaussian",
    dof: float = 4.0,
) -> np.ndarray:
    """Log likelihood of the observations for each row of ``predicted``.

    Parameters
    ----------
    observed, sigma : ndarray, shape (observations,)
        Observed values and 1-sigma errors (SI).
    predicted : ndarray, shape (sets, observations)
        Model values (SI); a NaN gives -inf.
    kind : {"gaussian", "student-t"}
    dof : float
        Degrees of freedom ``nu`` of the Student-t model.

    Returns
    -------
    ndarray, shape (sets,)

    Notes
    -----
    With normalised residuals ``r = (d - m) / sigma``: Gaussian
    ``sum(-r^2 / 2 - ln(sigma sqrt(2 pi)))``; Student-t with scale ``sigma`` and ``nu`` degrees of
    freedom ``sum(ln G((nu + 1)/2) - ln G(nu/2) - ln(sigma sqrt(nu pi)) - (nu + 1)/2 ln(1 + r^2/nu))``
    (Gelman et al. 2013, section 17.2), whose heavy tails let outliers weigh less.
    """
    r = (observed - predicted) / sigma
    if kind == "gaussian":
        terms = -0.5 * r * r - np.log(sigma * math.sqrt(2.0 * math.pi))
    else:
        norm = gammaln(0.5 * (dof + 1.0)) - gammaln(0.5 * dof)
        terms = (
            norm
            - np.log(sigma * math.sqrt(dof * math.pi))
            - 0.5 * (dof + 1.0) * np.log1p(r * r / dof)
        )
    total = terms.sum(axis=-1)
    return np.where(np.isfinite(total), total, -np.inf)


class Posterior:
    """Log posterior density in sampling coordinates, vectorised over walkers.

    Parameters
    ----------
    prior : Prior
    model : crustflow.analyses.fitting.forward.SiteModel
    observed, sigma : ndarray
        Per observation, SI (the order of the model's cells).
    kind : {"gaussian", "student-t"}
    dof : float

    Notes
    -----
    ``ln p(theta | d) = ln p(theta) + ln L(d | theta) + const``. Parameter sets that are not
    physical (a mantle no denser than the crust, channel or water; a channel not thinner than the
    thinnest crust) have zero prior density.
    """

    def __init__(self, prior: Prior, model, observed, sigma, *, kind="gaussian", dof=4.0) -> None:
        self.prior, self.model = prior, model
        self.observed, self.sigma = np.asarray(observed, float), np.asarray(sigma, float)
        self.kind, self.dof = kind, dof
        self.evaluations = 0

    def fields(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        """ModelParameters field -> SI values of each row of ``theta``."""
        x = self.prior.to_si(np.atleast_2d(theta))
        return {d.field: x[:, j] for j, d in enumerate(self.prior.dims)}

    def physical(self, values: dict[str, np.ndarray]) -> np.ndarray:
        """Whether each parameter set is physical (see the class notes)."""
        p = self.model.scenario.parameters
        n = len(next(iter(values.values())))

        def get(name):
            v = getattr(p, name)
            return np.asarray(values.get(name, np.full(n, np.nan if v is None else v)), float)

        ok = get("rho_mantle") > np.maximum(
            np.maximum(get("rho_crust"), get("rho_channel")), get("rho_water")
        )
        h = get("channel_thickness")
        with np.errstate(invalid="ignore"):
            ok &= ~(h >= self.model.thinnest_crust(values))
        return ok

    def __call__(self, theta: np.ndarray) -> np.ndarray:
        """Log posterior of each row of ``theta`` (-inf outside the prior or where unphysical)."""
        theta = np.atleast_2d(theta)
        out = self.prior.log_density(theta)
        ok = np.isfinite(out)
        if ok.any():
            values = {k: v[ok] for k, v in self.fields(theta).items()}
            good = self.physical(values)
            idx = np.flatnonzero(ok)
            out[idx[~good]] = -np.inf
            if good.any():
                predicted = self.model.predict({k: v[good] for k, v in values.items()})
                self.evaluations += int(good.sum())
                out[idx[good]] += log_likelihood(
                    self.observed, self.sigma, predicted, kind=self.kind, dof=self.dof
                )
        return out
