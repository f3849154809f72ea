"""Progress of long loops: a bar on a terminal, periodic log lines everywhere else.

The bar (tqdm, on stderr) is for people watching a terminal; the log lines (logger
``crustflow.progress``, level INFO) are for batch logs and notebooks, where a bar is noise. The command
line shows the log lines on stderr when stderr is not a terminal; library users see them by
configuring :mod:`logging`.
"""

from __future__ import annotations

import logging
import sys
import time

__all__ = ["Progress", "StageClock", "LOG_EVERY"]

log = logging.getLogger("crustflow.progress")

#: Seconds between two progress log lines (common practice, no source).
LOG_EVERY = 30.0


class Progress:
    """Counts work done towards a total.

    Parameters
    ----------
    total : int or None
        The amount of work (None: unknown).
    unit : str
        What is counted, e.g. " rows".
    desc : str
        What is being done, e.g. "compute and write".
    bar : bool
        Show a bar on stderr (a terminal).
    log_every : float
        Seconds between log lines.
    """

    def __init__(
        self, total, *, unit: str, desc: str, bar: bool = False, log_every: float = LOG_EVERY
    ):
        self.total, self.unit, self.desc = total, unit, desc
        self.done = 0
        self._log_every = log_every
        self._began = self._logged = time.perf_counter()
        self._bar = None
        if bar:
            from tqdm import tqdm

            self._bar = tqdm(
                total=total,
                unit=unit,
                desc=desc,
                leave=False,
                file=sys.stderr,
                dynamic_ncols=True,
                unit_scale=True,
            )

    def update(self, n: int = 1) -> None:
        """Add ``n`` units of work done."""
        self.done += n
        if self._bar is not None:
            self._bar.update(n)
        now = time.perf_counter()
        if now - self._logged >= self._log_every:
            self._logged = now
            log.info("%s", self._line(now))

    def _line(self, now: float) -> str:
        elapsed = now - self._began
        if self.total:
            share = self.done / self.total
            left = elapsed * (1 - share) / share if share > 0 else float("nan")
            return (
                f"{self.desc}: {_amount(self.done)} of {_amount(self.total)}{self.unit} "
                f"({100 * share:.0f} %), {elapsed:.0f} s so far, about {left:.0f} s left"
            )
        return f"{self.desc}: {_amount(self.done)}{self.unit}, {elapsed:.0f} s so far"

    def close(self) -> None:
        """End the bar; log the final count if the loop was long enough to log at all."""
        if self._bar is not None:
            self._bar.close()
            self._bar = None
        now = time.perf_counter()
        if now - self._began >= self._log_every:
            log.info("%s", self._line(now))

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _amount(value) -> str:
    """A count as people read it: whole numbers with thousands separators, fractions (model
    time in Myr) to four significant digits."""
    if float(value).is_integer():
        return f"{int(value):,}"
    return f"{value:,.4g}"


class StageClock:
    """Wall time per stage of a run; calls ``announce(name)`` as each stage starts.

    Parameters
    ----------
    announce : callable, optional
        Called with the stage's name when it starts (stage lines, progress displays).
    timings : dict, optional
        Filled with seconds per stage (a new dict by default; see :attr:`timings`).
    """

    def __init__(self, announce=None, timings: dict | None = None) -> None:
        self.timings: dict[str, float] = timings if timings is not None else {}
        self._announce = announce or (lambda name: None)
        self._current: tuple[str, float] | None = None

    def __call__(self, name: str) -> None:
        self._close()
        self._current = (name, time.perf_counter())
        log.debug("stage: %s", name)
        self._announce(name)

    def finish(self) -> dict[str, float]:
        """End the last stage; return the timings (s per stage)."""
        self._close()
        return self.timings

    def _close(self) -> None:
        if self._current is not None:
            name, began = self._current
            self.timings[name] = self.timings.get(name, 0.0) + time.perf_counter() - began
            self._current = None
