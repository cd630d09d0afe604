"""The indicator table's compiled kernels (service/indicators/compiled.py): loading them ahead of a request."""

from __future__ import annotations

import numpy as np

from service import jit
from service.indicators import compiled
from service.indicators.degree_days import single_sine


def test_warm_up_loads_every_kernel_and_they_give_the_reference_values() -> None:
    compiled.warm_up()
    assert all(jit.loaded(f"table.{name}") is not None for name in ("presence", "sines", "values", "snap"))
    tmax, tmin = np.array([[25.0, np.nan, 12.0]]), np.array([[8.0, 5.0, 11.0]])
    scratch: dict[str, np.ndarray] = {}
    out = compiled.degree_day_terms(
        tmax, tmin, 10.0, 30.0, lambda n: scratch.setdefault(n, np.empty(tmax.size)), np.empty_like(tmax)
    )
    # the reference is the plain single-sine formula, missing days 0 (as the table sums them)
    expected = np.nan_to_num(single_sine(tmax, tmin, 10.0, 30.0))
    assert np.array_equal(out, expected)
    counts = compiled.presence_counts([tmax, tmin, None])
    assert counts[0].tolist() == [0, 0, 1, 2, 0, 0, 0, 0]  # two days with both values, one with tmin alone


def test_snap_in_one_pass_is_numpys_three_steps_bit_for_bit() -> None:
    """snap_daily on a batch-sized array (the compiled pass) gives numpy's multiply, rint, divide bit for bit:
    halves (rint rounds them to even), values a hair off a step, negatives, -0.0, NaN and infinities."""
    from service.indicators.base import SNAP_COMPILED_SIZE, snap_daily

    rng = np.random.default_rng(3)
    values = rng.normal(15.0, 12.0, size=(SNAP_COMPILED_SIZE // 100 + 1, 100))
    values[0, :8] = [0.00005, -0.00005, 0.00015, 24.999999999999996, -0.0, np.nan, np.inf, -np.inf]
    values[1] = np.round(values[1], 4) + rng.choice([-1e-15, 0.0, 1e-15], size=100)
    for decimals in (1, 4):
        expected = values.copy()
        factor = float(10**decimals)
        np.multiply(expected, factor, out=expected)
        np.rint(expected, out=expected)
        np.divide(expected, factor, out=expected)
        got = snap_daily(values.copy(), decimals)
        assert np.array_equal(got.view(np.uint64), expected.view(np.uint64))
        small = snap_daily(values[:2].copy(), decimals)  # below SNAP_COMPILED_SIZE: numpy's own steps
        assert np.array_equal(small.view(np.uint64), expected[:2].view(np.uint64))
