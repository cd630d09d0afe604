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
import struct
import warnings
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
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


@dataclass
class _Kinds:
    """How each column goes into a .dta, decided over the whole table (or merged over its pieces)."""

    value_labels: dict[str, dict[int, str]] = field(default_factory=dict)  # class columns and their words
    text: set[str] = field(default_factory=set)
    flags: set[str] = field(default_factory=set)  # booleans, written as bytes
    integers: dict[str, bool] = field(default_factory=dict)  # integer columns: whether they fit a Stata long
    text_bytes: dict[str, int] = field(default_factory=dict)  # text columns: longest value in UTF-8 bytes

    def merge(self, other: _Kinds) -> None:
        """Take in the kinds of the table's next piece."""
        for column, labels in other.value_labels.items():
            self.value_labels[column] = dict(sorted((self.value_labels.get(column, {}) | labels).items()))
        self.text |= other.text
        self.flags |= other.flags
        for column, fits in other.integers.items():
            self.integers[column] = self.integers.get(column, True) and fits
        for column, size in other.text_bytes.items():
            self.text_bytes[column] = max(self.text_bytes.get(column, 0), size)


def _kinds(frame: pd.DataFrame, widths: bool = False) -> _Kinds:
    """The column kinds of a table (or of one piece of it, with its text widths when ``widths``)."""
    kinds = _Kinds()
    for column in frame.columns:
        name, values = str(column), frame[column]
        labels = _class_value_labels(frame, name)
        if labels is not None:
            kinds.value_labels[name] = labels
        elif isinstance(values.dtype, pd.CategoricalDtype) or pd.api.types.is_string_dtype(values.dtype):
            kinds.text.add(name)
            if widths and len(values):
                kinds.text_bytes[name] = int(_as_text(values).str.encode("utf-8").str.len().max())
        elif pd.api.types.is_bool_dtype(values.dtype):
            kinds.flags.add(name)
        elif pd.api.types.is_integer_dtype(values.dtype):
            numbers = pd.array(values, dtype="Int64")
            finite = numbers[~numbers.isna()]
            kinds.integers[name] = finite.size == 0 or (
                int(finite.min()) >= -2_147_483_647 and int(finite.max()) <= 2_147_483_620
            )
    return kinds


def _as_text(values: pd.Series) -> pd.Series:
    """Text, with '' for missing: Stata strings have no missing value of their own."""
    return values.astype("object").where(values.notna(), "").astype(str)


def stata_frame(
    frame: pd.DataFrame, kinds: _Kinds | None = None
) -> tuple[pd.DataFrame, dict[str, dict[int, str]]]:
    """The table in the column types Stata keeps, and the value labels of its class columns.

    ``kinds``, when given, are those of the whole table that ``frame`` is a piece of (:func:`stata_pieces`).
    """
    kinds = _kinds(frame) if kinds is None else kinds
    out: dict[str, Any] = {}
    for column in frame.columns:
        name, values = str(column), frame[column]
        if name in kinds.value_labels:
            out[column] = pd.array(pd.to_numeric(values, errors="coerce").round(), dtype="Int8")
        elif name in kinds.text:
            out[column] = _as_text(values)
        elif name in kinds.flags:
            out[column] = pd.array(values, dtype="Int8")
        elif name in kinds.integers:
            out[column] = (
                pd.array(values, dtype="Int32") if kinds.integers[name] else values.astype("float64")
            )
        else:
            out[column] = pd.to_numeric(values, errors="coerce").astype("float64")
    return pd.DataFrame(out, index=frame.index), dict(kinds.value_labels)


def to_stata(frame: pd.DataFrame, provenance: dict[str, Any], warnings_list: list[dict[str, Any]]) -> bytes:
    """The table as Stata 118 bytes: labelled variables, labelled classes, string ids, missing as '.'."""
    del warnings_list  # they travel in the notes column and, in a bundle, in warnings.csv
    return _write(frame, provenance, None)


def _write(frame: pd.DataFrame, provenance: dict[str, Any], kinds: _Kinds | None) -> bytes:
    """pandas' Stata 118 writer on the table (or one piece of it, with the whole table's ``kinds``)."""
    names = stata_names([str(c) for c in frame.columns])
    infos = {info.name: info for info in describe_columns(list(names), provenance)}
    data, value_labels = stata_frame(frame, kinds)
    data.columns = [names[str(c)] for c in frame.columns]
    data = data.reset_index(drop=True)
    if kinds is not None:
        _pad_text(data, [names[c] for c in kinds.text], {names[c]: b for c, b in kinds.text_bytes.items()})
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


def _pad_text(data: pd.DataFrame, columns: list[str], widths: dict[str, int]) -> None:
    """Give each text column of a piece the whole table's width (in place).

    pandas sizes a fixed-width string variable (str#) by the longest value it is given. The longest value of
    the piece gets trailing NUL bytes up to the longest of the whole table: Stata pads every str# value with
    NULs, so the row's bytes are those the whole table gives it, and the piece's variable is as wide.
    """
    for column in columns:
        text = data[column]
        if not len(text):
            continue
        sizes = text.str.encode("utf-8").str.len()
        at = int(sizes.to_numpy().argmax())
        missing = widths.get(column, 0) - int(sizes.iloc[at])
        if missing > 0:
            values = text.astype("object")
            values.iloc[at] = values.iloc[at] + "\x00" * missing
            data[column] = values.astype(text.dtype)


# A .dta 118 file (Stata's dta_118 description): <stata_dta><header>..<N>obs</N>..</header><map>14 offsets</map>
# ... <data>rows</data><strls>..</strls><value_labels>..</value_labels></stata_dta>. The map's entries, in order:
_MAP = (
    "stata_data", "map", "variable_types", "varnames", "sortlist", "formats", "value_label_names",
    "variable_labels", "characteristics", "data", "strls", "value_labels", "stata_data_close", "end-of-file",
)  # fmt: skip
_N_AT = len(b"<stata_dta><header><release>118</release><byteorder>LSF</byteorder><K>") + 2 + len(b"</K><N>")


def _sections(data: bytes) -> tuple[int, dict[str, int]]:
    """(where the map starts, its offsets by name) of a .dta 118 written by pandas (little-endian)."""
    start = data.index(b"</header><map>") + len(b"</header>")
    offsets = struct.unpack_from("<14Q", data, start + len(b"<map>"))
    sections = dict(zip(_MAP, offsets, strict=True))
    if sections["map"] != start or data[sections["data"] : sections["data"] + 6] != b"<data>":
        raise ValueError("unexpected .dta layout from pandas' writer; cannot join its pieces")
    return start, sections


def stata_pieces(
    frames: Callable[[], Iterable[pd.DataFrame]], columns: list[str], provenance: dict[str, Any]
) -> Iterator[bytes]:
    """The bytes of :func:`to_stata` for the table made of the pieces ``frames()`` gives, piece by piece.

    ``frames`` is called twice: a first pass finds what pandas' writer decides from the whole table (class
    words, integer ranges, the width of each text variable); the second writes each piece with pandas under
    those decisions and keeps only its rows, which go between the first piece's header and its value labels.
    Memory holds one piece. The bytes equal ``to_stata`` of the whole table (tests/encode/test_stata.py).
    """
    kinds, rows, first = _Kinds(), 0, None
    for frame in frames():
        if first is None:
            first = frame.iloc[:0]
        kinds.merge(_kinds(frame, widths=True))
        rows += len(frame)
    if first is None or rows == 0:
        yield to_stata(first if first is not None else pd.DataFrame(columns=columns), provenance, [])
        return
    head_done = False
    for frame in frames():
        if not len(frame):
            continue
        data = _write(frame, provenance, kinds)
        start, sections = _sections(data)
        body = data[sections["data"] + len(b"<data>") : sections["strls"] - len(b"</data>")]
        if not head_done:
            width = len(body) // len(frame)
            grown = width * rows - len(body)  # the whole table's rows in place of this piece's
            head = bytearray(data[: sections["data"] + len(b"<data>")])
            struct.pack_into("<Q", head, _N_AT, rows)
            moved = {k: v + grown if v > sections["data"] else v for k, v in sections.items()}
            struct.pack_into("<14Q", head, start + len(b"<map>"), *(moved[k] for k in _MAP))
            tail = data[sections["strls"] - len(b"</data>") :]
            yield bytes(head)
            head_done = True
        yield body
    yield tail


def read_stata(data: bytes) -> tuple[pd.DataFrame, dict[str, str], dict[str, dict[int, str]]]:
    """A .dta's table (class codes as numbers), its variable labels and value labels (for checks)."""
    with pd.io.stata.StataReader(io.BytesIO(data)) as reader:
        table = reader.read(convert_categoricals=False)
        labels = reader.variable_labels()
        values = reader.value_labels()
    return table, labels, {k: {int(c): w for c, w in v.items()} for k, v in values.items()}
