"""Which variable of an input file is tmax, tmin or prcp.

Recognition follows CF first: ``standard_name`` (air_temperature; the precipitation names) and
``cell_methods`` ("time: maximum", "time: minimum"). Where a variable carries no standard_name, or the
placeholder "unknown" that some reanalysis exports write, the usual variable names decide. A user can always
say it: ``tmax=NAME`` for every file that has NAME, or ``tmax=NAME@PATTERN`` for the files whose name matches
the shell-style PATTERN, which settles files that use one name for different variables.
"""

from __future__ import annotations

import fnmatch
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from service.errors import IngestError

VARIABLES = ("tmax", "tmin", "prcp")  # the store's daily variables: degC, degC, mm/day

TEMPERATURE_NAMES = ("air_temperature",)
PRECIPITATION_NAMES = (
    "precipitation_flux",
    "lwe_precipitation_rate",
    "precipitation_amount",
    "lwe_thickness_of_precipitation_amount",
    "thickness_of_rainfall_amount",
)
# standard_name values that say nothing (some reanalysis exports write "unknown")
UNINFORMATIVE_STANDARD_NAMES = ("", "unknown", "none", "undefined")

# Usual variable names, used only where the standard_name is missing or uninformative: ours, the CMIP data
# request's, short names of gridded products and reanalyses (the last from memory of such files).
FALLBACK_NAMES: dict[str, tuple[str, ...]] = {
    "tmax": ("tmax", "tasmax", "tx", "mx2t"),
    "tmin": ("tmin", "tasmin", "tn", "mn2t"),
    "prcp": ("prcp", "pr", "precip", "precipitation", "tp", "rr"),
    "temperature": ("t2m", "tas", "2t", "t2"),
}

Statistic = Literal["maximum", "minimum", "precipitation"]
Role = Literal["tmax", "tmin", "prcp", "temperature"]

_MAXIMUM = re.compile(r"time\s*:\s*max", re.IGNORECASE)
_MINIMUM = re.compile(r"time\s*:\s*min", re.IGNORECASE)
_POINT = re.compile(r"time\s*:\s*point", re.IGNORECASE)
_MEAN_OR_POINT = re.compile(r"time\s*:\s*(mean|point|median)", re.IGNORECASE)
_PERIOD = re.compile(r"time\s*:\s*(mean|sum|max|min|median)", re.IGNORECASE)


@dataclass(frozen=True)
class Choice:
    """One ``--var`` option: the file variable ``name`` is our ``variable`` in the files matching ``files``."""

    variable: str  # tmax, tmin or prcp
    name: str
    files: str | None = None  # shell-style pattern on the file name (or whole path); None: every file

    def applies_to(self, path: Path) -> bool:
        """True when this choice speaks about a file."""
        if self.files is None:
            return True
        return fnmatch.fnmatchcase(path.name, self.files) or fnmatch.fnmatchcase(str(path), self.files)

    def text(self) -> str:
        """The option as written: tmax=NAME or tmax=NAME@PATTERN."""
        return f"{self.variable}={self.name}" + (f"@{self.files}" if self.files else "")


def parse_choice(text: str) -> Choice:
    """A Choice from 'tmax=NAME' or 'tmax=NAME@PATTERN'."""
    variable, sep, rest = text.partition("=")
    name, at, pattern = rest.partition("@")
    variable, name, pattern = variable.strip(), name.strip(), pattern.strip()
    if not sep or variable not in VARIABLES or not name or (at and not pattern):
        raise IngestError(
            f"--var {text!r}: write VARIABLE=NAME or VARIABLE=NAME@FILES, VARIABLE one of tmax, tmin, prcp, NAME "
            "the variable's name in the files, FILES a pattern of file names such as 'tx_*.nc'",
            field="variables",
        )
    return Choice(variable=variable, name=name, files=pattern or None)


def choices_from(variables: Any) -> list[Choice]:
    """Choices from a mapping {"tmax": "NAME"}, a sequence of 'tmax=NAME[@FILES]' strings or of Choices."""
    if not variables:
        return []
    if isinstance(variables, dict):
        for key in variables:
            if key not in VARIABLES:
                raise IngestError(
                    f"--var {key}=...: {key!r} is not one of {list(VARIABLES)!r}", field="variables"
                )
        return [Choice(variable=k, name=str(v)) for k, v in variables.items()]
    return [c if isinstance(c, Choice) else parse_choice(str(c)) for c in variables]


@dataclass(frozen=True)
class Found:
    """One input variable recognised as (a source of) one of ours, and how."""

    variable: str  # tmax, tmin or prcp
    name: str  # the variable's name in the file
    how: str  # why it was taken, for messages and the store's record
    # a plain temperature field (no maximum or minimum in its cell_methods): usable only from sub-daily data,
    # as the daily maximum (tmax) or minimum (tmin) of its values
    plain_temperature: bool = False
    # the value stands for its time step (a sum, mean, maximum or minimum over it), not an instant
    period: bool = True
    explicit: bool = False  # named by a --var choice


def _standard_name(var: Any) -> str:
    """The standard_name of a variable, '' when missing or uninformative."""
    text = str(var.attrs.get("standard_name", "")).strip()
    return "" if text.lower() in UNINFORMATIVE_STANDARD_NAMES else text


def _role(name: str, var: Any, where: str = "") -> tuple[Role | None, str]:
    """What one file variable is, on CF attributes or (without a standard_name) its name; and why."""
    standard = _standard_name(var)
    methods = str(var.attrs.get("cell_methods", ""))
    lower = name.lower()
    named = next((role for role, names in FALLBACK_NAMES.items() if lower in names), None)
    if standard in TEMPERATURE_NAMES or (not standard and named in ("tmax", "tmin", "temperature")):
        source = f"standard_name {standard!r}" if standard else f"its name {name!r}"
        if _MAXIMUM.search(methods):
            return "tmax", f"{source} with cell_methods {methods!r}"
        if _MINIMUM.search(methods):
            return "tmin", f"{source} with cell_methods {methods!r}"
        if methods.strip() and named in ("tmax", "tmin"):
            # the name says maximum or minimum, the cell_methods say something else: trust neither
            raise _contradiction(where, name, methods, named)
        if named in ("tmax", "tmin"):
            return named, f"{source} (its name {name!r} says which)"
        return "temperature", f"{source} (a temperature field without maximum or minimum)"
    if standard in PRECIPITATION_NAMES or (not standard and named == "prcp"):
        return "prcp", f"standard_name {standard!r}" if standard else f"its name {name!r}"
    return None, ""


def _contradiction(where: str, name: str, methods: str, named: str) -> IngestError:
    """The error for a variable whose name and cell_methods disagree."""
    return IngestError(
        f"{where}: variable {name!r} is an air temperature whose name suggests {named} but whose cell_methods "
        f"({methods!r}) say neither 'time: maximum' nor 'time: minimum'; "
        f"name it with --var tmax={name} or --var tmin={name}"
    )


def _is_period(var: Any, role: str) -> bool:
    """True when the values stand for their time step (sums, means, extremes), False for instants."""
    methods = str(var.attrs.get("cell_methods", ""))
    if _POINT.search(methods):
        return False
    if _PERIOD.search(methods):
        return True
    # no cell_methods: precipitation and named daily extremes cover their step; a plain temperature is an instant
    return role != "temperature"


def identify(path: Path, ds: Any, choices: list[Choice], spatial_ndim: int = 2) -> list[Found]:
    """The variables of one file that wxshock takes: explicit choices first, then recognition of the rest.

    A variable named by a choice for this file is taken as that choice says (the same name may be chosen as
    both tmax and tmin: the daily maximum and minimum of one sub-daily field). Recognition never assigns a
    variable that some choice names, and two file variables that look like the same one of ours are an error.
    """
    where = f"file {str(path)!r}"
    found: list[Found] = []
    applying = [c for c in choices if c.applies_to(path)]
    for choice in applying:
        if choice.name not in ds.data_vars:
            if choice.files is not None:
                raise IngestError(
                    f"--var {choice.text()}: {where} has no variable {choice.name!r}; its variables are "
                    f"{sorted(map(str, ds.data_vars))!r}",
                    field="variables",
                )
            continue
        var = ds[choice.name]
        role, _ = _safe_role(choice.name, var)
        methods = str(var.attrs.get("cell_methods", ""))
        opposite = {"tmax": "tmin", "tmin": "tmax"}.get(choice.variable)
        if opposite is not None and role == opposite:
            raise IngestError(
                f"--var {choice.text()}: {where}: variable {choice.name!r} has cell_methods {methods!r}, a daily "
                f"{'minimum' if opposite == 'tmin' else 'maximum'}, not {choice.variable}; check the option",
                field="variables",
            )
        if choice.variable == "prcp" and role in ("tmax", "tmin", "temperature") and _standard_name(var):
            raise IngestError(
                f"--var {choice.text()}: {where}: variable {choice.name!r} is an air temperature "
                f"(standard_name {_standard_name(var)!r}), not precipitation; check the option",
                field="variables",
            )
        if choice.variable in ("tmax", "tmin") and role == "prcp" and _standard_name(var):
            raise IngestError(
                f"--var {choice.text()}: {where}: variable {choice.name!r} is precipitation "
                f"(standard_name {_standard_name(var)!r}), not {choice.variable}; check the option",
                field="variables",
            )
        # a chosen temperature is a plain field (not a daily extreme) only when its cell_methods say so
        plain = choice.variable in ("tmax", "tmin") and bool(_MEAN_OR_POINT.search(methods))
        found.append(
            Found(
                variable=choice.variable,
                name=choice.name,
                how=f"named with --var {choice.text()}",
                plain_temperature=plain,
                # without cell_methods: a recognised daily extreme (mx2t) covers its step, any other
                # temperature is an instant, precipitation covers its step
                period=_is_period(var, role or ("temperature" if choice.variable != "prcp" else "prcp")),
                explicit=True,
            )
        )
    chosen_variables = {c.variable for c in choices}
    taken = {f.name for f in found}
    recognised: dict[str, Found] = {}
    plain: list[tuple[str, str]] = []
    for key, var in ds.data_vars.items():
        name = str(key)
        if name in taken or var.ndim < 1 + spatial_ndim:
            continue
        role, how = _role(name, var, where)
        if role is None:
            continue
        if role == "temperature":
            plain.append((name, how))
            continue
        if role in chosen_variables:
            continue
        if role in recognised:
            raise IngestError(
                f"{where}: both {recognised[role].name!r} and {name!r} look like {role}; "
                f"choose one with --var {role}=NAME"
            )
        recognised[role] = Found(variable=role, name=name, how=how, period=_is_period(var, role))
    found.extend(recognised.values())
    # a plain temperature field serves as both tmax and tmin when nothing better is in the file (whether it may,
    # being sub-daily, is checked once the time axis is known)
    if len(plain) == 1:
        name, how = plain[0]
        for variable in ("tmax", "tmin"):
            if variable not in chosen_variables and variable not in recognised:
                found.append(
                    Found(variable=variable, name=name, how=how, plain_temperature=True,
                          period=_is_period(ds[name], "temperature"))
                )  # fmt: skip
    return found


def _safe_role(name: str, var: Any) -> tuple[Role | None, str]:
    """_role, with a name-versus-cell_methods contradiction read as 'no opinion' (the user has chosen)."""
    try:
        return _role(name, var)
    except IngestError:
        return None, ""
