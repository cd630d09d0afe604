"""Write aside, then swap into place, recoverably: a crash at any moment leaves a store that the next open or
write restores, and no litter that outlives it.

Every write builds the complete new store (data, data mask, fingerprint) in a hidden sibling
``.NAME.<purpose>-<token>`` first, inside :func:`write_aside` (which every write, update and migration uses):
its block builds the store there (the step ``aside-complete`` marks its end); the swap then runs these steps,
each named for the crash tests; a failure before the commit discards the aside.

1. ``journal``: write ``.NAME.swap.json`` (through a temporary file and a rename, so it is whole or absent)
   naming the new store and where the old one goes. From here on the write is committed: recovery completes it.
2. ``moved-old``: rename the store to ``.NAME.old-<token>`` (local) / delete it (object store).
3. ``moved-new``: rename the new store into place (local) / copy it into place (object store).
4. ``removed-old``: delete the old store (local) / the new store's aside copy (object store).
5. ``done``: delete the journal.

:func:`recover` (run on open and before every write) finishes a swap whose journal it finds, then deletes the
stale aside directories of writes that never reached step 1 (``.NAME.writing-*``, ``.NAME.appending-*``, ...).
Local writers hold an exclusive lock (``fcntl.flock`` on ``.NAME.lock``) from the first aside byte to the end of
the swap, and recovery takes it too, so it never touches the aside of a write still running. An object store has
no lock and no rename: its swap is journaled the same way, but two writers at once are not supported there.
"""

from __future__ import annotations

import contextlib
import errno
import json
import logging
import os
import re
import shutil
import time
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from service.errors import StoreError
from service.store.location import _filesystem, _is_url

log = logging.getLogger("wxshock.store")

# The purposes of aside directories: all of them are litter once no write holds the lock.
ASIDE_PURPOSES = ("writing", "appending", "updating", "migrating", "relayout", "old")
JOURNAL_SUFFIX = ".swap.json"
LOCK_SUFFIX = ".lock"
# How long a reader waits for a writer that is in the middle of a swap before giving up.
RECOVERY_WAIT_SECONDS = 30.0

# Tests only: called with the name of each step as it completes (see the module docstring), so that a test can
# stop the process there (os._exit in a forked child) and check what recovery makes of it.
CRASH_HOOK: Callable[[str], None] | None = None


def _step(name: str) -> None:
    """Mark a completed step of a write for the crash tests."""
    if CRASH_HOOK is not None:
        CRASH_HOOK(name)


# --- names beside the store ------------------------------------------------------------------------------------


def _split(target: str) -> tuple[str, str]:
    """(parent, last component) of a local path or URL."""
    if _is_url(target):
        head, _, last = target.rstrip("/").rpartition("/")
        return head, last
    path = Path(target)
    return str(path.parent), path.name


def _sibling(target: str, name: str) -> str:
    """A sibling of the store: ``<parent>/<name>``."""
    parent, _ = _split(target)
    return f"{parent}/{name}" if _is_url(target) else str(Path(parent) / name)


def aside_location(target: str, purpose: str) -> str:
    """A hidden sibling location for writing aside: ``<parent>/.<name>.<purpose>-<token>``."""
    if purpose not in ASIDE_PURPOSES:
        raise ValueError(f"unknown aside purpose {purpose!r}; one of {ASIDE_PURPOSES!r}")
    _, last = _split(target)
    return _sibling(target, f".{last}.{purpose}-{uuid.uuid4().hex[:12]}")


def journal_location(target: str) -> str:
    """Where the swap journal of a store lives."""
    return _sibling(target, f".{_split(target)[1]}{JOURNAL_SUFFIX}")


def _aside_pattern(target: str) -> re.Pattern[str]:
    """The names of the store's aside directories (and half-written journals)."""
    last = re.escape(_split(target)[1])
    purposes = "|".join(ASIDE_PURPOSES)
    return re.compile(rf"\.{last}\.(({purposes})-[0-9a-f]+|swap\.json\.tmp-[0-9a-f]+)")


# --- the lock ------------------------------------------------------------------------------------------------


@contextlib.contextmanager
def store_lock(target: str, *, wait: float = 0.0) -> Iterator[bool]:
    """Hold the store's exclusive write lock (local stores); yields False when it could not be had within
    ``wait`` seconds or the directory is not writable. Object stores have no lock: yields True.

    The lock is ``fcntl.flock`` on ``.NAME.lock`` beside the store, removed again by its holder before it lets
    go; a taker checks that the file it locked is still the one at that path (else it was removed meanwhile,
    and it tries again), so no litter stays and two writers never both hold it.
    """
    if _is_url(target):
        yield True
        return
    import fcntl

    parent, last = _split(target)
    path = Path(parent) / f".{last}{LOCK_SUFFIX}"
    deadline = time.monotonic() + wait
    fd = -1
    try:
        Path(parent).mkdir(parents=True, exist_ok=True)
        while True:
            fd = os.open(str(path), os.O_RDWR | os.O_CREAT, 0o666)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                os.close(fd)
                fd = -1
                if exc.errno not in (errno.EAGAIN, errno.EACCES) or time.monotonic() >= deadline:
                    break
                time.sleep(0.05)
                continue
            try:
                same = os.fstat(fd).st_ino == os.stat(path).st_ino
            except FileNotFoundError:
                same = False
            if same:
                break
            os.close(fd)  # the holder before us removed the file we locked: lock the new one
            fd = -1
    except OSError:
        if fd >= 0:
            os.close(fd)
        fd = -1
    if fd < 0:
        yield False
        return
    try:
        yield True
    finally:
        with contextlib.suppress(OSError):
            path.unlink()
        os.close(fd)  # closing the descriptor releases the lock


@contextlib.contextmanager
def writing(target: str, storage_options: dict | None) -> Iterator[None]:
    """The frame of every write: take the lock (or say who holds it), recover what a crash left, then write."""
    with store_lock(target) as held:
        if not held:
            lock = _sibling(target, f".{_split(target)[1]}{LOCK_SUFFIX}")
            raise StoreError(
                f"store {target!r} is being written by another process (it holds the lock {lock!r}), or its "
                "directory is not writable; wait until that write has finished, then try again"
            )
        _recover_locked(target, storage_options)
        yield


# --- the swap ------------------------------------------------------------------------------------------------


def _write_journal(target: str, storage_options: dict | None, record: dict[str, Any]) -> None:
    """Write the journal whole or not at all (temporary file, fsync, rename, fsync of the directory)."""
    text = json.dumps(record, sort_keys=True)
    journal = journal_location(target)
    if _is_url(target):
        fs, path = _filesystem(journal, storage_options)
        fs.pipe(path, text.encode())
        return
    tmp = f"{journal}.tmp-{uuid.uuid4().hex[:12]}"
    with open(tmp, "w", encoding="utf-8") as handle:
        handle.write(text)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(tmp, journal)
    _fsync_dir(str(Path(journal).parent))


def _fsync_dir(directory: str) -> None:
    """Make renames in a directory durable (best effort where the OS cannot open directories)."""
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _read_journal(target: str, storage_options: dict | None) -> dict[str, Any] | None:
    """The journal of an unfinished swap, or None."""
    journal = journal_location(target)
    try:
        if _is_url(target):
            fs, path = _filesystem(journal, storage_options)
            if not fs.exists(path):
                return None
            text = fs.cat(path).decode()
        else:
            if not Path(journal).is_file():
                return None
            text = Path(journal).read_text(encoding="utf-8")
        record = json.loads(text)
    except (OSError, ValueError) as exc:
        raise StoreError(
            f"the swap journal {journal!r} of store {target!r} cannot be read ({exc}); move it away by hand after "
            "checking which of the store's hidden siblings holds the data"
        ) from exc
    if not isinstance(record, dict) or not isinstance(record.get("new"), str):
        raise StoreError(f"the swap journal {journal!r} is not one that wxshock writes; move it away by hand")
    return record


def _remove_journal(target: str, storage_options: dict | None) -> None:
    """Delete the journal (the swap is complete)."""
    journal = journal_location(target)
    if _is_url(target):
        fs, path = _filesystem(journal, storage_options)
        if fs.exists(path):
            fs.rm(path)
        return
    Path(journal).unlink(missing_ok=True)
    _fsync_dir(str(Path(journal).parent))


def swap_into_place(aside: str, target: str, storage_options: dict | None) -> None:
    """Replace the store at ``target`` by the complete store at ``aside`` through the journaled steps of the
    module docstring. Call it inside :func:`writing` (which holds the lock)."""
    _, aside_name = _split(aside)
    old = aside_location(target, "old")
    _write_journal(target, storage_options, {"new": aside_name, "old": _split(old)[1]})
    _step("journal")
    _complete(target, storage_options, aside, old)


def _complete(target: str, storage_options: dict | None, new: str, old: str) -> None:
    """Steps 2 to 5 from wherever they stand (each step checks what is already done)."""
    if _is_url(target):
        fs, target_key = _filesystem(target, storage_options)
        _, new_key = _filesystem(new, storage_options)
        if fs.exists(new_key):
            if fs.exists(target_key):
                fs.rm(target_key, recursive=True)
            _step("moved-old")
            fs.copy(new_key, target_key, recursive=True)
            _step("moved-new")
            fs.rm(new_key, recursive=True)
            _step("removed-old")
        _remove_journal(target, storage_options)
        _step("done")
        return
    target_path, new_path, old_path = Path(target), Path(new), Path(old)
    if new_path.exists():
        if target_path.exists():
            os.replace(target_path, old_path)
        _step("moved-old")
        os.replace(new_path, target_path)
        _fsync_dir(str(target_path.parent))
        _step("moved-new")
    elif not target_path.exists() and old_path.exists():
        os.replace(old_path, target_path)  # the new store is gone (removed by hand): keep the old one
    if old_path.exists():
        shutil.rmtree(old_path)
    _step("removed-old")
    _remove_journal(target, storage_options)
    _step("done")


@contextlib.contextmanager
def write_aside(target: str, storage_options: dict | None, purpose: str) -> Iterator[str]:
    """Every write's sequence: yields a fresh aside location (``purpose``: one of ASIDE_PURPOSES) where the block
    builds and finishes the complete new store; when the block ends, that store is swapped into place
    (:func:`swap_into_place`, after the step ``aside-complete``); when the block or the swap raises, the aside is
    discarded (:func:`discard_aside`: unless the swap was committed) and the error goes on. Use it inside
    :func:`writing` (which holds the lock)."""
    aside = aside_location(target, purpose)
    try:
        yield aside
        _step("aside-complete")
        swap_into_place(aside, target, storage_options)
    except BaseException:
        discard_aside(aside, target, storage_options)
        raise


def discard_aside(aside: str, target: str, storage_options: dict | None) -> None:
    """After a failed write: delete its aside store, unless the swap journal names it (the write was committed:
    recovery completes it). Best effort; recovery removes whatever is left."""
    try:
        record = _read_journal(target, storage_options)
    except StoreError:
        return
    if record is not None and record.get("new") == _split(aside)[1]:
        log.warning(
            "store %s: the swap to %s was interrupted after its commit; recovery completes it", target, aside
        )
        return
    with contextlib.suppress(OSError):
        _delete(aside, storage_options)


# --- recovery ------------------------------------------------------------------------------------------------


def recover(target: str, storage_options: dict | None = None) -> list[str]:
    """Finish an interrupted swap and delete stale aside directories of the store at ``target``; returns what
    was done (empty when nothing was). Cheap when there is nothing to do (one directory listing).

    Local stores: done under the write lock. When a writer holds it, a store that is in place is left alone
    (the writer cleans up after itself); a store missing from its place is waited for (the writer is between
    two renames) up to RECOVERY_WAIT_SECONDS.
    """
    if (
        not _litter(target, storage_options)
        and _read_journal(target, storage_options) is None
        and not _stale_lock(target)
    ):
        return []
    if _is_url(target):
        return _recover_locked(target, storage_options)
    missing = not Path(target).exists()
    with store_lock(target, wait=RECOVERY_WAIT_SECONDS if missing else 0.0) as held:
        if not held:
            if missing and _read_journal(target, storage_options) is not None:
                raise StoreError(
                    f"store {target!r} is in the middle of a swap that another process holds (or the directory is "
                    "not writable); try again in a moment, or run 'wxshock verify' with write access to finish it"
                )
            return []
        return _recover_locked(target, storage_options)


def _recover_locked(target: str, storage_options: dict | None) -> list[str]:
    """Recovery with the lock held (or on an object store)."""
    done: list[str] = []
    record = _read_journal(target, storage_options)
    if record is None and not _exists_here(target, storage_options):
        restored = _restore_lone_old(target, storage_options)
        if restored:
            done.append(restored)
            log.warning("store %s: %s", target, restored)
    if record is not None:
        new = _sibling(target, record["new"])
        old = _sibling(target, str(record.get("old") or f".{_split(target)[1]}.old-0"))
        _complete(target, storage_options, new, old)
        done.append(f"finished the interrupted swap of {target!r} (journal named {record['new']!r})")
        log.warning("store %s: %s", target, done[-1])
    for name in _litter(target, storage_options):
        location = _sibling(target, name)
        _delete(location, storage_options)
        done.append(f"removed the stale aside {location!r}")
        log.warning("store %s: %s", target, done[-1])
    return done


def _stale_lock(target: str) -> bool:
    """True when a lock file lies beside a local store (its holder's lock is checked by taking it: a writer that
    died leaves the file, and the next taker removes it when it lets go)."""
    if _is_url(target):
        return False
    parent, last = _split(target)
    return (Path(parent) / f".{last}{LOCK_SUFFIX}").exists()


def _exists_here(target: str, storage_options: dict | None) -> bool:
    """True when the store's own directory (or prefix) is there."""
    if _is_url(target):
        fs, path = _filesystem(target, storage_options)
        return bool(fs.exists(path))
    return Path(target).exists()


def _restore_lone_old(target: str, storage_options: dict | None) -> str | None:
    """A store missing from its place with no journal, but one complete ``.NAME.old-*`` beside it: the crash of a
    swap written before the journal existed (between its two renames). Put that old store back."""
    olds = [n for n in _litter(target, storage_options) if n.startswith(f".{_split(target)[1]}.old-")]
    if not olds or _is_url(target):
        return None
    complete = [n for n in olds if (Path(_sibling(target, n)) / "zarr.json").is_file()]
    if len(complete) != 1:
        raise StoreError(
            f"store {target!r} is missing and {len(complete)} earlier versions lie beside it ({complete!r}); rename "
            "the right one to the store's name by hand (wxshock cannot tell which is the latest)"
        )
    os.replace(_sibling(target, complete[0]), target)
    _fsync_dir(str(Path(target).parent))
    return f"put back {complete[0]!r}, left by a swap that was interrupted between its renames"


def _litter(target: str, storage_options: dict | None) -> list[str]:
    """Names of the store's aside directories and half-written journals beside it."""
    pattern = _aside_pattern(target)
    parent, _ = _split(target)
    try:
        if _is_url(target):
            fs, parent_key = _filesystem(parent, storage_options)
            if not fs.exists(parent_key):
                return []
            names = [
                str(p).rstrip("/").rsplit("/", 1)[-1] for p in fs.ls(parent_key, detail=False, refresh=True)
            ]
        else:
            names = os.listdir(parent)
    except (FileNotFoundError, NotADirectoryError):
        return []
    return sorted(n for n in names if pattern.fullmatch(n))


def _delete(location: str, storage_options: dict | None) -> None:
    """Delete a directory or object prefix (or file) that exists."""
    if _is_url(location):
        fs, path = _filesystem(location, storage_options)
        if fs.exists(path):
            fs.rm(path, recursive=True)
        return
    path = Path(location)
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    else:
        path.unlink(missing_ok=True)


def store_exists(location: str, storage_options: dict | None = None) -> bool:
    """True when a store is at ``location``, once an interrupted swap is finished (a crash between the renames of
    a swap leaves the store aside for a moment: deciding "no store, write a new one" then would lose it)."""
    from service.store.location import _exists, _normalise_location

    target = _normalise_location(location)
    recover(target, storage_options)
    return _exists(target, storage_options)
