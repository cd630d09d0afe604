"""Reading whole chunks of a daily variable by decoding their bytes with the codec directly.

zarr's general read path (selection, codec pipeline on an event loop, copy into the output) costs several times
the decoding itself for the chunk-sized reads the aggregation makes (bench/SCALE.md, "Where the time goes"). For
the layouts wxshock writes (``bytes`` then ``blosc``, optionally inside a ``sharding_indexed`` shard whose index is
``bytes`` then ``crc32c``, at the end) a :class:`ChunkReader` fetches the chunk's bytes through the zarr store (a
plain file read for a local store, a ranged GET for an object store) and decompresses them with numcodecs into
the array the caller gets. Any other codec chain is read through zarr as before (``ChunkReader.for_array``
returns None), so stores written by other tools still read, only without the short cut.

The values are those zarr gives, bit for bit (a test compares both paths on every layout the store writes).
"""

from __future__ import annotations

import itertools
import os
import struct
import threading
from collections import OrderedDict
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from numcodecs import Blosc
from zarr.codecs import BloscCodec, BytesCodec, Crc32cCodec, ShardingCodec

# An inner chunk missing from its shard: offset and length both 2**64 - 1 (zarr's sharding specification).
_EMPTY = 2**64 - 1
# Bytes of the crc32c checksum after a shard's index.
_CRC_BYTES = 4
_TOKENS = itertools.count()
# Each thread's scratch memory for reads whose chunk is used at once and dropped (ChunkReader.chunk, scratch=True):
# the compressed bytes and the decoded chunk, reused read after read. Fresh memory for every chunk cost the
# 5,000-village batch about 1.3 CPU-s of page faults and allocation (bench/RESULTS.md, "Scale").
_SCRATCH = threading.local()


def scratch_array(shape: tuple[int, ...], dtype: np.dtype) -> np.ndarray:
    """This thread's scratch array of ``shape`` and ``dtype`` (uninitialised; the same array at every call)."""
    arrays = _SCRATCH.__dict__.setdefault("arrays", {})
    key = (tuple(shape), np.dtype(dtype))
    if key not in arrays:
        arrays[key] = np.empty(shape, dtype=dtype)
    return arrays[key]


class TileCache:
    """Decoded chunks kept in memory, least recently used first out, up to ``max_bytes``; thread-safe.

    Chunks in the cache are read-only arrays: a reader gets views of them and must copy before writing.
    """

    def __init__(self, max_bytes: int) -> None:
        self.max_bytes = int(max_bytes)
        self._items: OrderedDict[Any, np.ndarray] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    def get(self, key: Any) -> np.ndarray | None:
        """The chunk under ``key``, or None."""
        if not self.max_bytes:
            return None
        with self._lock:
            value = self._items.get(key)
            if value is None:
                self.misses += 1
                return None
            self._items.move_to_end(key)
            self.hits += 1
            return value

    def put(self, key: Any, value: np.ndarray) -> None:
        """Keep a decoded chunk (made read-only), dropping the least recently used ones beyond the budget."""
        if value.nbytes > self.max_bytes:
            return
        value.flags.writeable = False  # readers get views: none may write into a chunk others read
        with self._lock:
            old = self._items.pop(key, None)
            if old is not None:
                self._bytes -= old.nbytes
            self._items[key] = value
            self._bytes += value.nbytes
            while self._bytes > self.max_bytes and self._items:
                _, dropped = self._items.popitem(last=False)
                self._bytes -= dropped.nbytes

    @property
    def nbytes(self) -> int:
        """Bytes of decoded chunks held."""
        return self._bytes

    def clear(self) -> None:
        """Drop every chunk."""
        with self._lock:
            self._items.clear()
            self._bytes = 0


_SHARED = TileCache(0)


def tile_cache() -> TileCache:
    """The process's cache of decoded chunks, shared by every store opened here (empty budget: off)."""
    return _SHARED


def configure_tile_cache(max_bytes: int) -> None:
    """Set the shared cache's budget (bytes; 0 turns it off and empties it)."""
    _SHARED.max_bytes = max(0, int(max_bytes))
    if not _SHARED.max_bytes:
        _SHARED.clear()


class ChunkReader:
    """Whole-chunk reads of one zarr v3 array of integers whose chunks are ``bytes`` + ``blosc``, possibly sharded.

    ``read(y, x, t)`` gives the (ny, nx, nt) window; a window inside one chunk is a view of the decoded chunk (no
    copy). Missing chunks (never written, all fill) read as the fill value.
    """

    def __init__(
        self,
        array: zarr.Array,
        *,
        inner_shape: tuple[int, ...],
        shard_shape: tuple[int, ...] | None,
        cache: TileCache | None = None,
    ) -> None:
        self.shape = tuple(int(n) for n in array.shape)
        self.dtype = np.dtype(array.dtype)
        self.fill_value = array.metadata.fill_value
        self.inner_shape = inner_shape
        self.shard_shape = shard_shape
        self.cache = cache
        self._metadata = array.metadata
        self._store = array.store
        self._path = array.path
        root = getattr(array.store, "root", None)
        self._root = Path(root) / array.path if root is not None and _is_local(array.store) else None
        self._codec = Blosc()
        self._token = next(_TOKENS)  # this reader's chunks in a shared cache
        self._chunk_bytes = int(np.prod(inner_shape)) * self.dtype.itemsize
        if shard_shape is not None:
            self._per_shard = tuple(s // c for s, c in zip(shard_shape, inner_shape, strict=True))
            self._n_inner = int(np.prod(self._per_shard))
            self._index_bytes = self._n_inner * 16 + _CRC_BYTES
            self._indexes: dict[tuple[int, ...], np.ndarray | None] = {}
            self._index_lock = threading.Lock()

    @classmethod
    def for_array(cls, array: zarr.Array, cache: TileCache | None = None) -> ChunkReader | None:
        """A reader for ``array`` when its codecs allow the short cut, else None (read it through zarr)."""
        metadata = array.metadata
        if getattr(metadata, "zarr_format", None) != 3 or np.dtype(array.dtype).kind not in "iu":
            return None
        codecs = tuple(metadata.codecs)
        if len(codecs) == 1 and isinstance(codecs[0], ShardingCodec):
            sharding = codecs[0]
            index = tuple(sharding.index_codecs)
            if (
                str(getattr(sharding.index_location, "value", sharding.index_location)) != "end"
                or len(index) != 2
                or not _little_bytes(index[0])
                or not isinstance(index[1], Crc32cCodec)
                or not _blosc_chain(tuple(sharding.codecs), array)
            ):
                return None
            inner = tuple(int(n) for n in sharding.chunk_shape)
            shard = tuple(int(n) for n in metadata.chunk_grid.chunk_shape)
            if any(s % c for s, c in zip(shard, inner, strict=True)):
                return None
            return cls(array, inner_shape=inner, shard_shape=shard, cache=cache)
        if not _blosc_chain(codecs, array):
            return None
        inner = tuple(int(n) for n in metadata.chunk_grid.chunk_shape)
        return cls(array, inner_shape=inner, shard_shape=None, cache=cache)

    # -- bytes ----------------------------------------------------------------------------------------------------

    def _get(
        self,
        key: str,
        start: int | None = None,
        length: int | None = None,
        suffix: int | None = None,
        scratch: bool = False,
    ) -> bytes | memoryview | None:
        """Bytes of a stored object (all, a range, or the last ``suffix`` bytes); None when it does not exist.

        ``scratch``: a local file's bytes are read into this thread's scratch buffer, valid until its next
        scratch read (a view of it is returned)."""
        if self._root is not None and scratch and suffix is None:
            return self._read_into_scratch(key, start, length)
        if self._root is not None:
            try:
                with open(self._root / key, "rb") as f:
                    if suffix is not None:
                        f.seek(0, 2)
                        size = f.tell()
                        f.seek(max(0, size - suffix))
                        return f.read()
                    if start is not None:
                        f.seek(start)
                        return f.read(length)
                    return f.read()
            except FileNotFoundError:
                return None
        from zarr.abc.store import RangeByteRequest, SuffixByteRequest
        from zarr.core.buffer import default_buffer_prototype
        from zarr.core.sync import sync

        byte_range: Any = None
        if suffix is not None:
            byte_range = SuffixByteRequest(suffix)
        elif start is not None:
            byte_range = RangeByteRequest(start, start + (length or 0))
        key = f"{self._path}/{key}" if self._path else key
        buffer = sync(self._store.get(key, prototype=default_buffer_prototype(), byte_range=byte_range))
        return None if buffer is None else buffer.to_bytes()

    def _read_into_scratch(self, key: str, start: int | None, length: int | None) -> memoryview | None:
        """A local file's bytes (all, or ``length`` from ``start``) in this thread's scratch buffer; None if absent."""
        try:
            with open(self._root / key, "rb", buffering=0) as f:  # type: ignore[operator]
                if start is not None:
                    f.seek(start)
                    size = int(length or 0)
                else:
                    size = os.fstat(f.fileno()).st_size
                buffer = getattr(_SCRATCH, "compressed", None)
                if buffer is None or len(buffer) < size:
                    buffer = _SCRATCH.compressed = bytearray(size)
                view = memoryview(buffer)[:size]
                got = f.readinto(view)
                return view[:got]
        except FileNotFoundError:
            return None

    def _decode(self, data: bytes | memoryview | None, scratch: bool = False) -> np.ndarray:
        """One inner chunk's values (its full shape, C order) from its compressed bytes; fill when absent.

        ``scratch``: decoded into this thread's scratch chunk of that shape, valid until its next scratch read."""
        if data is None:
            return np.full(self.inner_shape, self.fill_value, dtype=self.dtype)
        out = (
            scratch_array(self.inner_shape, self.dtype) if scratch else np.empty(self.inner_shape, self.dtype)
        )
        self._codec.decode(data, out=out)
        return out

    def _shard_index(self, shard: tuple[int, ...]) -> np.ndarray | None:
        """(inner chunks, 2) offsets and lengths of one shard, or None when the shard does not exist."""
        with self._index_lock:
            if shard in self._indexes:
                return self._indexes[shard]
        data = self._get(self._metadata.encode_chunk_key(shard), suffix=self._index_bytes)
        index = None
        if data is not None:
            if len(data) != self._index_bytes:
                raise ValueError(f"shard {shard} of {self._path!r} has a truncated index")
            index = np.frombuffer(data[: self._n_inner * 16], dtype="<u8").reshape(self._n_inner, 2)
        with self._index_lock:
            self._indexes[shard] = index
        return index

    def chunk(self, coords: tuple[int, ...], cached: bool = True, scratch: bool = False) -> np.ndarray:
        """The decoded inner chunk at inner-chunk grid ``coords`` (full chunk shape, padded at the array's edge).

        ``cached`` False reads around the cache (neither taken from it nor kept in it). ``scratch`` True lets a
        chunk that does not go into the cache be decoded into this thread's scratch memory: the array is then
        valid only until this thread's next scratch read (for a caller that uses the chunk at once).
        """
        cache = self.cache if cached and self.cache is not None and self.cache.max_bytes else None
        scratch = scratch and cache is None
        if cache is not None:
            hit = cache.get((self._token, coords))
            if hit is not None:
                return hit
        if self.shard_shape is None:
            data = self._get(self._metadata.encode_chunk_key(coords), scratch=scratch)
        else:
            shard = tuple(c // p for c, p in zip(coords, self._per_shard, strict=True))
            index = self._shard_index(shard)
            data = None
            if index is not None:
                local = tuple(c % p for c, p in zip(coords, self._per_shard, strict=True))
                offset, length = (int(v) for v in index[np.ravel_multi_index(local, self._per_shard)])
                if offset != _EMPTY:
                    data = self._get(
                        self._metadata.encode_chunk_key(shard), start=offset, length=length, scratch=scratch
                    )
        values = self._decode(data, scratch)
        if cache is not None:
            cache.put((self._token, coords), values)
        return values

    # -- windows --------------------------------------------------------------------------------------------------

    def read(self, *window: slice, cached: bool = True, scratch: bool = False) -> np.ndarray:
        """The values of a window of index slices (step 1), one per dimension, in stored integers; ``cached``
        False reads around the decoded-tile cache; ``scratch`` True may give a view of this thread's scratch
        memory, valid until its next scratch read (see :meth:`chunk`)."""
        bounds = [s.indices(n)[:2] for s, n in zip(window, self.shape, strict=True)]
        if any(s.step not in (None, 1) for s in window):
            raise ValueError("ChunkReader reads windows of step 1")
        first = [start // c for (start, _), c in zip(bounds, self.inner_shape, strict=True)]
        last = [max(start, stop - 1) // c for (start, stop), c in zip(bounds, self.inner_shape, strict=True)]
        out_shape = tuple(max(0, stop - start) for start, stop in bounds)
        if first == last and all(out_shape):
            chunk = self.chunk(tuple(first), cached, scratch)
            return chunk[
                tuple(
                    slice(start - f * c, stop - f * c)
                    for (start, stop), f, c in zip(bounds, first, self.inner_shape, strict=True)
                )
            ]
        out = np.empty(out_shape, dtype=self.dtype)
        if not all(out_shape):
            return out
        for coords in np.ndindex(*(b - a + 1 for a, b in zip(first, last, strict=True))):
            chunk_coords = tuple(a + k for a, k in zip(first, coords, strict=True))
            source, target = [], []
            for (start, stop), k, c in zip(bounds, chunk_coords, self.inner_shape, strict=True):
                lo, hi = max(start, k * c), min(stop, (k + 1) * c)
                source.append(slice(lo - k * c, hi - k * c))
                target.append(slice(lo - start, hi - start))
            out[tuple(target)] = self.chunk(chunk_coords, cached, scratch)[tuple(source)]
        return out


def _is_local(store: Any) -> bool:
    """True for zarr's LocalStore (a directory on this machine)."""
    from zarr.storage import LocalStore

    return isinstance(store, LocalStore)


def _little_bytes(codec: Any) -> bool:
    """True for a ``bytes`` codec that leaves little-endian values (or none, for one-byte values)."""
    if not isinstance(codec, BytesCodec):
        return False
    endian = getattr(codec.endian, "value", codec.endian)
    return endian in (None, "little")


def _blosc_chain(codecs: tuple[Any, ...], array: zarr.Array) -> bool:
    """True for exactly ``bytes`` (little-endian) then ``blosc``, on a little-endian machine."""
    return (
        len(codecs) == 2
        and _little_bytes(codecs[0])
        and isinstance(codecs[1], BloscCodec)
        and struct.pack("=H", 1) == b"\x01\x00"
        and np.dtype(array.dtype).byteorder in ("=", "<", "|")
    )
