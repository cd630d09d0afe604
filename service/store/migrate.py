"""Migrating a layout-1 store (one grid, every array at the root) to layout 2 (one group per grid).

The layout-1 store is first verified against its recorded fingerprint (a damaged store is not migrated: its
damage would be sealed under a new fingerprint). The layout-2 store is then built aside: locally its chunks are
hard links to the old ones (nothing is copied; zarr replaces files, it never changes them in place), on an object
store it is rewritten. Each daily variable records the days it covers (the whole axis), the fingerprint is taken
the layout-2 way, the old one is kept beside it in ``wxshock_migrated_from``, and the new store is swapped into
place through the recoverable swap (service.store.swap).
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import zarr

from service.errors import FingerprintMismatchError, StoreFormatError
from service.store.fingerprint import fingerprint_v1
from service.store.layout import (
    DAYS_ATTR,
    DEFAULT_GRID,
    FINGERPRINT_ATTR,
    GRIDS_ATTR,
    LAYOUT_VERSION,
    MIGRATED_ATTR,
    VARIABLES,
    VERSION_ATTR,
    Layout,
    read_layout,
)
from service.store.location import _is_url, _normalise_location, _open_group, _zarr_store
from service.store.swap import _step, write_aside, writing


def migrate_store(
    location: str | Path, storage_options: dict | None = None, progress: bool = False
) -> str | None:
    """Migrate a layout-1 store to layout 2 in place; returns the new fingerprint (None when the store already
    has layout 2)."""
    target = _normalise_location(location)
    with writing(target, storage_options):
        return _migrate_locked(target, storage_options, progress)


def _migrate_locked(target: str, storage_options: dict | None, progress: bool) -> str | None:
    """The migration, with the store's write lock held."""
    from service.store.layout import DIGESTS_ATTR
    from service.store.read import Store
    from service.store.write import _existing_grid_plan, _finish, _write_new

    old = _open_group(target, storage_options, mode="r")
    layout = read_layout(old, target)
    if layout.version != 1:
        return None
    recorded = old.attrs.get(FINGERPRINT_ATTR)
    computed = fingerprint_v1(old, progress=progress)
    if recorded != computed:
        raise FingerprintMismatchError(
            f"store {target!r} no longer matches its recorded fingerprint ({recorded!r}; its contents give "
            f"{computed!r}), so it is not migrated; rebuild it from its source files with 'wxshock ingest'"
        )
    root_attrs = {
        k: v for k, v in old.attrs.asdict().items() if k not in (FINGERPRINT_ATTR, VERSION_ATTR, DIGESTS_ATTR)
    }
    record = {"layout_version": 1, "fingerprint": str(recorded)}
    if _is_url(target):
        store = Store(target, storage_options=storage_options)
        plan = _existing_grid_plan(store, DEFAULT_GRID)
        layout_of = _v1_layout(old)
        return _write_new(
            target, storage_options, [plan], root_attrs, layout_of, progress, "migrating",
            extra_root={MIGRATED_ATTR: record},
        )  # fmt: skip
    with write_aside(target, storage_options, "migrating") as aside:
        Path(aside).mkdir(parents=True)
        group = zarr.open_group(_zarr_store(aside, None, read_only=False), mode="w", zarr_format=3)
        group.attrs.update(
            {**root_attrs, VERSION_ATTR: LAYOUT_VERSION, GRIDS_ATTR: [DEFAULT_GRID], MIGRATED_ATTR: record}
        )
        group.create_group(DEFAULT_GRID)
        for name in old.array_keys():
            where = Path(aside) / (name if name == "time" else f"{DEFAULT_GRID}/{name}")
            shutil.copytree(Path(target) / name, where, copy_function=os.link)
        _step("migration-linked")
        new = zarr.open_group(_zarr_store(aside, None, read_only=False), mode="r+", zarr_format=3,
                              use_consolidated=False)  # fmt: skip
        numbers = new["time"][:]
        first, last = (int(numbers[0]), int(numbers[-1])) if numbers.size else (0, -1)
        for v in layout.variables:
            array = new[f"{DEFAULT_GRID}/{v}"]
            array.attrs[DAYS_ATTR] = [first, last]
        fingerprint = _finish(aside, None, progress, touched=None)
    return fingerprint


def _v1_layout(group: zarr.Group) -> Layout:
    """The chunking of a layout-1 store's daily variables, kept when it is rewritten."""
    from service.store.write import _array_layout

    for v in VARIABLES:
        if v in group.array_keys():
            return _array_layout(group[v])
    raise StoreFormatError("the layout-1 store has no daily variable")
