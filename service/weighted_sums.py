"""The weighted sums of one chunk, compiled: a chunk's stored integers x its sparse weights -> partial sums.

One pass over the int16 tile (no float64 copy of it) multiplies each feature's weights with its cells' values
and finds the fill values on the way; the compiled code runs without the GIL, so the aggregation's task threads
add up different chunks at the same time. The terms are added in the order scipy's CSR product adds them (for
each feature, its cells in column order, from 0), so the sums are those of ``scaled_weights @ float64(tile)``
bit for bit (tests/test_weighted_sums.py checks that against a plain scipy.sparse reference).

numba compiles the kernel the first time a chunk is summed, not when the module is imported (``wxshock
submit`` and the other commands never pay for it), and keeps the machine code in its cache: beside this file
when that directory is writable, else in the user's cache directory (or ``NUMBA_CACHE_DIR``), else nowhere
(compiled again in each process, about a second).
"""

from __future__ import annotations

import numpy as np

from service import jit

# Days added up at a time: a feature's running sums for these days (32 kB) stay in the first-level cache while
# each of its cells is added in. Measured on a 32 x 32 x 3,653-day chunk with 1,764 weights: 1.1 ms at 4,096
# days (the whole chunk), 1.8 ms at 256, 2.3 ms at 128 (the loop vectorises best on long rows).
TILE_DAYS = 4096

# names of the compiled loops (service.jit)
KERNEL = "weighted_sums.chunk"
PUT_ROWS = "weighted_sums.put_rows"
SCALE_ROWS = "weighted_sums.scale_rows"


def _kernel_source(
    data: np.ndarray,
    indices: np.ndarray,
    indptr: np.ndarray,
    scale_factor: float,
    chunk: np.ndarray,
    window: np.ndarray,
    fill: int,
    tile_days: int,
) -> tuple[np.ndarray, np.ndarray]:
    """(features, days) weighted sums of stored integers x scaled weights, and the correction (empty if none).

    ``chunk`` (ny, nx, days) C-contiguous holds the stored integers; ``window`` (y0, x0, t0, nx, days) the part
    summed, local cell c being chunk[y0 + c // nx, x0 + c % nx, t0 : t0 + days]. A fill value adds nothing to
    the sums; the correction (features, days) is minus the unscaled weight of each feature's cells that hold
    the fill value that day, made only when some used cell has one.
    """
    y0, x0, t_start, width, days = window[0], window[1], window[2], window[3], window[4]
    n_rows = indptr.size - 1
    sums = np.zeros((n_rows, days))
    gaps = np.zeros(indices.max() + 1 if indices.size else 0, dtype=np.bool_)
    any_gap = False
    for t0 in range(0, days, tile_days):
        t1 = min(days, t0 + tile_days)
        for r in range(n_rows):
            out = sums[r, t0:t1]
            for k in range(indptr[r], indptr[r + 1]):
                c = indices[k]
                iy = c // width
                values = chunk[y0 + iy, x0 + c - iy * width, t_start + t0 : t_start + t1]
                w = data[k] * scale_factor
                fills = 0
                for t in range(out.size):  # from 0, over contiguous rows: the loop vectorises
                    v = values[t]
                    is_fill = v == fill
                    fills += is_fill
                    # a fill adds w * 0.0, as the zeroed value did in scipy's product (the same sum)
                    out[t] += w * (0.0 if is_fill else np.float64(v))
                if fills:
                    gaps[c] = True
                    any_gap = True
    if not any_gap:
        return sums, np.zeros((0, 0))
    correction = np.zeros((n_rows, days))
    for r in range(n_rows):
        for k in range(indptr[r], indptr[r + 1]):
            c = indices[k]
            if not gaps[c]:
                continue
            iy = c // width
            values = chunk[y0 + iy, x0 + c - iy * width, t_start : t_start + days]
            w = data[k]
            for t in range(days):
                if values[t] == fill:
                    correction[r, t] -= w
    return sums, correction


def _put_rows_source(out: np.ndarray, rows: np.ndarray, values: np.ndarray, started: np.ndarray) -> None:
    """out[rows[r], :] = 0.0 + values[r, :] for a row not started yet, += for one that is; marks rows started."""
    for r in range(rows.size):
        row = rows[r]
        target = out[row]
        source = values[r]
        if started[row]:
            for t in range(target.size):
                target[t] += source[t]
        else:
            started[row] = True
            for t in range(target.size):
                target[t] = 0.0 + source[t]  # the bits of zeros += source: 0.0 + -0.0 is 0.0


def _scale_rows_source(out: np.ndarray, factor: np.ndarray, offset: float) -> None:
    """out[r, :] = out[r, :] * factor[r] (+ offset when it is not 0), two roundings as numpy makes them."""
    for r in range(out.shape[0]):
        target = out[r]
        f = factor[r]
        if offset != 0.0:
            for t in range(target.size):
                target[t] = target[t] * f + offset  # numba does not contract this into one fused multiply-add
        else:
            for t in range(target.size):
                target[t] = target[t] * f


def put_rows(out: np.ndarray, rows: np.ndarray, values: np.ndarray, started: np.ndarray) -> None:
    """Add each row of ``values`` (rows, days) float64 into ``out[rows]`` as if ``out`` held zeros in the rows not yet
    ``started`` ((features,) bool, updated): ``out`` need not be zeroed, each element gets the bits of
    ``zeros[rows] += values`` and then of each later ``+=`` (``rows`` distinct)."""
    if values.size:
        jit.compiled(PUT_ROWS, _put_rows_source)(
            out, np.asarray(rows, dtype=np.int64), np.ascontiguousarray(values, dtype=np.float64), started
        )
    else:
        started[np.asarray(rows, dtype=np.int64)] = True


def scale_rows(out: np.ndarray, factor: np.ndarray, offset: float) -> None:
    """``out *= factor[:, None]`` then, when ``offset`` is not 0, ``out += offset``, in one pass with numpy's bits
    (``out`` (features, days) float64, C-contiguous rows; ``factor`` (features,) float64, NaN where none)."""
    if out.size:
        jit.compiled(SCALE_ROWS, _scale_rows_source)(
            out, np.ascontiguousarray(factor, dtype=np.float64), float(offset)
        )


def chunk_weighted_sums(
    data: np.ndarray,
    indices: np.ndarray,
    indptr: np.ndarray,
    scale_factor: float,
    tile: np.ndarray,
    fill_value: int,
) -> tuple[np.ndarray, np.ndarray | None]:
    """Weighted sums of one chunk in scaled units: (features, days) float64, and the missing-weight correction.

    ``data``/``indices``/``indptr`` are the CSR weights (features x the tile's cells, cell = iy * nx + ix,
    column indices sorted within each row); ``tile`` (ny, nx, days) or (cells, days) the stored integers, any
    strides, read-only allowed. The sums are sum_c (weight_c * scale_factor) * value_c over the feature's cells
    with data; the correction is minus the weight of its cells holding ``fill_value`` on each day, or None when
    no cell it uses has one.
    """
    chunk, window = _in_chunk(tile if tile.ndim == 3 else tile[:, None, :])
    sums, correction = jit.compiled(KERNEL, _kernel_source)(
        np.asarray(data, dtype=np.float64),
        np.asarray(indices, dtype=np.int64),
        np.asarray(indptr, dtype=np.int64),
        float(scale_factor),
        chunk,
        window,
        int(fill_value),
        TILE_DAYS,
    )
    return sums, (correction if correction.size else None)


def _in_chunk(tile: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A C-contiguous (ny, nx, days) array holding ``tile`` and where in it: (y0, x0, t0, nx, days).

    A window of a decoded chunk (a partial chunk at the grid's edge, or the days of a partial time block) is a
    strided view: the kernel reads the chunk it is a view of, so its rows of days stay contiguous and the sums
    vectorise; anything else is copied once.
    """
    ny, nx, days = tile.shape
    window = np.array([0, 0, 0, nx, days], dtype=np.int64)
    if tile.flags.c_contiguous:
        return tile, window
    base = tile.base
    if (
        isinstance(base, np.ndarray)
        and base.ndim == 3
        and base.flags.c_contiguous
        and base.dtype == tile.dtype
        and tile.strides == base.strides
    ):
        offset = tile.__array_interface__["data"][0] - base.__array_interface__["data"][0]
        if offset >= 0 and offset % tile.itemsize == 0:
            y0, x0, t0 = np.unravel_index(offset // tile.itemsize, base.shape)
            if y0 + ny <= base.shape[0] and x0 + nx <= base.shape[1] and t0 + days <= base.shape[2]:
                window[:3] = (y0, x0, t0)
                return base, window
    return np.ascontiguousarray(tile), window


def warm_up() -> None:
    """Compile (or load from numba's cache) the kernel for int16 chunks, writable and read-only (cached tiles), so
    that a long-running process pays the one-time cost (about 0.7 s of CPU with a warm cache) before its first
    request rather than in it."""
    tile = np.zeros((1, 1, 2), dtype=np.int16)
    one = np.ones(1)
    cell, rows = np.zeros(1, dtype=np.int64), np.array([0, 1], dtype=np.int64)
    chunk_weighted_sums(one, cell, rows, 0.1, tile, int(np.iinfo(np.int16).min))
    tile.flags.writeable = False
    chunk_weighted_sums(one, cell, rows, 0.1, tile, int(np.iinfo(np.int16).min))
    out = np.zeros((2, 4))
    started = np.zeros(2, dtype=np.bool_)
    for view in (out, out[:, 1:3]):
        put_rows(view, np.array([1]), np.ones((1, view.shape[1])), started)
        scale_rows(view, np.ones(2), 0.5)
