"""service.registry: datasets named after their store's directory stem, opened once, addressed by name only."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from service.errors import StoreError, UnknownDatasetError
from service.registry import StoreRegistry, dataset_name
from service.settings import Settings


@pytest.mark.parametrize(
    ("location", "name"),
    [
        ("/data/region.zarr", "region"),
        ("/data/region.zarr/", "region"),
        ("relative/uplands", "uplands"),
        ("s3://bucket/stores/coast.zarr", "coast"),
        ("C:\\data\\valley.zarr", "valley"),
    ],
)
def test_a_dataset_is_named_after_its_directory_stem(location: str, name: str) -> None:
    assert dataset_name(location) == name


def test_stores_open_in_order_and_the_first_is_the_default(tiny_demo: Path, tmp_path: Path) -> None:
    other = tmp_path / "second.zarr"
    shutil.copytree(tiny_demo, other)
    registry = StoreRegistry.open(Settings(stores=[str(tiny_demo), str(other)], data_dir=tmp_path))
    assert list(registry) == ["demo", "second"]
    assert registry.get_dataset(None).name == "demo"
    assert registry.get_dataset("second").name == "second"
    with pytest.raises(
        UnknownDatasetError, match=r"unknown dataset 'third'; this server serves: 'demo', 'second'"
    ):
        registry.get_dataset("third")
    described = registry.describe("second")
    assert described["name"] == "second" and "location" not in described
    assert str(tmp_path) not in repr(described)


def test_two_stores_with_the_same_stem_are_refused(tiny_demo: Path, tmp_path: Path) -> None:
    twin = tmp_path / "elsewhere" / "demo.zarr"
    shutil.copytree(tiny_demo, twin)
    with pytest.raises(StoreError, match=r"dataset name\(s\) \['demo'\] more than once"):
        StoreRegistry.open(Settings(stores=[str(tiny_demo), str(twin)], data_dir=tmp_path))


def test_a_missing_store_fails_at_start(tmp_path: Path) -> None:
    with pytest.raises(StoreError, match="does not exist"):
        StoreRegistry.open(Settings(stores=[str(tmp_path / "nowhere.zarr")], data_dir=tmp_path))


def test_without_stores_the_demo_in_the_data_directory_is_served(tiny_demo: Path, tmp_path: Path) -> None:
    # A demo already built in the data directory is served as is (the build on first start is exercised by
    # tests/test_jobs.py, which starts `wxshock serve` on an empty data directory).
    shutil.copytree(tiny_demo, tmp_path / "demo.zarr")
    shutil.copy(tiny_demo.parent / "communities.geojson", tmp_path / "communities.geojson")
    registry = StoreRegistry.open(Settings(data_dir=tmp_path, demo_size="tiny"))
    assert list(registry) == ["demo"]
    assert (
        registry.get_dataset(None).fingerprint
        == StoreRegistry.open(Settings(stores=[str(tiny_demo)], data_dir=tmp_path))
        .get_dataset(None)
        .fingerprint
    )
