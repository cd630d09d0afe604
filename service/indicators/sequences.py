"""Season-to-season structure: lags, sequences of classes, and spells of seasons meeting a condition.

Every function takes (feature, year) arrays over consecutive season-years (one column per season-year, no
gaps) and returns the same shape; column t of a result speaks about season-year t.

Null handling (documented for users):
- a lag reaching before the first season-year is null;
- a sequence is null when either of its classes is null;
- a spell condition is unknown where any class or z it reads is null. An unknown season has a null
  ``_run`` and breaks the run: the run of the next season counts from 0 again (we do not assume the unknown
  season met the condition, nor that it failed). The first season-year of the record also starts a run at 0:
  a run cannot reach back before the data.
- ``_count`` (seasons meeting the condition among the last W, the season itself included) is null when any
  of those W seasons is unknown or the window reaches before the first season-year, so a count is never
  silently short.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def lag(values: np.ndarray, k: int) -> np.ndarray:
    """``values`` of season t - k at column t (float64; NaN where t - k is before the first season-year)."""
    values = np.asarray(values, dtype=np.float64)
    if k == 0:
        return values.copy()
    out = np.full(values.shape, np.nan)
    if k < values.shape[1]:
        out[:, k:] = values[:, :-k]
    return out


def lag_codes(codes: np.ndarray, k: int) -> np.ndarray:
    """Integer category codes of season t - k at column t (-1 where before the first season-year)."""
    out = np.full(codes.shape, -1, dtype=np.int64)
    if k == 0:
        return codes.astype(np.int64).copy()
    if k < codes.shape[1]:
        out[:, k:] = codes[:, :-k]
    return out


def condition_holds(
    classes: Sequence[np.ndarray | None],
    zs: Sequence[np.ndarray | None],
    bounds: Sequence[tuple[float | None, float | None, float | None, float | None]],
) -> np.ndarray:
    """Whether every condition holds: 1.0 yes, 0.0 no, NaN unknown (a needed class or z is null).

    Condition i reads ``classes[i]`` against (class_min, class_max) and ``zs[i]`` against (z_min, z_max),
    given in ``bounds[i]`` as (class_min, class_max, z_min, z_max), None for no bound; all bounds inclusive.
    A false condition decides the season even if another one is unknown.
    """
    shape = next(a.shape for a in (*classes, *zs) if a is not None)
    holds = np.ones(shape, dtype=bool)
    unknown = np.zeros(shape, dtype=bool)
    for cls, z, (class_min, class_max, z_min, z_max) in zip(classes, zs, bounds, strict=True):
        for values, low, high in ((cls, class_min, class_max), (z, z_min, z_max)):
            if low is None and high is None:
                continue
            if values is None:
                raise ValueError("a bounded class or z is missing")
            missing = np.isnan(values)
            ok = np.ones(shape, dtype=bool)
            with np.errstate(invalid="ignore"):
                if low is not None:
                    ok &= values >= low
                if high is not None:
                    ok &= values <= high
            unknown |= missing
            holds &= ok | missing
    result = holds.astype(np.float64)
    result[unknown & holds] = np.nan
    return result


def spell_run(condition: np.ndarray) -> np.ndarray:
    """Consecutive seasons meeting ``condition`` (1/0/NaN) ending at each season (float64, NaN unknown).

    Vectorised over features; loops over the (few dozen) season-years.
    """
    out = np.empty(condition.shape, dtype=np.float64)
    running = np.zeros(condition.shape[0], dtype=np.float64)
    for t in range(condition.shape[1]):
        c = condition[:, t]
        met = c == 1.0
        running = np.where(met, running + 1.0, 0.0)
        out[:, t] = np.where(np.isnan(c), np.nan, running)
    return out


def spell_count(condition: np.ndarray, window: int) -> np.ndarray:
    """Seasons meeting ``condition`` among the last ``window`` (this one included); NaN as the module says."""
    n_year = condition.shape[1]
    met = np.nan_to_num(condition, nan=0.0)
    unknown = np.isnan(condition).astype(np.float64)
    zeros = np.zeros((condition.shape[0], 1))
    met_sum = np.cumsum(np.concatenate([zeros, met], axis=1), axis=1)
    unknown_sum = np.cumsum(np.concatenate([zeros, unknown], axis=1), axis=1)
    out = np.full(condition.shape, np.nan)
    if window <= n_year:
        end = np.arange(window, n_year + 1)
        count = met_sum[:, end] - met_sum[:, end - window]
        gaps = unknown_sum[:, end] - unknown_sum[:, end - window]
        out[:, window - 1 :] = np.where(gaps > 0, np.nan, count)
    return out
