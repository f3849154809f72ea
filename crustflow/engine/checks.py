"""Checks of a run's inputs, accumulated block by block; ``finish`` raises the first problem.

:class:`InputChecks` is the one aggregate the engine uses; it folds in the checks of the grids'
values (:class:`GridChecks`), the per-cell parameter grids (:class:`CellInputCheck`), a channel
thicker than the crust (:class:`ThinCrustCheck`) and roof layers below the channel top
(:class:`ColumnCheck`). Strips computed elsewhere (a worker process) return their state with
:meth:`InputChecks.state`; the run folds it in with :meth:`InputChecks.merge`.
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING

import numpy as np

from crustflow import constants
from crustflow.errors import CrustflowInputError
from crustflow.io.grids import FILL_VALUES
from crustflow.physics.temperature import MAX_TEMPERATURE

if TYPE_CHECKING:
    from crustflow.io.grids import GridSource

__all__ = ["GridChecks", "CellInputCheck", "ThinCrustCheck", "ColumnCheck", "InputChecks"]


class GridChecks:
    """Value checks on input grids, accumulated strip by strip; :meth:`finish` raises."""

    def __init__(self, sources: dict[str, GridSource]) -> None:
        self.sources = sources
        self.count = dict.fromkeys(sources, 0)
        self.vmin = dict.fromkeys(sources, np.inf)
        self.vmax = dict.fromkeys(sources, -np.inf)
        untagged = [k for k, s in sources.items() if getattr(s, "nodata", 0.0) is None]
        self.fill = dict.fromkeys(untagged, 0)
        self.fill_seen: dict[str, set] = {k: set() for k in untagged}

    def update(self, arrays: dict[str, np.ndarray]) -> None:
        """Add a strip of rows of each grid."""
        for key, values in arrays.items():
            finite = values[np.isfinite(values)]
            if key in self.fill and finite.size:
                filled = np.isin(finite, FILL_VALUES)
                if filled.any():
                    self.fill[key] += int(filled.sum())
                    self.fill_seen[key].update(float(v) for v in np.unique(finite[filled]))
            if finite.size:
                self.count[key] += finite.size
                self.vmin[key] = min(self.vmin[key], float(finite.min()))
                self.vmax[key] = max(self.vmax[key], float(finite.max()))

    def finish(self) -> None:
        """Raise :class:`CrustflowInputError` for the first problem found."""
        self.warn_fill_values()
        for key, src in self.sources.items():
            if self.count[key] == 0:
                where = "" if key == "topography" else " on the topography grid"
                raise CrustflowInputError(
                    f"{src.name}: {src.path} holds no valid cells{where} (all "
                    "nodata); check the file, its extent or its nodata value"
                )
            if key == "topography":
                self._check_elevation(src)
            if key == "moho_depth" and self.vmax[key] <= 0:
                raise CrustflowInputError(
                    f"grids.moho_depth is at or above sea level everywhere (max "
                    f"{self.vmax[key]:.4g} m); it is the Moho's depth below sea level, positive "
                    "down: check the sign (a Moho elevation grid needs multiplying by -1)"
                )
            if key in ("crust_thickness", "moho_depth"):
                if self.vmax[key] < constants.KILOMETRE_SUSPICION:
                    raise CrustflowInputError(
                        f"grids.{key} values look like kilometres (max {self.vmax[key]:.4g}); give "
                        "the grid in metres (multiply by 1000)"
                    )
            if key == "crust_thickness" and self.vmin[key] <= 0:
                raise CrustflowInputError(
                    f"grids.crust_thickness has values <= 0 (min {self.vmin[key]:.4g} m); crustal "
                    "thickness is surface to Moho and must be positive"
                )

    def _check_elevation(self, src) -> None:
        low, high = constants.ELEVATION_RANGE
        vmin, vmax = self.vmin["topography"], self.vmax["topography"]
        if vmin < low or vmax > high:
            raise CrustflowInputError(
                f"grids.topography has values from {vmin:.6g} to {vmax:.6g} m, outside Earth's "
                f"{low / 1e3:g} km to +{high / 1e3:g} km; give elevations in metres and tag fill "
                "values as nodata"
            )

    def warn_fill_values(self) -> None:
        """Warn about grids without a nodata tag holding a common fill value (-9999, ...)."""
        for key, count in self.fill.items():
            if count:
                src = self.sources[key]
                values = ", ".join(f"{v:g}" for v in self.fill_seen[key])
                warnings.warn(
                    f"{src.name}: {src.path.name} has no nodata tag but {count} cells hold "
                    f"{values}, a common fill value; they are read as data: tag the nodata value "
                    "(e.g. gdal_edit.py -a_nodata -9999) if they are gaps",
                    stacklevel=2,
                )


class CellInputCheck:
    """Checks per-cell parameter grids block by block; :meth:`finish` raises."""

    def __init__(self) -> None:
        self.bad: dict[str, tuple[int, float]] = {}

    def update(self, cell: dict[str, np.ndarray]) -> None:
        """Add a block of SI values (``channel_thickness``, ``viscosity``, temperatures...)."""

        for key, values in cell.items():
            if key == "viscosity":
                low, high = constants.VISCOSITY_RANGE
                self._add(
                    "viscosity_range", values, (values > 0) & ((values < low) | (values > high))
                )
            if key in ("channel_thickness", "viscosity", "surface_heat_flow"):
                bad = np.isfinite(values) & ~(values > 0)
            elif key.startswith("temperature"):
                bad = np.isfinite(values) & ~((values > 0) & (values <= MAX_TEMPERATURE))
            else:
                continue
            self._add(key, values, bad)

    def _add(self, key: str, values: np.ndarray, bad: np.ndarray) -> None:
        if bad.any():
            count, worst = self.bad.get(key, (0, np.nan))
            first = float(values[bad].flat[0])
            self.bad[key] = (count + int(bad.sum()), worst if count else first)

    def finish(self) -> None:
        """Raise :class:`CrustflowInputError` for the first grid with bad values."""
        names = {
            "channel_thickness": "channel.thickness",
            "viscosity": "channel.viscosity",
            "temperature_top": "channel.temperature.top",
            "temperature_base": "channel.temperature.base",
            "surface_heat_flow": "channel.temperature.surface_heat_flow",
        }
        for key, (count, example) in sorted(
            self.bad.items(), key=lambda kv: kv[0].endswith("_range")
        ):
            if key == "viscosity_range":
                low, high = (f"{v:.0e}".replace("e+", "e") for v in constants.VISCOSITY_RANGE)
                raise CrustflowInputError(
                    f"channel.viscosity grid has {count} cells outside {low}-{high} Pa s "
                    f"(e.g. {example:.6g} Pa s after unit conversion), the range of crustal "
                    "channels and salt (see the README); check the grid and its units"
                )
            if key.startswith("temperature"):
                raise CrustflowInputError(
                    f"{names[key]} grid has {count} cells outside 0 K to 2000 K (e.g. "
                    f"{example:.6g} K after unit conversion); check the grid and its units"
                )
            raise CrustflowInputError(
                f"{names[key]} grid has {count} cells that are zero or negative (e.g. {example:.6g} "
                "in SI); it must be positive everywhere it has data: fix the grid or mask them as "
                "nodata"
            )


class ThinCrustCheck:
    """Counts cells where the channel is not thinner than the crust; :meth:`finish` raises."""

    def __init__(self, channel_thickness: float | None) -> None:
        self.h, self.cells, self.thinnest = channel_thickness, 0, np.inf

    def update(self, crust_thickness: np.ndarray, channel_thickness=None) -> None:
        """Add a strip of crustal thickness values (and channel thickness, if a grid), m."""
        h = self.h if channel_thickness is None else channel_thickness
        if h is None:  # channel placed by depths: cells are flagged, not refused
            return
        with np.errstate(invalid="ignore"):
            bad = np.isfinite(crust_thickness) & (crust_thickness <= h)
        self.cells += int(bad.sum())
        finite = crust_thickness[np.isfinite(crust_thickness)]
        if finite.size:
            self.thinnest = min(self.thinnest, float(finite.min()))

    def finish(self) -> None:
        """Raise :class:`CrustflowInputError` if any cell failed."""
        if self.cells:
            what = f"({self.h / 1e3:g} km) " if self.h is not None else "(grid) "
            raise CrustflowInputError(
                f"channel.thickness {what}is not less than the crustal thickness in "
                f"{self.cells} cells (thinnest crust {self.thinnest / 1e3:.3g} km); give a thinner "
                "channel or check the thickness grid"
            )


class ColumnCheck:
    """Counts cells whose roof reaches below the channel top, and cells where the placed channel
    has no thickness or leaves the crust; :meth:`finish` raises for the former."""

    def __init__(self) -> None:
        self.roof_cells = 0
        self.excluded = 0

    def update(self, roof_bad: np.ndarray | None, excluded: int) -> None:
        if roof_bad is not None:
            self.roof_cells += int(np.count_nonzero(roof_bad))
        self.excluded += int(excluded)

    def finish(self) -> None:
        if self.roof_cells:
            raise CrustflowInputError(
                f"the roof layers reach below the channel top in {self.roof_cells} cells; thin the "
                "roof layers or place the channel deeper (channel.thickness, channel.top_depth)"
            )


class InputChecks:
    """Every check of a run's inputs, accumulated block by block.

    Parameters
    ----------
    sources : dict of GridSource
        The run's grids (named in the messages).
    channel_thickness : float or None
        Uniform channel thickness, m (None: a grid, or placed by depths).
    """

    def __init__(self, sources: dict, channel_thickness: float | None) -> None:
        self.grids = GridChecks(sources)
        self.cells = CellInputCheck()
        self.thin = ThinCrustCheck(channel_thickness)
        self.column = ColumnCheck()

    def update(self, arrays: dict, crust_thickness, cell: dict, elevation) -> None:
        """Add a block's own rows: raw grid values, crustal thickness (m), SI parameter grids."""
        self.grids.update(arrays)
        self.cells.update(cell)
        self.thin.update(
            np.where(np.isfinite(elevation), crust_thickness, np.nan),
            cell.get("channel_thickness"),
        )

    def update_column(self, roof_bad, excluded) -> None:
        """Add the roof and placement counts of a block's own rows (from ``fields_si``)."""
        self.column.update(roof_bad, 0 if excluded is None else int(np.sum(excluded)))

    @property
    def failed(self) -> bool:
        """True once a check has found cells that make the run fail (stop computing)."""
        return bool(self.thin.cells or self.cells.bad or self.column.roof_cells)

    def state(self) -> dict:
        """The accumulated counts, to send from a worker to the run."""
        g = self.grids
        return {
            "grid": {k: (g.count[k], g.vmin[k], g.vmax[k]) for k in g.count},
            "fill": {k: (g.fill[k], sorted(g.fill_seen[k])) for k in g.fill},
            "cell_bad": dict(self.cells.bad),
            "thin": (self.thin.cells, self.thin.thinnest),
            "roof": self.column.roof_cells,
            "excluded": self.column.excluded,
        }

    def merge(self, state: dict) -> None:
        """Fold in the :meth:`state` of checks made elsewhere."""
        g = self.grids
        for key, (count, vmin, vmax) in state["grid"].items():
            g.count[key] += count
            g.vmin[key] = min(g.vmin[key], vmin)
            g.vmax[key] = max(g.vmax[key], vmax)
        for key, (count, seen) in state.get("fill", {}).items():
            if key in g.fill:
                g.fill[key] += count
                g.fill_seen[key].update(seen)
        for key, (count, example) in state["cell_bad"].items():
            old = self.cells.bad.get(key, (0, example))
            self.cells.bad[key] = (old[0] + count, old[1])
        self.thin.cells += state["thin"][0]
        self.thin.thinnest = min(self.thin.thinnest, state["thin"][1])
        self.column.roof_cells += state["roof"]
        self.column.excluded += state["excluded"]

    def finish(self) -> None:
        """Raise :class:`CrustflowInputError` for the first problem found."""
        self.grids.finish()
        self.cells.finish()
        self.column.finish()
        self.thin.finish()
