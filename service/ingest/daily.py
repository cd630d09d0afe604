"""From input files to daily variables in wxshock's units, one lazy (dask) array per variable.

Each file is opened lazily; its variables are recognised (variables.py), their units read (units.py), their
grid read and checked (readers.py). The files of one variable are joined in time order, checked for gaps and
overlaps, and made daily (timeaxis.py): daily data as they are (with a product's dropped days put back as
missing), sub-daily data as the daily maximum, minimum or precipitation total. Nothing is read in full here: the
arrays are dask graphs that the store writes block by block.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import dask
import dask.array as da
import numpy as np
import xarray as xr

from service.errors import IngestError
from service.ingest import timeaxis
from service.ingest.readers import FileGrid, file_grid, open_netcdf, time_dim, variable_data
from service.ingest.timeaxis import DAY, Cadence, Placement, Stamps
from service.ingest.units import Conversion, precipitation_conversion, temperature_conversion
from service.ingest.variables import VARIABLES, Choice, Found, identify

# Sub-daily values are reduced to days in blocks of this many days (times the steps of a day) along time, fewer
# where a block of a large grid would pass BLOCK_BYTES as float64 (whole days always: a day is never split).
DAYS_PER_BLOCK = 32
BLOCK_BYTES = 64 << 20
# Input files are opened in dask chunks of at most this size (dask's "auto" chunking, in the file's dtype), so that
# ingest of input larger than memory reads each chunk once into a time block (service/ingest/blocks.py).
INPUT_CHUNK = "32MiB"


@dataclass(frozen=True)
class DayOptions:
    """How sub-daily values become days."""

    utc_offset: int = 0  # seconds east of UTC of the local day's midnight
    placement: Placement = "end"  # where an unbounded period value's stamp sits in its period


@dataclass
class Source:
    """One recognised variable of one file."""

    path: Path
    found: Found
    units: str
    data: xr.DataArray  # lazy (time, y, x) in the file's units, after CF decoding (packing, fill values)
    stamps: Stamps
    grid: FileGrid


@dataclass
class DailyVariable:
    """One of our variables over its days, in wxshock units (degC or mm/day), lazily."""

    variable: str
    data: xr.DataArray  # (time, y, x) float64, no coordinates
    days: np.ndarray  # (time,) contiguous day numbers in the calendar
    calendar: str
    grid: FileGrid
    paths: list[Path]
    convention: str | None  # timeaxis.LEAP_DROPS_DEC31 or None
    record: str  # what was done, in words, for the store
    source: str  # the variable's name in the files
    sub_daily: bool
    notes: list[str] = field(default_factory=list)  # what the user should hear (left-out days ...)


def open_sources(files: Sequence[Path], choices: list[Choice], progress: bool = False) -> list[Source]:
    """Open every file lazily and recognise its variables; a file with none of ours is an error."""
    for choice in choices:
        if choice.files is not None and not any(choice.applies_to(Path(p)) for p in files):
            raise IngestError(
                f"--var {choice.text()}: no input file matches {choice.files!r}; the pattern is matched against each "
                "file's name (or whole path), e.g. 'tx_*.nc'",
                field="variables",
            )
    iterator: Any = files
    if progress:
        from tqdm.auto import tqdm

        iterator = tqdm(files, desc="reading file headers", unit="file")
    sources: list[Source] = []
    for path in iterator:
        path = Path(path)
        with dask.config.set({"array.chunk-size": INPUT_CHUNK}):
            ds = open_netcdf(path, chunks="auto")  # type: ignore[arg-type]
        grid = file_grid(path, ds)
        found = identify(path, ds, choices)
        if not found:
            raise IngestError(
                f"file {str(path)!r} holds none of tmax, tmin, prcp: no variable has standard_name air_temperature "
                "(with cell_methods 'time: maximum' or 'time: minimum' for daily data) or a precipitation "
                f"standard_name, or a usual name; its variables are {sorted(map(str, ds.data_vars))!r}; name them "
                "with --var tmax=NAME (or tmin=, prcp=; NAME@FILES for some files only)"
            )
        for item in found:
            var = ds[item.name]
            name = time_dim(path, ds, var)
            stamps = timeaxis.read_stamps(ds, name, f"file {str(path)!r}")
            data = variable_data(path, ds, item.name, grid, name)
            units = str(var.attrs.get("units", ""))
            sources.append(Source(path=path, found=item, units=units, data=data, stamps=stamps, grid=grid))
    return sources


def _where(source: Source) -> str:
    return f"file {str(source.path)!r}: variable {source.found.name!r} ({source.found.variable})"


def _conversion(source: Source) -> Conversion:
    """The unit conversion of one source."""
    if source.found.variable == "prcp":
        return precipitation_conversion(source.units, _where(source))
    return temperature_conversion(source.units, _where(source))


def daily_variables(
    sources: list[Source], choices: list[Choice], options: DayOptions
) -> dict[str, DailyVariable]:
    """Every recognised variable made daily; plain temperature fields of daily data are left out."""
    by_variable: dict[str, list[Source]] = {}
    for source in sources:
        by_variable.setdefault(source.found.variable, []).append(source)
    for choice in choices:
        if choice.variable not in by_variable or not any(
            s.found.name == choice.name for s in by_variable[choice.variable]
        ):
            raise IngestError(
                f"--var {choice.text()}: no input file"
                + (f" matching {choice.files!r}" if choice.files else "")
                + f" has a variable named {choice.name!r}",
                field="variables",
            )
    shared: dict[tuple[Any, ...], xr.DataArray] = {}
    result: dict[str, DailyVariable] = {}
    skipped: list[str] = []
    for variable in VARIABLES:
        items = sorted(
            by_variable.get(variable, []),
            key=lambda s: int(s.stamps.seconds[0]) if s.stamps.seconds.size else 0,
        )
        if not items:
            continue
        _check_one_grid(variable, items)
        calendars = {s.stamps.calendar for s in items}
        if len(calendars) > 1:
            detail = ", ".join(f"{str(s.path)!r}: {s.stamps.calendar}" for s in items)
            raise IngestError(f"files use different calendars ({detail}); convert them to one calendar first")
        seconds = np.concatenate([s.stamps.seconds for s in items])
        bounds = None
        if all(s.stamps.bounds is not None for s in items):
            bounds = np.concatenate([s.stamps.bounds for s in items])  # type: ignore[misc]
        where = f"{variable} ({', '.join(sorted({repr(str(s.path)) for s in items})[:3])}{', ...' if len(items) > 3 else ''})"
        rhythm = timeaxis.cadence(seconds, bounds, where)
        if rhythm.kind == "daily" and items[0].found.plain_temperature:
            if items[0].found.explicit:
                raise IngestError(
                    f"--var {variable}={items[0].found.name}: {_where(items[0])} is daily data whose cell_methods say "
                    f"{str(items[0].data.attrs.get('cell_methods', '')) or 'it is not a daily extreme'}; a daily "
                    f"{'maximum' if variable == 'tmax' else 'minimum'} is needed (from sub-daily data wxshock takes "
                    "it itself)",
                    field="variables",
                )
            skipped.append(variable)
            continue
        _check_order(variable, items, rhythm)
        if rhythm.kind == "daily":
            result[variable] = _daily(variable, items)
        else:
            result[variable] = _from_sub_daily(variable, items, rhythm, bounds, options, shared)
    if not result:
        raise IngestError(
            "the files hold only a temperature field without daily maximum or minimum, and their data are daily: "
            "wxshock needs tmax and tmin (a daily mean cannot stand in for them); "
            "give files of daily maxima and minima, or sub-daily temperatures"
        )
    _same_daily_source_twice(result)
    return result


def _check_one_grid(variable: str, items: list[Source]) -> None:
    """Every file of one variable lies on one grid."""
    first = items[0]
    for source in items[1:]:
        if not first.grid.same_as(source.grid):
            raise IngestError(
                f"file {str(source.path)!r} is not on the grid of {str(first.path)!r} ({variable}): "
                f"{first.grid.difference(source.grid)}; the files of one variable must share one grid "
                "(another variable may lie on its own grid)"
            )


def _check_order(variable: str, items: list[Source], rhythm: Cadence) -> None:
    """Consecutive files of one variable neither overlap nor leave a gap (beyond a product's dropped day)."""
    step = rhythm.step
    for before, after in zip(items, items[1:], strict=False):
        if not before.stamps.seconds.size or not after.stamps.seconds.size:
            continue
        end, start = int(before.stamps.seconds[-1]), int(after.stamps.seconds[0])
        calendar = before.stamps.calendar
        if start <= end:
            raise IngestError(
                f"files {str(before.path)!r} and {str(after.path)!r} overlap in {variable}: the first ends "
                f"{_when(end, rhythm, calendar)}, the second starts {_when(start, rhythm, calendar)}; remove the "
                "repeated time steps"
            )
        if rhythm.kind == "sub-daily" and start - end != step:
            raise IngestError(
                f"{variable} has a gap between {str(before.path)!r} (ends {_when(end, rhythm, calendar)}) and "
                f"{str(after.path)!r} (starts {_when(start, rhythm, calendar)}): {(start - end) // step - 1} time "
                "step(s) missing"
            )


def _when(seconds: int, rhythm: Cadence, calendar: str) -> str:
    """A stamp for messages: the day of daily data, day and time of sub-daily data."""
    if rhythm.kind == "daily":
        return timeaxis.day_text(seconds // DAY, calendar)
    return timeaxis._stamp(seconds, calendar)  # noqa: SLF001 - same package


def _joined(items: list[Source]) -> xr.DataArray:
    """The files of one variable joined along time (lazily)."""
    if len(items) == 1:
        return items[0].data
    return xr.concat(
        [s.data for s in items], dim="time", join="override", coords="minimal", compat="override"
    )


def _daily(variable: str, items: list[Source]) -> DailyVariable:
    """Daily input: units converted, the days checked, a product's dropped days put back as missing."""
    calendar = items[0].stamps.calendar
    numbers = [timeaxis.daily_numbers(s.stamps) for s in items]
    for source, days in zip(items, numbers, strict=True):
        if days.size > 1 and np.any(np.diff(days) <= 0):
            i = int(np.flatnonzero(np.diff(days) <= 0)[0])
            raise IngestError(
                f"file {str(source.path)!r}: {variable} time goes back or repeats after "
                f"{timeaxis.day_text(int(days[i]), calendar)} (next {timeaxis.day_text(int(days[i + 1]), calendar)}); "
                "time must run day by day without gaps or repeats"
            )
    days = np.concatenate(numbers)
    axis = timeaxis.daily_axis(days, calendar)
    if axis.convention is None:
        _report_gap(variable, items, numbers, calendar)
    conversions = [_conversion(s) for s in items]
    data = (
        xr.concat(
            [c.apply(s.data.astype(np.float64)) for c, s in zip(conversions, items, strict=True)],
            dim="time",
            join="override",
            coords="minimal",
            compat="override",
        )
        if len(items) > 1
        else conversions[0].apply(items[0].data.astype(np.float64))
    )
    if not axis.present.all():
        data = data.assign_coords(time=days).reindex(time=axis.days).drop_vars("time")
    conversion = conversions[0]
    kind = "per day" if conversion.kind == "amount" else "as a rate"
    text = f"daily values of {items[0].found.name!r} in {conversion.units!r}"
    if variable == "prcp":
        text += f" ({kind}), converted to mm/day"
    else:
        text += ", converted to degC"
    text += f"; recognised by {items[0].found.how}"
    notes = []
    if axis.convention:
        text += "; the product's 365-day years drop 31 December in leap years, stored as missing days"
        notes.append(
            f"{variable}: 365-day years with 31 December dropped in leap years: "
            f"{len(axis.dropped)} day(s) stored as missing"
        )
    return DailyVariable(
        variable=variable,
        data=data.astype(np.float64),
        days=axis.days,
        calendar=calendar,
        grid=items[0].grid,
        paths=[s.path for s in items],
        convention=axis.convention,
        record=text,
        source=items[0].found.name,
        sub_daily=False,
        notes=notes,
    )


def _report_gap(variable: str, items: list[Source], numbers: list[np.ndarray], calendar: str) -> None:
    """Raise for the first gap inside a file or between two files of daily data."""
    for source, days in zip(items, numbers, strict=True):
        steps = np.diff(days)
        bad = np.flatnonzero(steps != 1)
        if bad.size:
            i = int(bad[0])
            raise IngestError(
                f"file {str(source.path)!r}: {variable} time skips {int(steps[i]) - 1} day(s) after "
                f"{timeaxis.day_text(int(days[i]), calendar)} (next {timeaxis.day_text(int(days[i + 1]), calendar)}); "
                "time must run day by day without gaps or repeats"
            )
    for (before, a), (after, b) in zip(
        zip(items, numbers, strict=True), list(zip(items, numbers, strict=True))[1:], strict=False
    ):
        end, start = int(a[-1]), int(b[0])
        if start > end + 1:
            raise IngestError(
                f"{variable} has a gap between {str(before.path)!r} (ends {timeaxis.day_text(end, calendar)}) and "
                f"{str(after.path)!r} (starts {timeaxis.day_text(start, calendar)}): {start - end - 1} day(s) missing "
                f"from {timeaxis.day_text(end + 1, calendar)} to {timeaxis.day_text(start - 1, calendar)}"
            )


def _from_sub_daily(
    variable: str,
    items: list[Source],
    rhythm: Cadence,
    bounds: np.ndarray | None,
    options: DayOptions,
    shared: dict[tuple[Any, ...], xr.DataArray],
) -> DailyVariable:
    """Sub-daily input reduced to days: tmax/tmin the daily maximum/minimum, prcp the daily total in mm/day."""
    calendar = items[0].stamps.calendar
    found = items[0].found
    seconds = np.concatenate([s.stamps.seconds for s in items])
    stamps = Stamps(seconds=seconds, bounds=bounds, calendar=calendar)
    where = f"{variable} from {found.name!r}"
    plan = timeaxis.day_plan(
        stamps,
        rhythm.step,
        period=found.period,
        placement=options.placement,
        utc_offset=options.utc_offset,
        calendar=calendar,
        where=where,
    )
    conversions = [_conversion(s) for s in items]
    if len({(c.factor, c.offset, c.kind) for c in conversions}) > 1:
        raise IngestError(
            f"{where}: the files give it in different units ({sorted({c.units for c in conversions})!r})"
        )
    conversion = conversions[0]
    key = (found.name, tuple(str(s.path) for s in items))
    raw = shared.get(key)
    if raw is None:
        raw = shared[key] = _joined(items)
    spd = plan.steps_per_day
    cells = int(np.prod(raw.shape[1:]))
    days_per_block = max(1, min(DAYS_PER_BLOCK, BLOCK_BYTES // max(1, spd * cells * 8)))
    block = raw.data[plan.start : plan.start + plan.n_days * spd]
    if not isinstance(block, da.Array):
        block = da.from_array(np.asarray(block), chunks=(spd * days_per_block, -1, -1))
    block = block.rechunk({0: spd * days_per_block})
    if variable == "tmax":
        reducer, words = np.max, "maximum"
    elif variable == "tmin":
        reducer, words = np.min, "minimum"
    elif conversion.kind == "amount":
        reducer, words = np.sum, "total"
        _refuse_running_totals(block, spd, where)
    else:
        reducer, words = np.mean, "mean rate"
    # numpy's max, min, sum and mean give NaN for a day with any missing step: such a day is missing
    daily = da.coarsen(reducer, block.astype(np.float64), {0: spd}, trim_excess=False)
    values = conversion.apply(daily)  # amounts per day in mm are mm/day; rates go to mm/day directly
    days = np.arange(plan.first_day, plan.first_day + plan.n_days, dtype=np.int64)
    data = xr.DataArray(values, dims=("time", "y", "x"))
    boundary = timeaxis.format_utc_offset(options.utc_offset)
    if bounds is not None and found.period:
        placed = "each value placed at the middle of its time bounds"
    elif found.period:
        placed = f"each value taken to cover the time step {_PLACED[options.placement]} its stamp"
    else:
        placed = "each value taken as an instant"
    text = (
        f"daily {words} of {spd} {rhythm.describe()} values of {found.name!r} ({conversion.units!r}), days from "
        f"midnight to midnight {boundary}; {placed}; a day with any missing value is missing; recognised by "
        f"{found.how}"
    )
    notes = [f"{variable}: left out incomplete day {d}" for d in plan.left_out]
    return DailyVariable(
        variable=variable,
        data=data,
        days=days,
        calendar=calendar,
        grid=items[0].grid,
        paths=[s.path for s in items],
        convention=None,
        record=text,
        source=found.name,
        sub_daily=True,
        notes=notes,
    )


_PLACED = {"end": "ending at", "start": "starting at", "middle": "centred on"}

# Days read to tell running totals from amounts per time step, and the share of wet cell-days whose values fall at
# most once within the day (at the running total's reset) above which the amounts are taken for running totals
RUNNING_TOTAL_DAYS = 4
RUNNING_TOTAL_SHARE = 0.8


def _refuse_running_totals(block: da.Array, steps_per_day: int, where: str) -> None:
    """Refuse precipitation amounts that accumulate through the day (totals since a forecast's start) instead of
    being amounts per time step: summing them would multiply the daily total many times over.

    Amounts per step rise and fall within a wet day; running totals only rise, except once where they restart
    (which need not be the day's boundary, e.g. under --utc-offset). Among the cell-days of the first few days with
    at least three wet steps, more than RUNNING_TOTAL_SHARE that fall at most once mark running totals.
    """
    days = min(RUNNING_TOTAL_DAYS, block.shape[0] // steps_per_day)
    if days == 0 or steps_per_day < 4:
        return
    sample = np.asarray(block[: days * steps_per_day].compute(), dtype=np.float64)
    cube = sample.reshape(days, steps_per_day, -1)
    wet = (np.nan_to_num(cube) > 0).sum(axis=1) >= 3
    if wet.sum() < 10:
        return  # too few wet cell-days to tell
    falls = (np.diff(cube, axis=1) < 0).sum(axis=1)
    share = float((falls <= 1)[wet].mean())
    if share > RUNNING_TOTAL_SHARE:
        raise IngestError(
            f"{where}: the precipitation amounts look like running totals accumulated through the day (in "
            f"{share:.0%} of {int(wet.sum())} wet cell-days of the first {days} days they fall at most once, where "
            "a running total restarts), not amounts per time step; summing them would count each hour's rain many times. Difference "
            "them into amounts per time step first"
        )


def _same_daily_source_twice(result: dict[str, DailyVariable]) -> None:
    """tmax and tmin taken from one and the same daily variable is a mistake in the options."""
    tmax, tmin = result.get("tmax"), result.get("tmin")
    if tmax is None or tmin is None or tmax.sub_daily or tmin.sub_daily:
        return
    if tmax.paths == tmin.paths and tmax.source == tmin.source:
        raise IngestError(
            "tmax and tmin are the same daily variable of the same files; a daily field can be one of them only "
            "(from sub-daily data wxshock derives both from one field)",
            field="variables",
        )
