"""Scratch grids on disk: whole-grid arrays read and written by bands of rows or of columns.

The out-of-core whole-grid steps (:mod:`crustflow.engine.outofcore`) keep grids that do not fit in
memory in a run's temporary folder. A :class:`ScratchGrid` stores one float array in square tiles of
``tile`` x ``tile`` cells, each tile contiguous in the file and the tiles in row-major order, so that
a band of rows (one row of tiles) is one contiguous read and a band of columns (one column of tiles)
is one read per tile. Files are read and written with positioned reads and writes (``os.preadv``,
``os.pwrite``), not memory-mapped, so the operating system's page cache holds them and the
process's resident memory stays at the size of one band.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

__all__ = ["ScratchGrid", "scratch_tile"]

#: Cells in one band of rows or columns that :func:`scratch_tile` aims at (2^22 cells, 32 MB of
#: float64). Project choice: large enough that the per-read overhead is negligible, small enough
#: that a few working copies of a band stay near 100 MB.
BAND_CELLS = 1 << 22


def scratch_tile(height: int, width: int, cells: int = BAND_CELLS) -> int:
    """Tile side for a grid: a power of two between 16 and 512 keeping one band near ``cells``."""
    side = max(16, min(512, cells // max(height, width, 1)))
    return 1 << (side.bit_length() - 1)


class ScratchGrid:
    """A ``height`` x ``width`` array of ``dtype`` in a tiled file (see the module docstring).

    Parameters
    ----------
    path : path
        File to create; it must not exist (scratch files live in the run's temporary folder).
    height, width : int
    tile : int
        Side of the square tiles, cells.
    dtype : numpy dtype, optional
        Stored type (default float64).
    """

    def __init__(self, path, height: int, width: int, tile: int, dtype="float64") -> None:
        self.path = Path(path)
        self.height, self.width, self.tile = height, width, tile
        self.dtype = np.dtype(dtype)
        self.tile_rows = -(-height // tile)
        self.tile_cols = -(-width // tile)
        self._tile_bytes = tile * tile * self.dtype.itemsize
        self.has_nan = False  #: whether any NaN was written by rows (nodata)
        self._file = open(self.path, "x+b")  # noqa: SIM115 - closed in close()
        self._file.truncate(self.tile_rows * self.tile_cols * self._tile_bytes)

    # -- bands of rows ------------------------------------------------------------------------
    def read_rows(self, first: int, stop: int) -> np.ndarray:
        """Rows ``first:stop`` (any range inside the grid), all columns."""
        t = self.tile
        band0, band1 = first // t, -(-stop // t)
        out = np.empty((stop - first, self.width), self.dtype)
        for band in range(band0, band1):
            rows = self._read_band(band)
            a, b = max(first, band * t), min(stop, (band + 1) * t)
            out[a - first : b - first] = rows[a - band * t : b - band * t]
        return out

    def _read_band(self, band: int) -> np.ndarray:
        t, n = self.tile, self.tile_cols
        buf = np.empty((n, t, t), self.dtype)
        self._read(buf, band * n * self._tile_bytes)
        return buf.transpose(1, 0, 2).reshape(t, n * t)[:, : self.width]

    def write_rows(self, first: int, values: np.ndarray) -> None:
        """Write rows from ``first`` on; ``first`` is a multiple of :attr:`tile` and the rows fill
        whole bands (or end at the grid's last row)."""
        t, n = self.tile, self.tile_cols
        stop = first + values.shape[0]
        self.has_nan = self.has_nan or bool(np.isnan(values).any())
        if first % t or (stop % t and stop != self.height):
            raise ValueError(f"rows {first}:{stop} are not aligned to bands of {t} rows")
        for band in range(first // t, -(-stop // t)):
            rows = values[band * t - first : (band + 1) * t - first]
            buf = np.zeros((t, n * t), self.dtype)
            buf[: rows.shape[0], : self.width] = rows
            tiles = np.ascontiguousarray(buf.reshape(t, n, t).transpose(1, 0, 2))
            self._write(tiles, band * n * self._tile_bytes)

    # -- bands of columns ---------------------------------------------------------------------
    def read_columns(self, band: int) -> np.ndarray:
        """Band ``band`` of :attr:`tile` columns (fewer in the last band), all rows."""
        t, n = self.tile, self.tile_cols
        buf = np.empty((self.tile_rows, t, t), self.dtype)
        for i in range(self.tile_rows):
            self._read(buf[i], (i * n + band) * self._tile_bytes)
        width = min(t, self.width - band * t)
        return buf.reshape(self.tile_rows * t, t)[: self.height, :width]

    def write_columns(self, band: int, values: np.ndarray) -> None:
        """Write band ``band`` of columns (as returned by :meth:`read_columns`)."""
        t, n = self.tile, self.tile_cols
        buf = np.zeros((self.tile_rows * t, t), self.dtype)
        buf[: self.height, : values.shape[1]] = values
        tiles = buf.reshape(self.tile_rows, t, t)
        for i in range(self.tile_rows):
            self._write(np.ascontiguousarray(tiles[i]), (i * n + band) * self._tile_bytes)

    # positioned reads and writes (no shared file position: safe from any thread)
    def _read(self, buf: np.ndarray, offset: int) -> None:
        view = memoryview(buf).cast("B")
        done = 0
        while done < len(view):
            got = os.preadv(self._file.fileno(), [view[done:]], offset + done)
            if got <= 0:
                raise OSError(f"short read from scratch file {self.path}")
            done += got

    def _write(self, buf: np.ndarray, offset: int) -> None:
        view = memoryview(buf).cast("B")
        done = 0
        while done < len(view):
            done += os.pwrite(self._file.fileno(), view[done:], offset + done)

    def bands(self) -> range:
        """Starting rows of the bands of rows (the same numbers index the bands of columns)."""
        return range(0, self.height, self.tile)

    def close(self, *, remove: bool = True) -> None:
        """Close the file and (by default) delete it."""
        if not self._file.closed:
            self._file.close()
        if remove:
            try:
                os.remove(self.path)
            except FileNotFoundError:
                pass
