"""Lags, spell conditions, runs and counts over season-years, by hand and as properties."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from service.indicators import sequences

nan = np.nan


def test_lag_shifts_along_years():
    values = np.array([[1.0, 2.0, 3.0, 4.0], [5.0, 6.0, 7.0, 8.0]])
    np.testing.assert_array_equal(sequences.lag(values, 1), [[nan, 1, 2, 3], [nan, 5, 6, 7]])
    np.testing.assert_array_equal(sequences.lag(values, 0), values)
    assert np.isnan(sequences.lag(values, 4)).all()
    codes = np.array([[0, 1, 2, 3]])
    assert sequences.lag_codes(codes, 2).tolist() == [[-1, -1, 0, 1]]


def test_condition_on_classes_and_z():
    prcp_class = np.array([[-2.0, -1.0, 0.0, nan, -1.0, -1.0]])
    tmean_class = np.array([[1.0, 0.0, 2.0, 1.0, nan, 2.0]])
    tmean_z = np.array([[1.5, 0.2, 2.5, 1.1, nan, 0.9]])
    cond = sequences.condition_holds(
        [prcp_class, tmean_class],
        [None, tmean_z],
        [(None, -1, None, None), (1, None, 1.0, None)],
    )
    # season 4: prcp unknown, tmean met -> unknown; season 5: prcp met, tmean unknown -> unknown;
    # season 6: tmean class 2 but z 0.9 < 1.0 -> not met; a false condition decides despite an unknown one
    np.testing.assert_array_equal(cond, [[1, 0, 0, nan, nan, 0]])
    cond2 = sequences.condition_holds([prcp_class], [None], [(None, -1, None, None)])
    np.testing.assert_array_equal(cond2, [[1, 1, 0, nan, 1, 1]])


def test_run_and_count_worked_by_hand():
    cond = np.array([[1, 1, 0, 1, nan, 1, 1, 1]], dtype=float)
    np.testing.assert_array_equal(sequences.spell_run(cond), [[1, 2, 0, 1, nan, 1, 2, 3]])
    # count over the last 3 (the season included); null before a full window and where it holds an unknown
    np.testing.assert_array_equal(sequences.spell_count(cond, 3), [[nan, nan, 2, 2, nan, nan, nan, 3]])
    np.testing.assert_array_equal(sequences.spell_count(cond, 1), [[1, 1, 0, 1, nan, 1, 1, 1]])
    assert np.isnan(sequences.spell_count(cond, 9)).all()


conditions = st.lists(st.sampled_from([0.0, 1.0, nan]), min_size=1, max_size=40)


@settings(max_examples=200, deadline=None)
@given(
    rows=st.lists(conditions, min_size=1, max_size=4).map(lambda r: [x + [0.0] * (40 - len(x)) for x in r])
)
def test_runs_reset_exactly_when_the_condition_fails(rows):
    cond = np.array(rows)
    run = sequences.spell_run(cond)
    for f in range(cond.shape[0]):
        for t in range(cond.shape[1]):
            c = cond[f, t]
            if np.isnan(c):
                assert np.isnan(run[f, t])
            elif c == 0:
                assert run[f, t] == 0  # a failing season resets, and only it gives 0
            else:
                before = run[f, t - 1] if t > 0 else 0.0
                expected = 1.0 if np.isnan(before) else before + 1.0  # an unknown season breaks the run
                assert run[f, t] == expected >= 1


@settings(max_examples=100, deadline=None)
@given(row=conditions, window=st.integers(1, 10))
def test_count_is_the_sum_of_known_windows(row, window):
    cond = np.array([row])
    count = sequences.spell_count(cond, window)
    for t in range(len(row)):
        block = cond[0, max(0, t - window + 1) : t + 1]
        if t + 1 < window or np.isnan(block).any():
            assert np.isnan(count[0, t])
        else:
            assert count[0, t] == block.sum()
