"""service/store/relayout.py: rewriting a store in another chunking keeps its values and its fingerprint."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from service import cli
from service.errors import FingerprintMismatchError, StoreFormatError
from service.store import Layout, append_store, open_store, relayout_store, verify_store, write_store
from service.store import write as store_write
from tests._support_store import make_dataset

# shards of 8 x 8 cells x 365 days holding 4 x 4-cell chunks, on a 10 x 9 grid (edges cut the last shards)
SHARDED = Layout(tile=4, time_chunk=365, shard_tile=8)


def _siblings(path: Path) -> list[str]:
    return sorted(p.name for p in path.parent.iterdir())


def test_relayout_keeps_values_and_fingerprint_and_reads_inner_chunks(tmp_path: Path) -> None:
    ds = make_dataset(ny=10, nx=9, years=(2000, 2002), missing_cells=[(3, 4)], missing_days=[(40, 1, 1)])
    path = tmp_path / "s.zarr"
    before = write_store(ds, path)
    fingerprint, rewritten = relayout_store(path, SHARDED)
    assert rewritten and fingerprint == before  # the fingerprint names the values, not their chunking
    store = open_store(path)
    assert store.fingerprint == before and verify_store(path).ok
    assert store.chunk_shape == (4, 4, 365)  # the read unit: a chunk inside its shard
    assert store.storage_shape_of("tmax") == (8, 8, 365)
    assert store.describe()["grids"]["grid"]["chunks"] == {"y": 8, "x": 8, "time": 365}
    for var in ("tmax", "tmin", "prcp"):
        expected = ds[var].transpose("y", "x", "time").values
        np.testing.assert_allclose(
            store.read(var, slice(None), slice(None), slice(None)), expected, atol=1e-9
        )
    assert relayout_store(path, SHARDED) == (before, False)  # already in that layout: left alone
    back, rewritten = relayout_store(path, Layout())
    assert rewritten and back == before and open_store(path).chunk_shape == (10, 9, 3653)
    assert _siblings(path) == ["s.zarr"]  # no aside copy, journal or lock left behind


def test_append_to_a_relaid_store_keeps_its_layout(tmp_path: Path) -> None:
    ds = make_dataset(ny=10, nx=9, years=(2000, 2002))
    once = write_store(ds, tmp_path / "once.zarr", layout=SHARDED)
    path = tmp_path / "grown.zarr"
    write_store(ds.sel(time=slice(None, "2001-12-31")), path)
    relayout_store(path, SHARDED)
    grown = append_store(ds.sel(time=slice("2002-01-01", None)).drop_vars(["elevation", "population"]), path)
    assert grown == once and verify_store(path).ok
    store = open_store(path)
    assert store.chunk_shape == (4, 4, 365) and store.storage_shape_of("prcp") == (8, 8, 365)


def test_relayout_refuses_a_rewrite_that_changes_values(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ds = make_dataset(ny=6, nx=5, years=(2000, 2001))
    path = tmp_path / "s.zarr"
    before = write_store(ds, path)
    encode = store_write._encode_block

    def off_by_one(block: np.ndarray, var: str) -> np.ndarray:
        raw = encode(block, var)
        return raw + np.int16(1)  # a fault in the rewrite: every value 0.1 higher

    monkeypatch.setattr(store_write, "_encode_block", off_by_one)
    with pytest.raises(FingerprintMismatchError, match="left as it was"):
        relayout_store(path, Layout(tile=2, time_chunk=365, shard_tile=4))
    store = open_store(path)
    assert store.fingerprint == before and store.chunk_shape == (6, 5, 3653) and verify_store(path).ok
    assert _siblings(path) == ["s.zarr"]


@pytest.mark.parametrize(("tile", "shard"), [(8, 12), (8, 4)])
def test_layout_refuses_shards_that_do_not_hold_whole_chunks(tile: int, shard: int) -> None:
    with pytest.raises(StoreFormatError, match=f"shard_tile {shard} must be a multiple of tile {tile}"):
        Layout(tile=tile, shard_tile=shard)


def test_relayout_command(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "s.zarr"
    before = write_store(make_dataset(ny=10, nx=9, years=(2000, 2001)), path)
    args = ["relayout", str(path), "--tile", "4", "--shard", "8", "--days", "365", "--quiet"]
    assert cli.main(args) == 0
    out = capsys.readouterr().out
    assert "-> 4 x 4 cells x 365 days chunks in 8 x 8-cell shards" in out and f"{before} (unchanged)" in out
    assert open_store(path).storage_shape_of("tmax") == (8, 8, 365)
    assert cli.main(args) == 0 and "already" in capsys.readouterr().out
