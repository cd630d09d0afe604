"""The codebook: every column of every layout described, from the resolved request."""

from __future__ import annotations

from pathlib import Path

from service.encode import RunResult
from service.encode.codebook import baseline_text, describe_columns, season_text, short_title
from tests.encode._support_result import compute, example_body, example_result  # noqa: F401 - fixture


def test_every_wide_column_has_a_label_and_indicators_their_catalog_entry(
    example_result: RunResult,  # noqa: F811
) -> None:
    infos = describe_columns(list(example_result.frame.columns), example_result.provenance)
    assert [i.name for i in infos] == list(example_result.frame.columns)
    assert all(i.label and i.label != i.name for i in infos), [i.name for i in infos if i.label == i.name]
    by_name = {i.name: i for i in infos}
    assert by_name["spei_category"].source.startswith("WMO SPI User Guide")
    assert by_name["edd"].label == "Extreme degree days" and by_name["edd"].unit == "degC day"
    assert "threshold=29" in by_name["edd"].options
    assert "prcp_total class <= -1" in by_name["dry_hot_run"].definition
    assert by_name["prcp_total_and_tmean"].label == "classes of prcp_total and tmean together"


def test_every_long_column_has_a_label(tiny_demo: Path, tiny_communities: dict, tmp_path: Path) -> None:
    result = compute(tiny_demo, example_body(tiny_communities, count=1, layout="long"), tmp_path)
    infos = describe_columns(list(result.frame.columns), result.provenance)
    assert all(i.label != i.name for i in infos), [i.name for i in infos if i.label == i.name]


def test_unknown_columns_are_kept_with_their_name() -> None:
    (info,) = describe_columns(["something_new"], {"request": {}})
    assert info.name == info.label == "something_new"


def test_words_for_the_request() -> None:
    assert season_text({"months": [11, 12, 1, 2]}) == "Nov-Feb"
    assert season_text("year") == "the calendar year"
    assert season_text({"property": "rains"}) == "each community's own season (feature property 'rains')"
    assert baseline_text({"trailing": 15}) == "the 15 season-years before each season-year"
    assert short_title("Extreme (harmful) degree days: the sum ...") == "Extreme degree days"
    assert short_title("Number of days in the season with at least 10 mm of precipitation.") == (
        "Number of days in the season with at least 10 mm"
    )


def test_event_tables_are_described_too() -> None:
    infos = describe_columns(
        ["event_id", "date", "prior_year__start", "prior_year__window_complete"], {"request": {"events": {}}}
    )
    assert [i.label for i in infos] == [
        "event id",
        "event date",
        "prior_year: first day of the window",
        "prior_year: share of the window's days with data",
    ]
