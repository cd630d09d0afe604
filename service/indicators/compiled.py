"""Compiled day loops: the single-sine degree days (one pass instead of some thirty numpy steps) and the
days with values of a season cut (one pass over its variables instead of a mask per variable and set).

The single-sine degree days of a day (service.indicators.degree_days.single_sine) take two arcsines, two
square roots and a dozen arithmetic steps. numpy does each step as a pass over the whole block; the loops here
do every step of a day at once, in the same order and with the same IEEE operations (no fast-math: nothing is
reordered or fused), so the values are the same bits. The arcsines stay numpy's own (``np.arcsin`` between the
two loops), because a compiled arcsine may differ from numpy's in the last bit.

numba compiles the loops the first time degree days are computed, not when the module is imported, and keeps
the machine code in its cache where it can write one (service/jit.py).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from service import jit


def _sines_source(
    tmax: np.ndarray,
    tmin: np.ndarray,
    lower: float,
    upper: float,
    capped: bool,
    sin1: np.ndarray,
    sin2: np.ndarray,
) -> None:
    """Per day: the sines of ``lower`` (and ``upper`` when ``capped``) on the day's curve, clipped to [-1, 1].

    As single_sine computes them: (threshold - mean) / amplitude, NaN kept; a flat day (amplitude 0) gets
    whatever the division gives, its value being replaced later.
    """
    for i in range(tmax.size):
        mean = (tmax[i] + tmin[i]) * 0.5
        amplitude = abs(tmax[i] - tmin[i]) * 0.5
        s = (lower - mean) / amplitude
        if s > 1.0:
            s = 1.0
        elif s < -1.0:
            s = -1.0
        sin1[i] = s
        if capped:
            s = (upper - mean) / amplitude
            if s > 1.0:
                s = 1.0
            elif s < -1.0:
                s = -1.0
            sin2[i] = s


def _values_source(
    tmax: np.ndarray,
    tmin: np.ndarray,
    lower: float,
    upper: float,
    capped: bool,
    sin1: np.ndarray,
    theta1: np.ndarray,
    sin2: np.ndarray,
    theta2: np.ndarray,
    out: np.ndarray,
) -> None:
    """Per day: the single-sine degree days from the sines and their arcsines, 0 where a value is missing
    (the terms of a sum over the valid days, as np.nansum makes them)."""
    half_pi = math.pi / 2.0
    for i in range(tmax.size):
        mean = (tmax[i] + tmin[i]) * 0.5
        amplitude = abs(tmax[i] - tmin[i]) * 0.5
        cos1 = math.sqrt(1.0 - sin1[i] * sin1[i])
        if capped:
            cos2 = math.sqrt(1.0 - sin2[i] * sin2[i])
            value = (
                (mean - lower) * (theta2[i] - theta1[i])
                + amplitude * (cos1 - cos2)
                + (upper - lower) * (half_pi - theta2[i])
            )
        else:
            value = (mean - lower) * (half_pi - theta1[i]) + amplitude * cos1
        value = value / math.pi
        # comparisons with "<=", ">=": numpy's vectorised maximum and minimum give the second operand when
        # both are zero, so -0.0 becomes 0.0 as there
        if amplitude == 0.0:  # a flat day has its mean all day
            if capped:  # np.clip(mean, lower, upper) - lower: the maximum with lower, then the minimum
                clipped = lower if mean <= lower else mean
                if clipped >= upper:
                    clipped = upper
                value = clipped - lower
            else:  # np.maximum(mean - lower, 0.0)
                value = mean - lower
                if value <= 0.0:
                    value = 0.0
        if value <= 0.0:  # rounding can leave -1e-16 on days entirely below the threshold
            value = 0.0
        if value != value:  # a missing day adds nothing
            value = 0.0
        out[i] = value


def _presence_source(
    first: np.ndarray, second: np.ndarray, third: np.ndarray, held: np.ndarray, out: np.ndarray
) -> None:
    """Per row of (row, day) arrays: how many days have each combination of values present, ``out[row, code]``
    with bit k of code set when array k (held[k]) is not NaN that day."""
    for r in range(out.shape[0]):
        for d in range(first.shape[1]):
            code = 0
            if held[0] and first[r, d] == first[r, d]:
                code |= 1
            if held[1] and second[r, d] == second[r, d]:
                code |= 2
            if held[2] and third[r, d] == third[r, d]:
                code |= 4
            out[r, code] += 1


def presence_counts(arrays: list[np.ndarray | None]) -> np.ndarray:
    """Days per (row, combination) of up to three C-contiguous float64 (..., day) arrays of one shape (None:
    not held): int64 (..., 8), index ``code`` with bit k set where arrays[k] has a value (not NaN)."""
    present = [a for a in arrays if a is not None]
    lead, n_day = present[0].shape[:-1], present[0].shape[-1]
    flat = [(a if a is not None else present[0]).reshape(-1, n_day) for a in (*arrays, None, None)[:3]]
    held = np.array([a is not None for a in (*arrays, None, None)[:3]], dtype=np.bool_)
    out = np.zeros((flat[0].shape[0], 8), dtype=np.int64)
    _compile("presence", _presence_source)(flat[0], flat[1], flat[2], held, out)
    return out.reshape(*lead, 8)


def _snap_source(values: np.ndarray, factor: float) -> None:
    """values[i] = rint(values[i] * factor) / factor, in place: the three numpy steps of snap_daily in one pass."""
    for i in range(values.size):
        values[i] = np.rint(values[i] * factor) / factor


def snap_in_one_pass(values: np.ndarray, factor: float) -> None:
    """snap_daily's rounding of a C-contiguous float64 array in one compiled pass (the same IEEE steps)."""
    _compile("snap", _snap_source)(values.reshape(-1), float(factor))


def _compile(name: str, source: Callable[..., None]) -> Callable[..., None]:
    """``source`` compiled lazily under the table's ``name`` (service.jit)."""
    return jit.compiled(f"table.{name}", source)


def degree_day_terms(
    tmax: np.ndarray,
    tmin: np.ndarray,
    lower: float,
    upper: float | None,
    scratch: Callable[[str], np.ndarray],
    out: np.ndarray,
) -> np.ndarray:
    """Single-sine degree days (degC day) of each day of C-contiguous float64 ``tmax``/``tmin`` into ``out``
    (same shape), 0 where either temperature is missing: the terms whose row sums are np.nansum of
    single_sine(tmax, tmin, lower, upper). ``scratch(name)`` gives flat float64 arrays of the same size."""
    flat_max, flat_min, flat_out = tmax.reshape(-1), tmin.reshape(-1), out.reshape(-1)
    capped = upper is not None
    top = float(upper) if upper is not None else 0.0
    sin1, theta1 = scratch("sin1"), scratch("theta1")
    sin2, theta2 = (scratch("sin2"), scratch("theta2")) if capped else (sin1, theta1)
    with np.errstate(invalid="ignore", divide="ignore"):
        _compile("sines", _sines_source)(flat_max, flat_min, float(lower), top, capped, sin1, sin2)
        np.arcsin(sin1, out=theta1)
        if capped:
            np.arcsin(sin2, out=theta2)
    _compile("values", _values_source)(
        flat_max, flat_min, float(lower), top, capped, sin1, theta1, sin2, theta2, flat_out
    )
    return out


def warm_up() -> None:
    """Compile (or load from numba's cache) the table's kernels on tiny arrays, so that a long-running process
    pays the one-time cost before its first request rather than in it."""
    values = np.array([[1.0, np.nan]])
    presence_counts([values, values, None])
    snap_in_one_pass(values.copy(), 1000.0)
    scratch: dict[str, np.ndarray] = {}

    def take(name: str) -> np.ndarray:
        return scratch.setdefault(name, np.empty(values.size))

    degree_day_terms(values + 20.0, values, 10.0, 30.0, take, np.empty_like(values))
    degree_day_terms(values + 20.0, values, 10.0, None, take, np.empty_like(values))
