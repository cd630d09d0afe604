"""Suggestions for near misses: a misspelt name gets "did you mean ...?", a season in another form its fix.

Pure functions on strings (difflib's similarity ratio picks the closest name); the error messages of the
schema, the error tree and the indicator catalog call them. Nothing here raises.
"""

from __future__ import annotations

import difflib
import typing
from collections.abc import Iterable, Sequence
from typing import Any

MONTHS = (
    "january",
    "february",
    "march",
    "april",
    "may",
    "june",
    "july",
    "august",
    "september",
    "october",
    "november",
    "december",
)
SEASON_FORMS = (
    '"year", {"months": [5, 6, 7, 8, 9, 10]} (month numbers or names, one run that may cross the new year), '
    '{"start": "MM-DD", "end": "MM-DD"}, or {"property": NAME}'
)


def closest(word: str, choices: Iterable[str], cutoff: float = 0.6) -> str | None:
    """The choice most like ``word`` (difflib ratio at least ``cutoff``), or None."""
    matches = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1, cutoff=cutoff)
    return matches[0] if matches else None


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """ "; did you mean 'prcp_total'?" for a near miss, else ""."""
    match = closest(word, choices)
    return f"; did you mean {match!r}?" if match is not None and match != word else ""


def month_number(name: str) -> int | None:
    """1..12 for a month's English name or its first three letters (any case), else None."""
    word = name.strip().lower().rstrip(".")
    if len(word) >= 3:
        for number, month in enumerate(MONTHS, start=1):
            if month.startswith(word) and (len(word) >= 3):
                return number
    return None


def _run_of_initials(text: str) -> list[int] | None:
    """Months whose initials spell ``text`` in order ('MJJASO' -> May..Oct), when exactly one run does."""
    letters = text.strip().upper()
    if not 2 <= len(letters) <= 12 or not letters.isalpha():
        return None
    runs = []
    for start in range(12):
        months = [(start + i) % 12 + 1 for i in range(len(letters))]
        if "".join(MONTHS[m - 1][0].upper() for m in months) == letters:
            runs.append(months)
    return runs[0] if len(runs) == 1 else None


def _run_between(first: int, last: int) -> list[int]:
    """The months from ``first`` to ``last`` (1..12), crossing the new year when last < first."""
    months = [first]
    while months[-1] != last:
        months.append(months[-1] % 12 + 1)
    return months


def season_hint(value: Any) -> str:
    """What a season given in another form probably meant, as a suggested request value ('' when unclear)."""
    months: list[int] | None = None
    if isinstance(value, str):
        months = _run_of_initials(value)
        if months is None:
            parts = [
                p for p in value.replace(" to ", "-").replace("/", "-").replace(",", "-").split("-") if p
            ]
            numbers = [month_number(p) for p in parts]
            if len(parts) == 2 and all(n is not None for n in numbers):
                months = _run_between(int(numbers[0]), int(numbers[-1]))  # type: ignore[arg-type]
            elif len(parts) == 1 and numbers[0] is not None:
                months = [int(numbers[0])]  # type: ignore[arg-type]
    elif (
        isinstance(value, list)
        and value
        and all(isinstance(m, int) and not isinstance(m, bool) for m in value)
    ):
        months = [int(m) for m in value]
    if months:
        return f'; did you mean {{"months": {months}}}?'
    return ""


def season_message(value: Any) -> str:
    """The message for a season in a form wxshock does not read: the forms it does, and a guess."""
    return f"season {value!r} is not a form wxshock reads; give {SEASON_FORMS}{season_hint(value)}"


# --- field names of the request schema -------------------------------------------------------------------------


def _models_in(annotation: Any) -> list[type]:
    """The pydantic model classes inside a field's annotation (through unions, lists and Annotated)."""
    from pydantic import BaseModel

    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    found: list[type] = []
    for argument in typing.get_args(annotation):
        found += _models_in(argument)
    return found


def field_names_at(location: Sequence[str | int], root: type | None = None) -> list[str]:
    """The field names a request accepts at ``location`` (the path to the unknown key, the key excluded)."""
    if root is None:
        from service.schemas import IndicatorRequest

        root = IndicatorRequest
    models = [root]
    for part in location:
        if isinstance(part, int):
            continue
        following: list[type] = []
        for model in models:
            field = getattr(model, "model_fields", {}).get(part)
            if field is not None:
                following += _models_in(field.annotation)
        if not following:
            break
        models = following
    names: list[str] = []
    for model in models:
        names += [n for n in getattr(model, "model_fields", {}) if n not in names]
    return names


def unknown_field_message(location: Sequence[str | int]) -> str | None:
    """'unknown field 'lag'; did you mean 'lags'?' for the key at the end of ``location``, or None."""
    if not location or not isinstance(location[-1], str):
        return None
    name = location[-1]
    allowed = field_names_at(list(location[:-1]))
    if not allowed:
        return None
    hint = did_you_mean(name, allowed)
    listed = "" if hint else f"; fields here: {', '.join(allowed)}"
    return f"unknown field {name!r}{hint}{listed}"
