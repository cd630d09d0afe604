"""The whole chain (request -> pipeline.run -> table) on small stores written here: the cases of issue 10.

Each test builds a store whose daily values make the case exact, runs a request through the request model
and pipeline.run, and reads the table. Hand-worked values are explained beside each check.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from service.errors import RequestError
from service.warning_codes import WARNING_CODES
from tests._support_server import live_server  # noqa: F401 - the session's live server fixture

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_chain import cell_box, days, feature, run_chain, write_grid  # noqa: E402


def _check_warnings(warnings: list[dict]) -> None:
    """Every warning has the five keys and a registered code."""
    for w in warnings:
        assert set(w) == {"code", "feature_id", "year", "indicator", "reason"}, w
        assert w["code"] in WARNING_CODES, w


# --- datasets without every variable -------------------------------------------------------------------------


def test_a_precipitation_only_dataset_serves_its_indicators_and_refuses_the_others(tmp_path: Path) -> None:
    time = days(2000, 2009)
    rng = np.random.default_rng(1)
    prcp = np.round(rng.gamma(0.6, 6.0, (time.size, 2, 2)) * (rng.random((time.size, 2, 2)) < 0.4), 1)
    store = write_grid(tmp_path / "rain.zarr", time, {"prcp": prcp})
    village = [feature("v", cell_box(0, 0, 2))]
    result = run_chain(store, village, tmp_path)
    # the defaults are those the data can compute, and the resolved request records them
    assert result.provenance["request"]["indicators"] == ["prcp_total", "wet_days", "cdd", "spi"]
    assert result.frame["prcp_total"].notna().all() and "tmean" not in result.frame.columns
    _check_warnings(result.warnings)
    with pytest.raises(RequestError, match=r"'tmean' needs daily tmax and tmin") as caught:
        run_chain(store, village, tmp_path, indicators=["prcp_total", "tmean"])
    problem = caught.value.problem()
    assert problem["status"] == 422 and problem["indicator"] == "tmean" and problem["variable"] == "tmax"
    assert problem["pointer"] == "/indicators/1"


# --- 1. ties at thresholds ------------------------------------------------------------------------------------


def _tie_store(path: Path):
    """2 x 4 cells, 2000-2002, whose daily values sit exactly on the thresholds on most days.

    Cells of columns 0-1: TX 25.0 (25.1 on every 10th day), TN 0.0 (-0.1 on every 10th day from the 5th),
    RR 1.0 on every 3rd day and 10.0 on every 7th (0 else). Columns 2-3 straddle the thresholds instead:
    TX 24.9 | 25.1, TN -0.1 | 0.1, RR 0.9 | 1.1 and 9.9 | 10.1 on the same days, so an equal-weight mean
    of the two is exactly on the threshold.
    """
    time = days(2000, 2002)
    k = np.arange(time.size)
    shape = (time.size, 2, 4)
    tmax, tmin, prcp = np.empty(shape), np.empty(shape), np.empty(shape)
    tmax[:, :, :2] = np.where(k % 10 == 0, 25.1, 25.0)[:, None, None]
    tmin[:, :, :2] = np.where(k % 10 == 5, -0.1, 0.0)[:, None, None]
    rain = np.where(k % 7 == 0, 10.0, np.where(k % 3 == 0, 1.0, 0.0))
    prcp[:, :, :2] = rain[:, None, None]
    tmax[:, :, 2], tmax[:, :, 3] = 24.9, 25.1
    tmin[:, :, 2], tmin[:, :, 3] = -0.1, 0.1
    prcp[:, :, 2] = np.where(k % 7 == 0, 9.9, np.where(k % 3 == 0, 0.9, 0.0))[:, None]
    prcp[:, :, 3] = np.where(k % 7 == 0, 10.1, np.where(k % 3 == 0, 1.1, 0.0))[:, None]
    return write_grid(path, time, {"tmax": tmax, "tmin": tmin, "prcp": prcp}), time, k, rain


def test_ties_at_thresholds_count_by_the_stored_value(tmp_path: Path) -> None:
    store, time, k, rain = _tie_store(tmp_path / "ties.zarr")
    w, s, e, n = cell_box(0, 0, 2, inset=0.0)  # the cell of row 0, column 0; rows 0-1 cover 2 x 0.5 deg
    communities = [
        feature("one", cell_box(0, 0, 2, inset=0.13)),  # a village inside one cell
        feature("one-b", (w + 0.31, s + 0.02, w + 0.37, s + 0.41)),  # another, an odd share of its cell
        feature("two", (w + 0.07, s + 0.11, w + 0.83, s + 0.29)),  # 2 cells, unequal shares
        feature("four", (w + 0.29, s - 0.37, w + 0.61, s + 0.19)),  # 4 cells, unequal shares
        feature("pair", (w + 1.5 - 0.2, s + 0.1, w + 1.5 + 0.2, s + 0.4)),  # columns 2 | 3, equal shares
    ]
    indicators = ["su", "fd", "wet_days", "r10mm", "cdd"]
    result = run_chain(
        store, communities, tmp_path, indicators=indicators, baseline={"start": 2000, "end": 2002}
    )
    frame = result.frame.set_index(["feature_id", "year"])
    year = time.year.to_numpy()
    for y in (2000, 2001, 2002):
        days_of = year == y
        # by hand from the stored values: SU is TX > 25 (strict), FD TN < 0 (strict), wet day RR >= 1,
        # R10mm RR >= 10, CDD the longest run of RR < 1 (ETCCDI, Zhang et al. 2011)
        su = np.count_nonzero(days_of & (k % 10 == 0))
        fd = np.count_nonzero(days_of & (k % 10 == 5))
        wet = np.count_nonzero(days_of & (rain >= 1.0))
        r10 = np.count_nonzero(days_of & (rain >= 10.0))
        for fid in ("one", "one-b", "two", "four"):
            row = frame.loc[(fid, y)]
            assert (row["su"], row["fd"], row["wet_days"], row["r10mm"]) == (su, fd, wet, r10), (fid, y)
            assert row["cdd"] == 2.0, (fid, y)  # dry runs: at most 2 days between days k % 3 == 0
        # the equal-weight mean of 24.9 and 25.1 is 25.0: not a summer day; of -0.1 and 0.1 is 0: no frost;
        # of 0.9 and 1.1 is 1.0: a wet day; of 9.9 and 10.1 is 10.0: an R10mm day
        row = frame.loc[("pair", y)]
        assert (row["su"], row["fd"], row["wet_days"], row["r10mm"]) == (0, 0, wet, r10), y


# --- 2. trailing baselines: no spread, and z on a class edge ----------------------------------------------------


def _count_store(path: Path, counts: list[list[int]], first_year: int = 2000):
    """One row of cells, one per list: cell i has counts[i][y] days of 12 mm (R10mm days) in year y, else dry."""
    n_years = len(counts[0])
    time = days(first_year, first_year + n_years - 1)
    year = time.year.to_numpy()
    prcp = np.zeros((time.size, 1, len(counts)))
    for i, per_year in enumerate(counts):
        for y, c in enumerate(per_year):
            prcp[np.flatnonzero(year == first_year + y)[:c], 0, i] = 12.0
    temperature = np.full((time.size, 1, len(counts)), 20.0)
    return write_grid(path, time, {"tmax": temperature + 5.0, "tmin": temperature, "prcp": prcp})


def _class_by_the_rule(value: int, window: list[int]) -> int:
    """The class of z = (value - mean) / sd (ddof 1) by exact rational arithmetic and the documented edge rule.

    Edges -2, -1, 1, 2; an edge belongs to the class farther from zero (classes.py; the WMO SPI table puts
    -1.0 in "moderately dry").
    """
    from fractions import Fraction

    mean = Fraction(sum(window), len(window))
    variance = sum((Fraction(v) - mean) ** 2 for v in window) / (len(window) - 1)
    d = Fraction(value) - mean
    step = 0
    for edge in (1, 2):  # |z| >= edge  <=>  d^2 >= edge^2 variance
        if d * d >= edge * edge * variance:
            step = edge
    return step if d > 0 else -step


def test_trailing_baseline_without_spread_is_null_whatever_the_years_requested(tmp_path: Path) -> None:
    # r10mm is 0 in 2000-2004 and 1 in 2005: against the five seasons before, there is no spread
    store = _count_store(tmp_path / "counts.zarr", [[0, 0, 0, 0, 0, 1, 0, 2, 0, 1, 3, 0]])
    village = [feature("v", cell_box(0, 0, 1))]
    for years in ({"start": 2005, "end": 2005}, {"start": 2005, "end": 2011}):
        result = run_chain(
            store, village, tmp_path, indicators=["r10mm"], baseline={"trailing": 5}, years=years
        )
        row = result.frame.set_index("year").loc[2005]
        assert row["r10mm"] == 1.0 and np.isnan(row["r10mm_z"]) and row["r10mm_class"] is pd.NA, years
        assert row["notes"] == "no_spread"
        [flat] = [w for w in result.warnings if w["code"] == "no_spread"]
        assert flat["feature_id"] == "v" and flat["indicator"] == "r10mm" and flat["year"] == 2005
        _check_warnings(result.warnings)
    # the same seasons as a fixed baseline agree: null with the same code
    fixed = run_chain(
        store,
        village,
        tmp_path,
        indicators=["r10mm"],
        baseline={"start": 2000, "end": 2004},
        years={"start": 2005, "end": 2005},
    )
    assert np.isnan(fixed.frame["r10mm_z"].iloc[0]) and fixed.frame["notes"].iloc[0] == "no_spread"
    # a later season's z does not depend on which years were requested either
    short = run_chain(
        store,
        village,
        tmp_path,
        indicators=["r10mm"],
        baseline={"trailing": 5},
        years={"start": 2009, "end": 2011},
    )
    assert (
        short.frame["r10mm_z"].tolist() == result.frame.set_index("year").loc[2009:2011, "r10mm_z"].tolist()
    )


def test_a_z_on_a_class_edge_is_classed_by_the_rule(tmp_path: Path) -> None:
    # each trailing window of three holds an arithmetic progression, so many z are exactly -2, -1, 1 or 2;
    # the last five sequences are ones whose edge cases the moving sums of before classed wrongly
    counts = [
        [0, 2, 4, 0, 2, 4, 0, 2, 4, 6, 2, 4],
        [1, 5, 9, 1, 5, 9, 1, 5, 9, 1, 13, 5],
        [3, 6, 9, 3, 6, 9, 3, 6, 9, 3, 6, 0],
        [0, 6, 2, 4, 2, 0, 0, 0, 2, 4, 6, 6],
        [7, 7, 6, 6, 7, 4, 5, 6, 7, 5, 6, 7],
        [7, 8, 5, 7, 6, 8, 5, 8, 8, 7, 8, 8],
        [9, 11, 11, 11, 9, 11, 9, 9, 9, 7, 5, 9],
        [2, 2, 0, 6, 4, 2, 4, 2, 6, 2, 0, 2],
    ]
    store = _count_store(tmp_path / "edges.zarr", counts)
    villages = [feature(f"v{i}", cell_box(0, i, 1)) for i in range(len(counts))]
    result = run_chain(store, villages, tmp_path, indicators=["r10mm"], baseline={"trailing": 3})
    frame = result.frame.set_index(["feature_id", "year"])
    on_edge = 0
    for i, per_year in enumerate(counts):
        for t in range(3, len(per_year)):
            row = frame.loc[(f"v{i}", 2000 + t)]
            window = per_year[t - 3 : t]
            if len(set(window)) == 1:
                continue
            expected = _class_by_the_rule(per_year[t], window)
            assert row["r10mm_class"] == expected, (i, 2000 + t, row["r10mm_z"])
            if abs(row["r10mm_z"]) in (1.0, 2.0):
                on_edge += 1
    assert on_edge >= 20  # the case is exercised: z exactly on an edge (after rounding to 9 decimals)


# --- 3. partial seasons ---------------------------------------------------------------------------------------

_MISSING = {2001: 10, 2008: 18}  # days missing (all variables) at the start of these years; 31 Dec 2004 too


def _partial_store(path: Path):
    """One cell, 2000-2009: TX 26.0 + 0.2 j and TN 10 below, j = year % 3, constant within a year; RR 2 mm
    every day. Some days are missing: 10 in 2001 and 18 in 2008 (within 10 %), and 31 December 2004 (a
    product that drops it in leap years)."""
    time = days(2000, 2009)
    year = time.year.to_numpy()
    tmax = (26.0 + 0.2 * (year % 3)).astype(float)
    values = {"tmax": tmax, "tmin": tmax - 10.0, "prcp": np.full(time.size, 2.0)}
    gaps = np.zeros(time.size, dtype=bool)
    for y, n in _MISSING.items():
        gaps[np.flatnonzero(year == y)[:n]] = True
    gaps[np.flatnonzero((year == 2004) & (time.month == 12) & (time.day == 31))] = True
    grids = {k: np.where(gaps, np.nan, v)[:, None, None] for k, v in values.items()}
    return write_grid(path, time, grids)


def _full_season_gdd(year: int) -> float:
    """Growing degree days (10-30 degC) of a whole year of this store: both temperatures inside the band, so
    the single sine gives the daily mean minus 10 (Baskerville & Emin 1969), 11 + 0.2 j per day."""
    n_days = 366 if year % 4 == 0 else 365
    return n_days * (11.0 + 0.2 * (year % 3))


@pytest.mark.parametrize("policy", ["scale", "null", "as_is"])
def test_partial_seasons_follow_the_policy_in_the_season_and_in_its_baseline(
    tmp_path: Path, policy: str
) -> None:
    store = _partial_store(tmp_path / f"partial-{policy}.zarr")
    result = run_chain(
        store,
        [feature("v", cell_box(0, 0, 1))],
        tmp_path,
        indicators=["gdd", "su", "tmean", "prcp_total"],
        baseline={"start": 2000, "end": 2004},
        years={"start": 2000, "end": 2009},
        **({} if policy == "scale" else {"partial_seasons": policy}),  # "scale" is the default
    )
    _check_warnings(result.warnings)
    frame = result.frame.set_index("year")
    present = {y: (366 if y % 4 == 0 else 365) - _MISSING.get(y, 0) - (y == 2004) for y in range(2000, 2010)}
    expected_gdd = {}
    for y in range(2000, 2010):
        full = _full_season_gdd(y)
        n_days = 366 if y % 4 == 0 else 365
        if present[y] == n_days or policy == "scale":
            expected_gdd[y] = full
        elif policy == "null":
            expected_gdd[y] = np.nan
        else:
            expected_gdd[y] = full * present[y] / n_days  # the sum over the days present
    np.testing.assert_allclose(
        frame["gdd"].to_numpy(), [expected_gdd[y] for y in range(2000, 2010)], rtol=1e-12
    )
    baseline = np.array([expected_gdd[y] for y in range(2000, 2005)])
    baseline = baseline[~np.isnan(baseline)]
    z_2008 = (expected_gdd[2008] - baseline.mean()) / baseline.std(ddof=1)
    if policy == "null":
        assert np.isnan(frame.loc[2008, "gdd_z"]) and np.isnan(frame.loc[2008, "su"])
    else:
        assert frame.loc[2008, "gdd_z"] == pytest.approx(z_2008, rel=1e-9)
    if policy == "scale":
        # a whole year of days at TX 26 + 0.2 j > 25: SU counts every calendar day, none is lost to the gaps
        assert frame.loc[2008, "su"] == 366.0 and frame.loc[2008, "prcp_total"] == pytest.approx(732.0)
        assert abs(frame.loc[2008, "gdd_z"]) < 2.0  # not a spurious "much cooler" season
    # means use the days present under every policy
    assert frame.loc[2008, "tmean"] == pytest.approx(21.0 + 0.2 * (2008 % 3))
    for y in (2001, 2004, 2008):
        assert "partial_season" in frame.loc[y, "notes"].split(), y
    assert frame.loc[2005, "notes"] == ""  # a whole season: no note
    assert result.provenance["request"]["partial_seasons"] == policy
    [partial] = [w for w in result.warnings if w["code"] == "partial_season"]  # one per community
    assert partial["feature_id"] == "v" and partial["indicator"] is None  # every indicator's days
    assert "2008 (4.9% missing)" in partial["reason"] and "2001 (2.7% missing)" in partial["reason"]


# --- 4. spells read exactly the requested baseline ------------------------------------------------------------


def test_spells_use_the_whole_trailing_baseline_or_are_null(tmp_path: Path) -> None:
    # the same weather from 1990 (record A) and from 1994 (record B): a spell must not depend on where the
    # record starts, so B's counts whose windows reach seasons without five seasons of record before them are
    # null, and all others equal A's
    time = days(1990, 2008)
    rng = np.random.default_rng(10)  # a seed whose short windows of before change the counts of 2000 and 2001
    wetness = rng.uniform(0.2, 0.6, 19)[time.year.to_numpy() - 1990]  # each year its own share of wet days
    prcp = np.round(np.where(rng.random(time.size) < wetness, rng.gamma(0.8, 8.0, time.size), 0.0), 1)
    tmax = np.full(time.size, 30.0)
    a = write_grid(
        tmp_path / "a.zarr",
        time,
        {"tmax": tmax[:, None, None], "tmin": tmax[:, None, None] - 9, "prcp": prcp[:, None, None]},
    )
    late = time.year.to_numpy() >= 1994
    b = write_grid(
        tmp_path / "b.zarr",
        time[late],
        {"tmax": tmax[late, None, None], "tmin": tmax[late, None, None] - 9, "prcp": prcp[late, None, None]},
    )
    request = {
        "indicators": ["prcp_total"],
        "baseline": {"trailing": 5},
        "years": {"start": 1999, "end": 2008},
        "spells": [{"name": "dry", "window": 4, "when": [{"indicator": "prcp_total", "z_max": -0.3}]}],
    }
    village = [feature("v", cell_box(0, 0, 1))]
    from_a = run_chain(a, village, tmp_path, **request).frame.set_index("year")
    result_b = run_chain(b, village, tmp_path, **request)
    from_b = result_b.frame.set_index("year")
    # wherever B gives a count it is A's (the same weather, the same requested baseline)
    both = from_b["dry_count"].notna()
    assert from_b.loc[both, "dry_count"].tolist() == from_a.loc[both, "dry_count"].tolist()
    # B's first season-year with five seasons before it is 1999: windows of 4 ending 1999-2001 reach before it
    assert from_b.loc[1999:2001, "dry_count"].isna().all()
    assert all("spell_before_baseline" in n.split() for n in from_b.loc[1999:2001, "notes"])
    [before] = [w for w in result_b.warnings if w["code"] == "spell_before_baseline"]
    assert "1999-2001" in before["reason"] and before["feature_id"] is None
    assert "spell_before_baseline" in result_b.provenance["methods"]["spells"]
    assert from_a.loc[1999:2001, "dry_count"].notna().all()
    assert from_a.loc[2002:2008, "dry_count"].tolist() == from_b.loc[2002:2008, "dry_count"].tolist()
    assert from_a["prcp_total_z"].tolist() == from_b["prcp_total_z"].tolist()  # the z of the years asked for
    assert from_a["dry_count"].astype(float).fillna(-1).gt(0).any()  # the case is exercised: some dry seasons


# --- 5. aggregation order -------------------------------------------------------------------------------------


def _sine_degree_days(tmax: float, tmin: float, threshold: float) -> float:
    """Degree days above ``threshold`` of a day whose temperature is a sine between tmin and tmax, by numerical
    integration over the day (an independent check of the single-sine formula, Baskerville & Emin 1969)."""
    t = np.linspace(0.0, 2.0 * np.pi, 200_001)
    temperature = (tmax + tmin) / 2 + (tmax - tmin) / 2 * np.sin(t)
    return float(np.trapezoid(np.maximum(temperature - threshold, 0.0), t) / (2.0 * np.pi))


def _two_climates_store(path: Path, gap_year: int | None = None):
    """1 x 3 cells, 2000-2004. Cell 0: TX 35, TN 20, RR 2 mm every day. Cell 1: TX 25, TN 16, dry. Cell 2 as
    cell 0 but missing all of ``gap_year``. Year-to-year variation is nil: this test is about values."""
    time = days(2000, 2004)
    n = time.size
    tmax = np.empty((n, 1, 3))
    tmin = np.empty((n, 1, 3))
    prcp = np.empty((n, 1, 3))
    tmax[:, 0, 0], tmin[:, 0, 0], prcp[:, 0, 0] = 35.0, 20.0, 2.0
    tmax[:, 0, 1], tmin[:, 0, 1], prcp[:, 0, 1] = 25.0, 16.0, 0.0
    tmax[:, 0, 2], tmin[:, 0, 2], prcp[:, 0, 2] = 35.0, 20.0, 2.0
    if gap_year is not None:
        gap = time.year.to_numpy() == gap_year
        for values in (tmax, tmin, prcp):
            values[gap, 0, 2] = np.nan
    return write_grid(path, time, {"tmax": tmax, "tmin": tmin, "prcp": prcp})


def test_aggregation_cells_averages_the_cells_values_and_series_the_cells_days(tmp_path: Path) -> None:
    store = _two_climates_store(tmp_path / "two.zarr", gap_year=2001)
    w, s, e, n = cell_box(0, 0, 1, inset=0.0)
    halves = feature("halves", (w + 0.3, s + 0.1, w + 0.7, s + 0.4))  # equal shares of cells 0 and 1
    mostly = feature("mostly", (w + 0.55, s + 0.1, w + 1.02, s + 0.4))  # cell 1, and a sliver (4 %) of cell 2
    wide = feature("wide", (w + 0.75, s + 0.1, w + 1.25, s + 0.4))  # half of cell 1, half of cell 2
    fields = {"indicators": ["wet_days", "edd", "cdd"], "baseline": {"start": 2000, "end": 2004}}
    by_cells = run_chain(store, [halves, mostly, wide], tmp_path, aggregation="cells", **fields)
    by_series = run_chain(store, [halves, mostly, wide], tmp_path, **fields)
    cells = by_cells.frame.set_index(["feature_id", "year"])
    series = by_series.frame.set_index(["feature_id", "year"])
    hot, cool, mean = (
        _sine_degree_days(35, 20, 29),
        _sine_degree_days(25, 16, 29),
        _sine_degree_days(30, 18, 29),
    )
    # CHECK-VALUES.md (recomputed by integration): 1.6852 for (35, 20) and 0.1236 for (30, 18) above 29 degC
    assert hot == pytest.approx(1.6852, abs=1e-4) and mean == pytest.approx(0.1236, abs=1e-4) and cool == 0.0
    row_cells, row_series = cells.loc[("halves", 2002)], series.loc[("halves", 2002)]
    # series: the mean day is TX 30, TN 18, RR 1 mm: every day wet, never dry, 0.1236 degree days a day
    assert row_series["wet_days"] == 365 and row_series["cdd"] == 0
    assert row_series["edd"] == pytest.approx(365 * mean, rel=1e-4)
    # cells: the mean of the cells' own values
    assert row_cells["wet_days"] == 182.5 and row_cells["cdd"] == 182.5
    assert row_cells["edd"] == pytest.approx(365 * hot / 2, rel=1e-4)
    # a cell without a value in 2001: 'mostly' keeps the mean of the rest (its sliver), noted partial_cells;
    # 'wide' loses half of its weight, more than max_missing_share (10 %): null, too_few_cells
    assert (
        cells.loc[("mostly", 2001), "wet_days"] == 0
        and "partial_cells" in cells.loc[("mostly", 2001), "notes"]
    )
    assert cells.loc[("mostly", 2002), "wet_days"] < 366 and cells.loc[("mostly", 2002), "notes"] in (
        "",
        "no_spread",
    )
    assert (
        np.isnan(cells.loc[("wide", 2001), "wet_days"])
        and "too_few_cells" in cells.loc[("wide", 2001), "notes"]
    )
    assert by_cells.provenance["request"]["aggregation"] == "cells"
    assert by_cells.provenance["methods"]["aggregation"].startswith("cells:")
    assert by_series.provenance["request"]["aggregation"] == "series"
    _check_warnings(by_cells.warnings)


def test_the_new_fields_travel_through_the_api_the_client_jobs_and_the_command(
    live_server,  # noqa: F811 - the fixture
    tiny_demo: Path,
    tiny_communities: dict,
    tmp_path: Path,
) -> None:
    from service.cli import main
    from service.client import Client

    few = {"type": "FeatureCollection", "features": tiny_communities["features"][:3]}
    fields = {
        "indicators": ["wet_days", "edd"],
        "baseline": (1981, 1990),
        "years": (1991, 1994),
        "aggregation": "cells",
        "partial_seasons": "null",
    }
    with Client(live_server.base_url) as client:
        on_demand = client.indicators(few, **fields)
        as_job = client.indicators(few, as_job=True, progress=False, **fields)
        series = client.indicators(few, **{**fields, "aggregation": "series"})
    for frame in (on_demand, as_job):
        request = frame.attrs["provenance"]["request"]
        assert request["aggregation"] == "cells" and request["partial_seasons"] == "null"
        assert frame.attrs["provenance"]["methods"]["aggregation"].startswith("cells:")
        assert list(frame.columns)[-1] == "notes"
    pd.testing.assert_frame_equal(
        on_demand.reset_index(drop=True), as_job.reset_index(drop=True), check_dtype=False
    )
    assert not np.allclose(on_demand["wet_days"], series["wet_days"])  # the demo's cells differ
    # the command: a request file through the same model
    request_path = tmp_path / "request.json"
    request_path.write_text(
        json.dumps(
            {
                "features": few,
                "indicators": ["wet_days"],
                "baseline": {"start": 1981, "end": 1990},
                "years": {"start": 1991, "end": 1992},
                "aggregation": "cells",
            }
        ),
        encoding="utf-8",
    )
    out = tmp_path / "cells.csv"
    assert (
        main(
            [
                "compute",
                "--store",
                str(tiny_demo),
                "--request",
                str(request_path),
                "--out",
                str(out),
                "--quiet",
            ]
        )
        == 0
    )
    sidecar = json.loads((tmp_path / "cells.csv.provenance.json").read_text(encoding="utf-8"))
    assert sidecar["provenance"]["request"]["aggregation"] == "cells"
    table = pd.read_csv(out, keep_default_na=False)
    assert list(table.columns)[-1] == "notes" and len(table) == 3 * 2


# --- 6 and 7. baseline length, clipping, and what exactly is computed ---------------------------------------

# Annual precipitation of each cell, 2000-2011, spread evenly over the year's days (mm); baseline 2000-2009.
_TOTALS = {
    "zeros": [0, 400, 0, 350, 0, 420, 0, 380, 0, 410, 0, 400],  # 5 of 10 baseline years without rain
    "never": [300, 400, 350, 380, 420, 390, 360, 410, 370, 405, 0, 400],  # a dry year against no dry one
    "skewed": [
        820,
        800,
        810,
        805,
        790,
        815,
        100,
        812,
        795,
        808,
        830,
        805,
    ],  # one very dry year: negative skew
}


def _drought_store(path: Path):
    """1 x 3 cells (zeros, never, skewed), 2000-2011: TX 30, TN 18 every day; rain as _TOTALS says."""
    time = days(2000, 2011)
    year = time.year.to_numpy()
    prcp = np.zeros((time.size, 1, len(_TOTALS)))
    for i, totals in enumerate(_TOTALS.values()):
        for y, total in enumerate(totals):
            this = year == 2000 + y
            prcp[this, 0, i] = np.round(total / this.sum(), 1)  # on the 0.1 mm step
    tmax = np.full((time.size, 1, len(_TOTALS)), 30.0)
    return write_grid(path, time, {"tmax": tmax, "tmin": tmax - 12.0, "prcp": prcp}), prcp, year


def test_fitted_indices_say_how_they_were_fitted_and_where_they_are_clipped(tmp_path: Path) -> None:
    from scipy import stats

    store, prcp, year = _drought_store(tmp_path / "drought.zarr")
    villages = [feature(name, cell_box(0, i, 1)) for i, name in enumerate(_TOTALS)]
    fields = {"baseline": {"start": 2000, "end": 2009}, "years": {"start": 2010, "end": 2011}}
    result = run_chain(store, villages, tmp_path, indicators=["spi", "spei"], **fields)
    frame = result.frame.set_index(["feature_id", "year"])
    _check_warnings(result.warnings)
    # 6: a fit on 10 seasons (< 30, WMO-No. 1090) is flagged once per indicator, on every row it touches
    short = {w["indicator"] for w in result.warnings if w["code"] == "short_baseline_fit"}
    assert short == {"spi", "spei"} and all("short_baseline_fit" in n for n in frame["notes"])
    # 7: SPI of a season without rain is the published Phi^-1(q), q = 5/10 dry baseline seasons: 0 ("near
    # normal"), flagged zero_rain_spi (WMO-No. 1090: H = q + (1 - q) G(x))
    zeros = frame.loc[("zeros", 2010)]
    assert zeros["spi"] == pytest.approx(stats.norm.ppf(0.5), abs=1e-9) and "zero_rain_spi" in zeros["notes"]
    assert zeros["spi_category"] == "near normal"
    # 6: against a baseline without a dry season, a dry season is beyond the fit: clipped to -5, flagged at_clip
    never = frame.loc[("never", 2010)]
    assert never["spi"] == -5.0 and "at_clip" in never["notes"].split() and "zero_rain_spi" in never["notes"]
    # spi_z and spei_z equal the values (a standard-normal deviate is its own z)
    assert frame["spi_z"].equals(frame["spi"]) and frame["spei_z"].equals(frame["spei"])
    # 7: SPEI of a negatively skewed baseline: the generalized logistic (default) is bounded above and says so;
    # the log-logistic has no fit there and leaves the value null
    skewed = frame.loc[("skewed", 2010)]
    assert np.isfinite(skewed["spei"]) and "spei_upper_bound" in skewed["notes"]
    strict = run_chain(
        store,
        villages,
        tmp_path,
        indicators=[{"name": "spei", "distribution": "log_logistic"}, "tx90p"],
        **fields,
    )
    column = "spei_distributionlog_logistic"
    row = strict.frame.set_index(["feature_id", "year"]).loc[("skewed", 2010)]
    assert np.isnan(row[column]) and "no_fit" in row["notes"]
    methods = strict.provenance["methods"]["indicators"]
    assert methods[column]["parameters"] == {"distribution": "log_logistic"}
    assert "generalized logistic" in result.provenance["methods"]["indicators"]["spei"]["definition"]
    # the percentile indices' in-base bias is stated where a reader of the result finds it
    assert "Zhang et al. 2005" in methods["tx90p"]["details"] and "biased low" in methods["tx90p"]["details"]
    assert methods["tx90p"]["parameters"] == {"in_base": "plain"}


def test_tx90p_offers_the_in_base_bootstrap_and_records_it(tmp_path: Path) -> None:
    # stationary independent daily TX, baseline 2000-2005, June: the bootstrap changes only the baseline's own
    # years (Zhang et al. 2005), and the column name, the resolved request and the methods say which was used
    time = days(2000, 2007)
    tmax = np.round(np.random.default_rng(15).normal(25.0, 3.0, time.size), 1)[:, None, None]
    store = write_grid(tmp_path / "tx.zarr", time, {"tmax": tmax, "tmin": tmax - 10, "prcp": tmax * 0})
    fields = {"season": {"months": [6]}, "baseline": {"start": 2000, "end": 2005}}
    village = [feature("v", cell_box(0, 0, 1))]
    plain = run_chain(store, village, tmp_path, indicators=["tx90p"], **fields)
    resampled = run_chain(
        store, village, tmp_path, indicators=[{"name": "tx90p", "in_base": "bootstrap"}], **fields
    )
    column = "tx90p_in_basebootstrap"
    a, b = plain.frame.set_index("year")["tx90p"], resampled.frame.set_index("year")[column]
    assert (a.loc[2006:] == b.loc[2006:]).all() and (a.loc[:2005] != b.loc[:2005]).any()
    assert resampled.provenance["request"]["indicators"] == [{"name": "tx90p", "in_base": "bootstrap"}]
    entry = resampled.provenance["methods"]["indicators"][column]
    assert entry["parameters"] == {"in_base": "bootstrap"} and "bootstrap" in entry["details"]


def test_the_default_baseline_is_the_first_30_seasons_or_all_the_data_serve(tmp_path: Path) -> None:
    # WMO-No. 1090 (2012) asks for 30 years to fit SPI: with 40 years of data the default is the first 30,
    # with 12 it is all 12 (and the fit is noted short_baseline_fit)
    time = days(1981, 2020)
    rng = np.random.default_rng(30)
    year = time.year.to_numpy()
    totals = rng.gamma(4.0, 200.0, 40)[year - 1981]
    prcp = np.round(totals / np.where(year % 4 == 0, 366, 365), 1)
    tmax = np.full(time.size, 25.0)
    values = {"tmax": tmax, "tmin": tmax - 10.0, "prcp": prcp}
    village = [feature("v", cell_box(0, 0, 1))]
    long = write_grid(tmp_path / "long.zarr", time, {k: v[:, None, None] for k, v in values.items()})
    result = run_chain(long, village, tmp_path, indicators=["spi"], years={"start": 2011, "end": 2020})
    assert result.provenance["request"]["baseline"] == {"start": 1981, "end": 2010}
    assert "1981-2010 (30)" in result.provenance["methods"]["baseline"]
    assert not any(w["code"] == "short_baseline_fit" for w in result.warnings)
    short_time = time[year >= 2009]
    short = write_grid(
        tmp_path / "short.zarr", short_time, {k: v[year >= 2009, None, None] for k, v in values.items()}
    )
    result = run_chain(short, village, tmp_path, indicators=["spi"])
    assert result.provenance["request"]["baseline"] == {"start": 2009, "end": 2020}
    assert all("short_baseline_fit" in n.split() for n in result.frame["notes"])


def test_the_catalog_states_each_choice() -> None:
    from service.routes.indicators import indicator_catalog

    catalog = {entry.name: entry for entry in indicator_catalog().indicators}
    assert all(entry.variables and entry.reduction for entry in catalog.values())
    assert catalog["spi"].bounds == [-5.0, 5.0] == catalog["spei"].bounds
    assert "zero_rain_spi" in catalog["spi"].details and "spi_z == spi" in catalog["spi"].details
    spei = catalog["spei"].parameters["distribution"]
    assert spei.default == "generalized_logistic" and spei.choices == ["generalized_logistic", "log_logistic"]
    pool = catalog["r95ptot"].parameters["threshold_pool"]
    assert pool.default == "year" and pool.choices == ["year", "season"]
    for name in ("tx90p", "tn10p", "hotdry_days", "hotdry_spell"):
        assert "not applied" in catalog[name].details and "in base" in catalog[name].details, name
    for name in ("tx90p", "tn10p"):
        in_base = catalog[name].parameters["in_base"]
        assert in_base.default == "plain" and in_base.choices == ["plain", "bootstrap"], name
    assert catalog["su"].reduction == "count" and catalog["tmean"].reduction == "mean"
    # the request-wide rules, each option with its default (issue 10, cases 1-6)
    conventions = indicator_catalog().conventions
    assert "snapped" in conventions["daily_values"] and "TX > 25 degC" in conventions["thresholds"]
    assert "'series' (default)" in conventions["aggregation"] and "'cells'" in conventions["aggregation"]
    assert (
        "'scale' (default)" in conventions["partial_seasons"] and "'as_is'" in conventions["partial_seasons"]
    )
    assert "first 30 season-years" in conventions["baseline"] and "no_spread" in conventions["anomalies"]
    assert (
        "farther from zero" in conventions["classes"]
        and "short_baseline_fit" in conventions["distribution_fits"]
    )
    assert "spell_before_baseline" in conventions["spells"]


def test_r95ptot_takes_its_threshold_from_the_pool_asked_for(tmp_path: Path) -> None:
    # March is the season. Baseline 2000-2002: March has the wet days 1..20 mm, June the wet days 50..69 mm;
    # 2003's March has 19.5, 25, 40 and 55 mm days
    time = days(2000, 2003)
    year, month = time.year.to_numpy(), time.month.to_numpy()
    prcp = np.zeros(time.size)
    for y in (2000, 2001, 2002):
        prcp[np.flatnonzero((year == y) & (month == 3))[:20]] = np.arange(1.0, 21.0)
        prcp[np.flatnonzero((year == y) & (month == 6))[:20]] = np.arange(50.0, 70.0)
    prcp[np.flatnonzero((year == 2003) & (month == 3))[:4]] = [19.5, 25.0, 40.0, 55.0]
    tmax = np.full(time.size, 25.0)
    store = write_grid(
        tmp_path / "r95.zarr",
        time,
        {"tmax": tmax[:, None, None], "tmin": tmax[:, None, None] - 10, "prcp": prcp[:, None, None]},
    )
    fields = {
        "season": {"months": [3]},
        "baseline": {"start": 2000, "end": 2002},
        "years": {"start": 2003, "end": 2003},
    }
    village = [feature("v", cell_box(0, 0, 1))]
    # the type 8 95th percentile (Hyndman & Fan 1996; numpy's median_unbiased) of each pool, by numpy
    season_pool = np.quantile(np.tile(np.arange(1.0, 21.0), 3), 0.95, method="median_unbiased")
    year_pool = np.quantile(
        np.tile(np.r_[np.arange(1.0, 21.0), np.arange(50.0, 70.0)], 3), 0.95, method="median_unbiased"
    )
    assert 19 < season_pool < 20 and 67 < year_pool < 69
    default = run_chain(store, village, tmp_path, indicators=["r95ptot"], **fields).frame
    # ETCCDI (Zhang et al. 2011): the base period's wet days of whole years; no March day of 2003 is above 67 mm
    assert default["r95ptot"].iloc[0] == 0.0
    seasonal = run_chain(
        store, village, tmp_path, indicators=[{"name": "r95ptot", "threshold_pool": "season"}], **fields
    ).frame
    # the seasonal variant: March's own wet days; 25 + 40 + 55 mm are above its 19.7 mm
    assert seasonal["r95ptot_threshold_poolseason"].iloc[0] == pytest.approx(120.0)


def test_the_methods_page_names_every_indicator_option_and_warning_code() -> None:
    from service.indicators.base import catalog

    text = (Path(__file__).parents[2] / "docs" / "methods.md").read_text(encoding="utf-8")
    for code in WARNING_CODES:
        assert f"`{code}`" in text, code
    for entry in catalog():
        assert f"`{entry.name}`" in text, entry.name
        for choice in (c for p in entry.parameters.values() for c in p.choices):
            assert f'`"{choice}"`' in text, (entry.name, choice)
    for option in ('"series"', '"cells"', '"scale"', '"null"', '"as_is"'):
        assert f"`{option}`" in text, option
