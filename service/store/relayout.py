"""Rewriting a store's daily variables in another chunking: the migration path of existing stores to the
sharded layout new stores get (bench/RESULTS.md, "Store layouts for on-demand reads").

The values are read through the store and written anew with the layout asked for, aside, then swapped into
place through the recoverable swap (service.store.swap): a crash leaves the old store or the new one. The
fingerprint is taken over decoded values in a fixed tiling, independent of chunks, shards and codecs
(CONTRACTS.md), so the rewritten store must have the old fingerprint: a difference means the values changed, and
the new store is discarded before the swap. A layout-1 store is migrated to layout 2 first (its layout-1
fingerprint depends on its chunking; the migration records it beside the new one).
"""

from __future__ import annotations

from pathlib import Path

from service.errors import FingerprintMismatchError
from service.store.layout import DEFAULT_LAYOUT, DIGESTS_ATTR, MIGRATED_ATTR, Layout, layout_of_array
from service.store.location import _normalise_location
from service.store.swap import writing


def store_layout(location: str | Path, storage_options: dict | None = None) -> Layout:
    """The layout of a store's first daily variable (chunking and sharding)."""
    from service.store.read import open_store

    store = open_store(location, storage_options=storage_options)
    return layout_of_array(store._var_arrays[store.variables[0]])


def relayout_store(
    location: str | Path,
    layout: Layout = DEFAULT_LAYOUT,
    *,
    storage_options: dict | None = None,
    progress: bool = False,
) -> tuple[str, bool]:
    """Rewrite every daily variable of a store with ``layout`` in place (recoverably); returns (fingerprint,
    rewritten). A store already in that layout is left alone (rewritten False)."""
    from service.store.write import _existing_grid_plan, _open_for_update, _root_attrs, _write_new

    target = _normalise_location(location)
    with writing(target, storage_options):
        store = _open_for_update(target, storage_options, progress)
        if all(_same_chunking(store._var_arrays[v], layout) for v in store.variables):
            return store.fingerprint, False
        before = store.fingerprint
        plans = [_existing_grid_plan(store, grid) for grid in store.grids]
        root = _root_attrs(store._group.attrs.asdict(), plans)
        root.pop(MIGRATED_ATTR, None)
        root.pop(DIGESTS_ATTR, None)
        extra = {MIGRATED_ATTR: store.migrated_from} if store.migrated_from else None

        def same_values(fingerprint: str) -> None:
            if fingerprint != before:
                raise FingerprintMismatchError(
                    f"store {store.name!r}: rewritten with {layout.describe()} it gives fingerprint "
                    f"{fingerprint!r}, not its own {before!r}, so the values would change; the store was left "
                    "as it was: run 'wxshock verify' on it and report the difference"
                )

        fingerprint = _write_new(
            target, storage_options, plans, root, layout, progress, "relayout", extra_root=extra,
            before_swap=same_values,
        )  # fmt: skip
    return fingerprint, True


def _same_chunking(array: object, layout: Layout) -> bool:
    """True when a daily array already has the layout's chunks and shards."""
    shape = tuple(int(n) for n in array.shape)  # type: ignore[attr-defined]
    chunks = tuple(int(c) for c in array.chunks)  # type: ignore[attr-defined]
    shards = array.shards  # type: ignore[attr-defined]
    want = layout.chunks(*shape)
    want_shards = layout.shards(*shape)
    return chunks == want and (tuple(int(s) for s in shards) if shards else None) == want_shards
