"""The wxshock command: every subcommand parses, and a user's mistake exits 2 with its reason."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from service.cli import build_parser, main


@pytest.mark.parametrize(
    "argv",
    [
        ["serve", "--store", "a.zarr", "--store", "b.zarr", "--port", "8001", "--scheduler", "tcp://h:8786"],
        ["demo", "out.zarr", "--size", "tiny", "--quiet"],
        ["ingest", "a.nc", "b.nc", "--out", "s3://bucket/x.zarr", "--var", "tmax=tasmax"],
        ["describe", "x.zarr", "--json"],
        ["verify", "x.zarr"],
        ["migrate", "x.zarr", "--quiet"],
        ["compute", "--store", "x.zarr", "--request", "r.json", "--out", "o.parquet"],
        ["submit", "--server", "http://127.0.0.1:8000", "--request", "r.json", "--out", "o.csv"],
        ["openapi", "--out", "-"],
    ],
)
def test_every_subcommand_parses(argv: list[str]) -> None:
    assert build_parser().parse_args(argv).command == argv[0]


def test_bad_var_option_is_refused(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["ingest", "a.nc", "--out", "x.zarr", "--var", "wind=uas", "--quiet"]) == 2
    assert "--var 'wind=uas': write VARIABLE=NAME or VARIABLE=NAME@FILES" in capsys.readouterr().err


def test_describe_and_verify_the_tiny_demo(tiny_demo: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["describe", str(tiny_demo), "--json"]) == 0
    described = json.loads(capsys.readouterr().out)
    assert described["name"] == "demo" and described["years"] == [1975, 2022]
    assert main(["verify", str(tiny_demo)]) == 0
    assert capsys.readouterr().out.strip().endswith("ok")


def test_a_missing_store_exits_2_with_its_reason(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["describe", str(tmp_path / "nowhere.zarr")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("wxshock describe: ") and "nowhere.zarr" in err


def test_migrate_a_layout1_store(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import shutil

    path = tmp_path / "old.zarr"
    shutil.copytree(Path(__file__).parent / "data" / "store_layout1.zarr", path)
    assert main(["migrate", str(path), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "migrated to layout 2; fingerprint sha256:" in out and "(was sha256:c8ac7e3a" in out
    assert main(["migrate", str(path), "--quiet"]) == 0
    assert "already layout 2" in capsys.readouterr().out
