"""The replication bundle: byte-stable, with the table three ways, a codebook, methods and the provenance."""

from __future__ import annotations

import io
import json
import zipfile
from pathlib import Path

import pandas as pd
import pytest

from service.encode import RunResult, encode
from service.encode.stata import read_stata
from tests.encode._support_result import compute, example_body, example_result  # noqa: F401 - fixture

ENTRIES = [
    "codebook.csv",
    "methods.md",
    "provenance.json",
    "request.json",
    "table.csv",
    "table.dta",
    "table.parquet",
    "warnings.csv",
]


def _open(body: bytes) -> zipfile.ZipFile:
    return zipfile.ZipFile(io.BytesIO(body))


def test_the_bundle_holds_the_table_three_ways_and_its_papers(example_result: RunResult) -> None:  # noqa: F811
    body, media, headers = encode(example_result, "bundle")
    assert media == "application/zip"
    assert headers["Content-Disposition"].endswith('.zip"')
    bundle = _open(body)
    assert bundle.namelist() == ENTRIES  # sorted
    assert all(info.date_time == (1980, 1, 1, 0, 0, 0) for info in bundle.infolist())
    assert bundle.testzip() is None
    frame = example_result.frame
    # the same table in each of the three formats, and the same bytes as the formats alone
    assert bundle.read("table.parquet") == encode(example_result, "parquet")[0]
    assert bundle.read("table.csv") == encode(example_result, "csv")[0]
    assert bundle.read("table.dta") == encode(example_result, "dta")[0]
    from_parquet = pd.read_parquet(io.BytesIO(bundle.read("table.parquet")))
    from_dta = read_stata(bundle.read("table.dta"))[0]
    assert len(from_parquet) == len(from_dta) == len(frame)
    assert from_dta["feature_id"].tolist() == from_parquet["feature_id"].tolist()
    # the codebook covers every column, in order, with a real label; indicators carry unit and source
    codebook = pd.read_csv(io.BytesIO(bundle.read("codebook.csv")), keep_default_na=False)
    assert codebook["name"].tolist() == list(frame.columns)
    assert (codebook["label"] != codebook["name"]).all(), codebook[codebook["label"] == codebook["name"]]
    gdd = codebook.set_index("name").loc["gdd"]
    assert gdd["unit"] == "degC day" and "Baskerville" in gdd["source"]
    assert "base=10" in gdd["options"] and "cap=30" in gdd["options"] and "season=May-Oct" in gdd["options"]
    assert "baseline=1980-1990" in codebook.set_index("name").loc["gdd_z", "options"]
    # request, provenance and warnings as the result has them
    provenance = json.loads(bundle.read("provenance.json"))
    assert provenance == example_result.provenance
    assert json.loads(bundle.read("request.json")) == provenance["request"]
    warnings = pd.read_csv(io.BytesIO(bundle.read("warnings.csv")), keep_default_na=False)
    assert list(warnings.columns) == ["code", "feature_id", "year", "indicator", "reason"]
    assert len(warnings) == len(example_result.warnings)


def test_methods_are_written_from_the_resolved_request(example_result: RunResult) -> None:  # noqa: F811
    methods = _open(encode(example_result, "bundle")[0]).read("methods.md").decode()
    provenance = example_result.provenance
    for expected in (
        provenance["fingerprint"],
        provenance["request_hash"],
        provenance["software"],
        "dataset 'demo'",
        "for 3 communities and the season-years 1991-2018",
        "weights by exact area of overlap",
        "first averaged over the community",  # the aggregation order
        "The season was May-Oct",
        "own normal over 1980-1990",
        "edges at -2, -1, 1, 2 standard deviations",
        "lags 1, 2",
        "more than 10% of its days",
        "sums and counts were scaled to the whole season",  # partial_seasons "scale", the default
        "growing degree days (gdd)",
        "Vicente-Serrano",  # SPEI's source
    ):
        assert expected in methods, expected


def test_methods_follow_a_different_request(tiny_demo: Path, tiny_communities: dict, tmp_path: Path) -> None:
    body = example_body(
        tiny_communities,
        count=2,
        baseline={"trailing": 10},
        season={"start": "11-01", "end": "03-31"},
        weighting="centers",
        lags=[0],
        sequences=[],
        years={"start": 1995, "end": 2000},
    )
    methods = _open(encode(compute(tiny_demo, body, tmp_path), "bundle")[0]).read("methods.md").decode()
    assert "the 10 season-years before each season-year" in methods
    assert "11-01 to 03-31" in methods
    assert "cells whose centre lies inside" in methods
    assert "Lagged" not in methods
    assert "season-years 1995-2000" in methods


@pytest.mark.parametrize("repeat", [2])
def test_the_same_request_gives_the_same_bytes(
    tiny_demo: Path, tiny_communities: dict, tmp_path: Path, repeat: int
) -> None:
    # Two separate runs (not one result encoded twice): nothing time- or order-dependent gets in.
    body = example_body(tiny_communities, count=2)
    bundles = [encode(compute(tiny_demo, body, tmp_path / str(i)), "bundle")[0] for i in range(repeat)]
    assert bundles[0] == bundles[1]


def test_methods_explain_the_warning_codes_that_occur(example_result: RunResult) -> None:  # noqa: F811
    from service.warning_codes import WARNING_CODES

    methods = _open(encode(example_result, "bundle")[0]).read("methods.md").decode()
    codes = sorted({w["code"] for w in example_result.warnings})
    assert codes, "the example request leaves some values null"
    for code in codes:
        assert f"- `{code}`: {WARNING_CODES[code]}" in methods


def test_a_bundle_written_piece_by_piece_is_the_whole_zip(
    example_result: RunResult,  # noqa: F811
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    from service.encode import stable_frame, tables
    from service.encode import stream as stream_module
    from service.encode.bundle import write_bundle

    # row groups of 7 rows: the Parquet entry is cut into several, across the pieces given
    monkeypatch.setattr(stream_module, "PIECE_ROWS", 7)
    monkeypatch.setattr(tables, "PARQUET_ROW_GROUP_ROWS", 7)
    expected, _, _ = encode(example_result, "bundle")
    frame = stable_frame(example_result.frame)
    parts = [frame.iloc[:4], frame.iloc[4:4], frame.iloc[4:19], frame.iloc[19:]]
    with open(tmp_path / "bundle.zip", "wb") as sink:
        write_bundle(sink, lambda: iter(parts), list(frame.columns), example_result.provenance,
                     example_result.warnings, tmp_path / "scratch")  # fmt: skip
    assert (tmp_path / "bundle.zip").read_bytes() == expected
    assert not list((tmp_path / "scratch").iterdir())
