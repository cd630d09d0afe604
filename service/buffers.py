"""Large float64 arrays reused from one feature batch to the next instead of fresh memory each time.

A batch's daily means are about 140 MB per variable (1,000 features x 48 years). Fresh memory of that size comes
from the kernel page by page as it is first written: a page fault, the kernel zeroing the page and, with
transparent huge pages, compacting memory to find one. On the 5,000-village batch of the large demo that kernel
time was 2.8 of the 3.3 CPU-s spent finishing the series (bench/RESULTS.md, "Scale"); writing into memory already
mapped costs only the arithmetic.

The pool lends an array only when nothing but the pool refers to it any more. numpy views and pandas blocks keep a
reference to the array they were made from, so an array some table, frame or view still reads is never lent
again: no caller has to say when it is done with one, and none can get it wrong. A spare no one has taken for a
few seconds is freed by a sweeper thread, so that a server or a dask worker does not hold the memory of its last
batch between runs.
"""

from __future__ import annotations

import sys
import threading
import time

import numpy as np

# Smaller arrays are left to malloc, which reuses freed heap memory below glibc's largest mmap threshold (32 MB).
MIN_POOLED_BYTES = 32 << 20
# Bytes of arrays the pool keeps track of, lent or spare: two batches in flight of 4 variables (tmax, tmin, prcp,
# tmean) at the 448 MB cap of a batch's daily means (service.pipeline.core.BATCH_SERIES_BYTES) plus one being made.
DEFAULT_MAX_BYTES = 2560 << 20
# A spare is lent for a request at least this share of its size, so that a small array does not pin a large one.
MIN_FILL = 0.5
# sys.getrefcount of an array held by the pool's list alone: the list's reference and the call's argument.
_FREE_REFS = 2
# Seconds between sweeps; a spare seen on two sweeps in a row (idle 2 to 4 s) is freed. The next batch of a run
# takes its arrays well within that (a 1,000-feature batch of the large demo takes about 2 s).
SWEEP_SECONDS = 2.0


class ArrayPool:
    """float64 arrays lent out and taken back when no one refers to them; thread-safe, bounded in bytes."""

    def __init__(self, max_bytes: int = DEFAULT_MAX_BYTES) -> None:
        self.max_bytes = int(max_bytes)
        self._arrays: list[np.ndarray] = []
        self._lock = threading.Lock()
        self._idle: set[int] = set()  # ids of the arrays found spare by the last sweep
        self._sweeper: threading.Thread | None = None
        self.reused = 0
        self.fresh = 0

    def empty(self, shape: tuple[int, ...]) -> np.ndarray:
        """An uninitialised C-contiguous float64 array of ``shape``: a spare one when there is one, else fresh."""
        size = int(np.prod(shape))
        if size * 8 < MIN_POOLED_BYTES:
            return np.empty(shape)
        with self._lock:
            best = self._best_spare(size)
            if best is not None:
                self.reused += 1
                self._idle.discard(id(self._arrays[best]))
                return self._arrays[best][:size].reshape(shape)
            self._make_room(size * 8)
            array = np.empty(size)
            self.fresh += 1
            if self.nbytes + array.nbytes <= self.max_bytes:
                self._arrays.append(array)
                self._start_sweeper()
            return array.reshape(shape)

    def _best_spare(self, size: int) -> int | None:
        """Index of the smallest spare holding ``size`` values without wasting more than half of itself."""
        best = None
        for i in range(len(self._arrays)):
            # no local name for the array: it would be one more reference than _spare allows
            n = self._arrays[i].size
            if MIN_FILL * n <= size <= n and (best is None or n < self._arrays[best].size) and self._spare(i):
                best = i
        return best

    def _spare(self, i: int) -> bool:
        """True when the pool's list holds the only reference to its array ``i``."""
        return sys.getrefcount(self._arrays[i]) <= _FREE_REFS

    def _make_room(self, nbytes: int) -> None:
        """Drop spares until ``nbytes`` more fit the budget (arrays still lent stay tracked)."""
        i = 0
        while self.nbytes + nbytes > self.max_bytes and i < len(self._arrays):
            if self._spare(i):
                del self._arrays[i]
            else:
                i += 1

    @property
    def nbytes(self) -> int:
        """Bytes of the arrays tracked, lent or spare."""
        return sum(a.nbytes for a in self._arrays)

    def spare_bytes(self) -> int:
        """Bytes of the spare arrays (lent to no one)."""
        with self._lock:
            return sum(self._arrays[i].nbytes for i in range(len(self._arrays)) if self._spare(i))

    def clear(self) -> None:
        """Forget every array: spares are freed now, lent ones when their users drop them."""
        with self._lock:
            self._arrays.clear()
            self._idle.clear()

    def sweep(self) -> None:
        """Free the spares that were spare at the last sweep too; remember the others that are spare now."""
        with self._lock:
            idle = set()
            i = 0
            while i < len(self._arrays):
                if not self._spare(i):
                    i += 1
                elif id(self._arrays[i]) in self._idle:
                    del self._arrays[i]
                else:
                    idle.add(id(self._arrays[i]))
                    i += 1
            self._idle = idle

    def _start_sweeper(self) -> None:
        """Start the sweeper thread unless it runs (called with the lock held)."""
        if self._sweeper is None or not self._sweeper.is_alive():
            self._sweeper = threading.Thread(
                target=self._sweep_while_tracking, name="wxshock-pool", daemon=True
            )
            self._sweeper.start()

    def _sweep_while_tracking(self) -> None:
        """Sweep every SWEEP_SECONDS until the pool tracks nothing."""
        while True:
            time.sleep(SWEEP_SECONDS)
            self.sweep()
            with self._lock:
                if not self._arrays:
                    self._sweeper = None
                    return


_SHARED = ArrayPool()


def series_pool() -> ArrayPool:
    """The process's pool for batches' daily series (service.aggregate, the indicator tables)."""
    return _SHARED
