"""Units of input variables: UDUNITS/CF spellings read by cf-xarray's pint registry, turned into degC, mm/day, mm."""

from __future__ import annotations

import pytest

from service.errors import IngestError
from service.ingest.units import length_factor, precipitation_conversion, temperature_conversion

# The spellings UDUNITS accepts (CHECK-VALUES.md, "Conventions of gridded daily products", from memory) and
# "degrees C" as one product writes it. Expected: (factor, offset) to degC.
TEMPERATURES = [
    ("degrees_Celsius", 1.0, 0.0),
    ("degree_Celsius", 1.0, 0.0),
    ("Celsius", 1.0, 0.0),
    ("degC", 1.0, 0.0),
    ("deg_C", 1.0, 0.0),
    ("°C", 1.0, 0.0),
    ("degrees C", 1.0, 0.0),
    ("degree_C", 1.0, 0.0),
    ("K", 1.0, -273.15),
    ("kelvin", 1.0, -273.15),
    ("degrees_K", 1.0, -273.15),
    ("degF", 5.0 / 9.0, -32.0 * 5.0 / 9.0),  # (F - 32) x 5/9: -17.777... at 0 degF
]


@pytest.mark.parametrize(("units", "factor", "offset"), TEMPERATURES)
def test_temperature_spellings(units: str, factor: float, offset: float) -> None:
    conversion = temperature_conversion(units, "test")
    assert conversion.kind == "temperature"
    assert conversion.factor == pytest.approx(factor, rel=1e-12)
    assert conversion.offset == pytest.approx(offset, abs=1e-9)


def test_kelvin_values() -> None:
    # 273.15 K is the ice point, 0 degC (SI brochure); 300 K is 26.85 degC
    conversion = temperature_conversion("K", "test")
    assert conversion.apply(273.15) == pytest.approx(0.0, abs=1e-12)
    assert conversion.apply(300.0) == pytest.approx(26.85, abs=1e-12)
    assert temperature_conversion("degF", "test").apply(212.0) == pytest.approx(100.0, abs=1e-9)


# Precipitation: (units, kind, factor to mm/day for rates or to mm for amounts). 1 kg m-2 of liquid water is
# 1 mm, so kg m-2 s-1 x 86400 is mm/day (CF conventions; CHECK-VALUES.md).
PRECIPITATION = [
    ("kg m-2 s-1", "rate", 86400.0),
    ("kg m**-2 s**-1", "rate", 86400.0),
    ("kg/m2/s", "rate", 86400.0),
    ("mm/day", "rate", 1.0),
    ("mm d-1", "rate", 1.0),
    ("mm day-1", "rate", 1.0),
    ("mm/hr", "rate", 24.0),
    ("mm h-1", "rate", 24.0),
    ("m s-1", "rate", 86_400_000.0),
    ("mm", "amount", 1.0),
    ("m", "amount", 1000.0),
    ("cm", "amount", 10.0),
    ("kg m-2", "amount", 1.0),
]


@pytest.mark.parametrize(("units", "kind", "factor"), PRECIPITATION)
def test_precipitation_spellings(units: str, kind: str, factor: float) -> None:
    conversion = precipitation_conversion(units, "test")
    assert (conversion.kind, conversion.offset) == (kind, 0.0)
    assert conversion.factor == pytest.approx(factor, rel=1e-12)


@pytest.mark.parametrize(
    ("units", "message"),
    [
        ("K", r"units 'K' read as 'kelvin' \(\[temperature\]\), which is neither a precipitation rate nor"),
        (
            "mm/3hr",
            r"units 'mm/3hr' are not a precipitation unit",
        ),  # pint would read mm/3*hr: refused, not misread
        ("furlongs per fortnight please", r"are not a precipitation unit"),
        ("", r"units '' are not a precipitation unit"),
        ("1", r"read as 'dimensionless' \(dimensionless\)"),
    ],
)
def test_precipitation_refusals(units: str, message: str) -> None:
    with pytest.raises(IngestError, match=message):
        precipitation_conversion(units, "test")


@pytest.mark.parametrize(
    ("units", "message"),
    [
        ("mm", r"units 'mm' read as 'millimeter', which is not a temperature"),
        ("delta_degC", r"not an absolute temperature scale"),
        ("deg C per day", r"not an absolute temperature scale|not a temperature unit"),
        ("", r"units '' are not a temperature unit"),
    ],
)
def test_temperature_refusals(units: str, message: str) -> None:
    with pytest.raises(IngestError, match=message):
        temperature_conversion(units, "test")


@pytest.mark.parametrize(("units", "factor"), [("m", 1.0), ("km", 1000.0), ("metre", 1.0), ("", 1.0)])
def test_coordinate_lengths(units: str, factor: float) -> None:
    assert length_factor(units, "test") == factor


def test_coordinate_lengths_refuse_angles() -> None:
    with pytest.raises(IngestError, match=r"coordinate units 'degrees_east' are not a length"):
        length_factor("degrees_east", "test")
