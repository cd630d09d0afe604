"""Events, windows and variants through the whole chain on the tiny demo store.

Each window's value is checked against a plain loop over the community's daily series as POST /v1/series
gives it (pipeline.run_series), and each variant against the same request sent alone.
"""

from __future__ import annotations

import datetime as dt
import json
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from dask.callbacks import Callback

from service.encode import encode, read_parquet_provenance
from service.errors import RequestError
from service.pipeline import run, run_series
from service.schemas import IndicatorRequest, SeriesRequest, validate_request
from service.settings import Settings
from service.store import open_store
from tests import _support_cluster as support
from tests._support_events import west_communities, write_west_product

dask_cluster = support.dask_cluster  # the session fixture, used by name below

PRIOR_YEAR = {"name": "prior_year", "start": {"months": -12}, "end": {"days": -1}}
TRIMESTER_3 = {"name": "tri3", "start": {"days": -91}, "end": {"days": -1}}


@pytest.fixture(scope="module")
def settings(tmp_path_factory: pytest.TempPathFactory) -> Settings:
    return Settings(data_dir=tmp_path_factory.mktemp("data"), threads=2)


@pytest.fixture(scope="module")
def store(tiny_demo: Path):
    return open_store(tiny_demo)


@pytest.fixture(scope="module")
def few(tiny_communities: dict) -> dict:
    """Four of the demo's communities."""
    return {**tiny_communities, "features": tiny_communities["features"][:4]}


def _ids(collection: dict) -> list[str]:
    return [str(f.get("id")) for f in collection["features"]]


def _events(collection: dict) -> list[dict[str, str]]:
    """Invented births and interviews: several per community, 29 February and year ends among them."""
    ids = _ids(collection)
    dates = ["2004-02-29", "2010-01-05", "1999-12-31", "2016-07-14", "2003-03-01", "2021-10-30"]
    return [
        {"id": f"ev-{k:03d}", "feature_id": ids[k % len(ids)], "date": dates[k % len(dates)]}
        for k in range(2 * len(ids) + 3)
    ]


def _request(collection: dict, **fields: Any) -> IndicatorRequest:
    body = {
        "features": collection,
        "events": _events(collection),
        "windows": [PRIOR_YEAR, TRIMESTER_3],
        "indicators": ["prcp_total", "tmean", "wet_days"],
        "baseline": {"start": 1981, "end": 2010},
        "lags": [0, 1],
        "lag_values": True,
        **fields,
    }
    return validate_request(IndicatorRequest, body)


@pytest.fixture(scope="module")
def wide(store, settings, few):
    return run(_request(few), store, settings)


@pytest.fixture(scope="module")
def series(store, settings, few) -> pd.DataFrame:
    """The communities' daily area-weighted series (the same snapped values the indicators read)."""
    return run_series(validate_request(SeriesRequest, {"features": few}), store, settings).frame


def _same_days(first: dt.date, last: dt.date, year: int) -> tuple[dt.date, dt.date]:
    """The window's calendar days ending in ``year`` (29 February: a start moves to 1 March, an end to the 28th)."""

    def day(y: int, d: dt.date, start: bool) -> dt.date:
        try:
            return dt.date(y, d.month, d.day)
        except ValueError:
            return dt.date(y, 3, 1) if start else dt.date(y, 2, 28)

    return day(year - (last.year - first.year), first, True), day(year, last, False)


def _loop(daily: pd.DataFrame, first: dt.date, last: dt.date) -> dict[str, float]:
    """prcp_total, tmean, wet_days of one window by a plain loop over the days."""
    chosen = daily[(daily["date"] >= first.isoformat()) & (daily["date"] <= last.isoformat())]
    total = mean = wet = 0.0
    for prcp, tmean in zip(chosen["prcp"], chosen["tmean"], strict=True):
        total += prcp
        mean += tmean
        wet += 1.0 if prcp >= 1.0 else 0.0
    return {"prcp_total": total, "tmean": mean / len(chosen), "wet_days": wet}


def test_one_row_per_event_in_request_order(wide, few) -> None:
    frame = wide.frame
    events = _events(few)
    assert frame["event_id"].tolist() == [e["id"] for e in events]
    assert frame["feature_id"].tolist() == [e["feature_id"] for e in events]
    for column in ("event_id", "feature_id"):  # plain text, never categorical codes
        assert not isinstance(frame[column].dtype, pd.CategoricalDtype)
        assert all(isinstance(v, str) for v in frame[column])
    for name in ("prior_year__prcp_total_z", "tri3__tmean_lag1", "prior_year__notes", "coverage", "notes"):
        assert name in frame.columns
    assert frame.columns[-1] == "notes"
    assert wide.provenance["request"]["events"]["count"] == len(events)
    assert "events" not in json.dumps(wide.provenance["request"]["windows"])


def test_window_values_and_z_against_the_daily_series(wide, series, few) -> None:
    frame = wide.frame
    for event in _events(few):
        row = frame[frame["event_id"] == event["id"]].iloc[0]
        daily = series[series["feature_id"] == event["feature_id"]]
        when = dt.date.fromisoformat(event["date"])
        for window, (first, last) in (
            ("prior_year", _prior_year(when)),
            ("tri3", (when - dt.timedelta(days=91), when - dt.timedelta(days=1))),
        ):
            assert row[f"{window}__start"] == first.isoformat()
            own = _loop(daily, first, last)
            base = [_loop(daily, *_same_days(first, last, y)) for y in range(1981, 2011)]
            lagged = _loop(daily, *_same_days(first, last, last.year - 1))
            for name in ("prcp_total", "tmean", "wet_days"):
                column = f"{window}__{name}"
                assert row[column] == pytest.approx(own[name], rel=1e-9, abs=1e-6), (event["id"], column)
                sample = np.array([b[name] for b in base])
                z = (own[name] - sample.mean()) / sample.std(ddof=1)
                assert row[f"{column}_z"] == pytest.approx(z, abs=1e-6), (event["id"], column)
                assert row[f"{column}_lag1"] == pytest.approx(lagged[name], rel=1e-9, abs=1e-6)


def _prior_year(when: dt.date) -> tuple[dt.date, dt.date]:
    """12 months before the event (a missing 29 February moves the start to 1 March) to the day before."""
    try:
        first = when.replace(year=when.year - 1)
    except ValueError:
        first = dt.date(when.year - 1, 3, 1)
    return first, when - dt.timedelta(days=1)


def test_long_layout_one_row_per_event_window_indicator(store, settings, few, wide) -> None:
    long = run(_request(few, layout="long"), store, settings).frame
    events = _events(few)
    assert len(long) == len(events) * 2 * 3
    assert long.columns[:8].tolist() == [
        "event_id",
        "feature_id",
        "date",
        "window",
        "start",
        "end",
        "indicator",
        "value",
    ]
    assert "value_lag1" in long.columns
    row = long[
        (long["event_id"] == "ev-001") & (long["window"] == "tri3") & (long["indicator"] == "tmean")
    ].iloc[0]
    wide_row = wide.frame[wide.frame["event_id"] == "ev-001"].iloc[0]
    assert row["value"] == wide_row["tri3__tmean"]
    assert row["z_lag1"] == wide_row["tri3__tmean_z_lag1"]
    assert row["value_lag1"] == wide_row["tri3__tmean_lag1"]


def test_encoded_result_merges_by_event_id(wide) -> None:
    body, _, _ = encode(wide, "parquet")
    frame = pd.read_parquet(__import__("io").BytesIO(body))
    survey = pd.DataFrame({"event_id": frame["event_id"][::-1].tolist(), "weight": range(len(frame))})
    merged = survey.merge(frame, on="event_id", validate="one_to_one")
    assert len(merged) == len(frame)
    assert read_parquet_provenance(body)["provenance"]["request"]["events"]["count"] == len(frame)


def test_event_errors_name_the_event(store, settings, few) -> None:
    events = _events(few)
    events[2] = {**events[2], "date": "2041-01-01"}
    with pytest.raises(RequestError, match="wholly outside the data") as info:
        run(_request(few, events=events), store, settings)
    assert info.value.pointer == "/events/2/date"
    events = _events(few)
    events[1] = {**events[1], "feature_id": "nowhere"}
    with pytest.raises(RequestError, match="nowhere"):
        run(_request(few, events=events), store, settings)


def test_window_at_the_end_of_the_data_is_partial(store, settings, few) -> None:
    events = [{"id": "late", "feature_id": _ids(few)[0], "date": "2023-01-20"}]  # the data end on 2022-12-31
    frame = run(_request(few, events=events, windows=[TRIMESTER_3]), store, settings).frame
    row = frame.iloc[0]
    # 91 days to 19 January 2023: 19 of them after the data (21 %), more than max_missing_share allows
    assert np.isnan(row["tri3__prcp_total"])
    assert "incomplete_season" in row["tri3__notes"].split()


# --- variants -------------------------------------------------------------------------------------------------


class _Computes(Callback):
    """Counts the dask computations started while active (one per aggregated feature batch)."""

    def __init__(self) -> None:
        super().__init__()
        self.count = 0

    def _start(self, dsk: Any) -> None:
        self.count += 1


VARIANTS = [
    {"name": "main"},
    {"name": "recent", "baseline": {"start": 2001, "end": 2020}},
    {"name": "rainy", "season": {"months": [5, 6, 7, 8, 9, 10]}, "classes": {"edges": [-1.5, 1.5]}},
    {"name": "degree", "indicators": ["prcp_total", {"name": "gdd", "base": 8}]},
]


def _season_request(collection: dict, **fields: Any) -> IndicatorRequest:
    return validate_request(
        IndicatorRequest,
        {"features": collection, "indicators": ["prcp_total", "tmean"], "lags": [0, 1], **fields},
    )


def test_variants_share_one_aggregation_and_equal_separate_requests(store, settings, few) -> None:
    with _Computes() as computes:
        combined = run(_season_request(few, variants=VARIANTS), store, settings)
    assert computes.count == 1  # one feature batch, aggregated once for all four variants
    frame = combined.frame
    assert frame.columns[:2].tolist() == ["feature_id", "year"]
    for variant in VARIANTS:
        alone = run(
            _season_request(few, **{k: v for k, v in variant.items() if k != "name"}), store, settings
        ).frame
        name = variant["name"]
        own = frame[["feature_id", "year"] + [c for c in frame.columns if c.startswith(f"{name}__")]]
        own = own.rename(columns={c: c.removeprefix(f"{name}__") for c in own.columns})
        own = own.dropna(subset=["season_complete"])
        merged = alone.merge(own, on=["feature_id", "year"], suffixes=("", "_v"), validate="one_to_one")
        assert len(merged) == len(alone)
        for column in alone.columns:
            if column in ("feature_id", "year", "coverage", "cells", "area_km2"):
                continue
            left, right = merged[column], merged[f"{column}_v"]
            assert left.astype(str).tolist() == right.astype(str).tolist(), (name, column)
    entries = combined.provenance["variants"]
    assert [e["name"] for e in entries] == [v["name"] for v in VARIANTS]
    assert all(e["fingerprint"] == store.fingerprint for e in entries)
    assert entries[1]["request"]["baseline"] == {"start": 2001, "end": 2020}
    _, _, headers = encode(combined, "csv")  # CSV has no metadata: each variant's fingerprint in a header
    assert headers["X-Wxshock-Variants"].split(", ")[1] == f"recent=demo@{store.fingerprint}"


def test_variants_long_layout_has_a_variant_column(store, settings, few) -> None:
    frame = run(_season_request(few, variants=VARIANTS[:2], layout="long"), store, settings).frame
    assert frame.columns[:4].tolist() == ["feature_id", "year", "variant", "indicator"]
    assert frame["variant"].cat.categories.tolist() == ["main", "recent"]
    main = frame[frame["variant"] == "main"]
    recent = frame[frame["variant"] == "recent"]
    assert (main["value"].to_numpy() == recent["value"].to_numpy()).all()  # same values, other normal
    assert not np.allclose(main["z"].to_numpy(), recent["z"].to_numpy(), equal_nan=True)


MANY_INDICATORS = [
    "prcp_total", "wet_days", "tmean", "tmax_mean", "tmin_mean", "cdd", "gdd", "edd", "spi", "spei", "cwd",
    "rx1day", "rx5day", "r10mm", "r20mm", "sdii", "r95ptot", "txx", "tnn", "su", "fd", "tr", "id", "dtr",
]  # fmt: skip


def test_wide_variants_of_many_indicators_are_one_frame(store, settings, few) -> None:
    """Two variants of 24 indicators (over 100 categorical and Int64 columns): the wide table is built at
    once, without pandas' warning about a fragmented frame; r95ptot passes the variants' dry run on
    missing values (an IndexError before) and has values."""
    two = {**few, "features": few["features"][:2]}
    variants = [{"name": "a"}, {"name": "b", "baseline": {"start": 2001, "end": 2020}}]
    with warnings.catch_warnings():
        warnings.simplefilter("error", pd.errors.PerformanceWarning)
        frame = run(
            _season_request(two, indicators=MANY_INDICATORS, variants=variants), store, settings
        ).frame
    assert frame.columns[:2].tolist() == ["feature_id", "year"] and frame.columns[-1] == "notes"
    assert len(frame.columns) > 200 and frame["b__r95ptot"].notna().any()


def test_event_variants_with_a_weighting_of_their_own(store, settings, few) -> None:
    variants = [{"name": "area"}, {"name": "pop", "weighting": {"layer": "population"}}]
    with _Computes() as computes:
        combined = run(_request(few, variants=variants), store, settings).frame
    assert computes.count == 2  # one aggregation per weighting
    alone = run(_request(few, weighting={"layer": "population"}), store, settings).frame
    assert combined["pop__prior_year__prcp_total"].tolist() == alone["prior_year__prcp_total"].tolist()
    assert "pop__coverage" in combined.columns and "coverage" not in combined.columns


@pytest.fixture(scope="module")
def second_product(tmp_path_factory: pytest.TempPathFactory, tiny_demo: Path):
    """Another invented product over the western part of the demo region only, 0.5 degC warmer."""
    path = write_west_product(tmp_path_factory.mktemp("second") / "west.zarr")
    return open_store(path, name="west")


def test_variant_on_another_dataset(store, second_product, settings, tiny_communities) -> None:
    west = west_communities(tiny_communities)
    assert west["features"]
    stores = {"demo": store, "west": second_product}
    body = _season_request(west, variants=[{"name": "demo"}, {"name": "west", "dataset": "west"}])
    with _Computes() as computes:
        result = run(body, store, settings, stores=stores)
    assert computes.count == 2  # each product aggregated once
    entries = {e["name"]: e for e in result.provenance["variants"]}
    assert entries["west"]["fingerprint"] == second_product.fingerprint != entries["demo"]["fingerprint"]
    assert entries["west"]["dataset"] == "west"
    frame = result.frame
    alone = run(_season_request(west, dataset="west"), second_product, settings).frame
    assert frame["west__tmean"].tolist() == alone["tmean"].tolist()
    assert (frame["west__tmean"] > frame["demo__tmean"]).mean() > 0.9  # the warmer product
    assert "west__coverage" in frame.columns  # per product


def test_features_outside_one_product_follow_invalid_features(
    store, second_product, settings, tiny_communities
) -> None:
    import inspect

    from service.geometry import parse_features

    if "invalid" not in inspect.signature(parse_features).parameters:
        pytest.skip("service.geometry cannot skip features yet (the invalid='skip' API of issue 11)")
    stores = {"demo": store, "west": second_product}
    body = _season_request(
        tiny_communities,
        variants=[{"name": "demo"}, {"name": "west", "dataset": "west"}],
        invalid_features="skip",
    )
    result = run(body, store, settings, stores=stores)
    entries = {e["name"]: e for e in result.provenance["variants"]}
    skipped = entries["west"]["request"]["features"]["skipped"]
    assert skipped and not entries["demo"]["request"]["features"]["skipped"]
    frame = result.frame
    gone = frame[frame["feature_id"] == skipped[0]["feature_id"]]
    assert gone["west__tmean"].isna().all() and gone["demo__tmean"].notna().all()
    assert (gone["west__notes"] == "feature_skipped").all()
    assert any(
        w["code"] == "feature_skipped" and w["reason"].startswith("variant 'west'") for w in result.warnings
    )
    with pytest.raises(RequestError, match="variant 'west'"):
        run(body.model_copy(update={"invalid_features": "fail"}), store, settings, stores=stores)


def test_lag_values_of_seasons(store, settings, few) -> None:
    body = _season_request(few, lags=[0, 1, 3], lag_values=True, years={"start": 1995, "end": 2005})
    frame = run(body, store, settings).frame
    columns = frame.columns.tolist()
    assert columns.index("tmean_lag1") == columns.index("tmean_class_lag1") + 1
    full = run(_season_request(few, years={"start": 1991, "end": 2005}), store, settings).frame
    value = full.set_index(["feature_id", "year"])["tmean"]
    for row in frame.itertuples():
        assert row.tmean_lag1 == value[(row.feature_id, row.year - 1)]
        assert row.tmean_lag3 == value[(row.feature_id, row.year - 3)]
    long = run(body.model_copy(update={"layout": "long"}), store, settings).frame
    assert "value_lag3" in long.columns
    one = long[(long["indicator"] == "tmean") & (long["year"] == 2000)].iloc[0]
    assert one["value_lag3"] == value[(one["feature_id"], 1997)]


def test_variant_with_aggregation_cells_equals_the_request_alone(store, settings, few) -> None:
    variants = [{"name": "series"}, {"name": "cells", "aggregation": "cells"}]
    combined = run(
        _season_request(few, variants=variants, years={"start": 2000, "end": 2004}), store, settings
    )
    alone = run(
        _season_request(few, aggregation="cells", years={"start": 2000, "end": 2004}), store, settings
    ).frame
    frame = combined.frame
    assert frame["cells__tmean"].tolist() == alone["tmean"].tolist()
    assert frame["cells__prcp_total_z"].tolist() == alone["prcp_total_z"].tolist()
    series = run(_season_request(few, years={"start": 2000, "end": 2004}), store, settings).frame
    assert frame["series__tmean"].tolist() == series["tmean"].tolist()
    entries = {e["name"]: e for e in combined.provenance["variants"]}
    assert entries["cells"]["request"]["aggregation"] == "cells"


def test_events_refuse_aggregation_cells(few) -> None:
    with pytest.raises(RequestError, match="aggregation 'cells' is not available with 'events'"):
        _request(few, aggregation="cells")
    with pytest.raises(RequestError, match="variant 'c' gives aggregation 'cells'"):
        _request(few, variants=[{"name": "c", "aggregation": "cells"}])


# --- on a dask cluster: the batch path (one graph per feature batch, only its tables come back) -----------------


@pytest.mark.cluster
@pytest.mark.slow
def test_events_and_variants_on_the_cluster_send_tables_and_give_the_same_rows(
    store, few, tiny_communities, dask_cluster
) -> None:
    """Events and variants run as one graph per feature batch on the workers, like the season batch: the
    server gets one table task back per batch (no daily series), and the rows are the threaded run's."""
    from distributed import Client

    dask_cluster.ensure_workers()
    remote = Settings(scheduler=dask_cluster.address)
    local = Settings(threads=2, scheduler=None)
    some = {**tiny_communities, "features": tiny_communities["features"][:12]}
    bodies = [
        _request(some),
        _request(
            some, variants=[{"name": "main"}, {"name": "recent", "baseline": {"start": 1991, "end": 2020}}]
        ),
        _season_request(some, variants=VARIANTS),
    ]
    with Client(dask_cluster.address, set_as_default=False) as observer:
        workers = set(observer.scheduler_info(n_workers=-1)["workers"])

        def sent() -> list[str]:
            logs = observer.run(lambda dask_worker: list(dask_worker.transfer_outgoing_log))
            return [k for log in logs.values() for e in log if e.get("who") not in workers for k in e["keys"]]

        for body in bodies:
            before = len(sent())
            on_cluster = run(body, store, remote, batch_size=5)
            keys = sent()[before:]
            on_threads = run(body, store, local, batch_size=5)
            assert on_cluster.frame.equals(on_threads.frame)
            assert len(keys) == 3 and all(str(k).startswith("wxshock-table-") for k in keys), keys
