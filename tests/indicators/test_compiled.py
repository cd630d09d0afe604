"""The indicator table's compiled kernels (service/indicators/compiled.py): loading them ahead of a request."""

from __future__ import annotations

import numpy as np

from service import jit
from service.indicators import compiled
from service.indicators.degree_days import single_sine


def test_warm_up_loads_every_kernel_and_they_give_the_reference_values() -> None:
    compiled.warm_up()
    assert all(jit.loaded(f"table.{name}") is not None for name in ("presence", "sines", "values"))
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
