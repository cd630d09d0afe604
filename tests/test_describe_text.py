"""`wxshock describe` prints a summary a person reads; --json keeps the dict."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.cli import main
from service.describe_text import describe_text


def test_the_tiny_demo_reads_as_a_summary(tiny_demo: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["describe", str(tiny_demo)]) == 0
    text = capsys.readouterr().out
    lines = text.splitlines()
    assert lines[0] == "demo: Quennary Uplands: invented demo weather (tiny)"
    assert "  season-years     1975 to 2022" in lines
    prcp = "    prcp     mm/day   lwe_precipitation_rate (time: mean), stored to 0.1"
    assert any(line.startswith(prcp) for line in lines)  # then the variable's grid and days (store layout 2)
    assert "  crs              WGS 84 (EPSG:4326), geographic" in lines
    assert "  time             1975-01-01 to 2022-12-31, 17,532 days, standard calendar" in lines
    assert "GEOGCRS" not in text and "{" not in text  # no WKT, no raw dicts


def test_several_grids_and_new_keys_are_laid_out_the_same_way() -> None:
    # The shape a multi-grid store may describe itself in: each grid gets the same words as a one-grid store.
    info = {
        "name": "two",
        "grids": {
            "fine": {
                "crs": {"name": "WGS 84", "epsg": 4326, "is_geographic": True},
                "shape": {"y": 4, "x": 5},
            },
            "coarse": {
                "crs": {"name": "ETRS89-extended / LAEA Europe", "epsg": 3035, "is_geographic": False}
            },
        },
        "variables": {"prcp": {"units": "mm/day", "grid": "fine"}},
        "a_new_key": [1, 2],
    }
    lines = describe_text(info).splitlines()
    assert lines[:4] == [
        "two",
        "  grids",
        "    fine",
        "      crs              WGS 84 (EPSG:4326), geographic",
    ]
    assert "      shape            y 4, x 5 cells" in lines
    assert "      crs              ETRS89-extended / LAEA Europe (EPSG:3035), projected" in lines
    assert "    prcp     mm/day   ; grid fine" in lines
    assert "  a new key        1, 2" in lines
