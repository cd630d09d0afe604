"""The layout-2 fingerprint: over decoded values in a fixed tiling, blind to chunks, shards and codecs; and the
migration of a layout-1 store, which records the old fingerprint beside the new."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
import zarr
from zarr.codecs import BloscCodec, ZstdCodec

from service.errors import FingerprintMismatchError
from service.store import (
    CANONICAL_TILE,
    Layout,
    add_variables,
    compute_fingerprint,
    migrate_store,
    open_store,
    update_store,
    verify_store,
    write_layer,
    write_store,
)
from service.store.fingerprint import fingerprint_v1
from tests._support_store import make_dataset

DATA = Path(__file__).parent / "data"
# The layout-1 store in tests/data was written by wxshock's layout-1 writer (main at 7cc4705) from
# make_dataset(ny=4, nx=3, years=(2000, 2001), calendar="noleap", projected=True, missing_cells=[(0, 0)],
# missing_days=[(3, 1, 1)], seed=11); this is the fingerprint it recorded then.
LAYOUT1_FINGERPRINT = "sha256:c8ac7e3a32d4c62b3a8acc76bdebb0bb35e2827d292ed12f2acfd245551c6d40"


@pytest.fixture(scope="module")
def small():
    """Four years of a 7 x 5 grid with gaps: large enough that every layout below cuts it differently."""
    return make_dataset(
        ny=7, nx=5, years=(2000, 2003), missing_cells=[(2, 2)], missing_days=[(40, 1, 1)], seed=4
    )


@pytest.mark.parametrize(
    "layout",
    [
        Layout(tile=2, time_chunk=100),  # small chunks in every dimension
        Layout(tile=3, time_chunk=365, shard_time=730),  # sharded
        Layout(time_chunk=None),  # the whole time axis in one chunk
        Layout(compressor="zstd", level=3),  # another codec
        Layout(tile=4, time_chunk=500, shard_time=1500, compressor="blosclz", level=9),
    ],
    ids=["small-chunks", "sharded", "whole-time", "zstd", "sharded-blosclz"],
)
def test_a_relayout_leaves_the_fingerprint_unchanged(tmp_path: Path, small, layout: Layout) -> None:
    reference = write_store(small, tmp_path / "default.zarr")
    other = write_store(small, tmp_path / "other.zarr", layout=layout)
    assert other == reference
    store = open_store(tmp_path / "other.zarr")
    assert (
        store.inner_chunk_shape != open_store(tmp_path / "default.zarr").inner_chunk_shape
        or layout.compressor != "lz4"
    )
    assert verify_store(tmp_path / "other.zarr").ok


def test_rechunking_a_store_by_hand_with_zarr_keeps_its_fingerprint(tmp_path: Path, small) -> None:
    """A relayout made outside wxshock (zarr itself copies every array with other chunks, shards and codecs)."""
    path = tmp_path / "s.zarr"
    fingerprint = write_store(small, path)
    source = zarr.open_group(path, mode="r")
    copy = zarr.open_group(tmp_path / "copy.zarr", mode="w", zarr_format=3)
    copy.attrs.update(source.attrs.asdict())
    for name, member in source.groups():
        target = copy.create_group(name, attributes=member.attrs.asdict())
        for array_name, array in member.arrays():
            daily = array.ndim == 3
            new = target.create_array(
                array_name,
                shape=array.shape,
                dtype=array.dtype,
                chunks=(3, 2, 111) if daily else array.shape,
                shards=(3, 2, 333) if daily else None,
                compressors=[ZstdCodec(level=9)] if daily else [BloscCodec(cname="zlib")],
                fill_value=array.fill_value,
                dimension_names=array.metadata.dimension_names,
                attributes=array.attrs.asdict(),
            )
            new[...] = array[...]
    time = source["time"]
    copy.create_array("time", shape=time.shape, dtype=time.dtype, chunks=(17,), fill_value=time.fill_value,
                      dimension_names=("time",), attributes=time.attrs.asdict())[...] = time[...]  # fmt: skip
    assert compute_fingerprint(copy) == fingerprint
    assert copy["grid/tmax"].chunks != source["grid/tmax"].chunks


def test_the_canonical_tiling_is_fixed_and_cuts_along_time(tmp_path: Path) -> None:
    assert CANONICAL_TILE == {"y": 32, "x": 32, "time": 3653}  # changing it changes every fingerprint
    ds = make_dataset(ny=2, nx=2, years=(2000, 2010), layers=(), seed=1)  # 4018 days: two time tiles
    first = write_store(ds, tmp_path / "a.zarr")
    changed = ds.copy(deep=True)
    changed["prcp"][4000, 0, 0] = changed["prcp"][4000, 0, 0] + 0.1  # in the second time tile
    assert write_store(changed, tmp_path / "b.zarr") != first


def test_the_fingerprint_covers_values_metadata_grids_and_layers(tmp_path: Path, small) -> None:
    base = write_store(small, tmp_path / "base.zarr")
    assert (
        write_store(small, tmp_path / "again.zarr") == base
    )  # same data, same fingerprint, wherever it lies
    changed = small.copy(deep=True)
    changed["tmin"][3, 4, 4] = changed["tmin"][3, 4, 4] + 0.1  # one value, one storage step
    relabelled = small.copy(deep=True)
    relabelled["population"].attrs["units"] = "persons"  # metadata that changes what values mean
    moved = small.assign_coords(x=small.x + 0.5)  # the grid
    fingerprints = {
        write_store(changed, tmp_path / "changed.zarr"),
        write_store(relabelled, tmp_path / "relabelled.zarr"),
        write_store(moved, tmp_path / "moved.zarr"),
        write_store(small, tmp_path / "renamed.zarr", grid="fine"),  # the grid's name names columns
        write_store(small.drop_vars("population"), tmp_path / "nolayer.zarr"),
    }
    assert len(fingerprints) == 5 and base not in fingerprints
    layered = write_layer(tmp_path / "base.zarr", "cropland", {"grid": np.full((7, 5), 0.5)})
    assert layered != base and verify_store(tmp_path / "base.zarr").ok
    # a second grid counts as well, and adding it leaves the first grid's arrays as they were
    coarse = make_dataset(
        ny=2, nx=2, years=(2000, 2003), variables=("prcp",), layers=(), cell_size=2.0, seed=8
    )
    only_temperature = small.drop_vars("prcp")
    write_store(only_temperature, tmp_path / "two.zarr")
    two = add_variables(coarse, tmp_path / "two.zarr", grid="coarse")
    assert (
        two != write_store(only_temperature, tmp_path / "one.zarr") and verify_store(tmp_path / "two.zarr").ok
    )


def test_the_fingerprint_covers_every_grid_its_values_its_layers_and_their_kind(tmp_path: Path) -> None:
    """Each grid of a two-grid store counts alike: one value on the second grid, a layer on it, the layer's
    kind (a count and a share of the same numbers mean different weights), and the calendar."""
    fine = make_dataset(ny=4, nx=4, years=(2000, 2001), variables=("prcp",), layers=(), seed=3)
    coarse = make_dataset(ny=2, nx=2, years=(2000, 2001), variables=("tmax", "tmin"), layers=(), cell_size=1.0,
                          seed=4)  # fmt: skip
    base = write_store({"fine": fine, "coarse": coarse}, tmp_path / "base.zarr")
    assert write_store({"fine": fine, "coarse": coarse}, tmp_path / "again.zarr") == base
    nudged = coarse.copy(deep=True)
    nudged["tmax"][100, 1, 1] = nudged["tmax"][100, 1, 1] + 0.1
    swapped = {"fine": fine, "coarse": coarse.rename({"tmax": "tmin", "tmin": "tmax"})}
    noleap = make_dataset(
        ny=4, nx=4, years=(2000, 2001), variables=("prcp",), layers=(), seed=3, calendar="noleap"
    )
    others = {
        write_store({"fine": fine, "coarse": nudged}, tmp_path / "nudged.zarr"),
        write_store(swapped, tmp_path / "swapped.zarr"),
        write_store({"fine": noleap, "coarse": coarse.convert_calendar("noleap")}, tmp_path / "noleap.zarr"),
    }
    assert len(others) == 3 and base not in others
    for name in ("count", "share"):
        shutil.copytree(tmp_path / "base.zarr", tmp_path / f"{name}.zarr")
    people = {"coarse": np.full((2, 2), 3.0)}
    as_count = write_layer(tmp_path / "count.zarr", "people", people, attrs={"wxshock_layer_kind": "count"})
    as_share = write_layer(tmp_path / "share.zarr", "people", people, attrs={"wxshock_layer_kind": "share"})
    assert len({base, as_count, as_share}) == 3
    assert verify_store(tmp_path / "count.zarr").ok and verify_store(tmp_path / "share.zarr").ok


def test_the_layout1_store_reads_verifies_and_migrates_recording_its_old_fingerprint(tmp_path: Path) -> None:
    path = tmp_path / "old.zarr"
    shutil.copytree(DATA / "store_layout1.zarr", path)
    old = open_store(path)
    assert old.layout_version == 1 and old.fingerprint == LAYOUT1_FINGERPRINT and verify_store(path).ok
    assert list(old.grids) == ["grid"] and old.describe()["layout_version"] == 1
    values = {v: old.read(v, slice(None), slice(None), slice(None)) for v in old.variables}
    layers = {name: old.read_layer(name) for name in ("elevation", "population")}
    mask = old.data_mask()
    new_fingerprint = migrate_store(path)
    store = open_store(path)
    assert store.layout_version == 2 and store.fingerprint == new_fingerprint != LAYOUT1_FINGERPRINT
    assert store.migrated_from == {"layout_version": 1, "fingerprint": LAYOUT1_FINGERPRINT}
    assert store.describe()["migrated_from"]["fingerprint"] == LAYOUT1_FINGERPRINT
    assert verify_store(path).ok and migrate_store(path) is None  # already layout 2: nothing to do
    for v, want in values.items():
        np.testing.assert_array_equal(store.read(v, slice(None), slice(None), slice(None)), want)
    for name, want in layers.items():
        np.testing.assert_array_equal(store.read_layer(name), want)
    np.testing.assert_array_equal(store.data_mask(), mask)
    assert store.calendar == "noleap" and store.dates.year[-1] == 2001
    # the migrated store is the store layout 2 writes from the same values: same fingerprint
    rewritten = write_store(store.to_xarray().load(), tmp_path / "fresh.zarr")
    assert rewritten == new_fingerprint


def test_a_damaged_layout1_store_is_not_migrated(tmp_path: Path) -> None:
    path = tmp_path / "old.zarr"
    shutil.copytree(DATA / "store_layout1.zarr", path)
    group = zarr.open_group(path, mode="r+")
    group["tmax"][1, 1, 1] = group["tmax"][1, 1, 1] + 1
    assert fingerprint_v1(zarr.open_group(path, mode="r")) != LAYOUT1_FINGERPRINT
    with pytest.raises(FingerprintMismatchError, match="no longer matches its recorded fingerprint"):
        migrate_store(path)
    assert open_store(path).layout_version == 1 and sorted(p.name for p in tmp_path.iterdir()) == ["old.zarr"]


def test_writing_to_a_layout1_store_migrates_it_first(tmp_path: Path) -> None:
    path = tmp_path / "old.zarr"
    shutil.copytree(DATA / "store_layout1.zarr", path)
    old = open_store(path)
    more = make_dataset(ny=4, nx=3, years=(2002, 2002), calendar="noleap", projected=True, layers=(), seed=12)
    update_store(more, path)
    store = open_store(path)
    assert store.layout_version == 2 and store.migrated_from["fingerprint"] == LAYOUT1_FINGERPRINT
    assert store.n_times == old.n_times + 365 and verify_store(path).ok
