"""The datasets a server offers: every configured store opened once, addressed by name only."""

from __future__ import annotations

import logging
import threading
from collections.abc import Iterator, Mapping
from pathlib import PurePosixPath
from typing import TYPE_CHECKING, Any

from service.errors import StoreError, UnknownDatasetError

if TYPE_CHECKING:
    from service.settings import Settings
    from service.store import Store

log = logging.getLogger("wxshock.registry")


def dataset_name(location: str) -> str:
    """The dataset name of a store location: its directory stem ('/data/region.zarr' -> 'region')."""
    # s3://bucket/path/x.zarr and local paths alike: the last path component without its suffix.
    tail = str(location).rstrip("/").replace("\\", "/").rsplit("://", 1)[-1]
    return PurePosixPath(tail).stem or PurePosixPath(tail).name


class StoreRegistry(Mapping[str, "Store"]):
    """Opened stores by dataset name, in the order configured (the first is the default dataset)."""

    def __init__(self, stores: Mapping[str, Store]) -> None:
        self._stores = dict(stores)
        self._descriptions: dict[str, dict[str, Any]] = {}
        self._lock = threading.Lock()

    @classmethod
    def open(cls, settings: Settings) -> StoreRegistry:
        """Open every store of ``settings.stores`` (or the demo, built on first start when none is given)."""
        from service.store import open_store

        locations = list(settings.stores)
        if not locations:
            from service.demo import ensure_demo

            locations = [str(ensure_demo(settings.data_dir, settings.demo_size))]
            names = ["demo"]
        else:
            names = [dataset_name(loc) for loc in locations]
        duplicates = sorted({n for n in names if names.count(n) > 1})
        if duplicates:
            raise StoreError(
                f"stores {locations!r} give the dataset name(s) {duplicates!r} more than once; datasets are named "
                "after their directory stem, so rename one of the directories"
            )
        stores: dict[str, Store] = {}
        for name, location in zip(names, locations, strict=True):
            options = settings.storage_options() if location.startswith("s3://") else None
            stores[name] = open_store(location, name=name, storage_options=options)
            log.info("serving dataset %r", name)
        return cls(stores)

    def __getitem__(self, name: str) -> Store:
        return self._stores[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._stores)

    def __len__(self) -> int:
        return len(self._stores)

    def get_dataset(self, name: str | None) -> Store:
        """The store of dataset ``name``; None names the first (default) dataset."""
        if name is None:
            if not self._stores:
                raise UnknownDatasetError("this server serves no dataset", field="dataset")
            return next(iter(self._stores.values()))
        try:
            return self._stores[name]
        except KeyError:
            raise UnknownDatasetError(
                f"unknown dataset {name!r}; this server serves: {', '.join(map(repr, self._stores)) or 'none'}",
                field="dataset",
                pointer="/dataset",
            ) from None

    def describe(self, name: str) -> dict[str, Any]:
        """What dataset ``name`` holds (the store's own description plus its name), computed once."""
        store = self.get_dataset(name)
        with self._lock:
            if name not in self._descriptions:
                # The location is the server's own business (a path, a bucket): datasets go by name only.
                described = {k: v for k, v in store.describe().items() if k != "location"}
                self._descriptions[name] = {**described, "name": name}
            return self._descriptions[name]
