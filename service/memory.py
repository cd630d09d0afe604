"""Giving freed memory back to the operating system after a request or a job.

glibc keeps the memory a large request freed (the daily means of a feature batch, a table being encoded) in its
heaps for reuse, so a server's RSS stays at its highest point long after the work is done. ``malloc_trim(0)``
returns the free pages of every heap to the system (bench/RESULTS.md, "Scale", has what it gives back and what it
costs). Elsewhere than glibc it does nothing.

The dask workers are another matter: docker/dask.yaml unsets ``MALLOC_TRIM_THRESHOLD_`` for them, because the
distributed default (65536) made every chunk-sized array a fresh mmap and the chunk tasks 2.5 times slower
(bench/RESULTS.md, "Cluster"). Trimming once after a request or a job, as here, does not change the threshold.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import logging
import threading

log = logging.getLogger(__name__)

_libc: ctypes.CDLL | None = None
_looked_up = False
_busy = threading.Lock()


def _malloc_trim() -> ctypes._CFuncPtr | None:  # type: ignore[name-defined]
    """glibc's malloc_trim, or None where the C library has none."""
    global _libc, _looked_up
    if not _looked_up:
        _looked_up = True
        try:
            _libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
            _libc.malloc_trim.argtypes = [ctypes.c_size_t]
            _libc.malloc_trim.restype = ctypes.c_int
        except (OSError, AttributeError):
            _libc = None
    return None if _libc is None else _libc.malloc_trim


def release_memory() -> bool:
    """Return the heaps' free memory to the system (malloc_trim(0)); True when some was returned.

    Cheap to call often: a call while another one runs returns at once (False).
    """
    trim = _malloc_trim()
    if trim is None or not _busy.acquire(blocking=False):
        return False
    try:
        return bool(trim(0))
    except OSError:  # pragma: no cover - a C library without a working malloc_trim
        log.debug("malloc_trim failed", exc_info=True)
        return False
    finally:
        _busy.release()


def rss_bytes() -> int:
    """This process's resident set size now (bytes), from /proc; 0 where there is none."""
    try:
        with open("/proc/self/statm", encoding="ascii") as f:
            pages = int(f.read().split()[1])
    except (OSError, ValueError, IndexError):
        return 0
    import os

    return pages * os.sysconf("SC_PAGE_SIZE")
