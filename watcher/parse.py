"""Turn one raw line of a source into readings, or into a quarantined line with its reason.

A CSV file carries its header on its first line; every later line is checked
against it.  A JSON-lines file carries one object per line.  Nothing here
raises on bad input: every line becomes readings or a ``Quarantined`` record.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Iterable

from watcher.records import Quarantined, Reading

RAW_LIMIT = 1024  # bytes of a bad line kept in quarantine


@dataclass(frozen=True)
class Column:
    """A value column wanted from a source, and the characteristic it feeds."""

    characteristic: str
    column: str


def reason_kind(reason: str) -> str:
    """A quarantine reason with the line's own text left out, for counting lines by reason.

    >>> reason_kind("column 'mass_g': not a number: 'ERR'")
    "column 'mass_g': not a number: '…'"
    """
    head, sep, tail = reason.partition(": ")
    return head + sep + re.sub(r"'[^']*'", "'…'", tail)


def to_float(text: str, decimal: str = ".") -> float:
    """A number from text, with '.' or ',' as the decimal mark; ValueError otherwise."""
    t = text.strip()
    if decimal == ",":
        t = t.replace(".", "").replace(",", ".") if t.count(",") == 1 else t
    if not t:
        raise ValueError("empty value")
    return float(t)


def parse_time(value: object) -> str:
    """An ISO 8601 timestamp or epoch seconds -> ISO 8601 text; ValueError otherwise."""
    if isinstance(value, bool):
        raise ValueError("a boolean is not a time")
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            raise ValueError("not a finite epoch time")
        return datetime.fromtimestamp(float(value), tz=timezone.utc).isoformat()
    text = str(value).strip()
    try:
        x = float(text)
    except ValueError:
        pass
    else:
        if math.isfinite(x):
            return datetime.fromtimestamp(x, tz=timezone.utc).isoformat()
        raise ValueError("not a finite epoch time")
    try:
        dt = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise ValueError(f"time {text[:40]!r} is neither ISO 8601 nor epoch seconds") from None
    return dt.isoformat()


class LineParser:
    """Parse the lines of one file (or one stream) of a source.

    ``columns`` are the value columns to take; ``time_column`` is optional.
    For CSV, line 1 of a file is its header (a line without a number, when no header is known yet).
    """

    def __init__(
        self,
        source: str,
        fmt: str,
        columns: Iterable[Column],
        *,
        time_column: str | None = None,
        delimiter: str = ",",
        decimal: str = ".",
        encoding: str = "utf-8",
        file: str | None = None,
    ):
        self.source = source
        self.fmt = fmt
        self.columns = list(columns)
        self.time_column = time_column
        self.delimiter = delimiter
        self.decimal = decimal
        self.encoding = encoding
        self.file = file
        self.header: list[str] | None = None
        self._index: dict[str, int] = {}
        self._names: set[str] = set()
        self._plan: list[tuple[Column, int | None]] = []

    # -- public --------------------------------------------------------------
    def parse(self, data: bytes, line_no: int | None = None, offset: int | None = None) -> tuple[list[Reading], Quarantined | None]:
        """One line (without its newline) -> (readings, None) or ([], Quarantined)."""
        try:
            return self._parse(data, line_no, offset)
        except Exception as e:  # last line of defence: bad input must never escape as an exception
            return [], self._bad(data, line_no, offset, f"unexpected parse failure: {type(e).__name__}: {e}")

    def set_header(self, header: list[str]) -> None:
        self.header = header
        self._index = {name: i for i, name in enumerate(header)}
        self._names = set(header)
        # each value column's field position, resolved once per header (None: not in it)
        self._plan = [(col, self._index.get(col.column)) for col in self.columns]

    # -- internals -----------------------------------------------------------
    def _bad(self, data: bytes, line_no: int | None, offset: int | None, reason: str) -> Quarantined:
        raw = data[:RAW_LIMIT].decode(self.encoding, errors="replace")
        return Quarantined(self.source, self.file, line_no, offset, raw, reason)

    def _parse(self, data: bytes, line_no: int | None, offset: int | None) -> tuple[list[Reading], Quarantined | None]:
        if data.endswith(b"\r"):
            data = data[:-1]
        if b"\x00" in data:
            return [], self._bad(data, line_no, offset, "binary data (NUL byte) in a text line")
        try:
            text = data.decode(self.encoding)
        except UnicodeDecodeError as e:
            return [], self._bad(data, line_no, offset, f"not valid {self.encoding} text at byte {e.start}")
        if text.startswith("\ufeff"):
            text = text[1:]
        if not text.strip():
            return [], None  # blank lines carry nothing and are not an error
        if self.fmt == "jsonl":
            return self._parse_json(text, data, line_no, offset)
        return self._parse_csv(text, data, line_no, offset)

    def _new_header(self, fields: list[str], data: bytes, line_no: int | None, offset: int | None) -> Quarantined:
        """Later lines are read by the new header; the header line itself is quarantined to be seen."""
        old = self.header
        self.set_header(fields)
        return self._bad(data, line_no, offset, f"header changed mid-file (was: {','.join(old or [])})")

    def _split(self, text: str) -> list[str]:
        import csv

        return next(csv.reader([text], delimiter=self.delimiter))

    def _parse_csv(self, text: str, data: bytes, line_no: int | None, offset: int | None):
        fields = [f.strip() for f in self._split(text)]
        if line_no == 1 or (line_no is None and self.header is None):
            # The first line of every file is its header (a rotated or truncated file starts again at line 1).
            self.set_header(fields)
            missing = [c.column for c in self.columns if c.column not in self._index]
            if self.time_column and self.time_column not in self._index:
                missing.append(self.time_column)
            if missing:
                return [], self._bad(data, line_no, offset, f"header lacks column(s) {', '.join(missing)}")
            return [], None
        if self.header is None:
            return [], self._bad(data, line_no, offset, "no header known for this file (its first line was never read)")
        if len(fields) != len(self.header):
            if _is_other_header(fields, self.header, self._names, self.decimal):
                return [], self._new_header(fields, data, line_no, offset)
            if fields == self.header:
                return [], None  # a repeated header (files concatenated): skip quietly
            return [], self._bad(
                data, line_no, offset, f"wrong number of fields: expected {len(self.header)}, got {len(fields)}"
            )
        if fields == self.header:
            return [], None
        if _is_other_header(fields, self.header, self._names, self.decimal):
            return [], self._new_header(fields, data, line_no, offset)
        time = None
        if self.time_column:
            i = self._index.get(self.time_column)
            if i is None:
                return [], self._bad(data, line_no, offset, f"no column {self.time_column!r} in the header")
            try:
                time = parse_time(fields[i])
            except ValueError as e:
                return [], self._bad(data, line_no, offset, f"unparseable time: {e}")
        out = []
        point = self.decimal == "."
        for col, i in self._plan:
            if i is None:
                return [], self._bad(data, line_no, offset, f"no column {col.column!r} in the header")
            raw = fields[i]
            if raw == "":
                continue  # an empty cell: this characteristic was not measured on this line
            try:
                v = float(raw) if point else to_float(raw, self.decimal)  # the field is stripped and not empty
            except ValueError:
                return [], self._bad(data, line_no, offset, f"column {col.column!r}: not a number: {raw[:40]!r}")
            if not math.isfinite(v):
                return [], self._bad(data, line_no, offset, f"column {col.column!r}: {raw!r} is not a finite number")
            out.append(Reading(col.characteristic, v, time, self.source, self.file, line_no, offset))
        return out, None

    def _parse_json(self, text: str, data: bytes, line_no: int | None, offset: int | None):
        try:
            obj = json.loads(text)
        except (ValueError, RecursionError) as e:
            return [], self._bad(data, line_no, offset, f"not valid JSON: {e}")
        if isinstance(obj, (int, float)) and not isinstance(obj, bool) and len(self.columns) == 1:
            obj = {self.columns[0].column: obj}  # a bare number, where the source feeds one characteristic
        if not isinstance(obj, dict):
            return [], self._bad(data, line_no, offset, "expected a JSON object")
        time = None
        if self.time_column and self.time_column in obj and obj[self.time_column] is not None:
            try:
                time = parse_time(obj[self.time_column])
            except ValueError as e:
                return [], self._bad(data, line_no, offset, f"unparseable time: {e}")
        out = []
        for col in self.columns:
            if col.column not in obj or obj[col.column] is None:
                continue
            raw = obj[col.column]
            if isinstance(raw, bool):
                return [], self._bad(data, line_no, offset, f"key {col.column!r}: a boolean is not a number")
            try:
                v = float(raw) if isinstance(raw, (int, float)) else to_float(str(raw), self.decimal)
            except (ValueError, OverflowError):
                return [], self._bad(data, line_no, offset, f"key {col.column!r}: not a number: {str(raw)[:40]!r}")
            if not math.isfinite(v):
                return [], self._bad(data, line_no, offset, f"key {col.column!r}: {raw!r} is not a finite number")
            out.append(Reading(col.characteristic, v, time, self.source, self.file, line_no, offset))
        return out, None


def _looks_numeric(field: str, decimal: str) -> bool:
    try:
        to_float(field, decimal)
        return True
    except ValueError:
        return False


def _is_other_header(fields: list[str], header: list[str], names: set[str], decimal: str) -> bool:
    """A line of names only, sharing a name with the header (``names``: its set) but not equal to it: a new header."""
    if fields == header or not any(f in names for f in fields):
        return False
    return all(not _looks_numeric(f, decimal) for f in fields if f)
