"""Reducing an ensemble to what is reported, and the files: statistics over members per cell,
percentile maps (NetCDF, GeoTIFF), tables (CSV) and figures.

Written into the run's (temporary) folder by :func:`crustflow.analyses.ensemble.run.run_ensemble`:

==========================  ====================================================================
``ensemble.nc``             CF-1.8 NetCDF on the topography grid: for each summarised variable its
                            percentile maps under the variable's own name, dims
                            (``percentile``, y, x), plus ``<name>_mean`` and ``<name>_sd``; for the
                            exceedance variable ``<name>_exceedance``, dims (``threshold``, y, x),
                            probability 0 to 1. Practical units (those of ``fields.nc``).
``<name>_p<NN>.tif``        one GeoTIFF per percentile map (``p05``, ``p50``; ``p2_5`` for 2.5)
``ensemble_members.csv``    member (0-based), each sampled value in practical units, and the volume
                            flux of each budget feature (m^3/yr) when the scenario has features
``ensemble_budgets.csv``    per section/region: mean, sd and the percentiles of the volume flux in
                            m^3/yr and km^3/Myr (with features only)
``ensemble_<name>.png``    median and 5-95 % spread (p95 - p5) of each summarised variable
``<name>_exceedance.png``   exceedance probability maps, one panel per threshold
``ensemble_budgets.png``    one histogram of the members' volume flux per feature
                            (figures in every ``[output] figure_formats``, at ``figure_dpi``)
==========================  ====================================================================

Signs of budgets as in :mod:`crustflow.analyses.budgets` (sections: positive to the right of the line's
direction; regions: net inflow).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from crustflow.analyses.budgets import POSITIVE_SIDE
from crustflow.analyses.ensemble.stats import Reducer, sorted_percentiles
from crustflow.figures.common import save_figure
from crustflow.figures.ensemble import (
    budget_histograms,
    draw_budget_histograms,
    draw_ensemble_map,
    draw_exceedance_map,
    ensemble_map,
)
from crustflow.io.features import safe_name
from crustflow.io.writers import GeotiffWriter, NetcdfWriter, netcdf_attrs
from crustflow.scenario.ensemble_spec import PERCENTILE_METHOD
from crustflow.variables import CAUTION, VARIABLES, to_practical

__all__ = [
    "MapWriter",
    "Reducer",
    "sorted_percentiles",
    "write_tables",
    "budget_statistics",
    "budget_labels",
    "percentile_label",
    "ensemble_map",
    "budget_histograms",
    "PERCENTILE_METHOD",
]


#: m^3/yr in one km^3/Myr: 1e9 m^3 / 1e6 yr (definition).
M3_PER_YR_PER_KM3_PER_MYR = 1e3

#: Largest side, in cells, of the decimated maps kept for the figure. Project choice (as stream.py).
FIGURE_CELLS = 800


def percentile_label(p: float) -> str:
    """File and column label of a percentile: 5 -> ``p05``, 50 -> ``p50``, 2.5 -> ``p2_5``."""
    return f"p{int(p):02d}" if float(p).is_integer() else "p" + f"{p:g}".replace(".", "_")


class MapWriter:
    """Writes the per-cell statistics strip by strip: ``ensemble.nc`` and the GeoTIFFs.

    Parameters
    ----------
    folder : path
        The (temporary) output folder.
    grid
        The run's grid (``x``, ``y``, ``crs``, ``transform``, ``height``, ``width``).
    scenario : Scenario
        Title, scenario text, parameters and ``formats``.
    spec : crustflow.analyses.ensemble.run.EnsembleSpec
    percentiles : tuple of float
        The percentiles computed (the requested ones and those the figure needs), ascending.
    chunk_rows : int
        Rows written at a time (NetCDF chunk height).
    """

    def __init__(self, folder, grid, scenario, spec, percentiles, chunk_rows: int) -> None:

        self.folder, self.spec, self.grid = Path(folder), spec, grid
        self.names = list(spec.variables)
        self.pick = [percentiles.index(p) for p in spec.percentiles]
        self.figure_pick = [percentiles.index(p) for p in (5.0, 50.0, 95.0)]
        self.written: list[str] = []
        self.nc = None
        self.tifs: dict[tuple[str, float], object] = {}
        M = spec.members
        if "netcdf" in scenario.formats:
            attrs = netcdf_attrs(
                scenario.title, json.dumps(scenario.written), dict(vars(scenario.parameters))
            )
            attrs.update(
                history=attrs["history"].replace("crustflow run", "crustflow ensemble"),
                ensemble_members=M,
                ensemble_seed=spec.seed,
                ensemble_sampling=spec.sampling,
                ensemble_vary=json.dumps(spec.describe()["vary"]),
                ensemble_percentile_method=PERCENTILE_METHOD,
                ensemble_sd="sample standard deviation over the members (ddof = 1)",
                ensemble_exceedance="share of members strictly above each threshold",
            )
            two_d = {}
            for n in self.names:
                var = VARIABLES[n]
                two_d[f"{n}_mean"] = {
                    "long_name": f"{var.long_name}: mean over {M} ensemble members",
                    "units": var.units,
                }
                two_d[f"{n}_sd"] = {
                    "long_name": f"{var.long_name}: standard deviation over {M} ensemble members",
                    "units": var.units,
                }
            self.nc = NetcdfWriter(
                self.folder / "ensemble.nc",
                grid.x,
                grid.y,
                grid.crs,
                grid.transform,
                two_d,
                attrs,
                chunk_rows=chunk_rows,
            )
            self._add_stacked(chunk_rows)
            self.written.append("ensemble.nc")
        if "geotiff" in scenario.formats:
            for n in self.names:
                var = VARIABLES[n]
                for p in spec.percentiles:
                    name = f"{n}_{percentile_label(p)}.tif"
                    self.tifs[n, p] = GeotiffWriter(
                        self.folder / name,
                        crs=grid.crs,
                        transform=grid.transform,
                        height=grid.height,
                        width=grid.width,
                        variable=n,
                        attrs={
                            "long_name": f"{var.long_name}: percentile {p:g} of {M} ensemble "
                            "members",
                            "units": var.units,
                            "caution": CAUTION,
                        },
                    )
                    self.written.append(name)
        self.step = max(1, -(-max(grid.height, grid.width) // FIGURE_CELLS))
        self.figure_rows: dict[str, list] = {
            key: [] for n in self.names for key in (f"{n}:median", f"{n}:spread")
        }
        self.figure_rows["exceedance"] = []
        self.figure_options = {"formats": scenario.figure_formats, "dpi": scenario.figure_dpi}

    def _add_stacked(self, chunk_rows: int) -> None:
        """Percentile and exceedance variables: a leading dimension before (y, x)."""
        ds, spec, g = self.nc.nc, self.spec, self.grid
        chunks = (1, min(max(chunk_rows, 16), 256, g.height), min(256, g.width))
        cache = 2 * (g.width // chunks[2] + 1) * chunks[1] * chunks[2] * 4
        coords = [
            (
                "percentile",
                list(spec.percentiles),
                {"long_name": "percentile over the ensemble members", "units": "percent"},
            )
        ]
        stacked = [
            (
                n,
                "percentile",
                {
                    "long_name": f"{VARIABLES[n].long_name}: percentiles over "
                    f"{spec.members} ensemble members",
                    "units": VARIABLES[n].units,
                    "percentile_method": PERCENTILE_METHOD,
                },
            )
            for n in self.names
        ]
        exc = spec.exceedance_variable
        if exc is not None:
            var = VARIABLES[exc]
            coords.append(
                (
                    "threshold",
                    [t * var.factor for t in spec.thresholds],
                    {"long_name": f"threshold of {exc}", "units": var.units},
                )
            )
            stacked.append(
                (
                    f"{exc}_exceedance",
                    "threshold",
                    {
                        "long_name": f"probability that {exc} exceeds the threshold (share of "
                        f"{spec.members} ensemble members above it)",
                        "units": "1",
                        "valid_range": np.array([0.0, 1.0], dtype="float32"),
                    },
                )
            )
        for name, values, attrs in coords:
            ds.createDimension(name, len(values))
            var = ds.createVariable(name, "f8", (name,))
            var[:] = np.asarray(values, dtype=float)
            var.setncatts(attrs)
        for name, dim, attrs in stacked:
            var = ds.createVariable(
                name,
                "f4",
                (dim, "y", "x"),
                zlib=True,
                complevel=4,
                chunksizes=chunks,
                fill_value=np.float32(np.nan),
            )
            var.set_auto_maskandscale(False)
            var.set_var_chunk_cache(size=cache * len(ds.dimensions[dim]), preemption=0.9)
            var.setncatts(attrs)
            var.grid_mapping = "spatial_ref"

    def write(self, r0: int, r1: int, maps: dict) -> None:
        """Write rows ``r0:r1`` from the flat per-cell statistics of one strip (SI)."""
        shape = (r1 - r0, self.grid.width)
        for n in self.names:
            m = maps[n]
            pct = to_practical(n, m["percentiles"]).reshape(-1, *shape)
            if self.nc is not None:
                self.nc.nc.variables[n][:, r0:r1, :] = pct[self.pick].astype("float32")
                self.nc.write_rows(
                    r0,
                    {
                        f"{n}_mean": to_practical(n, m["mean"]).reshape(shape),
                        f"{n}_sd": to_practical(n, m["sd"]).reshape(shape),
                    },
                )
            for k, p in zip(self.pick, self.spec.percentiles, strict=True):
                if (n, p) in self.tifs:
                    self.tifs[n, p].write_rows(r0, pct[k])
            lo, mid, hi = (pct[k] for k in self.figure_pick)
            first, s = (-r0) % self.step, self.step
            # copies: views would keep each strip's percentile stack alive until the end
            self.figure_rows[f"{n}:median"].append(mid[first::s, s // 2 :: s].copy())
            self.figure_rows[f"{n}:spread"].append((hi - lo)[first::s, s // 2 :: s])
        exc = self.spec.exceedance_variable
        if exc is not None:
            values = maps[exc]["exceedance"].reshape(-1, *shape)
            first, s = (-r0) % self.step, self.step
            self.figure_rows["exceedance"].append(values[:, first::s, s // 2 :: s].copy())
            if self.nc is not None:
                self.nc.nc.variables[f"{exc}_exceedance"][:, r0:r1, :] = values.astype("float32")

    def close(self) -> list[str]:
        """Close every file; return the names written."""
        if self.nc is not None:
            self.nc.close()
            self.nc = None
        for writer in self.tifs.values():
            writer.close()
        self.tifs = {}
        return list(self.written)

    def abort(self) -> None:
        """Close whatever is open after an error (the folder is discarded by the caller)."""
        try:
            self.close()
        except Exception:  # noqa: BLE001 - the first error is the one to report
            pass

    def figures(self, folder, stats, member_budgets) -> list[str]:
        """Draw ``ensemble_<name>`` for every variable, ``<exceedance variable>_exceedance`` and,
        with budgets, ``ensemble_budgets``, in every figure format; returns the file names."""
        g, s, members = self.grid, self.step, self.spec.members
        out: list[str] = []
        for n in self.names:
            median = np.concatenate(self.figure_rows[f"{n}:median"], axis=0)
            spread = np.concatenate(self.figure_rows[f"{n}:spread"], axis=0)
            xs, ys = g.x[s // 2 :: s], g.y[::s][: median.shape[0]]
            title = f"{members}-member ensemble: {VARIABLES[n].long_name}"
            fig = draw_ensemble_map(median, spread, xs, ys, g.crs, n, title=title)
            out += save_figure(fig, folder, f"ensemble_{n}", **self.figure_options)
        exc = self.spec.exceedance_variable
        if exc is not None and self.figure_rows["exceedance"]:
            probability = np.concatenate(self.figure_rows["exceedance"], axis=1)
            xs, ys = g.x[s // 2 :: s], g.y[::s][: probability.shape[1]]
            thresholds = [t * VARIABLES[exc].factor for t in self.spec.thresholds]
            fig = draw_exceedance_map(probability, thresholds, xs, ys, g.crs, exc)
            out += save_figure(fig, folder, f"{exc}_exceedance", **self.figure_options)
        if member_budgets is not None and member_budgets.shape[1]:
            fig = draw_budget_histograms(
                member_budgets, stats, percentiles=self.spec.percentiles, note=POSITIVE_SIDE
            )
            out += save_figure(fig, folder, "ensemble_budgets", **self.figure_options)
        return out


# ----------------------------------------------------------------------------------------------
# tables


def budget_labels(table) -> list[str]:
    """Column labels of per-member budget totals: ``<kind>_<name>_volume_flux_m3_per_yr``."""

    taken: set[str] = set()
    return [
        f"{kind}_{safe_name(str(name), taken)}_volume_flux_m3_per_yr"
        for name, kind in zip(table["name"], table["kind"], strict=True)
    ]


def budget_statistics(member_budgets, percentiles, members: int):
    """Mean, sd and percentiles of each feature's volume flux over the members.

    Parameters
    ----------
    member_budgets : pandas.DataFrame or None
        One column per feature, m^3/yr, one row per member (``attrs`` ``names`` and ``kinds``).
    percentiles : sequence of float
    members : int

    Returns
    -------
    pandas.DataFrame or None
        One row per feature: ``name``, ``kind``, ``members``, then ``mean``, ``sd`` (ddof = 1) and
        ``p<NN>`` (numpy's "linear" method) in m^3/yr (``_m3_per_yr``) and km^3/Myr
        (``_km3_per_Myr``). NaN for a feature any member has no value for.
    """
    import pandas as pd

    if member_budgets is None:
        return None
    values = member_budgets.to_numpy(dtype=float)
    rows = []
    for j, (name, kind) in enumerate(
        zip(member_budgets.attrs["names"], member_budgets.attrs["kinds"], strict=True)
    ):
        v = values[:, j]
        stats = {"mean": float(np.mean(v)), "sd": float(np.std(v, ddof=1))}
        pct = np.percentile(v, list(percentiles), method="linear")
        stats.update({percentile_label(p): float(x) for p, x in zip(percentiles, pct, strict=True)})
        row = {"name": name, "kind": kind, "members": members}
        row.update({f"{k}_m3_per_yr": x for k, x in stats.items()})
        row.update({f"{k}_km3_per_Myr": x / M3_PER_YR_PER_KM3_PER_MYR for k, x in stats.items()})
        rows.append(row)
    return pd.DataFrame(rows)


def write_tables(folder, samples, member_budgets, spec) -> list[str]:
    """Write ``ensemble_members.csv`` and, with budgets, ``ensemble_budgets.csv``."""
    folder = Path(folder)
    table = samples.copy()
    if member_budgets is not None:
        for col in member_budgets.columns:
            table[col] = member_budgets[col].to_numpy()
    table.to_csv(folder / "ensemble_members.csv", index=False)
    out = ["ensemble_members.csv"]
    stats = budget_statistics(member_budgets, spec.percentiles, spec.members)
    if stats is not None:
        stats.to_csv(folder / "ensemble_budgets.csv", index=False)
        out.append("ensemble_budgets.csv")
    return out
