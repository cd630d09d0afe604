"""The indicator table: request resolution, the output contract, hand-worked rows, properties.

The indicators used here are registered by this module only (for the duration of each test), so the table
is tested independently of the value modules; results are worked out by hand.
"""

from __future__ import annotations

import io
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.errors import OutOfRangeError, RequestError, UnknownIndicatorError
from service.indicators import base
from service.indicators.base import Indicator, Parameter
from service.indicators.table import (
    DEFAULT_INDICATORS,
    add_warning_notes,
    compute_table,
    output_columns,
    resolve_request,
)
from service.schemas import IndicatorRequest
from service.warning_codes import WARNING_CODES, warning

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_daily import make_daily, with_values  # noqa: E402


def _season_total(cube, baseline, params):
    total = np.nansum(cube.prcp, axis=-1)
    return np.where(np.isnan(cube.prcp).all(axis=-1), np.nan, total)


def _hot_days(cube, baseline, params):
    return np.where(np.isnan(cube.tmax).all(axis=-1), np.nan, (cube.tmax > params["threshold"]).sum(axis=-1))


def _mean_tmax(cube, baseline, params):
    return np.nanmean(cube.tmax, axis=-1)


def _standard_index(cube, baseline, params):
    # stands in for SPI: the season's mean precipitation minus 2, read as a standard-normal deviate
    return np.nanmean(cube.prcp, axis=-1) - 2.0


TEST_INDICATORS = [
    Indicator(
        "t_prcp",
        "mm",
        "season total",
        "test",
        "precipitation",
        _season_total,
        ("prcp",),
        "sum",
        percent_of_normal=True,
    ),
    Indicator(
        "t_hot",
        "days",
        "days with tmax above threshold",
        "test",
        "count",
        _hot_days,
        ("tmax",),
        "count",
        parameters={"threshold": Parameter(30.0, "degC", "threshold", minimum=-50.0, maximum=60.0)},
    ),
    Indicator("t_tmax", "degC", "mean tmax", "test", "temperature", _mean_tmax, ("tmax",), "mean"),
    Indicator(
        "t_index",
        "1",
        "standardized stand-in",
        "test",
        "drought",
        _standard_index,
        ("prcp",),
        "standardized",
        standardized=True,
    ),
]


@pytest.fixture(autouse=True)
def _test_indicators(monkeypatch):
    """Register this module's indicators for one test, removed again afterwards."""
    for indicator in TEST_INDICATORS:
        monkeypatch.setitem(base._REGISTRY, indicator.name, indicator)


FEATURE = {"type": "Feature", "geometry": None, "properties": {}}


def _request(**fields) -> IndicatorRequest:
    return IndicatorRequest(features=FEATURE, **fields)


def _january_daily(per_year: dict[str, list[float]], start: int = 1980, tmax: float = 25.0):
    """Features whose January precipitation is constant within each year (mm/day), 0 outside January."""
    n_year = len(next(iter(per_year.values())))
    daily = make_daily(
        f"{start}-01-01", f"{start + n_year - 1}-12-31", n_features=len(per_year), prcp=0.0, tmax=tmax
    )
    prcp = np.zeros_like(daily.prcp)
    january = daily.month == 1
    for f, values in enumerate(per_year.values()):
        prcp[f, january] = np.asarray(values)[daily.year[january] - start]
    return with_values(daily, prcp=prcp), list(per_year)


def test_hand_worked_rows():
    daily, ids = _january_daily({"a": [1, 2, 3, 4, 5, 1, 2, 3, 4, 5], "b": [0.0] * 10})
    request = _request(
        season={"months": [1]},
        baseline={"start": 1980, "end": 1984},
        years={"start": 1981, "end": 1989},
        indicators=["t_prcp"],
        lags=[0, 1],
    )
    table = compute_table(daily, ids, [{}, {}], request)
    frame = table.frame
    assert len(frame) == 2 * 9
    a = frame[frame.feature_id == "a"].set_index("year")
    # totals 31 x mm/day; baseline 1980-1984 totals 31..155: mean 93, sample sd 31 sqrt(2.5) = 49.0153
    assert a.loc[1985, "t_prcp"] == 31.0
    assert a.loc[1985, "t_prcp_z"] == pytest.approx((31 - 93) / (31 * np.sqrt(2.5)))
    assert a.loc[1985, "t_prcp_z"] == pytest.approx(-1.264911, abs=1e-6)
    assert a.loc[1985, "t_prcp_class"] == -1 and a.loc[1985, "t_prcp_label"] == "drier"
    assert a.loc[1989, "t_prcp_class"] == 1 and a.loc[1989, "t_prcp_label"] == "wetter"
    assert a.loc[1987, "t_prcp_class"] == 0 and a.loc[1987, "t_prcp_label"] == "near normal"
    assert a.loc[1985, "t_prcp_pct_normal"] == pytest.approx(100 * 31 / 93)
    assert a.loc[1986, "t_prcp_z_lag1"] == a.loc[1985, "t_prcp_z"]
    assert a.loc[1986, "t_prcp_class_lag1"] == -1
    assert (a["season_complete"] == 1.0).all()
    # community b: 0 mm in every baseline season -> no spread: null z, class, label, percent; a warning
    b = frame[frame.feature_id == "b"]
    assert (b["t_prcp"] == 0.0).all()
    assert b["t_prcp_z"].isna().all() and b["t_prcp_class"].isna().all() and b["t_prcp_label"].isna().all()
    assert b["t_prcp_pct_normal"].isna().all()
    [warning] = table.warnings
    assert warning["feature_id"] == "b" and warning["indicator"] == "t_prcp"
    assert "no spread" in warning["reason"] and "1981-1989" in warning["reason"]
    assert np.isfinite(frame["t_prcp_z"].dropna()).all()


def test_columns_and_dtypes_are_the_contract():
    daily, ids = _january_daily({"a": list(range(1, 11))})
    request = _request(
        season={"months": [1]},
        indicators=["t_prcp", "t_tmax", "t_index", {"name": "t_hot", "threshold": 20}],
        lags=[0, 2],
        sequences=[[0, 1]],
        pairs=[["t_prcp", "t_tmax"]],
        spells=[{"name": "dry_hot", "window": 3, "when": [{"indicator": "t_prcp", "class_max": -1}]}],
    )
    frame = compute_table(daily, ids, [{}], request).frame
    per = ["", "_z", "_class", "_label"]
    lag = ["_z_lag2", "_class_lag2", "_seq0_1"]
    expected = (
        ["feature_id", "year"]
        + [f"t_prcp{s}" for s in per + ["_pct_normal"] + lag]
        + [f"t_tmax{s}" for s in per + lag]
        + [f"t_index{s}" for s in per + ["_category"] + lag]
        + [f"t_hot_threshold20{s}" for s in per + lag]
        + ["t_prcp_and_t_tmax", "dry_hot_run", "dry_hot_count", "season_complete", "notes"]
    )
    assert list(frame.columns) == expected
    resolved = resolve_request(request, daily)
    assert output_columns(resolved) == expected
    dtypes = {c: str(t) for c, t in frame.dtypes.items()}
    assert dtypes["feature_id"] == dtypes["notes"] == "string" and dtypes["year"] == "int64"
    assert dtypes["t_prcp"] == dtypes["t_prcp_z"] == dtypes["t_prcp_z_lag2"] == "float64"
    assert dtypes["t_prcp_class"] == dtypes["t_prcp_class_lag2"] == dtypes["dry_hot_run"] == "Int64"
    assert dtypes["t_prcp_label"] == dtypes["t_index_category"] == dtypes["t_prcp_and_t_tmax"] == "category"
    assert list(frame["t_prcp_label"].cat.categories) == [
        "much drier",
        "drier",
        "near normal",
        "wetter",
        "much wetter",
    ]
    assert frame["t_prcp_label"].cat.ordered
    # default years: the baseline 1980-1989 and the deepest lag 2 (also via the sequence) allow 1982-1989
    assert frame["year"].tolist() == list(range(1982, 1990))


def test_same_request_same_bytes():
    daily, ids = _january_daily({"a": [1, 2, 3, 4, 5, 1, 2, 3, 4, 5], "b": [5, 4, 3, 2, 1, 1, 2, 3, 4, 9]})
    request = _request(
        season={"months": [1]}, indicators=["t_prcp", "t_tmax"], lags=[0, 1], sequences=[[0, 1]]
    )

    def parquet_bytes() -> bytes:
        buf = io.BytesIO()
        compute_table(daily, ids, [{}, {}], request).frame.to_parquet(buf, index=False)
        return buf.getvalue()

    assert parquet_bytes() == parquet_bytes()


def test_standardized_indicator_is_its_own_z_and_has_wmo_category():
    daily, ids = _january_daily({"a": [2.0, 3.5, 0.4, 2.0, 2.0, 4.1, 0.0, 1.2, 2.9, 2.0]})
    frame = compute_table(daily, ids, [{}], _request(season={"months": [1]}, indicators=["t_index"])).frame
    row = frame.set_index("year")
    # monthly means are the daily rate over January only: value = rate - 2
    assert row.loc[1981, "t_index"] == pytest.approx(1.5) and row.loc[1981, "t_index_z"] == pytest.approx(1.5)
    assert row.loc[1981, "t_index_category"] == "very wet" and row.loc[1981, "t_index_label"] == "wetter"
    assert (
        row.loc[1982, "t_index"] == pytest.approx(-1.6)
        and row.loc[1982, "t_index_category"] == "severely dry"
    )
    assert row.loc[1982, "t_index_class"] == -1 and row.loc[1982, "t_index_label"] == "drier"
    assert row.loc[1986, "t_index_category"] == "extremely dry" and row.loc[1986, "t_index_class"] == -2


def test_parameterised_names_do_not_collide():
    daily = make_daily("1980-01-01", "1989-12-31", tmax=np.linspace(10, 40, 3653))
    request = _request(
        indicators=["t_hot", {"name": "t_hot", "threshold": 20}, {"name": "t_hot", "threshold": 30}]
    )
    with pytest.raises(RequestError, match=r"indicators\[2\]: 't_hot'.*already requested as indicators\[0\]"):
        resolve_request(request, daily)
    request = _request(indicators=["t_hot", {"name": "t_hot", "threshold": 20.5}])
    resolved = resolve_request(request, daily)
    assert [i if isinstance(i, str) else i.model_dump() for i in resolved.indicators] == [
        {"name": "t_hot", "threshold": 30.0},
        {"name": "t_hot", "threshold": 20.5},
    ]
    frame = compute_table(daily, ["a"], [{}], request).frame
    assert "t_hot" in frame and "t_hot_threshold20p5" in frame
    assert (frame["t_hot_threshold20p5"] >= frame["t_hot"]).all() and frame[
        "t_hot_threshold20p5"
    ].sum() > frame["t_hot"].sum()
    # the plain name is the default-parameter column here, so a pair may use it beside the other column
    pair = resolve_request(request.model_copy(update={"pairs": [("t_hot", "t_hot_threshold20p5")]}), daily)
    assert pair.pairs == [("t_hot", "t_hot_threshold20p5")]
    # with two non-default instances the plain name is ambiguous
    twice = _request(indicators=[{"name": "t_hot", "threshold": 20}, {"name": "t_hot", "threshold": 25}])
    with pytest.raises(RequestError, match=r"pairs\[0\]\[0\]: 't_hot' is requested more than once"):
        resolve_request(twice.model_copy(update={"pairs": [("t_hot", "t_hot_threshold25")]}), daily)


@pytest.mark.parametrize(
    ("fields", "error", "match"),
    [
        ({"indicators": ["nope"]}, UnknownIndicatorError, "unknown indicator 'nope'"),
        ({"indicators": [{"name": "t_hot", "limit": 3}]}, UnknownIndicatorError, "has no parameter 'limit'"),
        (
            {"indicators": [{"name": "t_hot", "threshold": 99}]},
            UnknownIndicatorError,
            "allowed -50.0 to 60.0",
        ),
        (
            {"baseline": {"start": 1975, "end": 1984}},
            OutOfRangeError,
            "baseline 1975-1984 is outside.*1980-1989",
        ),
        ({"baseline": {"start": 1985, "end": 1995}}, OutOfRangeError, "choose a baseline within 1980-1989"),
        (
            {"years": {"start": 1980, "end": 1989}, "lags": [0, 2]},
            OutOfRangeError,
            "needs season-year 1978.*first year that can be served is 1982",
        ),
        (
            {"years": {"start": 1984, "end": 1989}, "baseline": {"trailing": 5}},
            OutOfRangeError,
            "first year that can be served is 1985",
        ),
        (
            {"years": {"start": 1985, "end": 1990}},
            OutOfRangeError,
            "last season-year of season year in the data is 1989",
        ),
        (
            {"baseline": {"trailing": 10}},
            OutOfRangeError,
            "trailing baseline of 10 season-years leaves no season",
        ),
        (
            {"pairs": [["t_prcp", "t_gone"]]},
            RequestError,
            r"pairs\[0\]\[1\]: 't_gone' is not among the requested",
        ),
        ({"pairs": [["t_prcp", "t_prcp"]]}, RequestError, "with itself"),
        (
            {"spells": [{"name": "s", "when": [{"indicator": "t_gone", "class_max": -1}]}]},
            RequestError,
            r"spells\[0\]\.when\[0\]\.indicator: 't_gone'",
        ),
        (
            {
                "spells": [{"name": "t_prcp", "when": [{"indicator": "t_prcp", "z_max": -1}]}],
                "indicators": ["t_prcp"],
                "pairs": [],
            },
            None,
            "",
        ),
        ({"indicators": []}, RequestError, "'indicators' is empty"),
    ],
)
def test_request_errors(fields, error, match):
    daily = make_daily("1980-01-01", "1989-12-31")
    fields = {"indicators": ["t_prcp", "t_tmax"], **fields}
    if error is None:
        resolve_request(_request(**fields), daily)
        return
    with pytest.raises(error, match=match):
        resolve_request(_request(**fields), daily)


def test_defaults_filled_and_resolution_is_idempotent():
    daily = make_daily("1980-01-01", "2001-12-31")
    request = _request(indicators=["t_prcp", "t_tmax"], lags=[0, 3], baseline={"trailing": 5})
    resolved = resolve_request(request, daily)
    assert (resolved.years.start, resolved.years.end) == (1988, 2001)  # 1980 + 5 (trailing) + 3 (lag)
    assert resolved.max_missing_share == 0.10
    assert resolved.pairs == []
    assert resolve_request(resolved, daily) == resolved
    fixed = resolve_request(_request(indicators=["t_prcp"]), daily)
    assert (fixed.baseline.start, fixed.baseline.end) == (1980, 2001)  # all 22 (fewer than 30) season-years
    assert (fixed.years.start, fixed.years.end) == (1980, 2001)
    longer = make_daily("1960-01-01", "2001-12-31")
    fixed = resolve_request(_request(indicators=["t_prcp"]), longer)
    assert (fixed.baseline.start, fixed.baseline.end) == (1960, 1989)  # the first 30 season-years


def test_default_pair_only_when_both_requested_and_pairs_not_given():
    daily = make_daily("1980-01-01", "1989-12-31")
    for name in ("prcp_total", "tmean"):
        if name not in base._REGISTRY:
            pytest.skip("the value modules are not installed")
    assert resolve_request(_request(indicators=["prcp_total", "tmean"]), daily).pairs == [
        ("prcp_total", "tmean")
    ]
    assert resolve_request(_request(indicators=["prcp_total", "tmean"], pairs=[]), daily).pairs == []
    assert resolve_request(_request(indicators=["prcp_total"]), daily).pairs == []


def test_default_indicator_set_is_in_the_catalog():
    import service.indicators  # noqa: F401  (the package imports every value module)

    missing = [n for n in DEFAULT_INDICATORS if n not in base._REGISTRY]
    assert not missing, f"default indicators not in the catalog: {missing}"


def test_incomplete_season_is_null_with_reason():
    daily, ids = _january_daily({"a": [1, 2, 3, 4, 5, 1, 2, 3, 4, 5]})
    prcp = daily.prcp.copy()
    prcp[0, (daily.year == 1986) & (daily.month == 1) & (daily.day <= 5)] = np.nan  # 5 of 31 days: 16 %
    table = compute_table(
        with_values(daily, prcp=prcp), ids, [{}], _request(season={"months": [1]}, indicators=["t_prcp"])
    )
    row = table.frame.set_index("year").loc[1986]
    assert np.isnan(row["t_prcp"]) and pd.isna(row["t_prcp_class"])
    assert row["season_complete"] == pytest.approx(26 / 31)
    [warning] = table.warnings
    assert warning["year"] == 1986 and warning["feature_id"] == "a" and "16.1%" in warning["reason"]


def test_spells_over_seasons():
    # totals alternate around the baseline so classes are -1 (1, 3 mm/day) or +1 (5 mm/day) or 0
    daily, ids = _january_daily({"a": [1, 5, 3, 5, 1, 1, 1, 5, 1, 1]})
    request = _request(
        season={"months": [1]},
        indicators=["t_prcp"],
        spells=[{"name": "dry", "window": 3, "when": [{"indicator": "t_prcp", "z_max": -0.5}]}],
    )
    frame = compute_table(daily, ids, [{}], request).frame
    z = frame["t_prcp_z"].to_numpy()
    met = (z <= -0.5).astype(int)
    run = []
    for m in met:
        run.append(run[-1] + 1 if (m and run) else int(m))
    assert frame["dry_run"].tolist() == run
    counts = frame["dry_count"].tolist()
    assert pd.isna(counts[0]) and pd.isna(counts[1])
    assert counts[2:] == [int(met[t - 2 : t + 1].sum()) for t in range(2, 10)]


def test_property_seasons_in_one_table():
    daily = make_daily("1980-01-01", "1991-12-31", n_features=2, prcp=1.0)
    props = [{"s": [1]}, {"s": {"start": "12-01", "end": "01-31"}}]
    table = compute_table(
        daily,
        ["jan", "decjan"],
        props,
        _request(season={"property": "s"}, indicators=["t_prcp"], baseline={"start": 1981, "end": 1990}),
    )
    frame = table.frame.set_index(["feature_id", "year"])
    # the Dec-Jan season can serve from 1981 (Dec 1980 - Jan 1981); both features get 1981-1991
    assert frame.loc["jan", "t_prcp"].tolist() == [31.0] * 11
    assert frame.loc["decjan", "t_prcp"].tolist() == [62.0] * 11
    assert table.frame["feature_id"].tolist()[:2] == ["jan", "jan"]


def test_long_layout_matches_wide():
    daily, ids = _january_daily({"a": [1, 2, 3, 4, 5, 1, 2, 3, 4, 5], "b": [2, 2, 3, 1, 5, 4, 2, 3, 9, 5]})
    fields = dict(
        season={"months": [1]},
        indicators=["t_prcp", "t_index"],
        lags=[0, 1],
        sequences=[[0, 1]],
        pairs=[["t_prcp", "t_index"]],
    )
    wide = compute_table(daily, ids, [{}, {}], _request(**fields)).frame
    long = compute_table(daily, ids, [{}, {}], _request(layout="long", **fields)).frame
    assert len(long) == 2 * len(wide)
    assert list(long.columns[:5]) == ["feature_id", "year", "indicator", "value", "z"]
    sub = long[long.indicator == "t_index"].reset_index(drop=True)
    np.testing.assert_array_equal(sub["value"], wide["t_index"])
    assert sub["category"].astype(str).tolist() == wide["t_index_category"].astype(str).tolist()
    assert sub["class_lag1"].equals(wide["t_index_class_lag1"])
    assert sub["t_prcp_and_t_index"].astype(str).tolist() == wide["t_prcp_and_t_index"].astype(str).tolist()
    prcp = long[long.indicator == "t_prcp"].reset_index(drop=True)
    assert prcp["label"].astype(str).tolist() == wide["t_prcp_label"].astype(str).tolist()
    assert prcp["seq0_1"].astype(str).tolist() == wide["t_prcp_seq0_1"].astype(str).tolist()
    assert prcp["category"].isna().all()


def test_no_features_gives_empty_frame_with_columns():
    daily = make_daily("1980-01-01", "1989-12-31", n_features=0)
    frame = compute_table(daily, [], [], _request(indicators=["t_prcp"])).frame
    assert len(frame) == 0 and "t_prcp_label" in frame


@settings(max_examples=25, deadline=None)
@given(
    totals=st.lists(st.floats(0, 50, allow_nan=False), min_size=8, max_size=8),
    k=st.integers(1, 3),
    trailing=st.booleans(),
)
def test_lag_column_equals_the_season_k_years_earlier(totals, k, trailing):
    daily, ids = _january_daily({"a": totals, "b": totals[::-1]}, start=1990)
    baseline = {"trailing": 3} if trailing else {"start": 1990, "end": 1993}
    request = _request(season={"months": [1]}, indicators=["t_prcp"], lags=[0, k], baseline=baseline)
    frame = compute_table(daily, ids, [{}, {}], request).frame.set_index(["feature_id", "year"])
    first = 1990 + k + (3 if trailing else 0)
    assert frame.index.get_level_values("year").min() == first
    for fid in ids:
        for year in range(first + k, 1998):
            now, before = frame.loc[(fid, year)], frame.loc[(fid, year - k)]
            assert now[f"t_prcp_z_lag{k}"] == before["t_prcp_z"] or (
                np.isnan(now[f"t_prcp_z_lag{k}"]) and np.isnan(before["t_prcp_z"])
            )
            assert now[f"t_prcp_class_lag{k}"] is before["t_prcp_class"] or (
                now[f"t_prcp_class_lag{k}"] == before["t_prcp_class"]
            )


def test_feature_blocks_give_the_same_table(monkeypatch):
    from service.indicators import table as table_module

    daily, ids = _january_daily({f"f{i}": list(np.arange(10.0) * (i + 1) % 7) for i in range(5)})
    props = [{"s": [1]}, {"s": [1, 2]}, {"s": [1]}, {"s": [1]}, {"s": [1, 2]}]
    request = _request(season={"property": "s"}, indicators=["t_prcp", "t_tmax"], lags=[0, 1])
    whole = compute_table(daily, ids, props, request)
    monkeypatch.setattr(table_module, "FEATURE_BLOCK_ELEMENTS", 2 * daily.year.size)  # blocks of 2 features
    blocks = compute_table(daily, ids, props, request)
    pd.testing.assert_frame_equal(whole.frame, blocks.frame)
    assert whole.warnings == blocks.warnings


def test_default_set_and_the_issue_example_with_the_real_catalog():
    import service.indicators  # noqa: F401  (the package imports every value module)

    rng = np.random.default_rng(11)
    daily = make_daily("1980-01-01", "1993-12-31", n_features=3, latitude=-12.0)
    shape = daily.prcp.shape
    daily = with_values(
        daily,
        tmax=28 + rng.normal(0, 3, shape),
        tmin=17 + rng.normal(0, 2, shape),
        prcp=np.where(rng.random(shape) < 0.4, rng.gamma(0.8, 9.0, shape), 0.0),
    )
    ids = ["v-1", "v-2", "v-3"]
    frame = compute_table(daily, ids, [{}] * 3, _request()).frame
    assert {
        "spi_category",
        "prcp_total_pct_normal",
        "gdd",
        "edd",
        "cdd_label",
        "prcp_total_and_tmean",
    } <= set(frame)
    assert frame["year"].min() == 1980 and len(frame) == 3 * 14
    assert frame["spi_z"].equals(frame["spi"])
    # the request of the issue, on the same series
    example = _request(
        years={"start": 1991, "end": 1993},
        season={"months": [5, 6, 7, 8, 9, 10]},
        baseline={"start": 1980, "end": 1990},
        indicators=[
            "prcp_total",
            "tmean",
            "cdd",
            {"name": "gdd", "base": 10, "cap": 30},
            {"name": "edd"},
            "spei",
        ],
        lags=[0, 1, 2],
        pairs=[["prcp_total", "tmean"]],
        sequences=[[1, 2]],
        spells=[
            {
                "name": "dry_hot",
                "window": 5,
                "when": [
                    {"indicator": "prcp_total", "class_max": -1},
                    {"indicator": "tmean", "class_min": 1},
                ],
            }
        ],
    )
    table = compute_table(daily, ids, [{}] * 3, example)
    assert table.frame["year"].tolist() == [1991, 1992, 1993] * 3
    assert {"spei_category", "gdd_seq1_2", "dry_hot_run", "dry_hot_count", "tmean_class_lag2"} <= set(
        table.frame
    )
    assert table.frame["tmean"].notna().all() and table.frame["season_complete"].eq(1.0).all()


def test_resolve_with_a_date_mapping_and_a_given_calendar():
    daily = make_daily("1980-01-01", "1991-12-30", calendar="360_day")
    dates = {"year": daily.year, "month": daily.month, "day": daily.day, "dayofyear": daily.dayofyear}
    request = _request(indicators=["t_prcp"], season={"months": [12, 1, 2]})
    resolved = resolve_request(request, dates, calendar="360_day")
    # December to February (to Feb 30 in 360_day): the first whole season-year is 1981, the last 1991
    assert (resolved.years.start, resolved.years.end) == (1981, 1991)
    table = compute_table(daily, ["a"], [{}], resolved)
    assert table.frame["t_prcp"].tolist() == [2.0 * 90] * 11
    assert resolve_request(request, dates) == resolved  # the calendar inferred from Feb 30


def test_spell_count_null_around_an_unknown_season_is_explained():
    daily, ids = _january_daily({"a": [1, 5, 3, 5, 1, 1, 1, 5, 1, 1]})
    prcp = daily.prcp.copy()
    prcp[0, (daily.year == 1985) & (daily.month == 1)] = np.nan  # January 1985 missing
    request = _request(
        season={"months": [1]},
        indicators=["t_prcp"],
        spells=[{"name": "dry", "window": 3, "when": [{"indicator": "t_prcp", "z_max": -0.5}]}],
    )
    table = compute_table(with_values(daily, prcp=prcp), ids, [{}], request)
    frame = table.frame.set_index("year")
    assert frame.loc[[1985, 1986, 1987], "dry_count"].isna().all()
    assert frame.loc[1988, "dry_count"] >= 0 and pd.isna(frame.loc[1985, "dry_run"])
    assert frame.loc[1986, "dry_run"] in (0, 1)  # the run starts again after the unknown season
    reasons = [w["reason"] for w in table.warnings if w["feature_id"] == "a"]
    assert any("dry_count left null for 1985-1987" in r for r in reasons)
    assert any("1980-1981" in w["reason"] and w["feature_id"] is None for w in table.warnings)


def test_notes_carry_the_codes_of_each_rows_warnings_in_both_layouts():
    # b is 0 every January: no spread for t_prcp; a misses 2 of 31 tmax days in 1986: partial for t_tmax only
    daily, ids = _january_daily({"a": [1, 2, 3, 4, 5, 1, 2, 3, 4, 5], "b": [0.0] * 10})
    tmax = np.broadcast_to(20.0 + (daily.year - 1980) % 4, daily.tmax.shape).copy()  # some spread
    tmax[0, (daily.year == 1986) & (daily.month == 1) & (daily.day <= 2)] = np.nan
    request = _request(
        season={"months": [1]}, indicators=["t_prcp", "t_tmax"], baseline={"start": 1980, "end": 1984}
    )
    table = compute_table(with_values(daily, tmax=tmax), ids, [{}, {}], request)
    for w in table.warnings:
        assert set(w) == {"code", "feature_id", "year", "indicator", "reason"} and w["code"] in WARNING_CODES
    wide = table.frame.set_index(["feature_id", "year"])
    assert wide.loc[("a", 1986), "notes"] == "partial_season"  # t_tmax's days only
    assert wide.loc[("a", 1987), "notes"] == ""
    assert (wide.loc["b", "notes"] == "no_spread").all()
    # completeness counts the row's indicators' variables: a tmax gap does not touch precipitation
    assert wide.loc[("a", 1986), "t_prcp"] == 62.0 and wide.loc[("a", 1986), "t_tmax"] == 22.0  # 31 x 2 mm
    [partial] = [w for w in table.warnings if w["code"] == "partial_season"]
    assert (partial["feature_id"], partial["year"], partial["indicator"]) == ("a", 1986, "t_tmax")
    assert "6.5% missing" in partial["reason"]  # 2 of 31 days
    long = compute_table(
        with_values(daily, tmax=tmax), ids, [{}, {}], request.model_copy(update={"layout": "long"})
    )
    rows = long.frame.set_index(["feature_id", "year", "indicator"])
    assert rows.loc[("a", 1986, "t_tmax"), "notes"] == "partial_season"
    assert rows.loc[("a", 1986, "t_prcp"), "notes"] == ""
    assert rows.loc[("a", 1986, "t_tmax"), "season_complete"] == pytest.approx(29 / 31)
    assert rows.loc[("a", 1986, "t_prcp"), "season_complete"] == 1.0
    assert (
        rows.loc[("b", 1986, "t_prcp"), "notes"] == "no_spread"
        and rows.loc[("b", 1986, "t_tmax"), "notes"] == ""
    )


def test_warnings_made_after_the_table_reach_the_notes_of_their_rows():
    daily, ids = _january_daily({"a": [1, 2, 3, 4, 5, 1], "b": [2, 2, 3, 1, 5, 1]})
    frame = compute_table(daily, ids, [{}, {}], _request(season={"months": [1]}, indicators=["t_prcp"])).frame
    frame = frame.assign(coverage=1.0)  # a column added after the table: notes move to the end again
    later = [
        warning("repaired_geometry", "repaired", feature_id="b"),
        warning("feature_skipped", "skipped", feature_id="a", year=1982),
    ]
    before = frame.copy()
    noted = add_warning_notes(frame, later).set_index(["feature_id", "year"])
    pd.testing.assert_frame_equal(frame, before)  # the frame given is left as it was
    unwarned = add_warning_notes(frame, [])
    assert list(unwarned.columns) == [c for c in frame.columns if c != "notes"] + ["notes"]
    pd.testing.assert_frame_equal(frame, before)
    assert list(noted.columns)[-1] == "notes"
    assert (noted.loc["b", "notes"] == "repaired_geometry").all()
    assert noted.loc[("a", 1982), "notes"] == "feature_skipped" and noted.loc[("a", 1983), "notes"] == ""


def test_a_named_indicator_whose_variable_is_missing_is_refused():
    daily = make_daily("1980-01-01", "1989-12-31")
    rain_only = with_values(daily, tmax=None, tmin=None)
    with pytest.raises(RequestError, match=r"indicators\[1\]: 't_tmax' needs daily tmax") as caught:
        resolve_request(_request(indicators=["t_prcp", "t_tmax"]), rain_only, variables=("prcp",))
    assert caught.value.problem()["indicator"] == "t_tmax"
    frame = compute_table(rain_only, ["a"], [{}], _request(indicators=["t_prcp"])).frame
    assert frame["t_prcp"].notna().all()
