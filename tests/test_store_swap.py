"""The recoverable swap (issue 12, item 7): a crash at every step of a write, stale asides, a real SIGKILL.

A crash is made deterministic by running the write in a forked child whose crash hook ends the process with
os._exit at one named step: no clean-up handler runs, exactly as when the process is killed there. The parent
then opens the store (which recovers) and checks that it holds the old or the new data, matches its fingerprint,
and that nothing is left beside it.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import textwrap
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from service.errors import StoreError
from service.store import (
    add_variables,
    append_store,
    migrate_store,
    open_store,
    recover,
    store_exists,
    verify_store,
    write_layer,
    write_store,
)
from service.store import swap as swap_module
from tests._support_store import make_dataset

DATA = Path(__file__).parent / "data"
CRASHED = 70  # the exit status of a child that stopped at its crash step

# Every step a write passes, in order (service/store/swap.py names them); "aside-complete" is before the commit.
STEPS = ("aside-complete", "journal", "moved-old", "moved-new", "removed-old", "done")
COMMITTED = {"journal", "moved-old", "moved-new", "removed-old", "done"}


def _crash_at(step: str, write: Callable[[], object]) -> int:
    """Run ``write`` in a forked child that dies (os._exit, no clean-up) when it completes ``step``; the exit
    status (CRASHED when the step was reached)."""
    pid = os.fork()
    if pid == 0:  # the child: never returns into pytest
        code = 0
        try:

            def hook(name: str) -> None:
                if name == step:
                    os._exit(CRASHED)

            swap_module.CRASH_HOOK = hook
            write()
        except BaseException:  # noqa: BLE001 - any failure is reported by the status
            code = 1
        os._exit(code)
    deadline = time.monotonic() + 300  # bounded: a child stuck after the fork fails the test, not the suite
    while time.monotonic() < deadline:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            return os.waitstatus_to_exitcode(status)
        time.sleep(0.02)
    os.kill(pid, signal.SIGKILL)
    os.waitpid(pid, 0)
    raise AssertionError(f"the forked write did not end within 300 s (crash step {step!r})")


def _siblings(path: Path) -> list[str]:
    """Names in the store's directory other than the store itself."""
    return sorted(p.name for p in path.parent.iterdir() if p.name != path.name)


@pytest.fixture(scope="module")
def two_years(tmp_path_factory):
    """Two years of a small grid: the store holds the first, the write appends the second; and the
    fingerprint of the store with both years (what a completed append gives)."""
    ds = make_dataset(ny=5, nx=4, years=(2000, 2001), seed=5)
    first = ds.sel(time=slice("2000-01-01", "2000-12-31"))
    second = ds.sel(time=slice("2001-01-01", None)).drop_vars(["elevation", "population"])
    after = write_store(ds, tmp_path_factory.mktemp("reference") / "s.zarr")
    return ds, first, second, after


@pytest.mark.parametrize("step", STEPS)
def test_a_crash_at_every_step_of_an_append_leaves_the_old_or_the_new_store(
    tmp_path: Path, two_years, step
) -> None:
    ds, first, second, after = two_years
    path = tmp_path / "s.zarr"
    before = write_store(first, path)
    assert _crash_at(step, lambda: append_store(second, path)) == CRASHED
    on_disk = _siblings(path)
    if step == "moved-old":  # the crash the issue saw: nothing at the store's path for now
        assert not path.exists() and any(".s.zarr.old-" in n for n in on_disk)
    if step in ("aside-complete", "journal", "moved-old", "moved-new", "removed-old"):
        assert on_disk  # something is left for recovery to do
    store = open_store(path)  # recovers
    assert store.fingerprint == (after if step in COMMITTED else before)
    assert verify_store(path).ok
    assert _siblings(path) == []  # no journal, no aside, no old copy, no lock
    assert len(store.dates) == (731 if step in COMMITTED else 366)


@pytest.mark.parametrize("step", STEPS)
def test_a_crash_while_creating_a_store_leaves_none_or_the_whole_store(
    tmp_path: Path, two_years, step
) -> None:
    ds = two_years[0]
    path = tmp_path / "new.zarr"
    assert _crash_at(step, lambda: write_store(ds, path)) == CRASHED
    exists = store_exists(path)  # recovers too: ingest asks this before deciding to create a store
    assert exists is (step in COMMITTED)
    if exists:
        assert verify_store(path).ok
    assert _siblings(path) == []


@pytest.mark.parametrize("step", ("migration-linked", *STEPS))
def test_a_crash_during_migration_leaves_the_layout1_store_or_the_migrated_one(tmp_path: Path, step) -> None:
    path = tmp_path / "old.zarr"
    shutil.copytree(DATA / "store_layout1.zarr", path)
    before = open_store(path).fingerprint
    assert _crash_at(step, lambda: migrate_store(path)) == CRASHED
    store = open_store(path)
    if step in COMMITTED:
        assert store.layout_version == 2 and store.migrated_from == {
            "layout_version": 1,
            "fingerprint": before,
        }
    else:
        assert store.layout_version == 1 and store.fingerprint == before
    assert verify_store(path).ok and _siblings(path) == []


# The writes of several grids (issue 11): each goes through the same swap, by one of its two paths (a hard-linked
# copy of the store changed in place, or a whole rewrite when days come before the store's first day).
def _fine() -> object:
    return make_dataset(ny=4, nx=4, years=(2001, 2001), variables=("prcp",), layers=(), seed=3)


def _coarse(years: tuple[int, int]) -> object:
    return make_dataset(ny=2, nx=2, years=years, variables=("tmax", "tmin"), layers=(), cell_size=1.0, seed=4)


GRID_WRITES: dict[str, Callable[[Path], object]] = {
    "variables on a new grid": lambda path: add_variables(_coarse((2001, 2001)), path, grid="coarse"),
    "variables before the first day (rewrite)": lambda path: add_variables(
        _coarse((2000, 2001)), path, grid="coarse"
    ),
    "a weight layer": lambda path: write_layer(path, "cropland", {"grid": np.full((4, 4), 0.25)}),
}


@pytest.fixture(scope="module")
def grid_writes_done(tmp_path_factory) -> dict[str, str]:
    """The fingerprint each write of GRID_WRITES gives when it completes (made on a store of its own)."""
    done = {}
    for name, write in GRID_WRITES.items():
        path = tmp_path_factory.mktemp("done") / "s.zarr"
        write_store(_fine(), path)
        done[name] = write(path)
    return done


@pytest.mark.parametrize("write", list(GRID_WRITES))
@pytest.mark.parametrize("step", STEPS)
def test_a_crash_at_every_step_of_a_write_of_grids_or_layers_leaves_the_old_or_the_new_store(
    tmp_path: Path, grid_writes_done, write: str, step: str
) -> None:
    path = tmp_path / "s.zarr"
    before = write_store(_fine(), path)
    assert _crash_at(step, lambda: GRID_WRITES[write](path)) == CRASHED
    store = open_store(path)  # recovers
    assert store.fingerprint == (grid_writes_done[write] if step in COMMITTED else before)
    assert list(store.grids) == (
        ["grid"] if step not in COMMITTED or write == "a weight layer" else ["grid", "coarse"]
    )
    assert verify_store(path).ok and _siblings(path) == []


@pytest.mark.parametrize("recovery_step", ["moved-new", "removed-old", "done"])
def test_a_crash_during_recovery_is_finished_by_the_next_open(
    tmp_path: Path, two_years, recovery_step
) -> None:
    """Recovery runs the same journaled steps: killed in the middle of finishing a swap, it is finished by the next
    open, whatever step it had reached."""
    ds, first, second, after = two_years
    path = tmp_path / "s.zarr"
    write_store(first, path)
    assert _crash_at("moved-old", lambda: append_store(second, path)) == CRASHED  # no store at its path
    assert not path.exists()
    assert _crash_at(recovery_step, lambda: open_store(path)) == CRASHED
    store = open_store(path)
    assert store.fingerprint == after and verify_store(path).ok and _siblings(path) == []


def test_an_error_after_the_commit_leaves_the_write_to_recovery(
    tmp_path: Path, two_years, monkeypatch
) -> None:
    """An exception (not a crash) between the renames must not delete the committed new store."""
    ds, first, second, after = two_years
    path = tmp_path / "s.zarr"
    write_store(first, path)

    def hook(name: str) -> None:
        if name == "moved-old":
            raise OSError("the disk went away")

    monkeypatch.setattr(swap_module, "CRASH_HOOK", hook)
    with pytest.raises(OSError, match="the disk went away"):
        append_store(second, path)
    monkeypatch.setattr(swap_module, "CRASH_HOOK", None)
    assert not path.exists()  # interrupted between the renames
    assert open_store(path).fingerprint == after and _siblings(path) == []


@pytest.mark.parametrize("fails", [False, True])
def test_write_aside_swaps_the_finished_aside_into_place_or_discards_it(
    tmp_path: Path, fails: bool, monkeypatch
) -> None:
    """The one sequence of every write: the block's store replaces the old one when the block ends; when the block
    raises, the error goes on, the old store stays and the aside is gone."""
    path = tmp_path / "s.zarr"
    path.mkdir()
    (path / "which").write_text("old", encoding="utf-8")
    steps: list[str] = []
    monkeypatch.setattr(swap_module, "CRASH_HOOK", steps.append)

    def write() -> None:
        with (
            swap_module.writing(str(path), None),
            swap_module.write_aside(str(path), None, "writing") as aside,
        ):
            assert Path(aside).parent == tmp_path and Path(aside).name.startswith(".s.zarr.writing-")
            Path(aside).mkdir()
            (Path(aside) / "which").write_text("new", encoding="utf-8")
            if fails:
                raise OSError("the disk is full")

    if fails:
        with pytest.raises(OSError, match="the disk is full"):
            write()
    else:
        write()
    assert (path / "which").read_text(encoding="utf-8") == ("old" if fails else "new")
    assert _siblings(path) == []
    assert steps == ([] if fails else list(STEPS))


def test_stale_asides_of_killed_writes_are_removed_and_a_lone_old_store_is_put_back(tmp_path: Path) -> None:
    path, _ = tmp_path / "s.zarr", None
    write_store(make_dataset(ny=2, nx=2, years=(2000, 2000)), path)
    fingerprint = open_store(path).fingerprint
    # what killed appends of earlier versions left: an aside copy, an old copy, a half-written journal
    shutil.copytree(path, tmp_path / ".s.zarr.appending-0123456789ab")
    shutil.copytree(path, tmp_path / ".s.zarr.old-0123456789ab")
    (tmp_path / ".s.zarr.swap.json.tmp-00aa11bb22cc").write_text("{", encoding="utf-8")
    (tmp_path / ".other.zarr.old-0123456789ab").mkdir()  # another store's: not ours to touch
    done = recover(str(path))
    assert len(done) == 3 and _siblings(path) == [".other.zarr.old-0123456789ab"]
    # the crash of a swap made before the journal existed: the store is gone, its old copy lies beside it
    os.replace(path, tmp_path / ".s.zarr.old-00000000abcd")
    shutil.copytree(tmp_path / ".s.zarr.old-00000000abcd", tmp_path / ".s.zarr.appending-00000000dcba")
    assert open_store(path).fingerprint == fingerprint  # put back, not silently replaced by a new store
    assert _siblings(path) == [".other.zarr.old-0123456789ab"]


def test_a_writer_holding_the_lock_keeps_its_aside_and_a_second_writer_is_told(tmp_path: Path) -> None:
    path = tmp_path / "s.zarr"
    write_store(make_dataset(ny=2, nx=2, years=(2000, 2000)), path)
    aside = tmp_path / ".s.zarr.updating-0123456789ab"
    aside.mkdir()
    with swap_module.store_lock(str(path)) as held:
        assert held
        assert recover(str(path)) == [] and aside.exists()  # a write in progress: its aside is left alone
        with pytest.raises(StoreError, match="is being written by another process"):
            write_store(make_dataset(ny=2, nx=2, years=(2000, 2000)), path)
    assert recover(str(path)) and not aside.exists() and _siblings(path) == []


def test_a_real_sigkill_of_an_ingest_leaves_a_store_that_opens_whole(tmp_path: Path) -> None:
    """A subprocess appends years to a store and is SIGKILLed while it writes aside (the moment is found by
    watching the directory, bounded in time); the store then opens as before or after, and nothing is left."""
    path = tmp_path / "stores" / "s.zarr"
    ds = make_dataset(ny=24, nx=24, years=(2000, 2004), layers=(), seed=2)
    write_store(ds.sel(time=slice(None, "2000-12-31")), path)
    before = open_store(path).fingerprint
    data = tmp_path / "rest.nc"
    ds.sel(time=slice("2001-01-01", None)).to_netcdf(data)
    script = textwrap.dedent(
        f"""
        import xarray as xr
        from service.store import append_store
        append_store(xr.open_dataset({str(data)!r}).load(), {str(path)!r})
        """
    )
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    child = subprocess.Popen([sys.executable, "-c", script], env=env)
    try:
        deadline = time.monotonic() + 60
        seen = False
        while time.monotonic() < deadline and child.poll() is None and not seen:
            seen = any(".s.zarr.updating-" in n for n in _siblings(path))
            time.sleep(0.01)
        time.sleep(0.2)  # into the writing of chunks
        running = child.poll() is None
        child.send_signal(signal.SIGKILL)
    finally:
        child.wait(timeout=30)
    assert seen and running, "the append finished before it could be killed; make it larger"
    assert _siblings(path)  # the kill left its aside (and lock file) behind
    store = open_store(path)
    assert store.fingerprint == before
    assert verify_store(path).ok and _siblings(path) == []
    np.testing.assert_array_equal(
        np.isnan(store.read("prcp", slice(None), slice(None), slice(0, 366))),
        np.isnan(ds["prcp"].transpose("y", "x", "time").values[:, :, :366]),
    )


@pytest.mark.s3
def test_an_object_store_swap_interrupted_after_its_commit_is_finished_on_open(
    tmp_path: Path,
    s3_server,  # noqa: F811 - fixture from _support_cluster
    monkeypatch,
) -> None:
    """S3 has no rename: the old objects are deleted, then the new ones copied. An interruption between the two
    (here an error raised at that step) leaves no store until the next open copies the committed new one in."""
    ds = make_dataset(ny=3, nx=2, years=(2000, 2001), layers=(), seed=9)
    url = f"s3://{s3_server.bucket}/swap/s.zarr"
    options = s3_server.storage_options()
    write_store(ds.sel(time=slice(None, "2000-12-31")), url, storage_options=options)
    after = write_store(ds, tmp_path / "reference.zarr")

    def hook(name: str) -> None:
        if name == "moved-old":
            raise ConnectionError("the network went away")

    monkeypatch.setattr(swap_module, "CRASH_HOOK", hook)
    with pytest.raises(ConnectionError):
        append_store(ds.sel(time=slice("2001-01-01", None)), url, storage_options=options)
    monkeypatch.setattr(swap_module, "CRASH_HOOK", None)
    import fsspec

    fs, key = fsspec.core.url_to_fs(url, **options)
    assert not fs.exists(f"{key}/zarr.json")  # deleted, not yet copied back
    store = open_store(url, storage_options=options)
    assert store.fingerprint == after and verify_store(url, storage_options=options).ok
    fs, parent = fsspec.core.url_to_fs(f"s3://{s3_server.bucket}/swap", **options)
    assert sorted(p.rsplit("/", 1)[-1] for p in fs.ls(parent, refresh=True)) == ["s.zarr"]


from tests._support_cluster import s3_server  # noqa: E402,F401 - the session's moto S3 fixture
