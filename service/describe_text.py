"""`wxshock describe` as a readable summary: a store's description dict laid out for a person.

Known entries (name, title, time, variables, crs, shape, resolution, bounds, ...) get their own words; any
other entry, and any nesting (a dataset with several grids describes each grid with the same keys), is laid
out generically, so a new key in the store's description shows up without a change here. `--json` prints
the dict itself.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

_SKIP = {"name", "title", "wkt", "lonlat_bounds", "years", "calendar"}
_LABEL_WIDTH = 16


def _number(value: Any) -> str:
    """17532 -> '17,532' (years such as 1980 stay as they are); 0.025 -> '0.025'; others as they print."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}" if abs(value) >= 10_000 else str(value)
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def _crs(crs: Any) -> str:
    """'WGS 84 (EPSG:4326), geographic' rather than the WKT."""
    if not isinstance(crs, Mapping):
        text = str(crs)
        return text if len(text) <= 80 else text[:77] + "..."
    name = crs.get("name") or "unnamed CRS"
    code = f" (EPSG:{crs['epsg']})" if crs.get("epsg") else ""
    kind = {True: ", geographic", False: ", projected"}.get(crs.get("is_geographic"), "")
    if not crs.get("name") and crs.get("wkt"):
        name = str(crs["wkt"])[:60] + "..."
    return f"{name}{code}{kind}"


def _time(time: Mapping[str, Any], info: Mapping[str, Any]) -> str:
    """'1975-01-01 to 2022-12-31, 17,532 days, standard calendar'."""
    parts = [f"{time.get('start')} to {time.get('end')}"]
    if time.get("days") is not None:
        parts.append(f"{_number(time['days'])} days")
    calendar = time.get("calendar") or info.get("calendar")
    if calendar:
        parts.append(f"{calendar} calendar")
    return ", ".join(parts)


def _variable(name: str, attributes: Any) -> str:
    """'tmax  degC  air_temperature (time: maximum), stored to 0.1 (grid main)'."""
    if not isinstance(attributes, Mapping):
        return f"{name:<8} {attributes}"
    units = attributes.get("units", "")
    what = attributes.get("standard_name") or attributes.get("long_name") or ""
    method = f" ({attributes['cell_methods']})" if attributes.get("cell_methods") else ""
    precision = (
        f", stored to {_number(attributes['storage_precision'])}" if "storage_precision" in attributes else ""
    )
    known = {"units", "standard_name", "long_name", "cell_methods", "storage_precision"}
    rest = ", ".join(f"{k} {_inline(v)}" for k, v in attributes.items() if k not in known)
    return f"{name:<8} {units:<8} {what}{method}{precision}" + (f"; {rest}" if rest else "")


def _inline(value: Any) -> str:
    """A value on one line: mappings as 'k v, k v', lists joined by commas."""
    if isinstance(value, Mapping):
        return ", ".join(f"{k} {_inline(v)}" for k, v in value.items())
    if isinstance(value, list | tuple):
        return ", ".join(_inline(v) for v in value) or "none"
    return _number(value)


def _line(label: str, text: str, indent: int) -> str:
    return f"{' ' * indent}{label:<{_LABEL_WIDTH}} {text}".rstrip()


def _entries(info: Mapping[str, Any], indent: int) -> list[str]:
    """The lines of one description level (the store itself, or one of its grids)."""
    lines: list[str] = []
    for key, value in info.items():
        if key in _SKIP or value is None:
            continue
        label = key.replace("_", " ")
        if key == "time" and isinstance(value, Mapping):
            lines.append(_line("time", _time(value, info), indent))
        elif key == "variables" and isinstance(value, Mapping):
            lines.append(_line("variables", "", indent))
            lines += [" " * (indent + 2) + _variable(str(n), a) for n, a in value.items()]
        elif key == "crs":
            lines.append(_line("crs", _crs(value), indent))
        elif key == "shape" and isinstance(value, Mapping):
            lines.append(_line("shape", _inline(value) + " cells" * ("time" not in value), indent))
        elif key == "resolution" and isinstance(value, Mapping):
            units = value.get("units", "")
            steps = " x ".join(f"{_number(v)}" for k, v in value.items() if k != "units")
            lines.append(_line("resolution", f"{steps} {units}".strip(), indent))
        elif key == "bounds" and isinstance(value, Mapping):
            text = _inline(value)
            lonlat = info.get("lonlat_bounds")
            if isinstance(lonlat, Mapping) and list(lonlat.values()) != list(value.values()):
                text += f" (lon/lat: {_inline(lonlat)})"
            lines.append(_line("bounds", text, indent))
        elif isinstance(value, Mapping) and value and all(isinstance(v, Mapping) for v in value.values()):
            # A mapping of named parts (grids, layers with attributes): one block each, the same keys.
            lines.append(_line(label, "", indent))
            for name, part in value.items():
                lines.append(" " * (indent + 2) + str(name))
                lines += _entries(part, indent + 4)
        else:
            lines.append(_line(label, _inline(value), indent))
    return lines


def describe_text(info: Mapping[str, Any]) -> str:
    """The store's description as lines a person reads (the heading names the dataset and its title)."""
    heading = str(info.get("name", "dataset"))
    if info.get("title"):
        heading += f": {info['title']}"
    years = info.get("years")
    lines = [heading]
    lines += _entries(info, 2)
    if isinstance(years, list | tuple) and len(years) == 2:
        lines.insert(1, _line("season-years", f"{years[0]} to {years[1]}", 2))
    return "\n".join(lines) + "\n"
