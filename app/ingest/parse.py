"""Reading a CSV file into typed rows, collecting every problem with its line and column."""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Any
from zoneinfo import ZoneInfo

from app.timeutil import parse_clock, parse_date, parse_timestamp

MAX_PROBLEMS_SHOWN = 50


@dataclass(frozen=True)
class Problem:
    """One reason a file was refused."""

    file: str
    line: int | None
    column: str | None
    value: str | None
    why: str

    def __str__(self) -> str:
        where = self.file
        if self.line is not None:
            where += f", line {self.line}"
        if self.column:
            where += f", column {self.column}"
        shown = "" if self.value is None else f" (value {self.value[:60]!r})"
        return f"{where}{shown}: {self.why}"


class ImportRefused(Exception):
    """The file was not imported; nothing was written."""

    def __init__(self, problems: list[Problem]):
        self.problems = problems
        super().__init__(self.summary())

    def summary(self) -> str:
        shown = [str(p) for p in self.problems[:MAX_PROBLEMS_SHOWN]]
        more = len(self.problems) - len(shown)
        lines = [f"{len(self.problems)} problem(s); nothing was imported:", *shown]
        if more > 0:
            lines.append(f"... and {more} more")
        return "\n".join(lines)


Parser = Callable[[str], Any]


@dataclass(frozen=True)
class Column:
    name: str
    required: bool
    parse: Parser
    # A blank optional cell is None; a blank required cell is a problem.


@dataclass
class Sheet:
    """Parsed rows of one file: each row is (line number, {column: value})."""

    filename: str
    rows: list[tuple[int, dict[str, Any]]] = field(default_factory=list)
    problems: list[Problem] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def problem(self, line: int | None, column: str | None, value: Any, why: str) -> None:
        shown = None if value is None else str(value)
        self.problems.append(Problem(self.filename, line, column, shown, why))


# -- cell parsers: each raises ValueError with a message a person understands -----------------

def text(value: str) -> str:
    return value


def category(value: str) -> str:
    """Free-text category: trimmed, lower case, so 'Cardiac-Surgery' and 'cardiac-surgery' agree."""
    return value.strip().lower()


def identifier(value: str) -> str:
    value = value.strip()
    if len(value) > 64:
        raise ValueError("identifier longer than 64 characters")
    return value


def one_of(*allowed: str) -> Parser:
    def parse(value: str) -> str:
        v = value.strip().lower()
        if v not in allowed:
            raise ValueError(f"expected one of {', '.join(allowed)}")
        return v

    return parse


def integer(low: int, high: int) -> Parser:
    def parse(value: str) -> int:
        try:
            number = int(value.strip())
        except ValueError:
            raise ValueError("expected a whole number") from None
        if not low <= number <= high:
            raise ValueError(f"expected a whole number from {low} to {high}")
        return number

    return parse


def number(value: str) -> float:
    try:
        result = float(value.strip())
    except ValueError:
        raise ValueError("expected a number") from None
    if not math.isfinite(result):
        raise ValueError("expected a finite number")
    return result


def timestamp(tz: ZoneInfo) -> Parser:
    def parse(value: str) -> datetime:
        try:
            return parse_timestamp(value, tz)
        except ValueError:
            raise ValueError("expected an ISO 8601 timestamp, e.g. 2026-03-02T08:00") from None

    return parse


def day(value: str) -> date:
    try:
        return parse_date(value)
    except ValueError:
        raise ValueError("expected a date YYYY-MM-DD") from None


def clock(value: str) -> str:
    return parse_clock(value).strftime("%H:%M")


# -- reading ------------------------------------------------------------------------------------

def _decode(data: bytes, sheet: Sheet) -> str | None:
    try:
        content = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        sheet.problem(line, None, None, "the file is not UTF-8 text; save it as CSV UTF-8")
        return None
    if "\x00" in content:
        sheet.problem(None, None, None, "the file holds NUL bytes: it is not a CSV text file")
        return None
    return content


def _records(content: str) -> Iterator[tuple[int, list[str]]]:
    reader = csv.reader(io.StringIO(content, newline=""), strict=True)
    start = 1
    for record in reader:
        yield start, record
        start = reader.line_num + 1


def read_sheet(data: bytes, filename: str, columns: list[Column]) -> Sheet:
    """Parse ``data`` against ``columns``; every problem is collected, none raised."""
    sheet = Sheet(filename)
    content = _decode(data, sheet)
    if content is None:
        return sheet
    records = _records(content)
    try:
        first = next(records, None)
    except csv.Error as exc:
        sheet.problem(1, None, None, f"the header row cannot be read as CSV: {exc}")
        return sheet
    if first is None:
        sheet.problem(1, None, None, "the file is empty: a header row is required")
        return sheet
    _, header = first
    header = [h.strip().lower() for h in header]
    seen: set[str] = set()
    for name in header:
        if name in seen:
            sheet.problem(1, name, name, "this column appears twice in the header")
        seen.add(name)
    known = {c.name for c in columns}
    for c in columns:
        if c.required and c.name not in seen:
            sheet.problem(1, c.name, None, "required column is missing from the header")
    unknown = [h for h in header if h and h not in known]
    if unknown:
        sheet.warnings.append(f"{filename}: unknown column(s) ignored: {', '.join(unknown)}")
    if sheet.problems:
        return sheet
    index = {name: i for i, name in enumerate(header) if name in known}
    by_name = {c.name: c for c in columns}
    try:
        for line, record in records:
            if not any(cell.strip() for cell in record):
                continue  # blank lines carry nothing
            if len(record) > len(header):
                sheet.problem(line, None, None,
                              f"{len(record)} cells but the header has {len(header)} columns")
                continue
            row: dict[str, Any] = {}
            ok = True
            for name, i in index.items():
                raw = record[i] if i < len(record) else ""
                col = by_name[name]
                if raw.strip() == "":
                    if col.required:
                        sheet.problem(line, name, raw, "required value is blank")
                        ok = False
                    row[name] = None
                    continue
                try:
                    row[name] = col.parse(raw)
                except ValueError as exc:
                    sheet.problem(line, name, raw, str(exc))
                    ok = False
            for c in columns:
                row.setdefault(c.name, None)
            if ok:
                sheet.rows.append((line, row))
    except csv.Error as exc:
        sheet.problem(None, None, None, f"the file cannot be read as CSV: {exc}")
    return sheet
