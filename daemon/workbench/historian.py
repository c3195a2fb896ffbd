"""Historian CSV exports: write simulated runs, stream real-looking exports back.

File layout (as a process engineer would export it from a historian)::

    # comment lines start with '#'
    time,TI-104,FI-201,PI-110,AI-305,AX-350
    2026-01-05T00:00:00+00:00,110.2,14.1,1.21,5.03,
    2026-01-05T00:01:00+00:00,110.3,14.0,1.20,5.04,187.0

One row per input sample; the lab column is filled only on rows where a sample was drawn.

Time stamps (`read_csv`):

* ISO 8601 with an offset (``2026-03-29T03:00:00+02:00``, ``...Z``), or epoch seconds, or any
  `datetime.strptime` format.
* Naive local times (no offset) need ``tz``, an IANA zone name, and are converted with
  `zoneinfo`. Rule at daylight-saving changes: a local time that does not exist (the spring gap)
  makes the row bad (``"nonexistent_time"``); a local time that occurs twice (the autumn fold)
  is taken as the earlier instant (``fold=0``) unless that instant would not be after the
  previous good row while the later one (``fold=1``) would be. A monotone export that runs
  through the repeated hour is therefore read correctly, and an isolated ambiguous time is read
  as the earlier instant.
* A naive time without ``tz`` is a bad row (``"naive_time"``).

Bad rows are skipped, counted per reason and listed with their line numbers (1-based physical
line numbers of the file). Reasons: ``columns`` (wrong column count), ``time`` (unparseable time),
``naive_time``, ``nonexistent_time``, ``number`` (unparseable number), ``non_finite`` (nan/inf),
``backwards`` (time before the previous good row), ``duplicate`` (same time as a previous good
row).
"""

from __future__ import annotations

import csv
import json
import math
import os
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
    "read_csv",
    "write_csv",
]

BAD_REASONS: tuple[str, ...] = (
    "columns",
    "time",
    "naive_time",
    "nonexistent_time",
    "number",
    "non_finite",
    "backwards",
    "duplicate",
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
        f.write(f"# {DISCLAIMER}: {UNIT}\n")
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


class Row(NamedTuple):
    """One good data row: file line number, epoch seconds, inputs (nan where blank), target."""

    line: int
    t: float
    x: tuple[float, ...]
    y: float | None


class CsvReader:
    """Streaming reader over a historian CSV export; see `read_csv`.

    Iterating yields `Row` objects and fills the counters ``n_rows`` (data rows seen),
    ``n_good``, ``n_bad``, ``n_comments``, ``bad_counts`` (reason -> count) and ``bad`` (list of
    ``(line, reason)``, at most ``max_bad`` entries). Each new iteration reads the file again
    from the start and resets the counters.
    """

    def __init__(
        self,
        path: str | os.PathLike,
        *,
        time_column: str = "time",
        time_format: str = "auto",
        tz: str | None = None,
        target: str | None = None,
        tags: Sequence[str] | None = None,
        sort: bool = False,
        progress: bool = False,
        max_bad: int = 1000,
        delimiter: str = ",",
        encoding: str = "utf-8",
    ) -> None:
        self.path = os.fspath(path)
        if time_format not in ("auto", "iso", "epoch") and "%" not in time_format:
            raise ValueError(
                f"time_format={time_format!r}: expected 'auto', 'iso', 'epoch' or a strptime format"
            )
        if not isinstance(max_bad, int) or max_bad < 0:
            raise ValueError(f"max_bad={max_bad!r}: expected an integer >= 0")
        if len(delimiter) != 1:
            raise ValueError(f"delimiter={delimiter!r}: expected one character")
        self.time_format = time_format
        self.tz = tz
        self._zone = None if tz is None else _zone(tz)
        self.sort = bool(sort)
        self.progress = bool(progress)
        self.max_bad = max_bad
        self.delimiter = delimiter
        self.encoding = encoding

        self.header_line, self.columns = self._read_header()
        cols = self.columns

        def index(name: str, what: str) -> int:
            if name not in cols:
                raise ValueError(f"{self.path}: {what} column {name!r} not in header {cols}")
            if cols.count(name) > 1:
                raise ValueError(f"{self.path}: {what} column {name!r} appears twice in header")
            return cols.index(name)

        self.time_column = time_column
        self._ti = index(time_column, "time")
        if target is None:
            auto = TARGET in cols and (tags is None or TARGET not in tags)
            target = TARGET if auto else ""
        self.target = target or None
        self._yi = index(target, "target") if target else None
        if tags is None:
            tags = [c for c in cols if c not in (time_column, target) and c]
        self.tags = tuple(tags)
        self._xi = tuple(index(tag, "input") for tag in self.tags)
        self._ncols = len(cols)
        self._reset()

    # header and lines

    def _split(self, text: str) -> list[str]:
        if '"' in text:
            return next(csv.reader([text], delimiter=self.delimiter))
        return text.split(self.delimiter)

    def _read_header(self) -> tuple[int, list[str]]:
        with open(self.path, "rb") as f:
            for lineno, raw in enumerate(f, 1):
                text = raw.decode(self.encoding, errors="replace").rstrip("\r\n")
                if lineno == 1:
                    text = text.lstrip("\ufeff")
                stripped = text.strip()
                if not stripped or stripped.startswith("#"):
                    continue
                return lineno, [c.strip() for c in self._split(text)]
        raise ValueError(f"{self.path}: no header line")

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
        try:
            with open(self.path, "rb") as f:
                for lineno, raw in enumerate(f, 1):
                    if bar is not None:
                        pending += len(raw)
                        if pending >= 1 << 16:
                            bar.update(pending)
                            pending = 0
                    if lineno <= self.header_line:
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
        self._last: float | None = None
        self._fmt = None if self.time_format == "auto" else self.time_format

    def _record_bad(self, line: int, reason: str) -> None:
        self.n_bad += 1
        self.bad_counts[reason] = self.bad_counts.get(reason, 0) + 1
        if len(self.bad) < self.max_bad:
            self.bad.append((line, reason))

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
        if dt.tzinfo is None:
            return self._local(dt)
        return dt.timestamp()

    def _time(self, s: str) -> float | str:
        if not s:
            return "time"
        fmt = self._fmt
        if fmt is None:
            try:
                t = float(s)
            except ValueError:
                try:
                    dt = datetime.fromisoformat(s)
                except ValueError:
                    return "time"
                self._fmt = "iso"
                return self._datetime(dt)
            if not math.isfinite(t):
                return "non_finite"
            self._fmt = "epoch"
            return t
        if fmt == "epoch":
            try:
                t = float(s)
            except ValueError:
                return "time"
            return t if math.isfinite(t) else "non_finite"
        try:
            dt = datetime.fromisoformat(s) if fmt == "iso" else datetime.strptime(s, fmt)
        except ValueError:
            return "time"
        return self._datetime(dt)

    def _parse(self, lineno: int, text: str) -> Row | str:
        cells = self._split(text)
        if len(cells) != self._ncols:
            return "columns"
        t = self._time(cells[self._ti].strip())
        if isinstance(t, str):
            return t
        x = []
        for i in self._xi:
            c = cells[i].strip()
            if not c:
                x.append(_NAN)
                continue
            try:
                v = float(c)
            except ValueError:
                return "number"
            if not math.isfinite(v):
                return "non_finite"
            x.append(v)
        y = None
        if self._yi is not None:
            c = cells[self._yi].strip()
            if c:
                try:
                    y = float(c)
                except ValueError:
                    return "number"
                if not math.isfinite(y):
                    return "non_finite"
        return Row(lineno, t, tuple(x), y)

    # iteration

    def __iter__(self) -> Iterator[Row]:
        self._reset()
        return self._sorted() if self.sort else self._stream()

    def _stream(self) -> Iterator[Row]:
        for lineno, text in self._lines():
            self.n_rows += 1
            row = self._parse(lineno, text)
            if isinstance(row, str):
                self._record_bad(lineno, row)
                continue
            if self._last is not None and row.t <= self._last:
                self._record_bad(lineno, "duplicate" if row.t == self._last else "backwards")
                continue
            self._last = row.t
            self.n_good += 1
            yield row

    def _sorted(self) -> Iterator[Row]:
        # Holds every good row in memory: not constant memory, unlike the streaming mode.
        rows: list[Row] = []
        for lineno, text in self._lines():
            self.n_rows += 1
            row = self._parse(lineno, text)
            if isinstance(row, str):
                self._record_bad(lineno, row)
                continue
            self._last = row.t
            rows.append(row)
        rows.sort(key=lambda r: r.t)  # stable: of equal times the first in the file is kept
        last = None
        good = []
        for row in rows:
            if last is not None and row.t == last:
                self._record_bad(row.line, "duplicate")
                continue
            last = row.t
            good.append(row)
        self.bad.sort()
        self.n_good = len(good)
        del rows
        yield from good

    def summary(self) -> dict:
        """Counters as plain data."""
        return {
            "path": self.path,
            "rows": self.n_rows,
            "good": self.n_good,
            "bad": self.n_bad,
            "comments": self.n_comments,
            "bad_counts": dict(self.bad_counts),
            "bad_lines": [list(b) for b in self.bad],
        }


def read_csv(
    path: str | os.PathLike,
    *,
    time_column: str = "time",
    time_format: str = "auto",
    tz: str | None = None,
    target: str | None = None,
    tags: Sequence[str] | None = None,
    sort: bool = False,
    progress: bool = False,
    max_bad: int = 1000,
    delimiter: str = ",",
    encoding: str = "utf-8",
) -> CsvReader:
    """Open a historian CSV export for streaming; iterate the result for `Row` objects.

    Parameters
    ----------
    time_format : ``"auto"`` (epoch seconds if the first time cell is a number, else ISO 8601;
        the choice is then kept for the whole file), ``"iso"``, ``"epoch"`` or a strptime format.
    tz : IANA zone for naive times (see the module docstring for the daylight-saving rule).
    target : lab column; ``None`` takes ``AX-350`` when present, ``""`` means no target.
    tags : input columns; ``None`` takes every other column in header order.
    sort : read the whole file into memory and sort by time (not constant memory); otherwise
        rows not after the previous good row are bad rows.
    progress : show a tqdm bar (bytes read) when stderr is a terminal and tqdm is installed.

    The header is read at once, so a missing column raises ValueError here, naming the file
    and the column. The file itself is read line by line during iteration.
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
        encoding=encoding,
    )
