"""Tests of service.aggregate: daily weighted means on small stores where the answer is known exactly."""

from __future__ import annotations

import pickle
from pathlib import Path
from typing import Any

import dask
import numpy as np
import pyproj
import pytest
import shapely
import xarray as xr

from service.aggregate import aggregate, chunk_weights
from service.errors import RequestError
from service.geometry import Weights, cell_areas_km2, compute_weights, parse_features
from service.store import Layout, Store, open_store, write_store
from tests._support_store import LAMBERT_CRS, make_dataset

VARIABLES = ("tmax", "tmin", "prcp")
# make_dataset's lat-lon grid: 0.5-degree cells from (-150, -40), rows north first, so row j spans
# latitudes (-40 + 0.5 (ny - 1 - j)) to that + 0.5 and column i longitudes -150 + 0.5 i to that + 0.5.
WEST, SOUTH, SIZE = -150.0, -40.0, 0.5
TO_LONLAT = pyproj.Transformer.from_crs(LAMBERT_CRS, "EPSG:4326", always_xy=True)


def write(
    tmp_path: Path, name: str = "s", layout: Layout | None = None, **kwargs: Any
) -> tuple[Store, xr.Dataset]:
    """A small store from make_dataset(**kwargs), opened; and the Dataset it was written from."""
    ds = make_dataset(**kwargs)
    path = tmp_path / f"{name}.zarr"
    write_store(ds, path, **({"layout": layout} if layout else {}))
    return open_store(path), ds


def cell_box(ny: int, j0: float, i0: float, j1: float, i1: float) -> list[list[list[float]]]:
    """Polygon coordinates of a lon-lat box given in (fractional) cell indices, j counted from the north."""
    lon0, lon1 = WEST + SIZE * i0, WEST + SIZE * i1
    lat_top, lat_bottom = SOUTH + SIZE * (ny - j0), SOUTH + SIZE * (ny - j1)
    return [[[lon0, lat_bottom], [lon1, lat_bottom], [lon1, lat_top], [lon0, lat_top], [lon0, lat_bottom]]]


def fc(*geometries: dict[str, Any], properties: list[dict] | None = None) -> dict[str, Any]:
    props = properties or [{} for _ in geometries]
    return {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "id": f"f{i}", "geometry": g, "properties": p}
            for i, (g, p) in enumerate(zip(geometries, props, strict=True))
        ],
    }


def poly(coords: Any) -> dict[str, Any]:
    return {"type": "Polygon", "coordinates": coords}


def weights_for(store: Store, features: dict, crs: str | None = None, **kwargs: Any) -> Weights:
    return compute_weights(
        parse_features(features, crs=crs), store.grid, data_mask=store.data_mask(), cache_size=0, **kwargs
    )


def series(store: Store, weights: Weights, **kwargs: Any) -> xr.Dataset:
    (computed,) = dask.compute(aggregate(store, weights, **kwargs), scheduler="threads")
    return computed


def hand_mean(ds: xr.Dataset, var: str, cells: dict[tuple[int, int], float]) -> np.ndarray:
    """Daily mean of ``var`` over cells {(j, i): weight}, missing cells dropped and weights renormalised."""
    values = ds[var].values if var != "tmean" else (ds["tmax"].values + ds["tmin"].values) / 2
    num = np.zeros(values.shape[0])
    den = np.zeros(values.shape[0])
    for (j, i), w in cells.items():
        v = values[:, j, i]
        num += np.where(np.isnan(v), 0.0, w * v)
        den += np.where(np.isnan(v), 0.0, w)
    with np.errstate(invalid="ignore"):
        return np.where(den > 0, num / den, np.nan)


def assert_series(
    result: xr.Dataset, ds: xr.Dataset, row: int, cells: dict[tuple[int, int], float], tol: float = 1e-12
) -> None:
    for var in (*VARIABLES, "tmean"):
        np.testing.assert_allclose(result[var].values[row], hand_mean(ds, var, cells), rtol=tol, atol=tol)


def on_ground(store: Store, cells: dict[tuple[int, int], float]) -> dict[tuple[int, int], float]:
    """Cell shares {(j, i): share} as ground areas (km2): a projected grid's cells differ on the ground."""
    areas = cell_areas_km2(store.grid)
    return {(j, i): share * float(areas[j, i]) for (j, i), share in cells.items()}


# --- hand-computed means --------------------------------------------------------------------------------------


def test_half_of_one_cell_and_all_of_another(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=4, nx=3, years=(2000, 2001))
    # both cells in row 1 (same latitudes, so equal areas): weights 1/2 and 1
    result = series(store, weights_for(store, fc(poly(cell_box(4, 1, 0.5, 2, 2)))))
    assert_series(result, ds, 0, {(1, 0): 0.5, (1, 1): 1.0})
    assert result.sizes == {"feature": 1, "time": 731}
    assert list(result.feature.values) == ["f0"]
    np.testing.assert_array_equal(result.time.values, ds.time.values)


def test_hole_on_a_projected_grid(tmp_path: Path) -> None:
    store, ds = write(tmp_path, projected=True, ny=4, nx=4, years=(2001, 2001))
    x0, y0 = -200_000.0, -150_000.0  # make_dataset's projected origin, 10-km cells
    shell = [[x0, y0], [x0 + 30_000, y0], [x0 + 30_000, y0 + 30_000], [x0, y0 + 30_000], [x0, y0]]
    hole = [[x0 + 10_000, y0 + 10_000], [x0 + 20_000, y0 + 10_000], [x0 + 20_000, y0 + 20_000],
            [x0 + 10_000, y0 + 20_000], [x0 + 10_000, y0 + 10_000]]  # fmt: skip
    result = series(store, weights_for(store, fc(poly([shell, hole])), crs=LAMBERT_CRS.to_wkt()))
    # the bottom three rows (j = 1..3, north first) and left three columns, without the middle cell (2, 1)
    cells = {(j, i): 1.0 for j in (1, 2, 3) for i in (0, 1, 2) if (j, i) != (2, 1)}
    # weights are ground areas, which the Lambert plane shrinks by its (slowly varying) scale factor; the
    # scale at a piece's centroid differs from the cell centre's by about 1e-7 here
    assert_series(result, ds, 0, on_ground(store, cells), tol=1e-6)


def test_multipolygon_across_two_cells(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=3, nx=3, years=(2000, 2000))
    multi = {
        "type": "MultiPolygon",
        "coordinates": [cell_box(3, 2, 0, 3, 0.25), cell_box(3, 2, 2, 3, 2.5)],  # a quarter and a half
    }
    result = series(store, weights_for(store, fc(multi)))
    assert_series(result, ds, 0, {(2, 0): 0.25, (2, 2): 0.5})


def test_point_buffer_and_a_community_smaller_than_one_cell_take_their_cell(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=3, nx=3, years=(2000, 2000))
    lon, lat = WEST + SIZE * 1.5, SOUTH + SIZE * 1.5  # centre of cell (1, 1)
    point = {"type": "Point", "coordinates": [lon, lat]}
    small = poly(cell_box(3, 0.2, 2.3, 0.4, 2.6))
    result = series(store, weights_for(store, fc(point, small, properties=[{"buffer_m": 2500}, {}])))
    assert_series(result, ds, 0, {(1, 1): 1.0})
    assert_series(result, ds, 1, {(0, 2): 1.0})


def test_missing_cells_and_missing_days_renormalise(tmp_path: Path) -> None:
    # (1, 1) is missing on every day (water); (1, 0) on days 5 and 7; (1, 2) on day 7: day 7 has no data.
    store, ds = write(
        tmp_path,
        ny=3,
        nx=3,
        years=(2000, 2000),
        missing_cells=[(1, 1)],
        missing_days=[(5, 1, 0), (7, 1, 0), (7, 1, 2)],
    )
    w = weights_for(store, fc(poly(cell_box(3, 1, 0, 2, 3))))
    assert w.n_cells[0] == 2
    assert w.coverage[0] == pytest.approx(2 / 3)
    result = series(store, w)
    assert_series(result, ds, 0, {(1, 0): 1.0, (1, 1): 1.0, (1, 2): 1.0})
    assert result.tmax.values[0, 5] == pytest.approx(ds.tmax.values[5, 1, 2], rel=1e-12)
    assert np.isnan(result.prcp.values[0, 7]) and np.isnan(result.tmean.values[0, 7])
    assert result.coverage.values[0] == pytest.approx(2 / 3)


def test_feature_half_outside_the_grid(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=3, nx=3, years=(2000, 2000))
    result = series(store, weights_for(store, fc(poly(cell_box(3, 0, -1, 1, 1)))))
    assert_series(result, ds, 0, {(0, 0): 1.0})
    assert result.coverage.values[0] == pytest.approx(0.5, rel=1e-9)


def test_projected_grid_one_and_a_half_cells(tmp_path: Path) -> None:
    store, ds = write(tmp_path, projected=True, ny=3, nx=3, years=(2000, 2000))
    x0, y0 = -200_000.0, -150_000.0
    square = [[x0 + 5_000, y0], [x0 + 20_000, y0], [x0 + 20_000, y0 + 10_000], [x0 + 5_000, y0 + 10_000],
              [x0 + 5_000, y0]]  # fmt: skip
    w = weights_for(store, fc(poly([square])), crs=LAMBERT_CRS.to_wkt())
    # 150 km2 on the Lambert plane; on the ground pyproj.Geod measures the same outline (densified) larger,
    # since this plane's scale factor is below 1 between its standard parallels
    outline = shapely.segmentize(shapely.Polygon(square), 100.0)
    lonlat = shapely.transform(outline, lambda xy: np.column_stack(TO_LONLAT.transform(xy[:, 0], xy[:, 1])))
    geodesic, _ = pyproj.Geod(ellps="WGS84").geometry_area_perimeter(lonlat)
    assert w.area_km2[0] == pytest.approx(abs(geodesic) / 1e6, rel=1e-5)
    assert_series(series(store, w), ds, 0, on_ground(store, {(2, 0): 0.5, (2, 1): 1.0}), tol=1e-6)


def test_centers_weighting_gives_whole_cells_equal_weight(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=3, nx=3, years=(2000, 2000))
    # 60 % of cell (1, 0) and 30 % of cell (1, 1), both centres inside
    w = weights_for(store, fc(poly(cell_box(3, 1, 0.4, 2, 1.6))), weighting="centers")
    assert_series(series(store, w), ds, 0, {(1, 0): 1.0, (1, 1): 1.0})
    area = weights_for(store, fc(poly(cell_box(3, 1, 0.4, 2, 1.6))))
    assert_series(series(store, area), ds, 0, {(1, 0): 0.6, (1, 1): 0.6})


def test_layer_weighting(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=3, nx=3, years=(2000, 2000), layers=("population",))
    population = store.read_layer("population")
    np.testing.assert_allclose(population, ds.population.values, rtol=1e-6)  # the store keeps float32
    w = weights_for(store, fc(poly(cell_box(3, 1, 0, 2, 2))), layer=population)
    assert_series(series(store, w), ds, 0, {(1, 0): population[1, 0], (1, 1): population[1, 1]})


# --- the engine -----------------------------------------------------------------------------------------------


def random_features(n: int, rng: np.random.Generator, ny: int, nx: int) -> dict[str, Any]:
    """n irregular polygons of 0.3-2 cells across, anywhere on the make_dataset grid."""
    features = []
    for _ in range(n):
        cx, cy = WEST + SIZE * rng.uniform(0.5, nx - 0.5), SOUTH + SIZE * rng.uniform(0.5, ny - 0.5)
        angle = np.sort(rng.uniform(0, 2 * np.pi, 12))
        radius = SIZE * rng.uniform(0.15, 1.0) * rng.uniform(0.7, 1.0, 12)
        ring = np.column_stack([cx + radius * np.cos(angle), cy + radius * np.sin(angle)])
        features.append(poly([np.vstack([ring, ring[:1]]).tolist()]))
    return fc(*features)


def test_a_batch_equals_the_features_one_at_a_time(tmp_path: Path) -> None:
    # small chunks (4 x 4 cells x 200 days): features cross chunk edges in space and time
    store, ds = write(tmp_path, ny=10, nx=9, years=(2000, 2001), layout=Layout(tile=4, time_chunk=200),
                      missing_cells=[(3, 3), (4, 4)], missing_days=[(250, 5, 5)])  # fmt: skip
    features = random_features(25, np.random.default_rng(11), 10, 9)
    batch = series(store, weights_for(store, features))
    singles = [
        aggregate(store, weights_for(store, {"type": "FeatureCollection", "features": [item]}))
        for item in features["features"]
    ]
    for k, single in enumerate(dask.compute(*singles, scheduler="threads")):
        for var in (*VARIABLES, "tmean"):
            np.testing.assert_allclose(batch[var].values[k], single[var].values[0], rtol=1e-12, atol=1e-12)


def test_chunking_does_not_change_the_means_and_only_touched_chunks_are_read(tmp_path: Path) -> None:
    small, ds = write(
        tmp_path, "small", ny=10, nx=9, years=(2000, 2001), layout=Layout(tile=4, time_chunk=200)
    )
    whole, _ = write(
        tmp_path, "whole", ny=10, nx=9, years=(2000, 2001), layout=Layout(tile=32, time_chunk=None)
    )
    features = fc(poly(cell_box(10, 0, 0, 1, 3)), poly(cell_box(10, 1, 1, 2, 4)))  # both in chunk (0, 0)
    w = weights_for(small, features)
    lazy = aggregate(small, w, variables=("prcp",))
    # one chunk in space, ceil(731 / 200) = 4 blocks in time: 4 reading tasks for prcp
    names = [str(k[0] if isinstance(k, tuple) else k) for k in dict(lazy.prcp.data.__dask_graph__())]
    assert sum(k.endswith("-chunk") for k in names) == 4
    assert len(chunk_weights(w, small.grid.shape, small.chunk_shape[:2])) == 1
    a = series(small, w)
    b = series(whole, weights_for(whole, features))
    for var in (*VARIABLES, "tmean"):
        np.testing.assert_allclose(a[var].values, b[var].values, rtol=1e-12)
    assert_series(a, ds, 0, {(0, i): 1.0 for i in (0, 1, 2)})  # one row: equal cell areas


def test_time_selection_across_time_chunks(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=4, nx=4, years=(2000, 2001), layout=Layout(tile=4, time_chunk=100))
    w = weights_for(store, fc(poly(cell_box(4, 0.5, 0.5, 3.5, 2.5))))
    full = series(store, w)
    part = series(store, w, time=slice(150, 420))
    assert part.sizes["time"] == 270
    np.testing.assert_array_equal(part.time.values, ds.time.values[150:420])
    for var in (*VARIABLES, "tmean"):
        np.testing.assert_allclose(part[var].values, full[var].values[:, 150:420], rtol=1e-12)


def test_aggregate_computes_nothing_and_its_graph_pickles(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=4, nx=4, years=(2000, 2000))
    w = weights_for(store, fc(poly(cell_box(4, 1, 1, 2, 2))))

    def refuse(*args: Any, **kwargs: Any) -> None:
        raise AssertionError("aggregate must not compute")

    with dask.config.set(scheduler=refuse):
        lazy = aggregate(store, w)
    assert all(isinstance(lazy[v].data, dask.array.Array) for v in (*VARIABLES, "tmean"))
    # a worker gets the graph pickled: the Store travels as its location and reopens itself there
    (restored,) = dask.compute(pickle.loads(pickle.dumps(lazy)), scheduler="sync")
    assert_series(restored, ds, 0, {(1, 1): 1.0})


def test_noleap_calendar_keeps_its_time_axis(tmp_path: Path) -> None:
    store, ds = write(tmp_path, ny=3, nx=3, years=(2000, 2001), calendar="noleap")
    result = series(store, weights_for(store, fc(poly(cell_box(3, 0, 0, 1, 1)))))
    assert result.sizes["time"] == 730
    assert isinstance(result.indexes["time"], xr.CFTimeIndex)
    assert_series(result, ds, 0, {(0, 0): 1.0})


def test_variable_subset_and_bad_arguments(tmp_path: Path) -> None:
    store, _ = write(tmp_path, ny=3, nx=3, years=(2000, 2000))
    w = weights_for(store, fc(poly(cell_box(3, 0, 0, 1, 1))))
    only = aggregate(store, w, variables=("prcp",))
    assert list(only.data_vars) == ["prcp"]
    with pytest.raises(RequestError, match="no variable 'snow'"):
        aggregate(store, w, variables=("snow",))
    with pytest.raises(RequestError, match="step 2 is not supported"):
        aggregate(store, w, time=slice(0, 10, 2))
    other, _ = write(tmp_path, "other", ny=4, nx=3, years=(2000, 2000))
    with pytest.raises(ValueError, match="do not fit store"):
        aggregate(other, w)


def test_lazy_series_equals_aggregate_with_and_without_the_tile_cache(tmp_path: Path) -> None:
    """lazy_series gives aggregate's values bit for bit; cached=False reads around the tile cache (a job's pass)
    and leaves it as it was, with the same values."""
    from service.aggregate import lazy_series
    from service.store.chunks import configure_tile_cache, tile_cache

    store, _ = write(tmp_path, ny=10, nx=9, years=(2000, 2001), layout=Layout(tile=4, time_chunk=200),
                     missing_cells=[(3, 3)], missing_days=[(250, 5, 5)])  # fmt: skip
    weights = weights_for(store, random_features(12, np.random.default_rng(3), 10, 9))
    (whole,) = dask.compute(aggregate(store, weights), scheduler="threads")
    budget = tile_cache().max_bytes
    configure_tile_cache(0)  # emptied
    configure_tile_cache(1 << 24)
    try:
        store = open_store(store.location)  # readers made with the cache on
        before = tile_cache().nbytes
        (around,) = dask.compute(
            lazy_series(store, weights, variables=VARIABLES, cached=False), scheduler="threads"
        )
        assert tile_cache().nbytes == before
        (kept,) = dask.compute(lazy_series(store, weights, variables=VARIABLES), scheduler="threads")
        assert tile_cache().nbytes > before
    finally:
        configure_tile_cache(budget)
    for var in VARIABLES:
        assert np.array_equal(around[var], whole[var].values, equal_nan=True)
        assert np.array_equal(kept[var], whole[var].values, equal_nan=True)


def test_row_sums_are_scipys_row_sums_bit_for_bit() -> None:
    """row_sums replaces scipy's matrix.sum(axis=1) in every chunk task: the same bits (scipy is the reference),
    with empty rows, one-value rows, a row of zeros and values of very different sizes."""
    from scipy import sparse

    from service.aggregate import row_sums

    rng = np.random.default_rng(7)
    matrix = sparse.random(200, 1024, density=0.03, format="csr", random_state=3)
    matrix.data = rng.random(matrix.data.size) * 10.0 ** rng.integers(-9, 3, matrix.data.size)
    matrix = sparse.vstack(
        [matrix, sparse.csr_matrix((3, 1024)), sparse.csr_matrix(([0.0], ([0], [5])), (1, 1024))]
    )
    matrix = matrix.tocsr()
    expected = np.asarray(matrix.sum(axis=1)).ravel()
    got = row_sums(matrix)
    assert got.dtype == np.float64 and got.shape == expected.shape
    assert np.array_equal(got.view(np.uint64), expected.view(np.uint64))
    assert np.array_equal(row_sums(sparse.csr_matrix((0, 4))), np.zeros(0))


def test_chunk_weights_carry_each_rows_total(tmp_path: Path) -> None:
    """Each spatial chunk's row totals are computed once, when the weights are split: scipy's row sums of it."""
    store, _ = write(tmp_path, ny=10, nx=9, years=(2000, 2000), layout=Layout(tile=4, time_chunk=200))
    w = weights_for(store, fc(poly(cell_box(10, 0.5, 0.5, 7.5, 6.5)), poly(cell_box(10, 2.2, 1.1, 3.7, 2.9))))
    plan = chunk_weights(w, store.grid.shape, store.chunk_shape[:2])
    assert len(plan) > 1
    for part in plan:
        assert part.total is not None
        assert np.array_equal(
            part.total.view(np.uint64), np.asarray(part.matrix.sum(axis=1)).ravel().view(np.uint64)
        )


def _counting_reads(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Counts every chunk read of the lazy_series graphs made from now on (the functions that read a chunk,
    wrapped: the graph holds the functions it was made with)."""
    from service import aggregate

    reads = [0]
    for name in ("chunk_sums", "chunk_sums_for_two"):
        original = getattr(aggregate, name)

        def counted(*args: Any, _original: Any = original) -> Any:
            reads[0] += 1
            return _original(*args)

        monkeypatch.setattr(aggregate, name, counted)
    return reads


def test_one_task_sums_the_chunks_of_a_shard_with_the_bits_of_one_task_per_chunk(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """On a sharded store one task per shard and time block sums the inner chunks the batch touches, each read
    once: the daily means are the bits of the same chunks stored unsharded (one task per chunk), missing cells
    and days included, because the partial sums are still made chunk by chunk and added in grid order."""
    from service.aggregate import lazy_series

    kwargs: dict[str, Any] = dict(
        ny=10, nx=9, years=(2000, 2001), missing_cells=[(3, 3)], missing_days=[(250, 5, 5)]
    )
    sharded, _ = write(tmp_path, "sharded", layout=Layout(tile=2, shard_tile=4, time_chunk=400), **kwargs)
    plain, _ = write(tmp_path, "plain", layout=Layout(tile=2, time_chunk=400), **kwargs)
    assert sharded.storage_shape_of("prcp")[:2] == (4, 4) and sharded.chunk_shape_of("prcp")[:2] == (2, 2)
    features = random_features(12, np.random.default_rng(5), 10, 9)
    # a one-cell feature on the cell with a missing day: NaN in its means that day
    one_cell = fc(poly(cell_box(10, 5, 5, 6, 6)))["features"][0]
    features["features"].append({**one_cell, "id": "one-cell"})
    weights = weights_for(sharded, features)
    plan = chunk_weights(weights, sharded.grid.shape, (2, 2))
    shards = {(c.y.start // 4, c.x.start // 4) for c in plan}
    assert len(shards) < len(plan)  # some shard holds several touched chunks
    reads = _counting_reads(monkeypatch)
    lazy = lazy_series(sharded, weights, variables=VARIABLES)
    names = [str(k[0] if isinstance(k, tuple) else k) for k in dict(lazy["prcp"].__dask_graph__())]
    blocks = 2  # 731 days in chunks of 400
    assert sum(k.endswith("-chunk") for k in names) == len(shards) * blocks
    (got,) = dask.compute(lazy, scheduler="threads")
    assert reads[0] == len(plan) * blocks * len(VARIABLES)
    (want,) = dask.compute(lazy_series(plain, weights, variables=VARIABLES), scheduler="threads")
    for var in VARIABLES:
        assert np.isnan(got[var]).any()  # the missing days reach the means
        assert np.array_equal(got[var].view(np.uint64), want[var].view(np.uint64)), var
    as_dataset = series(sharded, weights)  # the xarray path adds them in the same order
    for var in VARIABLES:
        assert np.array_equal(as_dataset[var].values.view(np.uint64), want[var].view(np.uint64)), var


@pytest.mark.parametrize("layout", [Layout(tile=4, time_chunk=400), Layout(tile=2, shard_tile=4, time_chunk=400)],
                         ids=["chunks", "shards"])  # fmt: skip
def test_consecutive_batches_read_the_chunks_they_share_once(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, layout: Layout
) -> None:
    """With a Handover, a batch reads each chunk it shares with the next one once for both, and the next batch's
    chunk tasks take those sums instead of reading, even with its graph made before the first batch ran: every
    value the same bits as each batch alone, with missing cells and days, fewer reads, nothing left over (on a
    sharded store too, where one task holds several chunks)."""
    from service.aggregate import Handover, lazy_series
    from service.pipeline.core import take_weights

    store, _ = write(tmp_path, ny=10, nx=9, years=(2000, 2001), layout=layout,
                     missing_cells=[(3, 3)], missing_days=[(250, 5, 5)])  # fmt: skip
    weights = weights_for(store, random_features(16, np.random.default_rng(11), 10, 9))
    first, second = take_weights(weights, np.arange(0, 8)), take_weights(weights, np.arange(8, 16))
    other = take_weights(weights, np.arange(4, 12))
    reads = _counting_reads(monkeypatch)
    expected, alone_reads = [], []
    for batch in (first, second, other):
        reads[0] = 0
        expected.append(dask.compute(lazy_series(store, batch, variables=VARIABLES), scheduler="threads")[0])
        alone_reads.append(reads[0])
    handover = Handover()
    lazy_first = lazy_series(store, first, variables=VARIABLES, handover=handover, next_weights=second)
    lazy_second = lazy_series(
        store, second, variables=VARIABLES, handover=handover
    )  # made ahead, as read_ahead
    lazy_other = lazy_series(store, other, variables=VARIABLES, handover=handover)
    reads[0] = 0
    (got_first,) = dask.compute(lazy_first, scheduler="threads")
    assert reads[0] == alone_reads[0]
    kept = len(handover)
    assert kept > 0  # the two batches share chunks
    reads[0] = 0
    (got_other,) = dask.compute(
        lazy_other, scheduler="threads"
    )  # another batch on the same chunks takes nothing
    assert reads[0] == alone_reads[2] and len(handover) == kept
    reads[0] = 0
    (got_second,) = dask.compute(lazy_second, scheduler="threads")
    assert reads[0] == alone_reads[1] - kept
    assert len(handover) == 0
    for got, want in zip((got_first, got_second, got_other), expected, strict=True):
        for var in VARIABLES:
            assert np.array_equal(got[var].view(np.uint64), want[var].view(np.uint64))


def test_a_features_series_is_the_same_bits_in_any_batch(tmp_path: Path) -> None:
    """A feature's daily means do not depend on the other features of its batch: its chunks' partial sums are
    added in grid order, however many chunks the batch touches (here more than 128 one-cell chunks, more than
    a reduction tree's fan-in was), so a job's small batches, an on-demand batch and a cluster's give
    the same bits."""
    from service.aggregate import lazy_series
    from service.pipeline.core import take_weights

    store, _ = write(tmp_path, ny=16, nx=16, years=(2000, 2001), layout=Layout(tile=1, time_chunk=400),
                     missing_cells=[(3, 3)], missing_days=[(250, 5, 5)])  # fmt: skip
    weights = weights_for(store, random_features(60, np.random.default_rng(17), 16, 16))
    lazy = lazy_series(store, weights, variables=VARIABLES)
    names = [str(k[0] if isinstance(k, tuple) else k) for k in dict(lazy["prcp"].__dask_graph__())]
    assert sum(k.endswith("-chunk") for k in names) > 2 * 128  # two time blocks of more than 128 chunks each
    (together,) = dask.compute(lazy, scheduler="threads")
    for row in range(60):
        alone = take_weights(weights, np.array([row]))
        (one,) = dask.compute(lazy_series(store, alone, variables=VARIABLES), scheduler="threads")
        for var in VARIABLES:
            assert np.array_equal(one[var][0].view(np.uint64), together[var][row].view(np.uint64)), (row, var)
