"""Loops compiled by numba, each the first time it is asked for (never at import: the CLI and ``wxshock submit``
do not pay for it), kept in numba's cache where it can write one (beside the source, or the user's cache
directory, or ``NUMBA_CACHE_DIR``), else compiled in memory in each process (about a second each)."""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import Any

_lock = threading.Lock()
_compiled: dict[str, Any] = {}


def compiled(name: str, source: Callable[..., Any]) -> Any:
    """``source`` compiled (nopython, without the GIL, numpy's error model) under ``name``, once per process."""
    found = _compiled.get(name)  # every chunk task asks: no lock once compiled
    if found is not None:
        return found
    with _lock:
        if name not in _compiled:
            import numba

            options: dict[str, Any] = {"nogil": True, "error_model": "numpy"}
            try:
                _compiled[name] = numba.njit(cache=True, **options)(source)
            except RuntimeError:  # no directory numba can write its cache into (read-only install and home)
                _compiled[name] = numba.njit(cache=False, **options)(source)
        return _compiled[name]


def loaded(name: str) -> Any | None:
    """The dispatcher compiled under ``name`` in this process, or None when it has not been asked for yet."""
    return _compiled.get(name)
