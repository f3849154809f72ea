"""Statistics of an ensemble over its members, cell by cell: percentiles, mean, standard
deviation and exceedance probabilities.

Part of :mod:`crustflow.analyses.ensemble.report`, which re-exports :func:`sorted_percentiles` and
:class:`Reducer`. The conventions (percentile method, ``ddof = 1``, strict exceedance) are those of
:mod:`crustflow.analyses.ensemble.run`.

References
----------
.. [1] Hyndman, R. J. & Fan, Y. (1996). Sample quantiles in statistical packages. The American
   Statistician 50(4), 361-365.
"""

from __future__ import annotations

import numpy as np


def sorted_percentiles(rows: np.ndarray, percentiles) -> np.ndarray:
    """Percentiles of each row of an array sorted along its rows, numpy's "linear" method.

    Parameters
    ----------
    rows : ndarray, shape (cells, members)
        Each row sorted ascending (NaN last).
    percentiles : sequence of float
        0 to 100.

    Returns
    -------
    ndarray, shape (len(percentiles), cells)
        float64; equal, bit for bit, to ``numpy.percentile(rows, percentiles, axis=1)`` on the
        float64 values of ``rows``.

    Notes
    -----
    Virtual index ``v = (n - 1) p / 100``, neighbours ``i = floor(v)`` and ``i + 1`` (the last value
    when ``v >= n - 1``), weight ``t = v - i``, and numpy's interpolation ``a + (b - a) t`` (for
    ``t < 0.5``) or ``b - (b - a)(1 - t)``: definition 7 of Hyndman & Fan (1996).

    References
    ----------
    Hyndman, R. J. & Fan, Y. (1996), The American Statistician 50(4), 361-365.
    """
    n = rows.shape[1]
    q = np.true_divide(np.asarray(percentiles, dtype=float), 100)
    virtual = (n - 1) * q
    lo = np.floor(virtual)
    hi = lo + 1
    top = virtual >= n - 1
    lo[top], hi[top] = -1, -1
    t = virtual - lo
    a = rows[:, lo.astype(np.intp)].astype(np.float64).T
    b = rows[:, hi.astype(np.intp)].astype(np.float64).T
    diff = b - a
    out = a + diff * t[:, None]
    upper = np.broadcast_to((t >= 0.5)[:, None], out.shape)
    np.subtract(b, diff * (1 - t)[:, None], out=out, where=upper)
    return out


class Reducer:
    """Per-cell statistics over members, gathered into the flat maps of one strip (SI).

    Parameters
    ----------
    names : sequence of str
        Variables whose percentiles, mean and sd are mapped.
    exceedance : str or None
        Variable whose exceedance probabilities are mapped.
    thresholds : sequence of float
        Its thresholds, SI.
    percentiles : sequence of float
        0 to 100, ascending.
    members : int
    buffer : callable
        ``buffer(name, cells, dtype)`` returns a reusable (cells, members) work array.

    Notes
    -----
    Mean; sample standard deviation ``sqrt(sum((x - mean)^2) / (n - 1))``; exceedance
    ``count(x > t) / n``; percentiles by :func:`sorted_percentiles` on the values rounded to float32
    and sorted (rounding is monotone, so the order statistics are the float64 ones, rounded).
    """

    def __init__(self, names, exceedance: str | None, thresholds, percentiles, members, buffer):
        self.names, self.exceedance = list(names), exceedance
        self.thresholds, self.percentiles = tuple(thresholds), tuple(percentiles)
        self.members, self.buffer = members, buffer

    def start(self, cells: int) -> dict:
        """Begin a strip of ``cells`` cells: fresh maps, NaN until filled."""
        nan = np.nan
        self.maps = {
            n: {
                "percentiles": np.full((len(self.percentiles), cells), nan),
                "mean": np.full(cells, nan),
                "sd": np.full(cells, nan),
            }
            for n in self.names
        }
        if self.exceedance is not None:
            self.maps.setdefault(self.exceedance, {})["exceedance"] = np.full(
                (len(self.thresholds), cells), nan
            )
        return self.maps

    def add(self, name: str, vals: np.ndarray, idx: np.ndarray, rows: np.ndarray) -> None:
        """Reduce ``vals`` (cells, members) of the cells ``idx`` of the strip; ``rows`` marks data."""
        maps = self.maps[name]
        if "exceedance" in maps:
            for k, t in enumerate(self.thresholds):
                share = np.count_nonzero(vals > t, axis=1) / self.members
                maps["exceedance"][k, idx] = np.where(rows, share, np.nan)
        if "mean" not in maps:
            return
        mean = vals.mean(axis=1)
        dev = np.subtract(
            vals, mean[:, None], out=self.buffer("deviation", vals.shape[0], np.float64)
        )
        sd = np.sqrt(np.einsum("ij,ij->i", dev, dev) / (self.members - 1))
        maps["mean"][idx] = np.where(rows, mean, np.nan)
        maps["sd"][idx] = np.where(rows, sd, np.nan)
        ranked = self.buffer("sorted", vals.shape[0], np.float32)
        np.copyto(ranked, vals, casting="same_kind")
        ranked.sort(axis=1)
        maps["percentiles"][:, idx] = np.where(
            rows, sorted_percentiles(ranked, self.percentiles), np.nan
        )
