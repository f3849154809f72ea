"""The ``[evolution]`` table: how long to step the crust through time, and what its edges do.

Parsed to a frozen :class:`EvolutionSpec` in SI (seconds, m, m^2/s); no grid is opened here.

```toml
[evolution]
duration = "2 Myr"           # required for mode "transient"
save_every = "0.5 Myr"       # snapshots at 0, 0.5, ..., 2 Myr; the final state is always saved
mode = "transient"           # or "steady"
tolerance = "5 m"            # optional: local error per step in crustal thickness (default 5 m)
[evolution.boundaries]       # one entry per grid edge; default "closed"
west = "fixed"
south = { inflow = "300 m^2/yr" }
```
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field

from crustflow.errors import CrustflowInputError
from crustflow.units import parse_quantity

__all__ = ["EvolutionSpec", "EdgeCondition", "parse_evolution", "MODES", "EDGES", "EDGE_KINDS"]

#: Values of ``[evolution] mode``.
MODES = ("transient", "steady")

#: Grid edges, in the order of ``[evolution.boundaries]``.
EDGES = ("west", "east", "south", "north")

#: Kinds of edge condition.
EDGE_KINDS = ("closed", "fixed", "inflow")

#: Keys of ``[evolution]``.
EVOLUTION_KEYS = ("duration", "save_every", "mode", "tolerance", "max_step", "boundaries")

#: Default local error allowed per step, m of crustal thickness (project choice: well below the
#: metre-scale of any elevation change worth reporting after isostasy, which scales it by ~0.15).
DEFAULT_TOLERANCE = 5.0

#: Most snapshots a run may save (project choice: keeps outputs of a large grid bounded).
MAX_SNAPSHOTS = 1001


@dataclass(frozen=True)
class EdgeCondition:
    """What one grid edge does.

    Attributes
    ----------
    kind : {"closed", "fixed", "inflow"}
        ``closed``: nothing crosses the edge. ``fixed``: the edge cells keep their elevation and
        thickness (material may cross them). ``inflow``: a volume flux per unit edge length enters.
    inflow : float
        Volume flux per unit edge length into the grid, m^2/s (inflow edges only; negative values
        take material out).
    """

    kind: str = "closed"
    inflow: float = 0.0


@dataclass(frozen=True)
class EvolutionSpec:
    """The parsed ``[evolution]`` table, SI.

    Attributes
    ----------
    mode : {"transient", "steady"}
    duration : float
        Model time to step through, s (0 for the steady mode).
    save_every : float
        Interval between snapshots, s (``duration`` when not given; the steady mode saves the
        initial and the steady state).
    tolerance : float
        Local error allowed per step, m of crustal thickness (max norm).
    max_step : float or None
        Longest step, s (default: none beyond the snapshot interval).
    boundaries : dict
        Edge name (:data:`EDGES`) -> :class:`EdgeCondition`.
    """

    mode: str = "transient"
    duration: float = 0.0
    save_every: float = 0.0
    tolerance: float = DEFAULT_TOLERANCE
    max_step: float | None = None
    boundaries: dict = field(default_factory=lambda: {e: EdgeCondition() for e in EDGES})

    @property
    def snapshot_times(self) -> tuple[float, ...]:
        """Model times of the snapshots, s: 0, save_every, ..., and always the final time."""
        if self.duration <= 0:
            return (0.0,)
        count = math.floor(self.duration / self.save_every * (1 + 1e-12))
        times = [k * self.save_every for k in range(count + 1)]
        if self.duration - times[-1] > 1e-9 * self.duration:
            times.append(self.duration)
        else:
            times[-1] = self.duration
        return tuple(times)

    def describe(self) -> dict:
        """JSON-ready summary (SI) for the run manifest."""
        return {
            "mode": self.mode,
            "duration_s": self.duration,
            "save_every_s": self.save_every,
            "tolerance_m": self.tolerance,
            "max_step_s": self.max_step,
            "boundaries": {
                k: {"kind": v.kind, "inflow_m2_per_s": v.inflow} for k, v in self.boundaries.items()
            },
        }


def _unknown(key: str, valid, where: str) -> CrustflowInputError:
    close = difflib.get_close_matches(key, valid, n=1)
    hint = f"; did you mean {close[0]!r}?" if close else f"; valid keys: {', '.join(valid)}"
    return CrustflowInputError(f"unknown key {key!r} in {where}{hint}")


def _parse_edge(name: str, value: object) -> EdgeCondition:
    key = f"evolution.boundaries.{name}"
    if isinstance(value, str):
        if value not in ("closed", "fixed"):
            raise CrustflowInputError(
                f'{key} = {value!r} is not "closed", "fixed" or {{ inflow = "300 m^2/yr" }}; '
                "give one of them"
            )
        return EdgeCondition(kind=value)
    if isinstance(value, dict) and set(value) == {"inflow"}:
        return EdgeCondition(
            kind="inflow", inflow=parse_quantity(value["inflow"], f"{key}.inflow", "flux")
        )
    raise CrustflowInputError(
        f'{key} must be "closed", "fixed" or an inline table {{ inflow = "300 m^2/yr" }}'
    )


def _positive_time(raw: dict, key: str, *, allow_zero: bool = False) -> float:
    value = parse_quantity(raw[key], f"evolution.{key}", "time")
    if not math.isfinite(value) or value < 0 or (value == 0 and not allow_zero):
        need = "zero or positive" if allow_zero else "positive"
        raise CrustflowInputError(
            f'evolution.{key} = {raw[key]!r} must be {need}, e.g. evolution.{key} = "1 Myr"'
        )
    return value


def parse_evolution(raw: dict | None) -> EvolutionSpec | None:
    """Parse the ``[evolution]`` table.

    Parameters
    ----------
    raw : dict or None
        The table as read from TOML (None: the scenario has no ``[evolution]``).

    Returns
    -------
    EvolutionSpec or None

    Raises
    ------
    CrustflowInputError
        Unknown keys or edges, a missing duration in the transient mode, non-positive times,
        more than :data:`MAX_SNAPSHOTS` snapshots, bad edge conditions.
    """
    if raw is None:
        return None
    if not isinstance(raw, dict):
        raise CrustflowInputError('evolution must be a table: [evolution] duration = "2 Myr"')
    for key in raw:
        if key not in EVOLUTION_KEYS:
            raise _unknown(key, EVOLUTION_KEYS, "[evolution]")
    mode = raw.get("mode", "transient")
    if mode not in MODES:
        raise CrustflowInputError(
            f"evolution.mode = {mode!r} is not one of {', '.join(MODES)}; give one of them"
        )
    edges = raw.get("boundaries", {})
    if not isinstance(edges, dict):
        raise CrustflowInputError(
            'evolution.boundaries must be a table: [evolution.boundaries] west = "fixed"'
        )
    for key in edges:
        if key not in EDGES:
            raise _unknown(key, EDGES, "[evolution.boundaries]")
    boundaries = {e: _parse_edge(e, edges[e]) if e in edges else EdgeCondition() for e in EDGES}
    duration = 0.0
    if mode == "transient":
        if "duration" not in raw:
            raise CrustflowInputError(
                'evolution.duration is required for mode "transient"; add e.g. duration = "2 Myr"'
            )
        duration = _positive_time(raw, "duration", allow_zero=True)
    save_every = _positive_time(raw, "save_every") if "save_every" in raw else duration
    if duration > 0 and duration / save_every > MAX_SNAPSHOTS - 1:
        raise CrustflowInputError(
            f"evolution.save_every gives {duration / save_every:.0f} snapshots, more than "
            f"{MAX_SNAPSHOTS - 1}; save less often"
        )
    tolerance = DEFAULT_TOLERANCE
    if "tolerance" in raw:
        tolerance = parse_quantity(raw["tolerance"], "evolution.tolerance", "length")
        if not tolerance > 0:
            raise CrustflowInputError(
                'evolution.tolerance must be a positive length, e.g. tolerance = "5 m"'
            )
    max_step = _positive_time(raw, "max_step") if "max_step" in raw else None
    return EvolutionSpec(
        mode=mode,
        duration=duration,
        save_every=save_every or duration,
        tolerance=tolerance,
        max_step=max_step,
        boundaries=boundaries,
    )
