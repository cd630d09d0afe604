"""Tests of service.weighted_sums: the compiled chunk kernel gives scipy.sparse's sums bit for bit."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import dask
import numpy as np
import pytest
from scipy import sparse

from service import jit, weighted_sums
from service.aggregate import Partial, aggregate, chunk_weights, finish
from service.store import Layout
from service.weighted_sums import chunk_weighted_sums
from tests.test_aggregate import VARIABLES, cell_box, poly, random_features, weights_for, write

ROOT = Path(__file__).parent.parent
FILL = int(np.iinfo(np.int16).min)


def scipy_sums(
    matrix: sparse.csr_matrix, block: np.ndarray, scale_factor: float, fill: int
) -> tuple[np.ndarray, np.ndarray | None]:
    """The reference, plain scipy.sparse: (weights x scale) @ float64 values with fills zeroed; the correction
    minus the weight of the cells holding the fill, for the cells that hold one (None when no used cell does)."""
    missing = block == fill
    values = np.where(missing, 0, block).astype(np.float64)
    sums = (matrix * scale_factor) @ values
    used = np.zeros(block.shape[0], dtype=bool)
    used[matrix.indices] = True
    bad = np.flatnonzero(used & missing.any(axis=1))
    if not bad.size:
        return sums, None
    return sums, -(matrix[:, bad] @ missing[bad].astype(np.float64))


def random_weights(rng: np.random.Generator, n_rows: int, n_cells: int) -> sparse.csr_matrix:
    """Features x cells overlap weights in (0, 1]; each cell shared by several features, some cells unused."""
    dense = np.where(rng.random((n_rows, n_cells)) < 0.3, rng.uniform(1e-3, 1.0, (n_rows, n_cells)), 0.0)
    dense[:, -3:] = 0.0  # cells no feature uses (their fills must not count)
    dense[:, 0] = rng.uniform(0.1, 1.0, n_rows)  # one cell in every feature
    matrix = sparse.csr_matrix(dense)
    matrix.sum_duplicates()
    return matrix


def assert_same(
    got: tuple[np.ndarray, np.ndarray | None], want: tuple[np.ndarray, np.ndarray | None]
) -> None:
    """Bit for bit (np.array_equal: -0.0 == 0.0), NaNs in the same places."""
    assert got[0].shape == want[0].shape
    assert np.array_equal(got[0], want[0], equal_nan=True)
    if want[1] is None:
        assert got[1] is None
    else:
        assert got[1] is not None and np.array_equal(got[1], want[1], equal_nan=True)


@pytest.mark.parametrize("fill", [FILL, -9999])
@pytest.mark.parametrize("days", [1, 255, 700])
def test_chunk_sums_equal_scipy_bit_for_bit(fill: int, days: int) -> None:
    rng = np.random.default_rng(days)
    ny, nx = 3, 5  # a partial chunk at the grid's edge: 3 x 5 of a 4 x 8 stored chunk
    stored = rng.integers(-400, 400, size=(4, 8, days + 9)).astype(np.int16)
    stored[1, 2, 4::7] = fill  # a used cell with gaps (from the window's first day)
    stored[0, 0, : days // 2] = fill  # the cell every feature uses, missing half the days
    stored[2, 4, :] = fill  # a cell missing every day
    stored[2, 2, :] = fill  # ... and one no feature uses (local cell 12 is unused below)
    tile = stored[:ny, :nx, 4 : 4 + days]  # a strided view, as a window of a cached chunk
    tile.flags.writeable = False
    matrix = random_weights(rng, 6, ny * nx)
    matrix = sparse.csr_matrix(matrix.multiply(np.arange(ny * nx) != 12))
    matrix.eliminate_zeros()
    got = chunk_weighted_sums(matrix.data, matrix.indices, matrix.indptr, 0.1, tile, fill)
    assert_same(got, scipy_sums(matrix, tile.reshape(ny * nx, days), 0.1, fill))
    assert got[1] is not None
    flat = np.ascontiguousarray(tile).reshape(ny * nx, days)
    assert_same(chunk_weighted_sums(matrix.data, matrix.indices, matrix.indptr, 0.1, flat, fill), got)
    fortran = np.asfortranarray(tile)  # neither contiguous nor a window of a contiguous chunk: copied
    assert_same(chunk_weighted_sums(matrix.data, matrix.indices, matrix.indptr, 0.1, fortran, fill), got)


def test_no_fill_in_used_cells_gives_no_correction() -> None:
    rng = np.random.default_rng(3)
    block = rng.integers(0, 3000, size=(10, 300)).astype(np.int16)
    block[9] = FILL  # a cell with no data that no feature uses
    matrix = random_weights(rng, 4, 10)
    got = chunk_weighted_sums(matrix.data, matrix.indices, matrix.indptr, 0.1, block, FILL)
    assert got[1] is None
    assert_same(got, scipy_sums(matrix, block, 0.1, FILL))
    empty = sparse.csr_matrix((0, 10))
    sums, correction = chunk_weighted_sums(empty.data, empty.indices, empty.indptr, 0.1, block, FILL)
    assert sums.shape == (0, 300) and correction is None


def scipy_aggregate(store, weights, var: str) -> np.ndarray:  # noqa: ANN001 - test helper
    """(feature, day) means of ``var`` over the whole record, each chunk summed by scipy (scipy_sums) and the
    partial sums finished as the aggregation finishes them (plan order, one reduction step)."""
    plan = chunk_weights(weights, store.grid.shape, store.chunk_shape[:2])
    enc = store.encoding(var)
    ct = store.chunk_shape_of(var)[2]
    blocks = []
    for t0 in range(0, store.n_times, ct):
        t1 = min(store.n_times, t0 + ct)
        partials = []
        for chunk in plan:
            raw = np.asarray(store.read_raw(var, chunk.y, chunk.x, slice(t0, t1)))
            sums, correction = scipy_sums(
                chunk.matrix, raw.reshape(-1, t1 - t0), enc.scale_factor, enc.fill_value
            )
            total = np.asarray(chunk.matrix.sum(axis=1)).ravel()
            partials.append(Partial(chunk.rows, sums, total, correction))
        blocks.append(finish(partials, len(weights.feature_ids), t1 - t0, enc.add_offset))
    return np.concatenate(blocks, axis=1)


def test_aggregate_equals_scipy_with_gaps_edges_and_shared_cells(tmp_path: Path) -> None:
    # 10 x 9 cells in 4 x 4 x 200 chunks: edge chunks of 2 rows and 1 column; missing cells and days; 40
    # features, so that cells lie in several features and features cross chunks in space and time
    store, _ = write(tmp_path, ny=10, nx=9, years=(2000, 2001), layout=Layout(tile=4, time_chunk=200),
                     missing_cells=[(3, 3), (8, 8)], missing_days=[(250, 5, 5), (3, 9, 0), (3, 9, 1)])  # fmt: skip
    features = random_features(40, np.random.default_rng(5), 10, 9)
    # the two cells of the edge chunks' last row, both missing on day 3: that day has no data
    features["features"].append(
        {"type": "Feature", "id": "edge", "geometry": poly(cell_box(10, 9, 0, 10, 2)), "properties": {}}
    )
    weights = weights_for(store, features)
    assert (np.asarray((weights.matrix > 0).sum(axis=0)).ravel() > 1).any()
    (result,) = dask.compute(aggregate(store, weights), scheduler="threads")
    for var in VARIABLES:
        want = scipy_aggregate(store, weights, var)
        assert np.isnan(want[-1, 3]) and not np.isnan(want[-1, 4])
        assert np.array_equal(result[var].values, want, equal_nan=True), var


def test_importing_the_service_does_not_compile_or_import_numba() -> None:
    code = (
        "import sys, service.aggregate, service.pipeline, service.cli; "
        "assert 'numba' not in sys.modules, 'numba imported'; "
        "from service import jit, weighted_sums; assert jit.loaded(weighted_sums.KERNEL) is None"
    )
    subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT)


def test_compiles_without_a_writable_cache() -> None:
    # a read-only install and no writable cache directory (the container's site-packages, a read-only home):
    # numba finds no place for its cache (here: only the locator of zipped sources is allowed, and the source
    # is not zipped), so the kernel is compiled in memory and gives the same sums
    code = (
        "import numpy as np\n"
        "from service.weighted_sums import chunk_weighted_sums\n"
        "s, corr = chunk_weighted_sums(np.array([0.5, 0.5]), np.array([0, 1]), np.array([0, 2]), 0.1,\n"
        "                              np.array([[10, 20], [30, -32768]], dtype=np.int16), -32768)\n"
        "assert np.array_equal(s, [[2.0, 1.0]]) and np.array_equal(corr, [[0.0, -0.5]]), (s, corr)\n"
        "from service import jit, weighted_sums\n"
        "kernel = jit.loaded(weighted_sums.KERNEL)\n"
        "assert type(kernel._cache).__name__ == 'NullCache', kernel._cache\n"
    )
    env = {**os.environ, "NUMBA_CACHE_LOCATOR_CLASSES": "ZipCacheLocator"}
    subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, check=True)


def test_warm_up_loads_the_kernel_for_writable_and_read_only_chunks() -> None:
    from service import weighted_sums

    weighted_sums.warm_up()
    kernel = jit.loaded(weighted_sums.KERNEL)
    assert kernel is not None and jit.loaded(weighted_sums.PUT_ROWS) is not None
    readonly = [sig for sig in kernel.signatures if not sig[4].mutable]
    assert readonly and len(kernel.signatures) >= 2


def numpy_finish(partials: list[Partial], n: int, days: int, add_offset: float) -> np.ndarray:
    """The means as numpy makes them (the reference for aggregate.finish): partial sums added into zeros by fancy
    index, times one reciprocal per feature (NaN without weight), plus the offset when it is not 0."""
    out = np.zeros((n, days))
    total = np.zeros(n)
    for p in partials:
        out[p.rows] += p.weighted_sum
        total[p.rows] += p.total
    no_weight = total <= 0
    with np.errstate(divide="ignore"):
        out *= np.where(no_weight, np.nan, 1.0 / np.where(no_weight, 1.0, total))[:, None]
    if add_offset:
        out += add_offset
    return out


@pytest.mark.parametrize("add_offset", [0.0, 273.15])
def test_finish_into_used_memory_is_numpys_bit_for_bit(add_offset: float) -> None:
    """finish writes every element of an array holding garbage (a reused batch array, service.buffers) with the
    bits numpy's zeros + fancy-index adds + scaling give: rows in several partials, a row in none (NaN), a
    zero-weight row, sums of -0.0 (whose sign 0.0 + -0.0 drops), on a whole array and on a window of days."""
    rng = np.random.default_rng(11)
    n, days = 7, 40
    partials = []
    for rows in ([0, 2, 5], [2, 3], [5, 0, 6]):
        sums = rng.normal(size=(len(rows), days)) * 1e3 / 3.0
        sums[:, :4] = -0.0
        partials.append(Partial(np.array(rows), sums, rng.uniform(0.5, 2.0, len(rows)), None))
    partials.append(Partial(np.array([1]), np.full((1, days), 5.0), np.zeros(1), None))  # no weight: NaN
    expected = numpy_finish(partials, n, days, add_offset)
    assert np.isnan(expected[[1, 4]]).all() and not np.signbit(expected[0, :4]).any()  # the premises hold
    got = finish(partials, n, days, add_offset, out=np.full((n, days), 1e300))
    assert np.array_equal(got.view(np.uint64), expected.view(np.uint64))
    series = np.full((n, days + 10), -7.0)
    finish(partials, n, days, add_offset, out=series[:, 5 : days + 5])
    assert np.array_equal(series[:, 5 : days + 5].view(np.uint64), expected.view(np.uint64))
    assert (series[:, :5] == -7.0).all() and (series[:, days + 5 :] == -7.0).all()


def test_put_rows_into_started_rows_is_numpys_fancy_index_add_bit_for_bit_on_views() -> None:
    """put_rows into rows already started gives what ``out[rows] += values`` gives (the numpy reference), on a
    whole array and on a strided window of days (as ``finish`` writes one time block), with rows in any order and
    a row left untouched."""
    rng = np.random.default_rng(7)
    base = rng.normal(size=(6, 50)) * 1e3
    values = rng.normal(size=(3, 50)) / 7.0
    rows = np.array([4, 0, 2])
    started = np.ones(6, dtype=np.bool_)
    expected, got = base.copy(), base.copy()
    expected[rows] += values
    weighted_sums.put_rows(got, rows, values, started)
    assert np.array_equal(got, expected)
    expected, got = base.copy(), base.copy()
    expected[:, 10:30][rows] += values[:, :20]
    weighted_sums.put_rows(got[:, 10:30], rows, values[:, :20], started)
    assert np.array_equal(got, expected)
    assert np.array_equal(got[[1, 3, 5]], base[[1, 3, 5]])
