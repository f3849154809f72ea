"""Pieces shared by the commands: a dask.distributed client, the features check, budgets of a run."""

from __future__ import annotations

from pathlib import Path

from crustflow.errors import CrustflowInputError
from crustflow.io.grids import close_sources, open_sources

__all__ = ["distributed_client", "check_features", "write_budgets"]


def distributed_client(workers: int | None, scheduler: str | None):
    """A dask.distributed client: a local cluster of ``workers`` processes, or a running
    scheduler. Returns ``(client, cluster)``, both None when neither is asked for."""
    if not workers and not scheduler:
        return None, None
    from dask.distributed import Client, LocalCluster

    if scheduler:
        try:
            return Client(scheduler, timeout="20s"), None
        except OSError as exc:
            raise CrustflowInputError(
                f"--scheduler {scheduler}: no dask scheduler answers there "
                f"({exc.__class__.__name__}); start one or check the address"
            ) from None
    cluster = LocalCluster(
        n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None
    )
    return Client(cluster), cluster


def check_features(scenario) -> None:
    """Read the scenario's section and region files once, so that bad ones fail before any work."""
    from crustflow.io.features import read_features

    sources = open_sources(scenario)
    try:
        crs = sources["topography"].crs
    finally:
        close_sources(sources)
    if scenario.sections is not None:
        read_features(scenario.sections, "sections", crs)
    if scenario.regions is not None:
        read_features(scenario.regions, "regions", crs)


def write_budgets(fields_path: Path, folder: Path, scenario):
    """Budgets, layers and figures of the fields in ``fields_path`` into ``folder``; returns the
    budget table (pandas) and the files written."""
    import pandas as pd
    import xarray as xr

    from crustflow.analyses.budgets import write_budget_outputs

    with xr.open_dataset(fields_path, decode_coords="all") as fields:
        fields = fields.load()
    files = write_budget_outputs(
        fields,
        folder,
        sections=scenario.sections,
        regions=scenario.regions,
        title=scenario.title,
        figure_formats=scenario.figure_formats,
        figure_dpi=scenario.figure_dpi,
    )
    return pd.read_csv(folder / "budgets.csv"), files
