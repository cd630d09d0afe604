"""Writing a large store in bounded memory: daily values staged on disk in time blocks, then written tile by tile.

The store keeps decade-long chunks of 32 x 32 cells (service.store.layout), so each chunk it writes needs ten
years of its cells at once, and a decade of a large grid is gigabytes. So the values come in time blocks (a year
of the demo generator; for ingest, as many whole days of the input as fit a memory budget, never a day split),
are encoded at once to the store's int16 at 0.1 units (with the store's own ``_encode_block``, so a value out of
range fails here as it would there) and kept on disk, each block's tiles compressed apart (blosc lz4). The store's
write API then reads them back as a lazy array whose chunks are (tile, tile, block): each chunk the store writes
needs only its own tile's pieces, so memory stays at a few tiles per thread, whatever the size of the store.
Decoding gives back exactly the values the store would have encoded, so the store is the same as one written from
memory (same fingerprint).
"""

from __future__ import annotations

import os
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from service.store import FILL_VALUE, SCALE_FACTOR
from service.store.layout import TILE_CELLS, _encode_block

# Float64 bytes of one variable's time block read from the input at a time (its int16 and the encoding's
# temporaries come on top: about three times this at the peak, per variable, one variable at a time).
BLOCK_BYTES = 128 << 20


@dataclass
class _Piece:
    """Where one tile of one time block lies in a variable's staging file."""

    offset: int
    nbytes: int


@dataclass
class _Staged:
    """One variable's staging file and what it holds: per block, its days and its tiles' pieces."""

    path: Path
    days: list[int] = field(default_factory=list)
    pieces: list[dict[tuple[int, int], _Piece]] = field(default_factory=list)
    size: int = 0


class StagedGrid:
    """Daily int16 values of one grid's variables staged on disk in time blocks, each block's tiles apart.

    Blocks are added in time order with :meth:`add`; :meth:`array` gives a variable back as a lazy (y, x, time)
    dask array of decoded values, chunked (tile, tile, block).
    """

    def __init__(self, directory: Path, shape: tuple[int, int], tile: int = TILE_CELLS) -> None:
        import numcodecs

        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.shape = (int(shape[0]), int(shape[1]))
        self.tile = int(tile)
        self.variables: dict[str, _Staged] = {}
        self._codec = numcodecs.Blosc(cname="lz4", clevel=1, shuffle=numcodecs.Blosc.SHUFFLE)
        self._lock = threading.Lock()

    def _tiles(self) -> Iterator[tuple[int, int, slice, slice]]:
        """(tile row, tile column, rows, columns) of the grid's tiles."""
        ny, nx = self.shape
        for ty, y0 in enumerate(range(0, ny, self.tile)):
            for tx, x0 in enumerate(range(0, nx, self.tile)):
                yield ty, tx, slice(y0, min(ny, y0 + self.tile)), slice(x0, min(nx, x0 + self.tile))

    def add(self, variable: str, values: np.ndarray, *, time_first: bool = True) -> None:
        """Stage the next time block of a variable: int16 at 0.1 units, (time, y, x) or, with
        ``time_first=False``, (y, x, time)."""
        if values.dtype != np.int16:
            raise TypeError(f"staged values must be int16 (got {values.dtype}); encode them first")
        staged = self.variables.get(variable)
        if staged is None:
            staged = self.variables[variable] = _Staged(self.directory / f"{variable}.tiles")
        days = values.shape[0] if time_first else values.shape[2]
        grid_shape = values.shape[1:] if time_first else values.shape[:2]
        if tuple(grid_shape) != self.shape:
            raise ValueError(f"block of {variable!r} has grid shape {grid_shape}; the grid has {self.shape}")
        pieces: dict[tuple[int, int], _Piece] = {}
        with open(staged.path, "ab") as out:
            for ty, tx, rows, cols in self._tiles():
                piece = values[:, rows, cols].transpose(1, 2, 0) if time_first else values[rows, cols, :]
                data = self._codec.encode(np.ascontiguousarray(piece))
                out.write(data)
                pieces[(ty, tx)] = _Piece(staged.size, len(data))
                staged.size += len(data)
        staged.days.append(int(days))
        staged.pieces.append(pieces)

    def _read(self, variable: str, block: int, ty: int, tx: int, dtype: Any) -> np.ndarray:
        """One tile of one block, decoded to ``dtype`` values (NaN where missing)."""
        staged = self.variables[variable]
        piece = staged.pieces[block][(ty, tx)]
        fd = os.open(staged.path, os.O_RDONLY)
        try:
            data = os.pread(fd, piece.nbytes, piece.offset)
        finally:
            os.close(fd)
        rows = min(self.tile, self.shape[0] - ty * self.tile)
        cols = min(self.tile, self.shape[1] - tx * self.tile)
        raw = np.frombuffer(self._codec.decode(data), dtype=np.int16).reshape(rows, cols, staged.days[block])
        return decode(raw, dtype)

    def array(self, variable: str, dtype: Any = np.float64) -> Any:
        """The staged variable as a lazy (y, x, time) dask array of values in wxshock units (NaN missing)."""
        import dask.array as da
        from dask.highlevelgraph import HighLevelGraph

        staged = self.variables[variable]
        ny, nx = self.shape
        y_chunks = tuple(min(self.tile, ny - y0) for y0 in range(0, ny, self.tile))
        x_chunks = tuple(min(self.tile, nx - x0) for x0 in range(0, nx, self.tile))
        name = f"staged-{variable}-{id(self):x}-{os.getpid()}"
        dtype = np.dtype(dtype)
        graph = {
            (name, ty, tx, b): (self._read, variable, b, ty, tx, dtype)
            for b in range(len(staged.days))
            for ty in range(len(y_chunks))
            for tx in range(len(x_chunks))
        }
        chunks = (y_chunks, x_chunks, tuple(staged.days))
        return da.Array(
            HighLevelGraph.from_collections(name, graph, dependencies=()), name, chunks, dtype=dtype
        )

    @property
    def nbytes(self) -> int:
        """Bytes on disk of every staged variable."""
        return sum(s.size for s in self.variables.values())


def decode(raw: np.ndarray, dtype: Any = np.float64) -> np.ndarray:
    """Stored int16 at 0.1 units to values of ``dtype`` (fill -> NaN); re-encoding gives back the same integers."""
    kind = np.dtype(dtype).type
    values = raw.astype(kind)
    values *= kind(SCALE_FACTOR)
    values[raw == FILL_VALUE] = np.nan
    return values


def time_blocks(ds: xr.Dataset, variables: list[str], budget: int | None = None) -> list[tuple[int, int]]:
    """[start, stop) day indices of the time blocks a Dataset is staged in: about ``budget`` float64 bytes of one
    variable each, cut where the input's own chunks are cut where possible (so that no input chunk is read twice
    unless it alone exceeds the budget). Days are whole: the Dataset's time steps are days."""
    n = ds.sizes["time"]
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    most = max(1, (BLOCK_BYTES if budget is None else budget) // max(1, ny * nx * 8))
    cuts = {0, n}
    for v in variables:
        chunks = ds[v].chunks
        if chunks is None:
            continue
        sizes = chunks[ds[v].dims.index("time")]
        cuts.update(int(c) for c in np.cumsum(sizes))
    edges = sorted(cuts)
    blocks: list[tuple[int, int]] = []
    start = 0
    for i, edge in enumerate(edges[1:], start=1):
        following = edges[i + 1] if i + 1 < len(edges) else None
        if following is not None and following - start <= most:
            continue  # the next input chunk still fits in this block
        while edge - start > most:
            blocks.append((start, start + most))
            start += most
        if edge > start:
            blocks.append((start, edge))
            start = edge
    return blocks


def stage_dataset(
    ds: xr.Dataset,
    directory: Path,
    variables: list[str],
    *,
    budget: int | None = None,
    progress: bool = False,
) -> xr.Dataset:
    """A Dataset whose daily ``variables`` (lazy, on dims time, y and x) are computed block by block, encoded and
    staged in ``directory``; returns it with those variables read back from the staging, everything else kept.

    ``budget``: float64 bytes of one variable's block (default BLOCK_BYTES). The caller removes ``directory`` once
    the store is written.
    """
    import dask
    import dask.threaded  # the scheduler given as a function, not "threads": see cluster.LOCAL_THREADS

    stage = StagedGrid(directory, (ds.sizes["y"], ds.sizes["x"]))
    blocks = time_blocks(ds, variables, budget)
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=ds.sizes["time"], desc="reading input by time blocks", unit="day")
    for start, stop in blocks:
        for v in variables:
            lazy = ds[v].isel(time=slice(start, stop)).transpose("time", "y", "x").data
            with dask.config.set(scheduler=dask.threaded.get):
                values = np.asarray(dask.compute(lazy)[0] if hasattr(lazy, "dask") else lazy)
            encoded = _encode_block(values, v)
            del values
            stage.add(v, encoded)
            del encoded
        if bar is not None:
            bar.update(stop - start)
    if bar is not None:
        bar.close()
    replaced = {v: (("y", "x", "time"), stage.array(v), ds[v].attrs) for v in variables}
    return ds.drop_vars(variables).assign(replaced)[list(ds.data_vars)]
