"""Result tables as Stata .dta files (format 118, Stata 14 and later), written by pandas' Stata writer.

- Variable labels (at most 80 characters) say what each column is, from the codebook.
- Class columns (``*_class``, ``*_class_lag<k>``, long layout ``class``) are byte variables with value labels
  in wxshock's own words (-2 "much drier" ... 2 "much wetter"); the label words of each indicator family
  get their own value label.
- ``feature_id`` and other text stay strings; ``year`` and counts are integers; nulls are Stata missing (.).
- Categorical columns (labels, categories, pairs, sequences) are written as their text.
- Names longer than 32 characters (Stata's limit) are cut to 27 characters plus '_' and the first 4 hex
  digits of the SHA-256 of the full name; the full name starts the variable label and is in the codebook.
- Nothing time-dependent is written (the file's time stamp is fixed), so equal results give equal bytes.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import re
import warnings
from collections.abc import Sequence
from typing import Any

import pandas as pd

from service.encode.codebook import ColumnInfo, describe_columns

STATA_NAME_LIMIT = 32
STATA_LABEL_LIMIT = 80
STATA_VERSION = 118
# Stata 14+ files carry a time stamp; a fixed one keeps the bytes of equal results equal.
FIXED_TIME_STAMP = dt.datetime(2000, 1, 1, 0, 0)
_VALID_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
# Names Stata reserves for itself (Stata manual, [U] 11.3 Naming conventions).
_RESERVED = frozenset(
    "_all _b byte _coef _cons double float if in int long _n _N _pi _pred _rc _skip strL using with".split()
)
_CLASS_COLUMN = re.compile(r"(.*)_class(_lag\d+)?|class(_lag\d+)?")


def stata_name(name: str) -> str:
    """A valid Stata variable name for ``name``: itself when it fits, else cut + '_' + 4 hex of its hash."""
    clean = name if _VALID_NAME.fullmatch(name) else re.sub(r"[^A-Za-z0-9_]", "_", name)
    if not _VALID_NAME.fullmatch(clean):
        clean = "_" + clean
    if clean in _RESERVED or re.fullmatch(r"str\d+", clean):
        clean = "_" + clean
    if clean == name and len(name) <= STATA_NAME_LIMIT:
        return name
    digest = hashlib.sha256(name.encode("utf-8")).hexdigest()[:4]
    return f"{clean[: STATA_NAME_LIMIT - 5]}_{digest}" if len(clean) > STATA_NAME_LIMIT else clean


def stata_names(columns: Sequence[str]) -> dict[str, str]:
    """Each column's Stata name; refuses (ValueError) the astronomically unlikely clash of two of them."""
    names = {str(c): stata_name(str(c)) for c in columns}
    seen: dict[str, str] = {}
    for column, short in names.items():
        if short.lower() in seen:  # Stata names are case-sensitive, but keep clear of near-twins anyway
            raise ValueError(
                f"columns {seen[short.lower()]!r} and {column!r} both become Stata variable {short!r}; "
                "rename one (e.g. the spell or window)"
            )
        seen[short.lower()] = column
    return names


def variable_label(info: ColumnInfo, short: str) -> str:
    """At most 80 characters saying what the column is; a shortened name's label starts with the full name."""
    unit = f" [{info.unit}]" if info.unit and info.unit not in ("1", "class", "year") else ""
    text = f"{info.label}{unit}"
    if short != info.name:
        text = f"{info.name}: {text}"
    text = text.encode("ascii", "replace").decode("ascii") if not text.isascii() else text
    return text if len(text) <= STATA_LABEL_LIMIT else text[: STATA_LABEL_LIMIT - 3].rstrip() + "..."


def _class_value_labels(frame: pd.DataFrame, column: str) -> dict[int, str] | None:
    """The class words of a class column, taken from its label column when the table has one."""
    match = _CLASS_COLUMN.fullmatch(column)
    if not match:
        return None
    base = match.group(1)
    label_column = f"{base}_label" if base is not None else "label"
    if label_column not in frame.columns:
        return None
    classes = pd.to_numeric(frame[column], errors="coerce")
    labels = frame[label_column]
    if match.group(2) or match.group(3):  # a lagged class: same words, found through the unlagged column
        unlagged = f"{base}_class" if base is not None else "class"
        classes_now = pd.to_numeric(frame[unlagged], errors="coerce") if unlagged in frame.columns else None
        pairs = _pairs(classes_now, labels) if classes_now is not None else {}
    else:
        pairs = _pairs(classes, labels)
    if isinstance(labels.dtype, pd.CategoricalDtype) and base is not None:
        # The full set of words even when a class never occurs: classes run -m..m in category order.
        categories = list(labels.cat.categories)
        middle = len(categories) // 2
        pairs = {i - middle: str(word) for i, word in enumerate(categories)} | pairs
    return dict(sorted(pairs.items())) or None


def _pairs(classes: pd.Series, labels: pd.Series) -> dict[int, str]:
    """{class number: word} as they occur together in the table."""
    both = pd.DataFrame({"c": classes, "w": labels.astype("object")}).dropna().drop_duplicates()
    return {int(c): str(w) for c, w in zip(both["c"], both["w"], strict=True)}


def stata_frame(frame: pd.DataFrame) -> tuple[pd.DataFrame, dict[str, dict[int, str]]]:
    """The table in the column types Stata keeps, and the value labels of its class columns."""
    out: dict[str, Any] = {}
    value_labels: dict[str, dict[int, str]] = {}
    for column in frame.columns:
        values = frame[column]
        labels = _class_value_labels(frame, str(column))
        if labels is not None:
            out[column] = pd.array(pd.to_numeric(values, errors="coerce").round(), dtype="Int8")
            value_labels[str(column)] = labels
        elif isinstance(values.dtype, pd.CategoricalDtype) or pd.api.types.is_string_dtype(values.dtype):
            # Text, with '' for missing: Stata strings have no missing value of their own.
            out[column] = values.astype("object").where(values.notna(), "").astype(str)
        elif pd.api.types.is_bool_dtype(values.dtype):
            out[column] = pd.array(values, dtype="Int8")
        elif pd.api.types.is_integer_dtype(values.dtype):
            numbers = pd.array(values, dtype="Int64")
            finite = numbers[~numbers.isna()]
            fits = finite.size == 0 or (
                int(finite.min()) >= -2_147_483_647 and int(finite.max()) <= 2_147_483_620
            )
            out[column] = pd.array(values, dtype="Int32") if fits else values.astype("float64")
        else:
            out[column] = pd.to_numeric(values, errors="coerce").astype("float64")
    return pd.DataFrame(out, index=frame.index), value_labels


def to_stata(frame: pd.DataFrame, provenance: dict[str, Any], warnings_list: list[dict[str, Any]]) -> bytes:
    """The table as Stata 118 bytes: labelled variables, labelled classes, string ids, missing as '.'."""
    del warnings_list  # they travel in the notes column and, in a bundle, in warnings.csv
    names = stata_names([str(c) for c in frame.columns])
    infos = {info.name: info for info in describe_columns(list(names), provenance)}
    data, value_labels = stata_frame(frame)
    data.columns = [names[str(c)] for c in frame.columns]
    data = data.reset_index(drop=True)
    labels = {names[c]: variable_label(infos[c], names[c]) for c in names}
    dataset = str(provenance.get("dataset", ""))
    request_hash = str(provenance.get("request_hash", "")).removeprefix("sha256:")[:16]
    data_label = f"wxshock {dataset}, request {request_hash}"[:STATA_LABEL_LIMIT]
    sink = io.BytesIO()
    with warnings.catch_warnings():
        # pandas warns when it rewrites names or converts types; both were done above on purpose.
        warnings.simplefilter("ignore")
        data.to_stata(
            sink,
            write_index=False,
            version=STATA_VERSION,
            variable_labels=labels,
            value_labels={names[c]: v for c, v in value_labels.items()},
            data_label=data_label,
            time_stamp=FIXED_TIME_STAMP,
        )
    return sink.getvalue()


def read_stata(data: bytes) -> tuple[pd.DataFrame, dict[str, str], dict[str, dict[int, str]]]:
    """A .dta's table (class codes as numbers), its variable labels and value labels (for checks)."""
    with pd.io.stata.StataReader(io.BytesIO(data)) as reader:
        table = reader.read(convert_categoricals=False)
        labels = reader.variable_labels()
        values = reader.value_labels()
    return table, labels, {k: {int(c): w for c, w in v.items()} for k, v in values.items()}
