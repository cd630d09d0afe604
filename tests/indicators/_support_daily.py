"""Hand-made daily series for the indicator-core tests (seasons, baselines, classes, sequences, table).

The dates come from numpy's datetime64 (standard calendar) or are written out directly (noleap, 360_day),
independently of service/indicators/seasons.py, so the cutter is tested against a second way of counting days.
"""

from __future__ import annotations

import numpy as np

from service.indicators.base import DailySeries


def dates(start: str, end: str, calendar: str = "standard") -> dict[str, np.ndarray]:
    """year, month, day, dayofyear of every day from ``start`` to ``end`` ('YYYY-MM-DD', inclusive)."""
    y0, y1 = int(start[:4]), int(end[:4])
    if calendar == "360_day":
        year = np.repeat(np.arange(y0, y1 + 1), 360)
        doy = np.tile(np.arange(1, 361), y1 - y0 + 1)
        month, day = (doy - 1) // 30 + 1, (doy - 1) % 30 + 1
    else:
        days = np.arange(f"{y0}-01-01", f"{y1 + 1}-01-01", dtype="datetime64[D]")
        year = days.astype("datetime64[Y]").astype(int) + 1970
        month = days.astype("datetime64[M]").astype(int) % 12 + 1
        day = (days - days.astype("datetime64[M]")).astype(int) + 1
        doy = (days - days.astype("datetime64[Y]")).astype(int) + 1
        if calendar == "noleap":
            keep = ~((month == 2) & (day == 29))
            year, month, day = year[keep], month[keep], day[keep]
            doy = np.tile(np.arange(1, 366), y1 - y0 + 1)
    key = year * 10000 + month * 100 + day
    lo, hi = int(start.replace("-", "")), int(end.replace("-", ""))
    keep = (key >= lo) & (key <= hi)
    return {"year": year[keep], "month": month[keep], "day": day[keep], "dayofyear": doy[keep]}


def make_daily(
    start: str,
    end: str,
    *,
    n_features: int = 1,
    calendar: str = "standard",
    tmax: np.ndarray | float = 25.0,
    tmin: np.ndarray | float = 15.0,
    prcp: np.ndarray | float = 2.0,
    latitude: float = 10.0,
) -> DailySeries:
    """A DailySeries from ``start`` to ``end``; scalars and (time,) arrays broadcast to (feature, time)."""
    d = dates(start, end, calendar)
    shape = (n_features, d["year"].size)

    def full(value: np.ndarray | float) -> np.ndarray:
        return np.broadcast_to(np.asarray(value, dtype=np.float64), shape).copy()

    return DailySeries(
        tmax=full(tmax),
        tmin=full(tmin),
        prcp=full(prcp),
        calendar=calendar,
        latitude=np.full(n_features, latitude),
        **d,
    )


def with_values(daily: DailySeries, **arrays: np.ndarray) -> DailySeries:
    """A copy of ``daily`` with some variables replaced."""
    fields = {k: getattr(daily, k) for k in daily.__dataclass_fields__}
    fields.update(arrays)
    return DailySeries(**fields)
