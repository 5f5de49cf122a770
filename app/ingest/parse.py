"""Reading a CSV file into typed rows, collecting every problem with its line and column."""

from __future__ import annotations

import csv
import io
import math
import re
import unicodedata
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Any
from zoneinfo import ZoneInfo

from app import bounds
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
    # The known columns the file's header has (an optional column may be absent altogether).
    present: set[str] = field(default_factory=set)

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
    if any(unicodedata.category(ch) == "Cc" for ch in value):
        raise ValueError("an identifier holds no control characters (tab, line break, ...)")
    return value


# A unit code is part of every page's address (/units/CODE/...). These characters stand for
# themselves in a URL path and in a file name; "/", "?", "#", "%", a backslash, spaces and
# letters outside ASCII would make the unit's pages unreachable or ambiguous.
UNIT_CODE_CHARACTERS = "letters A-Z and a-z, digits 0-9 and - _ . + = @"
_UNIT_CODE = re.compile(r"[A-Za-z0-9_.+=@-]{1,64}")


def unit_code(value: str) -> str:
    """A unit code: 1 to 64 of ``UNIT_CODE_CHARACTERS``, not "." or ".." (path segments)."""
    code = value.strip()
    if not _UNIT_CODE.fullmatch(code) or code in (".", ".."):
        raise ValueError(f"a unit code is 1 to 64 characters: {UNIT_CODE_CHARACTERS} "
                         "(not only dots)")
    return code


def one_of(*allowed: str) -> Parser:
    def parse(value: str) -> str:
        v = value.strip().lower()
        if v not in allowed:
            raise ValueError(f"expected one of {', '.join(allowed)}")
        return v

    return parse


# Python's int() and float() also read "1_2" as 12 and other scripts' digits ("١٢" as 12): a
# cell is read only as written with the ASCII digits 0-9, so what is stored is what was shown.
_WHOLE = re.compile(r"[+-]?[0-9]+")
# An exponent is accepted: JSON clients and spreadsheets write very small or large values
# that way (the API passes Python's repr of a float, e.g. 1e-05), and it is as unambiguous as
# a decimal point. Out-of-range values are refused by the column's own range check.
_REAL = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def integer(low: int, high: int) -> Parser:
    def parse(value: str) -> int:
        if not _WHOLE.fullmatch(value.strip()):
            raise ValueError("expected a whole number written with the digits 0-9")
        # Python refuses to convert thousands of digits; any such value is out of range anyway.
        number = int(value.strip()) if len(value.strip()) <= 20 else high + 1
        if not low <= number <= high:
            raise ValueError(f"expected a whole number from {low} to {high}")
        return number

    return parse


def number(value: str) -> float:
    if not _REAL.fullmatch(value.strip()):
        raise ValueError("expected a finite number written with the digits 0-9, an optional "
                         "sign and decimal point (e.g. -1.5 or 2e-3)")
    result = float(value.strip())
    if not math.isfinite(result):
        raise ValueError("expected a finite number")
    return result


def timestamp(tz: ZoneInfo) -> Parser:
    # Every imported timestamp records something that has happened; the clock is read once
    # per file so that all its rows meet the same bound.
    latest = bounds.latest_event()

    def parse(value: str) -> datetime:
        try:
            moment = parse_timestamp(value, tz)
        except ValueError:
            raise ValueError("expected an ISO 8601 timestamp, e.g. 2026-03-02T08:00") from None
        if not bounds.EARLIEST <= moment <= latest:
            raise ValueError(f"expected a time from {bounds.EARLIEST:%Y-%m-%d} to a day after "
                             f"now ({latest:%Y-%m-%d %H:%M} UTC)")
        return moment

    return parse


def day(value: str) -> date:
    try:
        result = parse_date(value)
    except ValueError:
        raise ValueError("expected a date YYYY-MM-DD") from None
    latest = bounds.latest_planned_date()
    if not bounds.EARLIEST_DATE <= result <= latest:
        raise ValueError(f"expected a date from {bounds.EARLIEST_DATE} to "
                         f"{bounds.PLAN_HORIZON_DAYS} days from today ({latest})")
    return result


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
        line, column = _where_first_nul(content)
        sheet.problem(line, column, None, "the file holds NUL bytes (the first is here): it is "
                      "not a CSV text file")
        return None
    return content


_LINE_BREAK = re.compile(r"\r\n|\r|\n")  # what the csv reader counts as a line


def _where_first_nul(content: str) -> tuple[int, str | None]:
    """Line and column (header name, when the header reads) of the first NUL character."""
    line = len(_LINE_BREAK.findall(content, 0, content.index("\x00"))) + 1
    marker = "\ufffe"  # a noncharacter: never in a CSV cell, so it marks where NUL was
    header: list[str] = []
    try:
        for start, record in _records(content.replace("\x00", marker)):
            if start == 1:
                header = [h.strip().lower() for h in record]
            for i, cell in enumerate(record):
                if marker in cell:
                    name = header[i] if i < len(header) and start > 1 else None
                    return start, name or None
    except CsvTrouble:
        pass
    return line, None


class CsvTrouble(Exception):
    """A record that cannot be read as CSV, with the line it starts on."""

    def __init__(self, line: int, why: str):
        self.line = line
        self.why = why
        super().__init__(f"line {line}: {why}")


def _plain(exc: csv.Error) -> str:
    """The csv module's complaint in words a person who saved the file understands."""
    text = str(exc)
    if "field larger than field limit" in text:
        return (f"a cell is longer than {csv.field_size_limit():,} characters (often a quote "
                "that is never closed)")
    if "unexpected end of data" in text:
        return 'a quoted cell that starts on this line is never closed (a " is missing)'
    if "expected after" in text:
        return 'a quoted cell on this line is followed by text: write "" for a quote inside it'
    return f"this line cannot be read as CSV ({text})"


def _records(content: str) -> Iterator[tuple[int, list[str]]]:
    """Each record with the line it starts on; ``CsvTrouble`` names the line of a bad one."""
    reader = csv.reader(io.StringIO(content, newline=""), strict=True)
    start = 1
    while True:
        try:
            record = next(reader)
        except StopIteration:
            return
        except csv.Error as exc:
            raise CsvTrouble(start, _plain(exc)) from None
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
    except CsvTrouble as trouble:
        sheet.problem(trouble.line, None, None, f"the header row cannot be read: {trouble.why}")
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
    sheet.present = set(index)
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
    except CsvTrouble as trouble:
        sheet.problem(trouble.line, None, None, trouble.why)
    return sheet
