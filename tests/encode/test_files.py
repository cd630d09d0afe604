"""Result files: whole or absent, and readable as the umask allows (not mkstemp's 0600)."""

from __future__ import annotations

import os
import stat
from pathlib import Path

import pytest

from service.encode import write_atomically


@pytest.mark.parametrize(("umask", "mode"), [(0o022, 0o644), (0o027, 0o640), (0o077, 0o600)])
def test_result_files_follow_the_umask(tmp_path: Path, umask: int, mode: int) -> None:
    old = os.umask(umask)
    try:
        write_atomically(tmp_path / "out" / "shocks.csv", b"feature_id,year\n")
    finally:
        os.umask(old)
    written = tmp_path / "out" / "shocks.csv"
    assert stat.S_IMODE(written.stat().st_mode) == mode
    assert written.read_bytes() == b"feature_id,year\n"
    assert [p.name for p in written.parent.iterdir()] == ["shocks.csv"]  # no temporary file left


def test_a_failed_write_leaves_neither_file_nor_temporary(tmp_path: Path) -> None:

    with pytest.raises(TypeError):
        write_atomically(tmp_path / "shocks.csv", object())  # type: ignore[arg-type]
    assert list(tmp_path.iterdir()) == []


def test_an_existing_file_is_replaced_whole(tmp_path: Path) -> None:
    target = tmp_path / "shocks.csv"
    target.write_bytes(b"old")
    write_atomically(target, b"new")
    assert target.read_bytes() == b"new"
