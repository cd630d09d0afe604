"""Streamed writes (service/ingest/blocks.py): staging by time blocks gives the same store as the in-memory path.

Small grids and tiny block budgets, so that every path (several blocks, blocks cut inside an input chunk, edge tiles
smaller than a tile, sub-daily days, appends) runs in a second; the memory figures are in bench/bench_streaming.py.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import dask.array as da
import numpy as np
import pytest
import xarray as xr

from service.demo import DEMO_INPUTS, demo_dataset, stage_demo
from service.errors import IngestError
from service.ingest import blocks as blocks_module
from service.ingest import ingest_files
from service.ingest.blocks import StagedGrid, decode, time_blocks
from service.store import FILL_VALUE, open_store, write_store
from tests._support_products import hourly_reanalysis
from tests._support_store import make_dataset
from tests.test_ingest import assert_same_values, write_cf


def _lazy(n_days: int, chunks: tuple[int, ...], ny: int = 4, nx: int = 5) -> xr.Dataset:
    """A Dataset of one lazy daily variable chunked along time as given."""
    data = da.zeros((n_days, ny, nx), chunks=(chunks, ny, nx))
    return xr.Dataset({"tmax": (("time", "y", "x"), data)})


@pytest.mark.parametrize(
    ("chunks", "most", "want"),
    [
        ((10, 10, 10), 25, [(0, 20), (20, 30)]),  # whole input chunks while they fit
        ((30,), 12, [(0, 12), (12, 24), (24, 30)]),  # a chunk beyond the budget is cut
        ((5, 25, 5), 10, [(0, 5), (5, 15), (15, 25), (25, 30), (30, 35)]),
        ((7,), 100, [(0, 7)]),
    ],
)
def test_time_blocks_follow_the_input_chunks_within_the_budget(
    chunks: tuple[int, ...], most: int, want: list[tuple[int, int]]
) -> None:
    ds = _lazy(sum(chunks), chunks)
    assert time_blocks(ds, ["tmax"], budget=most * 4 * 5 * 8) == want


def test_staged_tiles_give_back_the_values_in_any_block_and_edge_tile(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    ny, nx = 7, 10  # tiles of 4: edge tiles of 3 rows and 2 columns
    blocks = [rng.integers(-500, 500, size=(days, ny, nx)).astype(np.int16) for days in (3, 1, 6)]
    blocks[1][0, 2, 3] = FILL_VALUE
    stage = StagedGrid(tmp_path / "stage", (ny, nx), tile=4)
    for block in blocks:
        stage.add("prcp", block)
    stage.add("tmax", np.concatenate(blocks).transpose(1, 2, 0).copy(), time_first=False)
    whole = np.concatenate(blocks).transpose(1, 2, 0)
    for dtype in (np.float32, np.float64):
        got = stage.array("prcp", dtype)
        assert got.chunks == ((4, 3), (4, 4, 2), (3, 1, 6)) and got.dtype == dtype
        np.testing.assert_array_equal(got.compute(), decode(whole, dtype))
    np.testing.assert_array_equal(stage.array("tmax").compute(), decode(whole))
    assert np.isnan(stage.array("prcp").compute()[2, 3, 3])
    with pytest.raises(TypeError, match="int16"):
        stage.add("prcp", blocks[0].astype(np.float32))
    with pytest.raises(ValueError, match=r"grid shape \(7, 9\)"):
        stage.add("prcp", blocks[0][:, :, :9])


def test_decoding_then_the_stores_encoding_gives_back_every_int16() -> None:
    from service.store.layout import _encode_block

    raw = np.arange(-32767, 32768, dtype=np.int32).astype(np.int16)
    raw[0] = FILL_VALUE
    for dtype in (np.float32, np.float64):
        np.testing.assert_array_equal(_encode_block(decode(raw, dtype), "tmax"), raw)


def _same_stores(a: Path, b: Path) -> None:
    """Two stores with the same fingerprint and the same values, NaN where NaN."""
    first, second = open_store(a), open_store(b)
    assert first.fingerprint == second.fingerprint
    for v in first.variables:
        everything = (slice(None), slice(None), slice(None))
        np.testing.assert_array_equal(first.read(v, *everything), second.read(v, *everything))


def test_streamed_daily_ingest_equals_the_in_memory_ingest(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ds = make_dataset(ny=5, nx=3, years=(2000, 2001), missing_cells=[(1, 1)], missing_days=[(40, 2, 2)])
    files = write_cf(ds, tmp_path / "in")  # K and kg m-2 s-1: converted per block
    monkeypatch.setattr(blocks_module, "BLOCK_BYTES", 5 * 3 * 8 * 50)  # blocks of 50 days
    streamed = ingest_files(files, tmp_path / "streamed.zarr", progress=False, stream=True)
    at_once = ingest_files(files, tmp_path / "memory.zarr", progress=False, stream=False)
    assert streamed == at_once
    _same_stores(tmp_path / "streamed.zarr", tmp_path / "memory.zarr")
    assert_same_values(tmp_path / "streamed.zarr", ds)
    assert not list(tmp_path.glob(".*staging*"))  # the staging is removed


def test_streamed_appends_equal_ingesting_at_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    ds = make_dataset(ny=3, nx=3, years=(2000, 2002))
    files = write_cf(ds, tmp_path / "in", split="year")
    monkeypatch.setattr(blocks_module, "BLOCK_BYTES", 3 * 3 * 8 * 100)
    at_once = ingest_files(files, tmp_path / "once.zarr", progress=False, stream=False)
    ingest_files(files[:2], tmp_path / "grown.zarr", progress=False, stream=True)
    grown = ingest_files(files[2:], tmp_path / "grown.zarr", progress=False, stream=True)
    assert grown == at_once
    _same_stores(tmp_path / "grown.zarr", tmp_path / "once.zarr")


def test_streamed_sub_daily_ingest_keeps_whole_days(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    files, *_ = hourly_reanalysis(tmp_path / "in", "2001-01-01", 3, 3)
    monkeypatch.setattr(blocks_module, "BLOCK_BYTES", 4 * 6 * 8 * 2)  # blocks of two days
    notes: list[str] = []
    streamed = ingest_files(files, tmp_path / "s.zarr", progress=False, stream=True, notes=notes)
    at_once = ingest_files(files, tmp_path / "m.zarr", progress=False, stream=False)
    assert streamed == at_once and "prcp: left out incomplete day 2000-12-31 (1 of 24 steps)" in notes
    _same_stores(tmp_path / "s.zarr", tmp_path / "m.zarr")


def test_a_value_out_of_range_fails_while_staging_and_leaves_no_store(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ds = make_dataset(ny=2, nx=2, years=(2000, 2000))
    ds["tmax"][100, 0, 0] = 5000.0  # degC: beyond int16 at 0.1 units
    files = write_cf(ds, tmp_path / "in", split="one")
    monkeypatch.setattr(blocks_module, "BLOCK_BYTES", 2 * 2 * 8 * 30)
    with pytest.raises(IngestError, match=r"variable 'tmax': value 5000\.0.* cannot be stored"):
        ingest_files(files, tmp_path / "x.zarr", progress=False, stream=True)
    assert not (tmp_path / "x.zarr").exists() and not list(tmp_path.glob(".*staging*"))


def test_the_streamed_demo_equals_the_demo_built_in_memory(tmp_path: Path) -> None:
    # three years (one with a planted episode) instead of 48, so that both builds take seconds
    inputs = tmp_path / "inputs"
    shutil.copytree(DEMO_INPUTS, inputs)
    world = json.loads((inputs / "world.json").read_text(encoding="utf-8"))
    episode = world["episodes"][0]["years"][0]
    world["years"] = [episode - 1, episode + 1]
    (inputs / "world.json").write_text(json.dumps(world), encoding="utf-8")
    memory = write_store(demo_dataset("tiny", inputs=inputs), tmp_path / "memory.zarr")
    streamed = write_store(stage_demo("tiny", tmp_path / "stage", inputs=inputs), tmp_path / "streamed.zarr")
    assert streamed == memory
    _same_stores(tmp_path / "streamed.zarr", tmp_path / "memory.zarr")
