"""Historian CSV exports: write simulated runs, read real exports back.

The documented layout (what `write_csv` writes)::

    # comment lines start with '#'
    time,TI-104,FI-201,PI-110,AI-305,AX-350
    2026-01-05T00:00:00+00:00,110.2,14.1,1.21,5.03,
    2026-01-05T00:01:00+00:00,110.3,14.0,1.20,5.04,187.0

One row per input sample; the lab column is filled only on rows where a sample was drawn.

What `read_csv` also reads, detected from the header and the first data lines (``SAMPLE``)
before any long computation, or given explicitly:

* separator ``,`` ``;`` or tab (``delimiter``), decimal mark ``.`` or ``,`` (``decimal``);
* the time column: ``time_column``, else a column called time, timestamp, date, datetime, ...
  (any case), else the first column; a ``Date`` and a ``Time`` column (also Datum/Uhrzeit,
  ...) are read together; a time column whose header names UTC (``Time (UTC)``) holds UTC
  times;
* the encoding: UTF-8 (with or without a byte-order mark), else cp1252 when the start of the
  file is not UTF-8;
* headers with a unit and a description: ``TI-104 (degC)``, ``TI-104 [degC]``,
  ``"TI-104 Tray 12 temperature"``: a first word that looks like an instrument tag (letters,
  then digits: ``TI-104``, ``FIC101.PV``) is the tag and the rest its description; a header
  with spaces that does not start with such a word (``Feed Temp``) becomes one tag with ``_``
  for the spaces (``Feed_Temp``). ``mapping`` lists every header that changed;
* a units row (and a descriptions row) right under the header: a line whose time cell holds no
  digit and whose other cells hold text but no number; the units are kept per tag (``units``);
* any cell of an input or of the lab column that is not a number (``Bad``, ``NaN``,
  ``I/O Timeout``, ``Shutdown``, ``#N/A``, blank) is a missing reading of that tag only, counted
  per tag and text (``missing``); the row and its other readings are kept.

Time stamps:

* ISO 8601 with an offset (``2026-03-29T03:00:00+02:00``, ``...Z``), or epoch numbers, or any
  `datetime.strptime` format. ``time_format="auto"`` detects: a number is an epoch time whose
  unit (s, ms, us, ns) follows from its magnitude (below 1e11 seconds, below 1e14
  milliseconds, below 1e17 microseconds, else nanoseconds; unambiguous for times after
  1973); else ISO 8601; else the common spreadsheet formats (``MM/DD/YYYY hh:mm:ss AM/PM``,
  ``DD.MM.YYYY HH:MM:SS``, ``DD/MM/YYYY``, ``YYYY/MM/DD``, with or without seconds): the
  formats that read every sampled time; when several read them differently, those giving
  times in order are kept, then one whose largest step between rows is less than a tenth of
  any other's (day first or month first through ``03/05`` .. ``03/11``: one of the two jumps
  a month at midnight); when still several remain (``01/02/2026`` through a single day), the
  reader asks for ``time_format``. ``"epoch"`` is epoch seconds; ``"epoch_ms"``,
  ``"epoch_us"``, ``"epoch_ns"`` the other units.
* Times before 1900 or from 2200 on are bad rows (``implausible_time``); when the first data
  lines hold nothing else, the reader stops at once with a hint at the epoch unit.
* Naive local times (no offset) need ``tz``, an IANA zone name, and are converted with
  `zoneinfo`. Rule at daylight-saving changes: a local time that does not exist (the spring gap)
  makes the row bad (``"nonexistent_time"``); a local time that occurs twice (the autumn fold)
  is taken as the earlier instant (``fold=0``) unless that instant would not be after the
  previous good row while the later one (``fold=1``) would be. A monotone export that runs
  through the repeated hour is therefore read correctly, and an isolated ambiguous time is read
  as the earlier instant.
* A naive time without ``tz`` is a bad row (``"naive_time"``); when all sampled times are naive
  and no ``tz`` is given the reader stops at once and asks for it.

Rows with the same time as the previous good row are merged tag-wise into it: a blank reading is
filled from the later row; where both hold a reading the first is kept and the conflict counted
(``n_conflicts``); a lab value on the later row is kept when the first had none, else it is
dropped and listed (``lab_dropped``). Merged lines are listed in ``merged``.

Bad rows are skipped, counted per reason and listed with their line numbers (1-based physical
line numbers of the file). Reasons: ``columns`` (wrong column count), ``time`` (unparseable
time), ``naive_time``, ``nonexistent_time``, ``non_finite`` (nan/inf time),
``implausible_time``, ``backwards`` (time before the previous good row; ``sort=True`` sorts
instead). A lab value on a bad row is listed too (``lab_in_bad``), so that every lab cell of
the file is accounted for: ``lab_cells = n_lab + lab text cells + lab in bad rows + lab
dropped``.
"""
from __future__ import annotations

import csv
import json
import math
import os
import re
import sys
from collections.abc import Iterator, Sequence
from datetime import UTC, datetime
from typing import NamedTuple
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np

from daemon.workbench.plant import DISCLAIMER, TAGS, TARGET, UNIT

__all__ = [
    "BAD_REASONS",
    "CsvReader",
    "Row",
    "epoch_unit",
    "read_csv",
    "reading_text",
    "split_header",
    "write_csv",
]

BAD_REASONS: tuple[str, ...] = (
    "columns",
    "time",
    "naive_time",
    "nonexistent_time",
    "non_finite",
    "implausible_time",
    "backwards",
)

_NAN = float("nan")


def _zone(tz: str) -> ZoneInfo:
    try:
        return ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError, TypeError) as exc:
        raise ValueError(f"unknown time zone {tz!r}") from exc


def _num(v: float) -> str:
    return repr(float(v)) if math.isfinite(v) else ""


# -- writing -----------------------------------------------------------------------------------


def write_csv(path: str | os.PathLike, run, *, time_format: str = "iso", tz: str | None = None):
    """Write ``run`` (a `plant.Run`) as a historian export; returns the number of rows.

    ``time_format="iso"`` writes ISO 8601 with offset, in UTC or in zone ``tz``;
    ``"epoch"`` writes epoch seconds. Floats are written with ``repr`` so reading back is exact.
    """
    if time_format not in ("iso", "epoch"):
        raise ValueError(f"time_format={time_format!r}: expected 'iso' or 'epoch'")
    zone = UTC if tz is None else _zone(tz)
    tags = tuple(getattr(run, "tags", TAGS))
    target = getattr(run, "target", TARGET)
    lab = dict(zip(np.asarray(run.lab_index).tolist(), np.asarray(run.lab_y).tolist(), strict=True))
    scenario = getattr(run, "scenario", None)
    with open(path, "w", encoding="utf-8", newline="") as f:
        f.write(f"# {DISCLAIMER}: {getattr(run, 'unit_name', UNIT)}\n")
        if scenario is not None and hasattr(scenario, "to_state"):
            f.write(f"# scenario: {json.dumps(scenario.to_state(), sort_keys=True)}\n")
        f.write(",".join(("time", *tags, target)) + "\n")
        n = 0
        for k, (tk, row) in enumerate(zip(run.t.tolist(), run.X.tolist(), strict=True)):
            if time_format == "iso":
                stamp = datetime.fromtimestamp(tk, zone).isoformat()
            else:
                stamp = str(int(tk)) if float(tk).is_integer() else repr(tk)
            y = lab.get(k)
            cells = [stamp, *(_num(v) for v in row), "" if y is None else _num(y)]
            f.write(",".join(cells) + "\n")
            n += 1
    return n


# -- reading -----------------------------------------------------------------------------------

SAMPLE = 500  # data lines read at opening to detect the layout and check the time stamps

_EPOCH_SCALE = {"epoch": 1.0, "epoch_s": 1.0, "epoch_ms": 1e-3, "epoch_us": 1e-6,
                "epoch_ns": 1e-9}
_UNIT_NAME = {"epoch_s": "seconds", "epoch_ms": "milliseconds", "epoch_us": "microseconds",
              "epoch_ns": "nanoseconds"}
# plausible sample times: 1900-01-01 to 2200-01-01 UTC (calendar.timegm)
T_MIN = -2208988800.0
T_MAX = 7258118400.0

_TIME_NAMES = frozenset({
    "time", "timestamp", "time stamp", "time_stamp", "date", "datetime", "date time",
    "date/time", "date_time", "date-time", "ts", "zeit", "zeitstempel", "datum",
    "datum/zeit", "datum zeit", "tijd", "tijdstip", "fecha", "fecha/hora", "horodatage",
    "date et heure", "data/ora", "local time", "utc time", "time (utc)",
})
_DATE_NAMES = frozenset({"date", "datum", "fecha", "data", "day", "jour", "dag"})
_CLOCK_NAMES = frozenset({"time", "clock", "uhrzeit", "zeit", "hora", "heure", "ora", "tijd",
                          "time of day"})
_DATES = ("%m/%d/%Y", "%d/%m/%Y", "%d.%m.%Y", "%Y/%m/%d", "%d-%m-%Y", "%m-%d-%Y", "%Y.%m.%d",
          "%m/%d/%y", "%d/%m/%y", "%d.%m.%y")
_CLOCKS = ("%H:%M:%S", "%H:%M", "%H:%M:%S.%f", "%I:%M:%S %p", "%I:%M %p", "%I:%M:%S.%f %p")
CANDIDATE_FORMATS: tuple[str, ...] = tuple(
    [f"{d} {c}" for d in _DATES for c in _CLOCKS] + list(_DATES))

_TAG_WORD = re.compile(r"[A-Za-z]{1,8}[-_.]?\d[\w.\-/:]*")
_UNIT_SUFFIX = re.compile(r"(.*?)\s*[(\[]([^()\[\]]{1,24})[)\]]")
_COMMA_NUMBER = re.compile(r"[+-]?(\d{1,3}(\.\d{3})+|\d+),\d+")
_DOT_NUMBER = re.compile(r"[+-]?\d*\.\d+([eE][+-]?\d+)?")
_THOUSANDS_DOT = re.compile(r"[+-]?\d{1,3}(\.\d{3})+(,\d*)?")
_MAX_TEXTS = 20  # distinct missing-reading texts kept per tag; more go under "(other)"
_UNIT_WORDS = frozenset({"unit", "units", "eu", "eng units", "eng. units", "engineering units",
                         "einheit", "eenheid", "unité", "unidad", "unità", "uom"})


def split_header(cell: str) -> tuple[str, str | None, str]:
    """``(tag, unit, description)`` of a header cell (module docstring)."""
    text = " ".join(cell.split())
    unit = None
    m = _UNIT_SUFFIX.fullmatch(text)
    if m and m.group(1):
        text, unit = m.group(1).strip(), m.group(2).strip() or None
    if " " not in text:
        return text, unit, ""
    first, rest = text.split(" ", 1)
    first = first.rstrip(":-,")
    if _TAG_WORD.fullmatch(first):
        return first, unit, rest.lstrip(":- ").strip()
    return text.replace(" ", "_"), unit, ""


def _year(t: float) -> int:
    return 1970 + math.floor(t / 31556952.0)  # mean Gregorian year, for messages only


def epoch_unit(value: float) -> str:
    """The epoch unit (``epoch_s``, ``epoch_ms``, ``epoch_us``, ``epoch_ns``) of a magnitude."""
    a = abs(value)
    if a < 1e11:
        return "epoch_s"
    if a < 1e14:
        return "epoch_ms"
    if a < 1e17:
        return "epoch_us"
    return "epoch_ns"


class Row(NamedTuple):
    """One good data row: file line number, epoch seconds, inputs (nan where missing), target."""

    line: int
    t: float
    x: tuple[float, ...]
    y: float | None


class CsvReader:
    """Streaming reader over a historian CSV export; see `read_csv`.

    Opening reads the header and the first `SAMPLE` data lines to detect the layout (module
    docstring) and raises ValueError at once when the file cannot be read as asked.
    Iterating yields `Row` objects and fills the counters ``n_rows`` (data rows seen),
    ``n_good``, ``n_bad``, ``n_comments``, ``bad_counts`` (reason -> count), ``bad`` (list of
    ``(line, reason)``, at most ``max_bad`` entries), ``missing`` (tag -> text -> count of
    missing readings, ``""`` for blank), ``merged``, ``n_conflicts`` and the lab accounting
    (``lab_cells``, ``n_lab``, ``lab_text``, ``lab_in_bad``, ``lab_dropped``). Each new
    iteration reads the file again from the start and resets the counters.
    """

    def __init__(
        self,
        path: str | os.PathLike,
        *,
        time_column: str | None = None,
        time_format: str = "auto",
        tz: str | None = None,
        target: str | None = None,
        tags: Sequence[str] | None = None,
        sort: bool = False,
        progress: bool = False,
        max_bad: int = 1000,
        delimiter: str | None = None,
        decimal: str | None = None,
        encoding: str = "utf-8",
    ) -> None:
        self.path = os.fspath(path)
        if (time_format not in ("auto", "iso", *_EPOCH_SCALE)
                and "%" not in str(time_format)):
            raise ValueError(
                f"time_format={time_format!r}: expected 'auto', 'iso', 'epoch', 'epoch_ms', "
                f"'epoch_us', 'epoch_ns' or a strptime format such as '%d.%m.%Y %H:%M:%S'"
            )
        if not isinstance(max_bad, int) or max_bad < 0:
            raise ValueError(f"max_bad={max_bad!r}: expected an integer >= 0")
        if delimiter is not None:
            delimiter = {"tab": "\t", "\\t": "\t", "semicolon": ";", "comma": ","}.get(
                delimiter, delimiter)
            if len(delimiter) != 1:
                raise ValueError(f"delimiter={delimiter!r}: expected one character "
                                 f"(',', ';' or tab)")
        if decimal is not None:
            decimal = {"comma": ",", "point": ".", "dot": "."}.get(decimal, decimal)
            if decimal not in (".", ","):
                raise ValueError(f"decimal={decimal!r}: expected '.' or ','")
        self.time_format = time_format
        self.tz = tz
        self._zone = None if tz is None else _zone(tz)
        self.sort = bool(sort)
        self.progress = bool(progress)
        self.max_bad = max_bad
        self.encoding = encoding

        self.header_line, header, sample = self._scan()
        self.delimiter = delimiter or self._detect_delimiter(header, sample)
        cols = [c.strip() for c in self._split(header)]
        self.columns = cols
        parsed = [split_header(c) for c in cols]
        names = [p[0] for p in parsed]
        self._ti = self._time_index(time_column, cols, names)
        self._ti2 = None
        if time_column is None:
            self._ti, self._ti2 = self._date_and_clock(cols)
        self._tis = {self._ti} if self._ti2 is None else {self._ti, self._ti2}
        self.time_column = cols[self._ti] + ("" if self._ti2 is None else
                                             f" + {cols[self._ti2]}")
        self.tz_from_header = False
        if self._zone is None and parsed[self._ti][1] in ("UTC", "utc", "GMT", "Z"):
            # "Time (UTC)": naive times in UTC
            self.tz, self._zone, self.tz_from_header = "UTC", UTC, True
        self._ncols = len(cols)
        sample_cells = [(ln, self._split(s)) for ln, s in sample]
        self.units: dict[str, str] = {}
        self.descriptions: dict[str, str] = {}
        self._skip: set[int] = set()
        self.units_line = None
        data_cells = self._meta_rows(sample_cells, names)
        for i, (name, (_, unit, desc)) in enumerate(zip(names, parsed, strict=True)):
            if i in self._tis:
                continue
            if unit and name not in self.units:
                self.units[name] = unit
            if desc and name not in self.descriptions:
                self.descriptions[name] = desc
        self.decimal = decimal or self._detect_decimal(data_cells)
        self.mapping = {c: n for i, (c, n) in enumerate(zip(cols, names, strict=True))
                        if c != n and n and i not in self._tis}
        self.names = names

        def index(name: str, what: str) -> int:
            hits = [i for i, (c, n) in enumerate(zip(cols, names, strict=True))
                    if name in (c, n) and i not in self._tis]
            if not hits:
                shown = [n if c == n else f"{n} ({c!r})" for c, n in zip(cols, names,
                                                                        strict=True)]
                raise ValueError(f"{self.path}: {what} column {name!r} not in header "
                                 f"{shown}")
            if len(hits) > 1:
                raise ValueError(f"{self.path}: {what} column {name!r} appears twice in "
                                 f"header (columns {', '.join(str(i + 1) for i in hits)})")
            return hits[0]

        data = [i for i in range(len(cols)) if i not in self._tis and names[i]]
        seen: dict[str, int] = {}
        for i in data:
            if names[i] in seen and tags is None:
                raise ValueError(f"{self.path}: headers {cols[seen[names[i]]]!r} and "
                                 f"{cols[i]!r} both read as tag {names[i]!r}; choose the "
                                 f"inputs by their full header")
            seen.setdefault(names[i], i)
        if target is None:
            auto = TARGET in names and (tags is None or TARGET not in tags)
            target = TARGET if auto else ""
        self._yi = index(target, "target") if target else None
        self.target = names[self._yi] if self._yi is not None else None
        if tags is None:
            xi = [i for i in data if i != self._yi]
        else:
            xi = [index(tag, "input") for tag in tags]
        self._xi = tuple(xi)
        self.tags = tuple(names[i] for i in xi)
        self._reset()
        self._detect_time([c for c in (self._tcell(cells) for _, cells in data_cells
                                        if len(cells) == self._ncols) if c])

    # header, layout detection

    def _split(self, text: str, delimiter: str | None = None) -> list[str]:
        d = delimiter or self.delimiter
        if '"' in text:
            return next(csv.reader([text], delimiter=d))
        return text.split(d)

    def _scan(self) -> tuple[int, str, list[tuple[int, str]]]:
        if self.encoding.lower().replace("-", "") in ("utf8", "utf8sig"):
            # spreadsheet exports on Windows are often cp1252 ("\xb0C"): not UTF-8, then
            with open(self.path, "rb") as f:
                head = f.read(1 << 16)
            try:
                head.decode("utf-8")
            except UnicodeDecodeError as exc:
                if exc.start < len(head) - 4:  # not a character cut by the read's end
                    self.encoding = "cp1252"
        header_line, header, sample = None, None, []
        with open(self.path, "rb") as f:
            for lineno, raw in enumerate(f, 1):
                text = raw.decode(self.encoding, errors="replace").rstrip("\r\n")
                if lineno == 1:
                    text = text.lstrip("\ufeff")
                stripped = text.strip()
                if not stripped or stripped.startswith("#"):
                    continue
                if header is None:
                    header_line, header = lineno, text
                    continue
                sample.append((lineno, text))
                if len(sample) >= SAMPLE:
                    break
        if header is None:
            raise ValueError(f"{self.path}: no header line")
        return header_line, header, sample

    def _detect_delimiter(self, header: str, sample) -> str:
        best, key = ",", None
        for d in (",", ";", "\t"):
            n = len(self._split(header, d))
            if n < 2:
                continue
            agree = sum(len(self._split(s, d)) == n for _, s in sample)
            k = (agree, n)
            if key is None or k > key:
                best, key = d, k
        return best

    def _time_index(self, time_column, cols, names) -> int:
        if time_column is not None:
            hits = [i for i, (c, n) in enumerate(zip(cols, names, strict=True))
                    if time_column in (c, n)]
            if not hits:
                low = time_column.lower()
                hits = [i for i, c in enumerate(cols) if c.lower() == low]
            if not hits:
                raise ValueError(f"{self.path}: time column {time_column!r} not in header "
                                 f"{cols}")
            if len(hits) > 1:
                raise ValueError(f"{self.path}: time column {time_column!r} appears twice in "
                                 f"header")
            return hits[0]
        for i, c in enumerate(cols):
            low = " ".join(c.lower().split())
            bare = _UNIT_SUFFIX.fullmatch(low)
            if low in _TIME_NAMES or (bare and bare.group(1) in _TIME_NAMES):
                return i
        return 0

    def _tcell(self, cells: list[str]) -> str:
        """The time text of a row: the time cell, or the date and clock cells joined."""
        if self._ti2 is None:
            return cells[self._ti].strip()
        return f"{cells[self._ti].strip()} {cells[self._ti2].strip()}".strip()

    def _date_and_clock(self, cols) -> tuple[int, int | None]:
        """Separate date and clock columns (``Date,Time,...``), else the time column alone."""
        low = [" ".join(c.lower().split()) for c in cols]
        dates = [i for i, c in enumerate(low) if c in _DATE_NAMES]
        clocks = [i for i, c in enumerate(low) if c in _CLOCK_NAMES]
        if len(dates) == 1 and len(clocks) == 1 and self._ti in (dates[0], clocks[0]):
            return dates[0], clocks[0]
        return self._ti, None

    @staticmethod
    def _numberish(c: str) -> bool:
        c = c.strip()
        return bool(c) and (_DOT_NUMBER.fullmatch(c) is not None
                            or _COMMA_NUMBER.fullmatch(c) is not None
                            or c.lstrip("+-").isdigit())

    def _meta_rows(self, sample_cells, names):
        """Take a units row and a descriptions row off the top of the sample."""
        k = 0
        while k < min(2, len(sample_cells)):
            lineno, cells = sample_cells[k]
            if len(cells) > self._ncols:
                break
            tcell = self._tcell(cells) if len(cells) == self._ncols else ""
            others = [c.strip() for i, c in enumerate(cells) if i not in self._tis]
            if (any(ch.isdigit() for ch in tcell) or not any(others)
                    or any(self._numberish(c) for c in others)):
                break
            short = all(len(c) <= 16 for c in others)
            is_units = (tcell.lower() in _UNIT_WORDS or short) and self.units_line is None
            for i, c in enumerate(cells):
                c = c.strip()
                if i in self._tis or not c or i >= len(names):
                    continue
                if is_units:
                    self.units[names[i]] = c
                else:
                    self.descriptions[names[i]] = c
            if is_units:
                self.units_line = lineno
            self._skip.add(lineno)
            k += 1
        return sample_cells[k:]

    def _detect_decimal(self, data_cells) -> str:
        if self.delimiter == ",":
            return "."
        commas = dots = 0
        for _, cells in data_cells:
            for i, c in enumerate(cells):
                if i in self._tis:
                    continue
                c = c.strip()
                if _COMMA_NUMBER.fullmatch(c):
                    commas += 1
                elif _DOT_NUMBER.fullmatch(c):
                    dots += 1
        return "," if commas > dots else "."

    def _detect_time(self, cells: list[str]) -> None:
        """Choose the time format (and epoch unit) from the sampled time cells; check them."""
        fmt = self.time_format
        self.epoch_unit = None
        self.format_detected = False
        if fmt == "auto" and cells:
            try:
                float(cells[0])
            except ValueError:
                try:
                    datetime.fromisoformat(cells[0])
                    fmt = "iso"
                except ValueError:
                    fmt = self._guess_format(cells)
                    self.format_detected = True
            else:
                values = [v for v in map(_float, cells) if v is not None and math.isfinite(v)]
                fmt = epoch_unit(values[0]) if values else "epoch_s"
                self.format_detected = fmt != "epoch_s"
        self._base_fmt = None if fmt == "auto" else fmt
        if fmt in _EPOCH_SCALE:
            self.epoch_unit = "epoch_s" if fmt == "epoch" else fmt
        self._fmt = self._base_fmt
        if not cells:
            return
        times = [self._time(c) for c in cells]
        self._reset()
        if all(t == "implausible_time" for t in times):
            raise ValueError(self._implausible_hint(cells[0]))
        if self._zone is None and all(t == "naive_time" for t in times):
            raise ValueError(f"{self.path}: the time stamps (like {cells[0]!r}) have no UTC "
                             f"offset: give their zone with --tz (e.g. --tz Europe/Berlin, "
                             f"or --tz UTC)")

    def _implausible_hint(self, cell: str) -> str:
        v = _float(cell)
        if v is not None and math.isfinite(v):
            unit = self.epoch_unit or "epoch_s"
            t = v * _EPOCH_SCALE[unit]
            guess = epoch_unit(v)
            hint = (f"; they look like epoch {_UNIT_NAME[guess]}: use --time-format {guess} "
                    f"(or auto)" if guess != unit else "")
            return (f"{self.path}: time stamps like {cell!r} read as epoch "
                    f"{_UNIT_NAME[unit]} fall in the year {_year(t)}{hint}")
        return (f"{self.path}: time stamps like {cell!r} fall outside 1900-2199; check "
                f"--time-format")

    def _guess_format(self, cells: list[str]) -> str:
        first = cells[0]
        viable = []
        for fmt in CANDIDATE_FORMATS:
            try:
                datetime.strptime(first, fmt)
            except ValueError:
                continue
            parsed = []
            for c in cells:
                try:
                    parsed.append(datetime.strptime(c, fmt))
                except ValueError:
                    parsed.append(None)
            viable.append((fmt, parsed))
        if not viable:
            raise ValueError(
                f"{self.path}: cannot read time stamps like {first!r} in column "
                f"{self.time_column!r}; give --time-column if the time is in another column, "
                f"or --time-format, a strptime format such as '%d.%m.%Y %H:%M:%S' or "
                f"'%m/%d/%Y %I:%M:%S %p'")
        best = max(sum(p is not None for p in parsed) for _, parsed in viable)
        viable = [(f, p) for f, p in viable if sum(x is not None for x in p) == best]
        groups: dict[tuple, str] = {}
        for f, p in viable:
            groups.setdefault(tuple(p), f)
        if len(groups) > 1:
            ordered = {}
            for key, f in groups.items():
                seq = [x for x in key if x is not None]
                if all(a <= b for a, b in zip(seq, seq[1:], strict=False)):
                    ordered[key] = f
            groups = ordered or groups
        if len(groups) > 1:
            # of readings in order, one whose largest step is far the smallest is the one
            # (01/02 .. 01/11 read day first jumps a month at every midnight)
            gaps = sorted((self._max_step(key), f) for key, f in groups.items())
            if gaps[0][0] * 10 < gaps[1][0]:
                return gaps[0][1]
        if len(groups) != 1:
            raise ValueError(
                f"{self.path}: time stamps like {first!r} can be read as "
                f"{' or '.join(repr(f) for f in groups.values())}; choose with --time-format")
        return next(iter(groups.values()))

    @staticmethod
    def _max_step(parsed) -> float:
        seq = [x for x in parsed if x is not None]
        return max(((b - a).total_seconds() for a, b in zip(seq, seq[1:], strict=False)),
                   default=0.0)

    def _progress_bar(self):
        if not self.progress or sys.stderr is None or not sys.stderr.isatty():
            return None
        try:
            from tqdm import tqdm
        except ImportError:
            return None
        return tqdm(
            total=os.path.getsize(self.path),
            unit="B",
            unit_scale=True,
            desc=os.path.basename(self.path),
            file=sys.stderr,
            leave=False,
        )

    def _lines(self) -> Iterator[tuple[int, str]]:
        bar = self._progress_bar()
        pending = 0
        skip = self._skip
        try:
            with open(self.path, "rb") as f:
                for lineno, raw in enumerate(f, 1):
                    if bar is not None:
                        pending += len(raw)
                        if pending >= 1 << 16:
                            bar.update(pending)
                            pending = 0
                    if lineno <= self.header_line or lineno in skip:
                        continue
                    text = raw.decode(self.encoding, errors="replace").rstrip("\r\n")
                    stripped = text.strip()
                    if not stripped:
                        continue
                    if stripped.startswith("#"):
                        self.n_comments += 1
                        continue
                    yield lineno, text
        finally:
            if bar is not None:
                bar.update(pending)
                bar.close()

    # parsing

    def _reset(self) -> None:
        self.n_rows = 0
        self.n_good = 0
        self.n_bad = 0
        self.n_comments = 0
        self.bad: list[tuple[int, str]] = []
        self.bad_counts: dict[str, int] = {}
        self.missing: dict[str, int] = {tag: 0 for tag in self.tags}
        self.missing_texts: dict[str, dict[str, int]] = {tag: {} for tag in self.tags}
        self.merged: list[int] = []
        self.n_merged = 0
        self.n_conflicts = 0
        self.lab_cells = 0
        self.n_lab = 0
        self.lab_text: dict[str, int] = {}
        self.lab_text_lines: list[int] = []
        self.lab_in_bad: list[tuple[int, str]] = []
        self.lab_dropped: list[tuple[int, float]] = []
        self.t_first: float | None = None
        self.t_last: float | None = None
        self._last: float | None = None
        self._fmt = getattr(self, "_base_fmt", None)

    def _record_bad(self, line: int, reason: str, cells) -> None:
        self.n_bad += 1
        self.bad_counts[reason] = self.bad_counts.get(reason, 0) + 1
        if len(self.bad) < self.max_bad:
            self.bad.append((line, reason))
        yi = self._yi
        if yi is not None and cells is not None and yi < len(cells):
            c = cells[yi].strip()
            if c:
                self.lab_cells += 1
                v = self._number(c)
                if v is not None and math.isfinite(v):
                    self.lab_in_bad.append((line, reason))
                else:
                    self._lab_text(line, c)

    def _lab_text(self, line: int, c: str) -> None:
        d = self.lab_text
        key = c if c in d or len(d) < _MAX_TEXTS else "(other)"
        d[key] = d.get(key, 0) + 1
        if len(self.lab_text_lines) < self.max_bad:
            self.lab_text_lines.append(line)

    def _local(self, dt: datetime) -> float | str:
        """Epoch seconds for a naive local time, or the reason it is bad."""
        zone = self._zone
        if zone is None:
            return "naive_time"
        t0 = dt.replace(tzinfo=zone, fold=0).timestamp()
        t1 = dt.replace(tzinfo=zone, fold=1).timestamp()
        if t0 == t1:
            return t0
        if datetime.fromtimestamp(t0, zone).replace(tzinfo=None) != dt:
            return "nonexistent_time"
        early, late = min(t0, t1), max(t0, t1)
        last = self._last
        if last is not None and early <= last < late:
            return late
        return early

    def _datetime(self, dt: datetime) -> float | str:
        try:
            t = self._local(dt) if dt.tzinfo is None else dt.timestamp()
        except (OverflowError, OSError, ValueError):
            return "implausible_time"
        if isinstance(t, float) and not T_MIN <= t < T_MAX:
            return "implausible_time"
        return t

    def _epoch(self, s: str, scale: float) -> float | str:
        t = _float(s)
        if t is None:
            return "time"
        if not math.isfinite(t):
            return "non_finite"
        t *= scale
        return t if T_MIN <= t < T_MAX else "implausible_time"

    def _time(self, s: str) -> float | str:
        if not s:
            return "time"
        fmt = self._fmt
        if fmt is None:
            # no sampled time decided the format (an empty sample): the first cell does
            t = _float(s)
            if t is None:
                try:
                    dt = datetime.fromisoformat(s)
                except ValueError:
                    return "time"
                self._fmt = "iso"
                return self._datetime(dt)
            if not math.isfinite(t):
                return "non_finite"
            self._fmt = "epoch"
            return self._epoch(s, 1.0)
        scale = _EPOCH_SCALE.get(fmt)
        if scale is not None:
            return self._epoch(s, scale)
        try:
            dt = datetime.fromisoformat(s) if fmt == "iso" else datetime.strptime(s, fmt)
        except (ValueError, OverflowError):
            return "time"
        return self._datetime(dt)

    def _number(self, c: str) -> float | None:
        if self.decimal == ",":
            if "." in c:
                if not _THOUSANDS_DOT.fullmatch(c):
                    return None
                c = c.replace(".", "")
            c = c.replace(",", ".")
        elif "_" in c:
            return None  # float() would take 1_000
        try:
            return float(c)
        except ValueError:
            return None

    def _missing(self, tag: str, c: str) -> None:
        d = self.missing_texts[tag]
        key = c if c in d or len(d) < _MAX_TEXTS else "(other)"
        d[key] = d.get(key, 0) + 1

    def _parse(self, lineno: int, text: str) -> Row | tuple[str, list[str] | None]:
        cells = self._split(text)
        if len(cells) != self._ncols:
            return "columns", cells
        t = self._time(self._tcell(cells))
        if isinstance(t, str):
            return t, cells
        x = []
        for tag, i in zip(self.tags, self._xi, strict=True):
            c = cells[i].strip()
            v = self._number(c) if c else None
            if v is None or not math.isfinite(v):
                self._missing(tag, c)
                x.append(_NAN)
            else:
                x.append(v)
        y = None
        if self._yi is not None:
            c = cells[self._yi].strip()
            if c:
                self.lab_cells += 1
                v = self._number(c)
                if v is not None and math.isfinite(v):
                    y = v
                else:
                    self._lab_text(lineno, c)
        return Row(lineno, t, tuple(x), y)

    def _merge(self, first: Row, later: Row) -> Row:
        """``later`` has the time of ``first``: fill blanks of ``first`` from it."""
        self.n_merged += 1
        if len(self.merged) < self.max_bad:
            self.merged.append(later.line)
        x = list(first.x)
        for k, v in enumerate(later.x):
            if math.isnan(x[k]):
                x[k] = v
            elif not math.isnan(v) and v != x[k]:
                self.n_conflicts += 1
        y = first.y
        if later.y is not None:
            if y is None:
                y = later.y
            else:
                self.lab_dropped.append((later.line, later.y))
        return Row(first.line, first.t, tuple(x), y)

    # iteration

    def __iter__(self) -> Iterator[Row]:
        self._reset()
        return self._sorted() if self.sort else self._stream()

    def _good(self, row: Row) -> Row:
        self.n_good += 1
        for tag, v in zip(self.tags, row.x, strict=True):
            if v != v:
                self.missing[tag] += 1
        if row.y is not None:
            self.n_lab += 1
        if self.t_first is None:
            self.t_first = row.t
        self.t_last = row.t
        return row

    def _stream(self) -> Iterator[Row]:
        pending: Row | None = None
        for lineno, text in self._lines():
            self.n_rows += 1
            row = self._parse(lineno, text)
            if isinstance(row, tuple) and not isinstance(row, Row):
                self._record_bad(lineno, *row)
                continue
            if pending is not None:
                if row.t == pending.t:
                    pending = self._merge(pending, row)
                    continue
                if row.t < pending.t:
                    # its cells were counted by _parse; only the lab value changes account
                    self._record_bad(lineno, "backwards", None)
                    if row.y is not None:
                        self.lab_in_bad.append((lineno, "backwards"))
                    continue
                yield self._good(pending)
            pending = row
            self._last = row.t
        if pending is not None:
            yield self._good(pending)

    def _sorted(self) -> Iterator[Row]:
        # Holds every good row in memory: not constant memory, unlike the streaming mode.
        rows: list[Row] = []
        for lineno, text in self._lines():
            self.n_rows += 1
            row = self._parse(lineno, text)
            if isinstance(row, tuple) and not isinstance(row, Row):
                self._record_bad(lineno, *row)
                continue
            self._last = row.t
            rows.append(row)
        rows.sort(key=lambda r: r.t)  # stable: of equal times the first in the file comes first
        good: list[Row] = []
        for row in rows:
            if good and row.t == good[-1].t:
                good[-1] = self._merge(good[-1], row)
                continue
            good.append(row)
        self.bad.sort()
        self.merged.sort()
        del rows
        for row in good:
            self._good(row)
        yield from good

    def summary(self) -> dict:
        """Counters, the layout found and the lab accounting, as plain data."""
        return {
            "path": self.path,
            "rows": self.n_rows,
            "good": self.n_good,
            "bad": self.n_bad,
            "comments": self.n_comments,
            "bad_counts": dict(self.bad_counts),
            "bad_lines": [list(b) for b in self.bad],
            "delimiter": self.delimiter,
            "decimal": self.decimal,
            "time_column": self.time_column,
            "time_format": self._fmt or self.time_format,
            "time_format_detected": self.format_detected,
            "epoch_unit": self.epoch_unit,
            "tz": self.tz,
            "tz_from_header": self.tz_from_header,
            "encoding": self.encoding,
            "t_first": self.t_first,
            "t_last": self.t_last,
            "tags": list(self.tags),
            "target": self.target,
            "mapping": dict(self.mapping),
            "units": dict(self.units),
            "units_line": self.units_line,
            "descriptions": dict(self.descriptions),
            "missing": dict(self.missing),
            "missing_texts": {tag: dict(d) for tag, d in self.missing_texts.items()},
            "merged": self.n_merged,
            "merged_lines": list(self.merged),
            "conflicts": self.n_conflicts,
            "lab_cells": self.lab_cells,
            "lab_read": self.n_lab,
            "lab_text": dict(self.lab_text),
            "lab_text_lines": list(self.lab_text_lines),
            "lab_in_bad": [list(b) for b in self.lab_in_bad],
            "lab_dropped": [list(b) for b in self.lab_dropped],
        }


def _float(s: str) -> float | None:
    try:
        return float(s)
    except ValueError:
        return None


def read_csv(
    path: str | os.PathLike,
    *,
    time_column: str | None = None,
    time_format: str = "auto",
    tz: str | None = None,
    target: str | None = None,
    tags: Sequence[str] | None = None,
    sort: bool = False,
    progress: bool = False,
    max_bad: int = 1000,
    delimiter: str | None = None,
    decimal: str | None = None,
    encoding: str = "utf-8",
) -> CsvReader:
    """Open a historian CSV export for streaming; iterate the result for `Row` objects.

    Parameters
    ----------
    time_column : header of the time column; ``None`` detects it (module docstring).
    time_format : ``"auto"`` (module docstring; the choice is then kept for the whole file),
        ``"iso"``, ``"epoch"`` (seconds), ``"epoch_ms"``, ``"epoch_us"``, ``"epoch_ns"`` or a
        strptime format.
    tz : IANA zone for naive times (see the module docstring for the daylight-saving rule).
    target : lab column (its header or its tag); ``None`` takes ``AX-350`` when present,
        ``""`` means no target.
    tags : input columns (headers or tags); ``None`` takes every other column in header order.
    sort : read the whole file into memory and sort by time (not constant memory); otherwise
        rows before the previous good row are bad rows.
    progress : show a tqdm bar (bytes read) when stderr is a terminal and tqdm is installed.
    delimiter, decimal : ``None`` detects them; else ``,`` ``;`` or tab, and ``.`` or ``,``.

    The header and the first `SAMPLE` data lines are read at once, so a missing column, an
    unreadable or ambiguous time format, naive times without ``tz`` or implausible epoch
    times raise ValueError here, naming the file. The rest of the file is read line by line
    during iteration.
    """
    return CsvReader(
        path,
        time_column=time_column,
        time_format=time_format,
        tz=tz,
        target=target,
        tags=tags,
        sort=sort,
        progress=progress,
        max_bad=max_bad,
        delimiter=delimiter,
        decimal=decimal,
        encoding=encoding,
    )


# -- what was read, for people -----------------------------------------------------------------

_SEP_NAME = {",": "','", ";": "';'", "\t": "tab"}


def _lines_list(lines, n: int = 5) -> str:
    lines = list(lines)
    shown = ", ".join(str(x) for x in lines[:n])
    return ("line " if len(lines) == 1 else "lines ") + shown + (", ..." if len(lines) > n
                                                                else "")


def _iso(t: float | None) -> str:
    if t is None:
        return "-"
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M:%S")


def reading_text(summary: dict) -> list[str]:
    """What a `CsvReader` read, as lines for people (its ``summary()``)."""
    s = summary
    fmt = s.get("time_format")
    how = []
    if s.get("epoch_unit"):
        how.append(f"epoch {_UNIT_NAME[s['epoch_unit']]}"
                   + (" (detected from the magnitude)" if s.get("time_format_detected")
                      else ""))
    elif fmt:
        how.append(f"format {fmt!r}" + (" (detected)" if s.get("time_format_detected")
                                       else ""))
    if s.get("tz_from_header"):
        how.append("times in UTC (from the header)")
    elif s.get("tz"):
        how.append(f"local times in {s['tz']}")
    how.append(f"separator {_SEP_NAME.get(s.get('delimiter'), repr(s.get('delimiter')))}")
    how.append(f"decimal {s.get('decimal')!r}")
    if s.get("encoding") not in (None, "utf-8"):
        how.append(f"encoding {s['encoding']}")
    out = [f"read {os.path.basename(s['path'])}: {s['good']} rows, {_iso(s.get('t_first'))} "
           f"to {_iso(s.get('t_last'))} UTC; time column {s.get('time_column')!r}, "
           + ", ".join(how)]
    if s.get("mapping"):
        out.append("  tags from headers: " + ", ".join(
            f"{h!r} -> {t}" for h, t in s["mapping"].items()))
    units = s.get("units") or {}
    if units:
        where = f" (units row, line {s['units_line']})" if s.get("units_line") else ""
        out.append(f"  units{where}: " + ", ".join(f"{t} {u}" for t, u in units.items()))
    miss = []
    for tag in s.get("tags", []):
        n = s.get("missing", {}).get(tag, 0)
        if not n:
            continue
        texts = s.get("missing_texts", {}).get(tag, {})
        # blanks are the rest (cells of merged rows included, so no count is shown for them)
        detail = ", ".join(f"{k!r} {v}" for k, v in sorted(texts.items(),
                                                           key=lambda kv: -kv[1]) if k)
        miss.append(f"{tag} {n}" + (f" ({detail})" if detail else ""))
    out.append("  missing readings: " + ("; ".join(miss) if miss else "none"))
    if s.get("bad"):
        by: dict[str, list[int]] = {}
        for line, reason in s.get("bad_lines", []):
            by.setdefault(reason, []).append(line)
        out.append(f"  bad rows: {s['bad']} (skipped): " + "; ".join(
            f"{reason} {n} ({_lines_list(by.get(reason, []))})"
            for reason, n in s["bad_counts"].items()))
    if s.get("merged"):
        out.append(f"  rows with a repeated time merged into the row before: {s['merged']} "
                   f"({_lines_list(s.get('merged_lines', []))})"
                   + (f"; {s['conflicts']} readings differed (the first kept)"
                      if s.get("conflicts") else ""))
    if s.get("target"):
        parts = [f"{s['lab_read']} read"]
        if s.get("lab_text"):
            n = sum(s["lab_text"].values())
            parts.append(f"{n} not numbers ({', '.join(map(repr, s['lab_text']))}; "
                         f"{_lines_list(s.get('lab_text_lines', []))})")
        if s.get("lab_in_bad"):
            parts.append(f"{len(s['lab_in_bad'])} on bad rows "
                         f"({_lines_list(b[0] for b in s['lab_in_bad'])})")
        if s.get("lab_dropped"):
            parts.append(f"{len(s['lab_dropped'])} dropped, a second lab value at a repeated "
                         f"time ({_lines_list(b[0] for b in s['lab_dropped'])})")
        out.append(f"  lab column {s['target']}: {s['lab_cells']} values in the file = "
                   + " + ".join(parts))
    return out
