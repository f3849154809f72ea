"""The whole-grid load step out of core: load filters and thin-channel flag in bounded memory.

The load filters (:func:`crustflow.physics.flexure.gaussian_smoothing`,
:func:`~crustflow.physics.flexure.flexural_filter`) and the thin-channel flag
(:func:`crustflow.physics.column.short_wavelength_mask`) act on the whole grid. Above
:data:`IN_MEMORY_CELLS` cells the command computes them here, with the whole grid on disk in
:class:`crustflow.io.scratch.ScratchGrid` files inside the run's temporary folder and only bands of
rows or columns in memory:

1. **Driving potential**: the grids are read in bands of rows and the potential
   ``phi = P_top - rho_ch g z_top`` (NaN off the valid cells) and ``rho_ch g z_top`` are written to
   scratch grids (:func:`crustflow.engine.fields.column_si`, as the in-memory step).
2. **Filters** (:func:`filter_scratch`): the same orthonormal DCT-II as the in-memory filter
   (:func:`crustflow.physics.flexure.wavenumber_filter`), done separably: a DCT along the rows of each
   band of rows, then along the columns of each band of columns, where the response
   ``R(k_north^2 + k_east^2)`` is applied and the column transform inverted, then the inverse
   along rows. The response, the wavenumbers and the local frame are the in-memory filter's, so
   the result is the whole-grid DCT filter itself, not an approximation of it: it agrees to
   rounding (the order of the floating-point operations differs; ``tests/engine/test_whole_grid.py``
   bounds the difference at 1e-12 of the field's range). Nothing is truncated, so the flexural
   filter, whose response is not compact in space, needs no halo.
3. **Nodata**: before filtering, nodata cells take the value of the nearest finite cell as in the
   in-memory filter, but searched in a window of the band of rows and :data:`FILL_HALO_ROWS` rows
   on each side. This is the whole-grid nearest cell whenever that cell lies within
   :data:`FILL_HALO_ROWS` cells (and, among cells at exactly the same distance, may pick another
   one); nodata farther from any data than that takes the nearest value in the window, or the mean
   of the valid potential where the window holds no data at all. It changes valid cells only
   through the filter's response to those far-inside nodata values.
4. **Thin-channel flag**: ``P_long`` by the out-of-core Gaussian, the two gradient magnitudes per
   band with one halo row (:func:`crustflow.physics.column.wavelength_gradients`), their local
   averages by the out-of-core Gaussian, and the comparison with the whole-grid maxima
   (:func:`crustflow.physics.column.short_wavelength_flag`).

Strips then read their rows of the filtered load and the flag from the scratch grids
(:class:`ScratchLoad`, which has the interface of :class:`crustflow.engine.blocks.WholeGridLoad`).
"""

from __future__ import annotations

import math
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import fft as sp_fft

from crustflow.engine.blocks import BlockReader, WholeGridLoad
from crustflow.engine.fields import column_si
from crustflow.errors import CrustflowInputError
from crustflow.geometry.grid import grid_geometry
from crustflow.io.scratch import ScratchGrid, scratch_tile
from crustflow.physics.column import (
    SHORT_WAVE_AVERAGING,
    short_wavelength_flag,
    short_wavelength_limit,
    wavelength_gradients,
)
from crustflow.physics.flexure import (
    dct_wavenumbers,
    elastic_lid_response,
    fill_nearest,
    gaussian_response,
    local_frame,
    report_frame,
)

__all__ = [
    "IN_MEMORY_CELLS",
    "FILL_HALO_ROWS",
    "ScratchLoad",
    "out_of_core_load",
    "filter_scratch",
]

#: Largest grid (cells) whose whole-grid load step runs in memory (about ten float64 copies of the
#: grid: some 350 MB at this size); larger grids take the out-of-core path. Project choice.
IN_MEMORY_CELLS = 1 << 22

#: Scratch grids of float64 alive at once at most (filtered potential and reference load, then
#: the long-wavelength gradient and both local averages of the thin-channel flag), for the disk check.
SCRATCH_FILES = 6

#: Cells computed at a time inside a band in the passes that evaluate the density column and the
#: gradients (their temporaries are a few dozen arrays of this size). Project choice.
PIECE_CELLS = 1 << 19

#: Rows searched on each side of a band of rows for the nearest finite cell when filling nodata
#: before a filter, cells. Project choice: exact fill for nodata within 256 cells of data.
FILL_HALO_ROWS = 256


@dataclass(eq=False)
class ScratchLoad:
    """The whole-grid load step's results in scratch grids; rows are read on demand.

    Same interface as :class:`crustflow.engine.blocks.WholeGridLoad` (``rows``, ``part``,
    ``flagged_cells``).
    """

    potential: ScratchGrid | None = None  #: filtered driving potential, Pa
    reference: ScratchGrid | None = None  #: rho_ch g z_top, Pa
    thin: ScratchGrid | None = None  #: thin-channel flag, 0/1, NaN off valid cells
    flagged: int | None = None  #: cells flagged
    _grids: list = field(default_factory=list)

    def rows(self, first: int, stop: int) -> tuple[np.ndarray | None, np.ndarray | None]:
        """Grid rows ``first:stop`` of the filtered load (Pa) and of the flag."""
        pressure = thin = None
        if self.potential is not None:
            pressure = self.potential.read_rows(first, stop) + self.reference.read_rows(first, stop)
        if self.thin is not None:
            thin = self.thin.read_rows(first, stop).astype("float64")
        return pressure, thin

    def part(self, first: int, stop: int) -> WholeGridLoad:
        """Grid rows ``first:stop`` in memory (for a strip computed in another process)."""
        return WholeGridLoad(*self.rows(first, stop), offset=first)

    def flagged_cells(self) -> int | None:
        """Cells with the thin-channel warning, or None without the flag."""
        return self.flagged

    def close(self) -> None:
        """Close and delete the scratch files."""
        for grid in self._grids:
            grid.close()
        self._grids.clear()


def out_of_core_load(
    reader: BlockReader, folder: str | Path, *, filtered: bool, thin_channel: bool
) -> ScratchLoad:
    """The whole-grid load step of ``reader``'s scenario with scratch grids in ``folder``.

    Parameters
    ----------
    reader : BlockReader
    folder : path
        An existing temporary folder (the run's); the scratch files are deleted by
        :meth:`ScratchLoad.close`.
    filtered, thin_channel : bool
        Apply the scenario's [load] filters; compute the thin-channel flag.

    Returns
    -------
    ScratchLoad
        Equal to :meth:`BlockReader.whole_grid_load` to rounding where nodata lies within
        :data:`FILL_HALO_ROWS` cells of data (see the module docstring).
    """
    scenario, folder = reader.scenario, Path(folder)
    tile = scratch_tile(reader.height, reader.width)
    load = ScratchLoad()
    _check_disk(folder, reader.height, reader.width, tile, SCRATCH_FILES)

    def scratch(name: str, dtype="float64") -> ScratchGrid:
        grid = ScratchGrid(folder / f"{name}.bin", reader.height, reader.width, tile, dtype)
        load._grids.append(grid)
        return grid

    ls, p = scenario.load, scenario.parameters
    filtered = filtered and ls.filtered
    try:
        phi = scratch("potential")
        reference = scratch("reference") if filtered else None
        stats = _potential(reader, phi, reference)
        geometry = _geometry(reader, 0, reader.height)
        frame = local_frame(geometry)
        if filtered:
            for i, response in enumerate(_load_responses(ls, p)):
                out = scratch(f"filtered{i}")
                filter_scratch(phi, out, frame, response, fallback=stats["mean"])
                _drop(load, phi)
                phi = out
            load.potential, load.reference = phi, reference
        if thin_channel:
            load.thin, load.flagged = _thin_channel(reader, phi, frame, stats, scratch)
        if load.potential is None:
            _drop(load, phi)
        return load
    except BaseException:
        load.close()
        raise


def _check_disk(folder: Path, height: int, width: int, tile: int, files: int) -> None:
    """Refuse to start when the scratch files cannot fit on the output's disk."""
    need = files * 8 * (-(-height // tile) * tile) * (-(-width // tile) * tile)
    free = shutil.disk_usage(folder).free
    if free < need:
        raise CrustflowInputError(
            f"the whole-grid load step of a {height:,} x {width:,} grid needs about "
            f"{need / 2**30:.1f} GB of scratch space next to the output (--out) and "
            f"{free / 2**30:.1f} GB are free; free disk space there, or write the output to "
            "another disk"
        )


def _drop(load: ScratchLoad, grid: ScratchGrid) -> None:
    grid.close()
    load._grids.remove(grid)


def _geometry(reader: BlockReader, first: int, stop: int):
    t = reader.transform
    return grid_geometry(reader.x, reader.y[first:stop], reader.crs, spacing=(t.a, t.e))


def _load_responses(ls, p) -> list:
    """The scenario's filters, in the order of :func:`crustflow.engine.fields.whole_grid_load`."""
    responses = []
    if ls.smoothing:
        responses.append(gaussian_response(ls.smoothing))
    if ls.elastic_thickness:
        responses.append(
            elastic_lid_response(
                elastic_thickness=ls.elastic_thickness,
                density_contrast=ls.density_contrast or (p.rho_mantle - p.rho_crust),
                gravity=p.gravity,
                youngs_modulus=ls.youngs_modulus,
                poissons_ratio=ls.poissons_ratio,
            )
        )
    return [r for r in responses if r is not None]


def _potential(reader: BlockReader, phi: ScratchGrid, reference: ScratchGrid | None) -> dict:
    """Pass 1: the driving potential and (if asked for) the reference load, band by band; returns
    the largest channel thickness (m), the mean of the potential (Pa) and the valid cells."""
    scenario = reader.scenario
    p = scenario.parameters
    h_max, total, count = -math.inf, 0.0, 0
    for r0 in phi.bands():
        r1 = min(reader.height, r0 + phi.tile)
        values = np.empty((r1 - r0, reader.width))
        ref = np.empty_like(values)
        for a, b in _pieces(r0, r1, reader.width):  # the column's temporaries: a piece at a time
            # One halo row: a grid geometry needs two rows; the column is per cell, so cropping
            # the halo off gives exactly the piece's own rows.
            block = reader.read(a, b, halo=1)
            col = column_si(
                block.elevation,
                block.crust_thickness(p),
                p,
                load_setup=scenario.load,
                cell=block.cell,
            )
            col = {k: v[block.own] if np.ndim(v) == 2 else v for k, v in col.items()}
            ref[a - r0 : b - r0] = p.rho_channel * p.gravity * col["z_top"]
            values[a - r0 : b - r0] = np.where(
                col["valid"], col["p_top"] - ref[a - r0 : b - r0], np.nan
            )
            h = np.asarray(col["h"], dtype=float)
            finite = h[np.isfinite(h)]
            if finite.size:
                h_max = max(h_max, float(finite.max()))
        phi.write_rows(r0, values)
        if reference is not None:
            reference.write_rows(r0, ref)
        good = values[np.isfinite(values)]
        total, count = total + float(good.sum()), count + good.size
    return {"h_max": h_max, "mean": total / count if count else 0.0, "valid": count}


def _pieces(r0: int, r1: int, width: int):
    """Rows ``r0:r1`` in pieces of about :data:`PIECE_CELLS` cells, each at least two rows long
    where the band has two (a grid geometry needs two rows)."""
    rows = max(2, PIECE_CELLS // max(width, 1))
    starts = list(range(r0, r1, rows))
    if len(starts) > 1 and r1 - starts[-1] < 2:
        starts.pop()  # a one-row tail joins the piece before it
    for i, a in enumerate(starts):
        yield a, starts[i + 1] if i + 1 < len(starts) else r1


def filter_scratch(
    src: ScratchGrid,
    dst: ScratchGrid,
    frame,
    response,
    *,
    fallback: float = 0.0,
    fill_halo: int = FILL_HALO_ROWS,
) -> float:
    """Apply an isotropic wavenumber filter to a scratch grid, out of core.

    Parameters
    ----------
    src, dst : ScratchGrid
        Input (unit u, NaN nodata; unchanged) and output (unit u, NaN where ``src`` is NaN); two
        different files of the same shape and tile.
    frame : crustflow.physics.flexure.LocalFrame
        The whole grid's local frame.
    response : callable
        ``k^2`` (rad^2/m^2) -> factor, as for :func:`crustflow.physics.flexure.wavenumber_filter`.
    fallback : float
        Value for nodata in a window without any data, unit u.
    fill_halo : int
        Rows searched beyond each band for the nearest finite cell.

    Returns
    -------
    float
        The largest finite value of the output (NaN if none), unit u.

    Notes
    -----
    The orthonormal 2-D DCT-II is the 1-D transform along rows followed by the 1-D transform
    along columns; the filter is ``idct_rows(idct_cols(R * dct_cols(dct_rows(f))))``, the same
    linear map as :func:`crustflow.physics.flexure.wavenumber_filter` (Makhoul 1980).
    """
    report_frame(frame)
    k_north, k_east = dct_wavenumbers(src.height, src.width, frame)
    t, n = src.tile, src.height
    nodata_seen = False
    for r0 in src.bands():
        r1 = min(n, r0 + t)
        halo = fill_halo if src.has_nan else 0
        a, b = max(0, r0 - halo), min(n, r1 + halo)
        window = src.read_rows(a, b)
        nodata = ~np.isfinite(window)
        if nodata.all():
            window = np.full(window.shape, fallback)
        elif nodata.any():
            window = fill_nearest(window, nodata)
        nodata_seen |= bool(nodata[r0 - a : r1 - a].any())
        rows = window[r0 - a : r1 - a]
        dst.write_rows(r0, sp_fft.dct(rows, type=2, norm="ortho", axis=1, workers=-1))
    for band in range(dst.tile_cols):
        cols = dst.read_columns(band)
        coef = sp_fft.dct(cols, type=2, norm="ortho", axis=0, workers=-1)
        c0 = band * t
        coef *= response(k_north[:, None] ** 2 + k_east[None, c0 : c0 + cols.shape[1]] ** 2)
        dst.write_columns(band, sp_fft.idct(coef, type=2, norm="ortho", axis=0, workers=-1))
    largest = -np.inf
    for r0 in dst.bands():
        r1 = min(n, r0 + t)
        out = sp_fft.idct(dst.read_rows(r0, r1), type=2, norm="ortho", axis=1, workers=-1)
        if nodata_seen:
            values = src.read_rows(r0, r1)
            np.copyto(out, values, where=~np.isfinite(values))
        dst.write_rows(r0, out)
        finite = out[np.isfinite(out)]
        if finite.size:
            largest = max(largest, float(finite.max()))
    return largest if np.isfinite(largest) else math.nan


def _thin_channel(reader: BlockReader, phi: ScratchGrid, frame, stats: dict, scratch):
    """The thin-channel flag of :func:`crustflow.physics.column.short_wavelength_mask`, out of
    core; returns the flag's scratch grid (float32) and the number of cells flagged."""
    thin = scratch("thin_channel", "float32")
    n, t = phi.height, phi.tile
    if stats["valid"] == 0:  # no valid cell: the flag is NaN everywhere, as in memory
        for r0 in phi.bands():
            thin.write_rows(r0, np.full((min(n, r0 + t) - r0, phi.width), np.nan))
        return thin, 0
    wavelength = short_wavelength_limit(stats["h_max"])
    p_long = scratch("long_part")
    split = gaussian_response(wavelength / (2.0 * math.pi))
    filter_scratch(phi, p_long, frame, split, fallback=stats["mean"])
    short, long = scratch("short_gradient"), scratch("long_gradient")
    load_max = 0.0
    for r0 in phi.bands():
        r1 = min(n, r0 + t)
        first, stop = max(0, r0 - 1), min(n, r1 + 1)  # one halo row for the gradients
        p, pl = phi.read_rows(first, stop), p_long.read_rows(first, stop)
        s_band, g_band = np.empty((r1 - r0, phi.width)), np.empty((r1 - r0, phi.width))
        for a, b in _pieces(r0, r1, phi.width):
            lo, hi = max(0, a - 1), min(n, b + 1)
            s, g = wavelength_gradients(
                p[lo - first : hi - first], pl[lo - first : hi - first], _geometry(reader, lo, hi)
            )
            s_band[a - r0 : b - r0], g_band[a - r0 : b - r0] = (
                s[a - lo : b - lo],
                g[a - lo : b - lo],
            )
        short.write_rows(r0, s_band)
        long.write_rows(r0, g_band)
        own = np.abs(p[r0 - first : r1 - first])
        if np.isfinite(own).any():
            load_max = max(load_max, float(np.nanmax(own)))
    p_long.close()
    average = gaussian_response(SHORT_WAVE_AVERAGING * wavelength)
    short_avg, long_avg = scratch("short_average"), scratch("long_average")
    filter_scratch(short, short_avg, frame, average)
    short.close()
    long_max = filter_scratch(long, long_avg, frame, average)
    long.close()
    flagged = 0
    for r0 in phi.bands():
        r1 = min(n, r0 + t)
        p = phi.read_rows(r0, r1)
        flag = short_wavelength_flag(
            short_avg.read_rows(r0, r1),
            long_avg.read_rows(r0, r1),
            long_max=long_max,
            load_max=load_max,
            wavelength=wavelength,
        ) & np.isfinite(p)
        flagged += int(flag.sum())
        thin.write_rows(r0, np.where(np.isfinite(p), flag.astype(float), np.nan))
    short_avg.close()
    long_avg.close()
    return thin, flagged
