"""Units of input variables, read with a kept units library and turned into wxshock's units.

The strings are parsed by cf-xarray's pint registry, which reads the UDUNITS and CF spellings (``degC``,
``degree_Celsius``, ``degrees_Celsius``, ``Celsius``, ``K``, ``kg m-2 s-1``, ``mm d-1``, ``mm/hr``, ``mm h-1``,
...). Temperatures become degC. Precipitation is either a rate (length or water mass per area, per time), which
becomes mm/day, or an amount per time step (length, or water mass per area), which becomes mm; 1 kg m-2 of
liquid water is 1 mm (CF conventions, lwe quantities; see /work/shared/CHECK-VALUES.md).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import cache
from typing import Any, Literal

from service.errors import IngestError

TEMPERATURE_UNITS = "degC"
RATE_UNITS = "mm/day"
AMOUNT_UNITS = "mm"

# Spellings seen in real products that every units library reads as something else: UDUNITS reads
# "degrees C" as an angle times a coulomb, pint as an angle times a temperature difference. They name an
# absolute temperature scale, so they are mapped to the scale's own symbol before parsing.
_DEGREE_SPELLING = re.compile(r"^\s*(?:deg|degs|degree|degrees)[\s_]*([CFK])\s*$", re.IGNORECASE)

Kind = Literal["temperature", "rate", "amount"]


@dataclass(frozen=True)
class Conversion:
    """How one input variable's values become wxshock's: ``value * factor + offset``.

    ``kind`` is "temperature" (to degC), "rate" (precipitation per unit time, to mm/day) or "amount"
    (precipitation per time step, to mm). ``parsed`` is the library's reading of ``units`` (for messages and the
    store's record of what was done).
    """

    units: str
    parsed: str
    kind: Kind
    factor: float
    offset: float = 0.0

    def apply(self, values: Any) -> Any:
        """Convert values (numpy, dask or xarray) to degC, mm/day or mm."""
        if self.offset == 0.0:
            return values if self.factor == 1.0 else values * self.factor
        return values * self.factor + self.offset


@cache
def registry() -> Any:
    """The pint unit registry of cf-xarray (UDUNITS spellings); imported on first use (it takes a few seconds)."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from cf_xarray.units import units

    return units


def _parse(units: str) -> Any:
    """A pint Unit from a units string, or None when the library cannot read it."""
    import pint

    text = units.strip()
    degree = _DEGREE_SPELLING.match(text)
    if degree:
        text = "deg" + degree.group(1).upper()
    if not text:
        return None
    try:
        return registry().Unit(text)
    except (pint.errors.PintError, ValueError, TypeError, AttributeError, KeyError):
        # pint raises ValueError for scaling factors ("mm/3hr") and TypeError for some malformed strings
        return None


def temperature_conversion(units: str, where: str) -> Conversion:
    """The conversion of an air temperature to degC; ``where`` names the file and variable for messages."""
    unit = _parse(units)
    if unit is None:
        raise IngestError(
            f"{where}: units {units!r} are not a temperature unit that UDUNITS/CF spellings allow; "
            "write them as K, degC, degree_Celsius or degF"
        )
    parts = dict(unit._units)  # noqa: SLF001 - pint's documented way to see the factors of a unit
    name = next(iter(parts)) if len(parts) == 1 else ""
    if len(parts) != 1 or parts[name] != 1 or name.startswith("delta_"):
        raise IngestError(
            f"{where}: units {units!r} read as {str(unit)!r}, not an absolute temperature scale; "
            "write them as K, degC, degree_Celsius or degF"
        )
    registry_ = registry()
    import pint

    try:
        zero = float(registry_.Quantity(0.0, unit).to(TEMPERATURE_UNITS).magnitude)
        one = float(registry_.Quantity(1.0, unit).to(TEMPERATURE_UNITS).magnitude)
    except pint.errors.DimensionalityError:
        raise IngestError(
            f"{where}: units {units!r} read as {str(unit)!r}, which is not a temperature; "
            "write them as K, degC, degree_Celsius or degF"
        ) from None
    factor = one - zero
    return Conversion(
        units=units, parsed=str(unit), kind="temperature", factor=_tidy(factor), offset=_tidy(zero)
    )


def precipitation_conversion(units: str, where: str) -> Conversion:
    """The conversion of precipitation to mm/day (a rate) or mm (an amount per time step)."""
    unit = _parse(units)
    allowed = (
        "a rate such as kg m-2 s-1, mm/day, mm h-1, m s-1, or an amount per time step such as mm, m, kg m-2"
    )
    if unit is None:
        raise IngestError(
            f"{where}: units {units!r} are not a precipitation unit that UDUNITS/CF spellings allow; use {allowed}"
        )
    registry_ = registry()
    dims = dict(unit.dimensionality)
    # liquid water: 1 kg m-2 is 1 mm (CF lwe quantities), so a water mass per area is read as a depth
    targets: list[tuple[dict[str, int], Kind, str]] = [
        ({"[length]": 1, "[time]": -1}, "rate", "mm/day"),
        ({"[mass]": 1, "[length]": -2, "[time]": -1}, "rate", "kg m-2 day-1"),
        ({"[length]": 1}, "amount", "mm"),
        ({"[mass]": 1, "[length]": -2}, "amount", "kg m-2"),
    ]
    for wanted, kind, target in targets:
        if dims == wanted:
            factor = float(registry_.Quantity(1.0, unit).to(target).magnitude)
            return Conversion(units=units, parsed=str(unit), kind=kind, factor=_tidy(factor))
    raise IngestError(
        f"{where}: units {units!r} read as {str(unit)!r} ({_dimensions(dims)}), which is neither a precipitation "
        f"rate nor an amount; use {allowed}"
    )


def length_factor(units: str, where: str) -> float:
    """Metres per unit of a projected coordinate (m, km, ...)."""
    unit = _parse(units or "m")
    if unit is None or dict(unit.dimensionality) != {"[length]": 1}:
        raise IngestError(f"{where}: coordinate units {units!r} are not a length; expected m or km")
    return _tidy(float(registry().Quantity(1.0, unit).to("m").magnitude))


def _dimensions(dims: dict[str, int]) -> str:
    """'[mass] [length]^-2' for messages."""
    if not dims:
        return "dimensionless"
    return " ".join(name if power == 1 else f"{name}^{power}" for name, power in dims.items())


def _tidy(value: float) -> float:
    """A factor without the last-digit noise of the library's arithmetic (86400.00000000001 -> 86400.0)."""
    return float(f"{value:.12g}")
