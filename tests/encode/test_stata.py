"""Stata files: labelled variables and classes, string ids, integer years, missing as '.', short names."""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest

from service.encode import RunResult, encode, stable_frame
from service.encode.stata import (
    STATA_LABEL_LIMIT,
    read_stata,
    stata_name,
    stata_names,
    stata_pieces,
    to_stata,
)
from tests.encode._support_result import example_result  # noqa: F401 - fixture


def test_short_names_stay_and_long_names_are_cut_with_a_hash() -> None:
    assert stata_name("prcp_total_z_lag1") == "prcp_total_z_lag1"
    long = "gdd_base8_cap30_z_lag12_and_some_more"  # 38 characters
    digest = hashlib.sha256(long.encode()).hexdigest()[:4]
    assert stata_name(long) == long[:27] + "_" + digest
    assert len(stata_name(long)) == 32
    assert stata_name(long) == stata_name(long)  # deterministic
    assert stata_name("in") == "_in" and stata_name("str12") == "_str12"  # Stata's reserved words
    assert stata_name("window__tmean").startswith("window__tmean")


def test_two_long_names_with_the_same_head_stay_apart() -> None:
    head = "x" * 30
    names = stata_names([head + "_one", head + "_two"])
    assert len(set(names.values())) == 2


def test_the_table_reads_back_with_labels_and_missing_values(example_result: RunResult) -> None:  # noqa: F811
    body, media, headers = encode(example_result, "dta")
    assert media == "application/x-stata-dta"
    assert headers["Content-Disposition"].startswith('attachment; filename="wxshock-')
    table, labels, value_labels = read_stata(body)
    frame = example_result.frame
    assert list(table.columns) == list(frame.columns)  # all names fit in 32 characters here
    # ids as strings, years as integers, classes as integers with labels, nulls as missing
    assert table["feature_id"].tolist() == frame["feature_id"].astype(str).tolist()
    assert pd.api.types.is_integer_dtype(table["year"]) and table["year"].tolist() == frame["year"].tolist()
    np.testing.assert_allclose(table["prcp_total_z"], frame["prcp_total_z"].round(6), equal_nan=True)
    assert table["edd_z"].isna().sum() == frame["edd_z"].isna().sum() > 0
    assert value_labels["prcp_total_class"] == {
        -2: "much drier",
        -1: "drier",
        0: "near normal",
        1: "wetter",
        2: "much wetter",
    }
    assert value_labels["tmean_class_lag2"][2] == "much warmer"
    assert table["prcp_total_class"].dropna().isin([-2, -1, 0, 1, 2]).all()
    # every variable says what it is, in at most 80 characters
    assert all(0 < len(label) <= STATA_LABEL_LIMIT for label in labels.values()), labels
    assert labels["prcp_total"] == "Total precipitation of the season [mm]"
    assert labels["prcp_total_z_lag1"].startswith("Total precipitation of the season: z, lag 1")
    assert (
        table["prcp_total_label"].tolist()
        == frame["prcp_total_label"].astype(str).replace("nan", "").tolist()
    )


def test_long_column_names_get_their_full_name_in_the_label(example_result: RunResult) -> None:  # noqa: F811
    long = "a_window_name__prcp_total_z_lag1_long"  # 37 characters
    frame = example_result.frame[["feature_id", "year", "prcp_total_z"]].rename(
        columns={"prcp_total_z": long}
    )
    body, _, _ = encode(RunResult(frame, example_result.provenance, []), "dta")
    table, labels, _ = read_stata(body)
    short = stata_name(long)
    assert list(table.columns) == ["feature_id", "year", short] and len(short) == 32
    assert labels[short].startswith(long + ": ")
    assert len(labels[short]) <= STATA_LABEL_LIMIT


def test_same_result_same_bytes(example_result: RunResult) -> None:  # noqa: F811
    assert encode(example_result, "dta")[0] == encode(example_result, "dta")[0]


@pytest.mark.parametrize("fmt", ["csv", "dta", "json", "parquet", "bundle"])
def test_every_format_carries_every_column(example_result: RunResult, fmt: str) -> None:  # noqa: F811
    # The notes column (warning codes per row) and any other column travel with every format.
    frame = example_result.frame.copy()
    frame["notes"] = ["partial_season" if i % 7 == 0 else "" for i in range(len(frame))]
    body, _, _ = encode(RunResult(frame, example_result.provenance, example_result.warnings), fmt)
    if fmt == "dta":
        columns = list(read_stata(body)[0].columns)
    elif fmt == "bundle":
        import io
        import zipfile

        columns = list(pd.read_csv(io.BytesIO(zipfile.ZipFile(io.BytesIO(body)).read("table.csv"))).columns)
    elif fmt == "json":
        import json

        columns = json.loads(body)["columns"]
    elif fmt == "csv":
        import io

        columns = list(pd.read_csv(io.BytesIO(body)).columns)
    else:
        import io

        columns = list(pd.read_parquet(io.BytesIO(body)).columns)
    assert columns == list(frame.columns)


def _cut(frame: pd.DataFrame, sizes: list[int]) -> list[pd.DataFrame]:
    """The frame cut into consecutive pieces of the given sizes (the last takes the rest)."""
    cuts = np.cumsum(sizes)
    return [frame.iloc[a:b] for a, b in zip(np.r_[0, cuts], np.r_[cuts, len(frame)], strict=True)]


def test_a_table_written_piece_by_piece_is_the_whole_file(example_result: RunResult) -> None:  # noqa: F811
    frame = stable_frame(example_result.frame)
    # ids and labels of different widths in different pieces, a piece whose classes are all missing, a
    # piece with no rows: the joined file must still be the whole table's, byte for byte
    frame = frame.assign(feature_id=[f"v{'x' * (i % 7)}-{i}" for i in range(len(frame))])
    frame.loc[frame.index[:5], "prcp_total_class"] = np.nan
    expected = to_stata(frame, example_result.provenance, example_result.warnings)
    for sizes in ([5, 0, 11], [1], [len(frame)]):
        pieces = _cut(frame, sizes)
        joined = b"".join(
            stata_pieces(lambda p=pieces: iter(p), list(frame.columns), example_result.provenance)
        )
        assert joined == expected, sizes
    table, _, values = read_stata(joined)
    assert table["feature_id"].tolist() == frame["feature_id"].tolist() and values["prcp_total_class"]
