"""service.store.chunks: direct chunk decoding gives zarr's values, bit for bit, on every layout the store writes."""

from __future__ import annotations

import numpy as np
import pytest
import zarr

from service.store import Layout, open_store, write_store
from service.store.chunks import ChunkReader, TileCache
from tests._support_store import make_dataset

LAYOUTS = {
    "decade-like chunks": Layout(tile=4, time_chunk=400),
    "whole time": Layout(tile=4, time_chunk=None),
    "sharded": Layout(tile=4, time_chunk=200, shard_time=800),
}
WINDOWS = [
    (slice(0, 7), slice(0, 5), slice(0, 1096)),  # everything (edge chunks padded in the store)
    (slice(1, 3), slice(2, 3), slice(10, 390)),  # inside one chunk: a view
    (slice(3, 6), slice(1, 5), slice(380, 1001)),  # across chunks in every dimension
    (slice(6, 7), slice(4, 5), slice(1095, 1096)),  # the last cell and day
    (slice(2, 2), slice(0, 5), slice(0, 10)),  # empty
]


@pytest.fixture(scope="module", params=list(LAYOUTS))
def store(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory):
    """A 7 x 5-cell, three-year store with missing cells and days, written with one layout."""
    ds = make_dataset(ny=7, nx=5, years=(2000, 2002), missing_cells=[(0, 0)], missing_days=[(17, 3, 2)])
    path = tmp_path_factory.mktemp("chunks") / "s.zarr"
    write_store(ds, path, layout=LAYOUTS[request.param])
    return open_store(path)


def _zarr_array(store, var: str) -> zarr.Array:
    """The variable's array as zarr opens it (in its grid's group)."""
    return store._var_arrays[var]


@pytest.mark.parametrize("window", WINDOWS)
def test_reader_gives_zarrs_values(store, window) -> None:
    for var in ("tmax", "tmin", "prcp"):
        array = _zarr_array(store, var)
        reader = ChunkReader.for_array(array)
        assert reader is not None, "the store's own layouts take the short cut"
        got = reader.read(*window)
        want = np.asarray(array[window])
        assert got.dtype == want.dtype and got.shape == want.shape
        assert got.tobytes() == want.tobytes()
        # through the Store, and into the thread's scratch memory as the aggregation's chunk tasks read
        assert store.read_raw(var, *window).tobytes() == want.tobytes()
        assert store.read_raw(var, *window, scratch=True).tobytes() == want.tobytes()


def test_missing_chunk_reads_as_fill(tmp_path) -> None:
    """A chunk never written (all fill) is the fill value, as zarr reads it."""
    array = zarr.create_array(
        str(tmp_path / "a.zarr"),
        shape=(8, 8, 10),
        chunks=(4, 4, 10),
        dtype="int16",
        fill_value=-32768,
        compressors=zarr.codecs.BloscCodec(cname="lz4", shuffle="shuffle"),
    )
    array[:4, :4, :] = 7
    reader = ChunkReader.for_array(array)
    assert reader is not None
    got = reader.read(slice(0, 8), slice(0, 8), slice(0, 10))
    assert got.tobytes() == np.asarray(array[:]).tobytes()
    assert (got[4:, 4:] == -32768).all()


def test_other_codecs_read_through_zarr(tmp_path) -> None:
    """A chain other than bytes + blosc (here zstd) gets no reader, so zarr reads it."""
    array = zarr.create_array(
        str(tmp_path / "z.zarr"),
        shape=(4, 4, 4),
        chunks=(2, 2, 4),
        dtype="int16",
        compressors=zarr.codecs.ZstdCodec(),
    )
    assert ChunkReader.for_array(array) is None


def test_cache_serves_read_only_chunks(store) -> None:
    """With a cache, the second read is a hit and the chunk cannot be written through the view."""
    array = _zarr_array(store, "tmax")
    cache = TileCache(max_bytes=1 << 20)
    reader = ChunkReader.for_array(array, cache=cache)
    window = (slice(1, 3), slice(2, 3), slice(10, 190))
    first = reader.read(*window)
    second = reader.read(*window)
    assert cache.hits == 1 and cache.misses == 1
    assert first.tobytes() == second.tobytes() == np.asarray(array[window]).tobytes()
    with pytest.raises(ValueError):
        second[0, 0, 0] = 1


def test_a_read_around_the_cache_neither_takes_nor_keeps_chunks(store) -> None:
    """cached=False (a job's reads) leaves the cache as it was and gives the same values, writable."""
    array = _zarr_array(store, "tmax")
    cache = TileCache(max_bytes=1 << 20)
    reader = ChunkReader.for_array(array, cache=cache)
    window = (slice(1, 3), slice(2, 3), slice(10, 190))
    around = reader.read(*window, cached=False)
    assert cache.nbytes == 0 and cache.hits == cache.misses == 0
    kept = reader.read(*window)
    again = reader.read(*window, cached=False)
    assert cache.hits == 0 and cache.misses == 1 and cache.nbytes > 0
    assert around.tobytes() == kept.tobytes() == again.tobytes() == np.asarray(array[window]).tobytes()
    assert again.flags.writeable and not kept.flags.writeable


def test_scratch_reads_reuse_one_chunk_per_thread_and_never_a_cached_one(store) -> None:
    """Scratch reads on one thread decode into the same memory (the last read wins); another thread has its own;
    with a cache the chunk goes to the cache (read-only, never overwritten) instead."""
    import threading

    array = _zarr_array(store, "tmax")
    reader = ChunkReader.for_array(array)
    one, two = (slice(0, 2), slice(0, 2), slice(0, 100)), (slice(0, 2), slice(0, 2), slice(400, 500))
    first = reader.read(*one, scratch=True)
    first_values = np.asarray(array[one])
    assert first.tobytes() == first_values.tobytes()
    second = reader.read(*two, scratch=True)
    assert first.base is second.base and second.tobytes() == np.asarray(array[two]).tobytes()
    other: list[np.ndarray] = []
    thread = threading.Thread(target=lambda: other.append(reader.read(*one, scratch=True)))
    thread.start()
    thread.join()
    assert other[0].base is not second.base and other[0].tobytes() == first_values.tobytes()
    cached = ChunkReader.for_array(array, cache=TileCache(max_bytes=1 << 22))
    kept = cached.read(*one, scratch=True)
    cached.read(*two, scratch=True)
    assert not kept.flags.writeable and kept.tobytes() == first_values.tobytes()


def test_cache_keeps_its_budget() -> None:
    cache = TileCache(max_bytes=1000)
    for k in range(10):
        cache.put(k, np.zeros(200, dtype=np.int16))  # 400 bytes each
    assert cache.nbytes <= 1000
    assert cache.get(9) is not None and cache.get(0) is None
