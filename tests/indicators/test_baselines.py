"""Baselines, z against them (sample sd, ddof = 1) and percent of normal, by hand and against numpy."""

from __future__ import annotations

import numpy as np
import pytest

from service.indicators import baselines
from service.schemas import FixedBaseline, TrailingBaseline

YEARS = np.arange(2000, 2006)


def test_fixed_baseline_members():
    b = baselines.make_baseline(YEARS, FixedBaseline(start=2001, end=2003))
    assert b.fixed and b.label == "2001-2003"
    assert b.members.shape == (6, 6)
    assert (b.members == np.array([0, 1, 1, 1, 0, 0], dtype=bool)).all()


def test_trailing_baseline_members():
    b = baselines.make_baseline(YEARS, TrailingBaseline(trailing=3))
    assert not b.fixed and b.label == "trailing 3" and b.seasons == 3
    # season 2004's normal is 2001-2003; 2003 is the first with three seasons of record before it: those
    # before have no baseline at all (never a shorter one than asked for)
    assert np.flatnonzero(b.members[4]).tolist() == [1, 2, 3]
    assert np.flatnonzero(b.members[3]).tolist() == [0, 1, 2]
    assert not b.members[:3].any()
    assert baselines.first_full_year(YEARS, TrailingBaseline(trailing=3)) == YEARS[3]


def test_z_worked_by_hand():
    # values 1..5 over a baseline of all five: mean 3, sample sd sqrt(2.5) = 1.5811
    values = np.array([[1.0, 2.0, 3.0, 4.0, 5.0]])
    members = np.ones((5, 5), dtype=bool)
    stats = baselines.baseline_statistics(
        values, baselines.Baseline(members=members, fixed=True, label="all")
    )
    np.testing.assert_allclose(stats.mean, 3.0)
    np.testing.assert_allclose(stats.sd, np.sqrt(2.5))
    assert stats.count.tolist() == [[5] * 5]
    a = baselines.anomaly(values, stats)
    np.testing.assert_allclose(a.z, [[-1.264911, -0.632456, 0.0, 0.632456, 1.264911]], atol=1e-6)
    assert (a.reason == baselines.OK).all()


@pytest.mark.parametrize("spec", [FixedBaseline(start=2001, end=2004), TrailingBaseline(trailing=3)])
def test_statistics_match_numpy_with_missing_values(spec):
    rng = np.random.default_rng(4)
    values = 1e6 + rng.normal(0, 0.01, (7, YEARS.size))  # a large offset: the sums must not lose precision
    values[2, 1] = np.nan
    values[5, :] = np.nan
    b = baselines.make_baseline(YEARS, spec)
    stats = baselines.baseline_statistics(values, b)
    for f in range(values.shape[0]):
        for t in range(YEARS.size):
            sample = values[f, b.members[t]]
            sample = sample[~np.isnan(sample)]
            assert stats.count[f, t] == sample.size
            if sample.size >= 1:
                assert stats.mean[f, t] == pytest.approx(np.mean(sample), abs=1e-9)
            if sample.size >= 2:
                assert stats.sd[f, t] == pytest.approx(np.std(sample, ddof=1), rel=1e-6)
            else:
                assert np.isnan(stats.sd[f, t])


def test_few_seasons_and_no_spread_give_null_z_never_infinite():
    members = np.ones((4, 4), dtype=bool)
    b = baselines.Baseline(members=members, fixed=True, label="2000-2003")
    values = np.array(
        [
            [0.0, 0.0, 0.0, 0.0],  # a count that is 0 in every baseline season: no spread
            [1.0, np.nan, np.nan, 2.0],  # two seasons with a value: too few
            [1.0, 2.0, 4.0, 8.0],  # fine
        ]
    )
    stats = baselines.baseline_statistics(values, b)
    a = baselines.anomaly(values, stats)
    assert np.isnan(a.z[:2]).all()
    assert np.isfinite(a.z[2]).all()
    assert (a.reason[0] == baselines.NO_SPREAD).all()
    assert (a.reason[1] == baselines.FEW_SEASONS).all()
    warnings = baselines.anomaly_warnings(
        a.reason,
        stats,
        feature_ids=["v-1", "v-2", "v-3"],
        years=np.arange(2000, 2004),
        indicator="fd",
        baseline_label=b.label,
    )
    assert [(w["feature_id"], w["indicator"], w["year"]) for w in warnings] == [
        ("v-2", "fd", None),
        ("v-1", "fd", None),
    ]
    assert "has 2 season(s) with a value, fewer than the 3" in warnings[0]["reason"]
    assert "2000-2003" in warnings[0]["reason"]
    assert "same (0) in every season of baseline 2000-2003" in warnings[1]["reason"]
    assert warnings[1]["reason"].endswith("left null for 2000-2003")


def test_constant_nonzero_series_is_no_spread_despite_rounding():
    values = np.full((1, 10), 0.1 * 3)  # 0.30000000000000004: products must not invent a tiny spread
    b = baselines.make_baseline(np.arange(10), TrailingBaseline(trailing=5))
    a = baselines.anomaly(values, baselines.baseline_statistics(values, b))
    assert np.isnan(a.z).all()
    assert (a.reason[0, 5:] == baselines.NO_SPREAD).all()
    assert (a.reason[0, :3] == baselines.FEW_SEASONS).all()


def test_standardized_value_is_its_own_z():
    a = baselines.standardized_anomaly(np.array([[-2.5, 0.3, np.nan, np.inf]]))
    np.testing.assert_array_equal(a.z, [[-2.5, 0.3, np.nan, np.nan]])


def test_percent_of_normal_by_hand():
    members = np.ones((4, 4), dtype=bool)
    b = baselines.Baseline(members=members, fixed=True, label="all")
    values = np.array([[100.0, 200.0, 300.0, 200.0], [0.0, 0.0, 0.0, 0.0]])
    pct = baselines.percent_of_normal(values, baselines.baseline_statistics(values, b))
    np.testing.assert_allclose(pct[0], [50.0, 100.0, 150.0, 100.0])  # normal 200 mm
    assert np.isnan(pct[1]).all()  # a normal of 0 mm has no percent


def test_year_ranges_text():
    assert baselines._year_ranges([1990, 1991, 1992, 1995, 1997, 1998]) == "1990-1992, 1995, 1997-1998"
