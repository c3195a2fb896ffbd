"""Lab results from a watched folder of CSV files, as the lab's information system drops them.

A file is ``*.csv`` (UTF-8) with a header row naming ``model``, ``drawn`` and ``value``, and
optionally ``id``, in any order; ``drawn`` is an ISO 8601 time with its UTC offset or seconds
since 1970. The lab system should write it under another name and rename it into the folder
(a rename is atomic; a file being written is never read half-way).

Each file is read once as a whole: if every row is good, its results are sent (once the
daemon is subscribed to every model it names) and the file moves to ``done/``; otherwise
nothing of it is sent and it moves to ``rejected/`` with ``<file>.reason`` beside it, saying
which row and why. The move follows the send, so a crash in between sends the file again
after the restart; the daemon then refuses the repeated results (a lab result drawn no later
than the last one learned is ``lab_out_of_order``), so nothing is learned twice and nothing
is lost.
"""

from __future__ import annotations

import asyncio
import contextlib
import csv
import datetime as _dt
import io
import logging
import os
from pathlib import Path

import zmq

from daemon.bridges.common import FeedEnd, Metrics, number
from daemon.config.bridges import BridgeConfig
from daemon.logsetup import RateLimitedLog

log = logging.getLogger("posteriord.bridge.lab_folder")

MAX_FILE = 16 << 20
MAX_ROWS = 100_000


class BadFile(ValueError):
    """A lab file that cannot be used; its message is the reason written beside it."""


def _drawn(text: str) -> float:
    text = text.strip()
    try:
        f = float(text)
    except ValueError:
        try:
            ts = _dt.datetime.fromisoformat(text)
        except ValueError:
            raise BadFile(f"drawn {text[:40]!r} is not a time") from None
        if ts.tzinfo is None:
            raise BadFile(f"drawn {text[:40]!r} has no UTC offset") from None
        return ts.timestamp()
    if number(f) is None or f <= 0:
        raise BadFile(f"drawn {text[:40]!r} is not a time")
    return f


def read_lab_file(data: bytes, models) -> list[tuple[str, dict]]:
    """(model, feed body) of every row; raises BadFile naming the first bad row."""
    if len(data) > MAX_FILE:
        raise BadFile(f"{len(data)} bytes > {MAX_FILE}")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        raise BadFile("not UTF-8 text") from None
    reader = csv.reader(io.StringIO(text))
    try:
        header = [h.strip().lower() for h in next(reader)]
    except StopIteration:
        raise BadFile("the file is empty") from None
    except csv.Error as exc:
        raise BadFile(f"header: {exc}") from None
    need = {"model", "drawn", "value"}
    if not need <= set(header) or len(set(header)) != len(header):
        raise BadFile(f"the header must name model, drawn and value once each, got "
                      f"{','.join(header)[:80]!r}")
    col = {h: i for i, h in enumerate(header)}
    out = []
    try:
        for n, row in enumerate(reader, 2):
            if not row or all(not c.strip() for c in row):
                continue
            if len(row) != len(header):
                raise BadFile(f"row {n}: {len(row)} fields, the header has {len(header)}")
            model = row[col["model"]].strip()
            if model not in models:
                raise BadFile(f"row {n}: no model named {model[:60]!r}")
            try:
                t = _drawn(row[col["drawn"]])
            except BadFile as exc:
                raise BadFile(f"row {n}: {exc}") from None
            try:
                y = float(row[col["value"]])
            except ValueError:
                y = None
            if y is None or number(y) is None:
                raise BadFile(f"row {n}: value {row[col['value']][:40]!r} is not a finite "
                              "number")
            body = {"t": t, "y": y}
            if "id" in col and row[col["id"]].strip():
                body["id"] = row[col["id"]].strip()[:128]
            out.append((model, body))
            if len(out) > MAX_ROWS:
                raise BadFile(f"more than {MAX_ROWS} rows")
    except csv.Error as exc:
        raise BadFile(f"not CSV: {exc}") from None
    if not out:
        raise BadFile("no result rows")
    return out


class LabFolder:
    """The bridge; :meth:`run` until :meth:`stop`, or :meth:`scan` once."""

    def __init__(self, cfg: BridgeConfig, *, context: zmq.Context | None = None):
        self.cfg = cfg
        self.name = cfg.name
        self.folder = Path(cfg.folder)
        self.models = {m.name for m in cfg.models}
        self.metrics = Metrics(self.name, sorted(self.models))
        self.rlog = RateLimitedLog(log)
        self._ctx = context
        self._own_ctx = context is None
        self.feed: FeedEnd | None = None
        self._stop = asyncio.Event()
        self.metrics_address = None

    def stop(self) -> None:
        self._stop.set()

    def open(self) -> None:
        if self.feed is not None:
            return
        for sub in ("done", "rejected"):
            (self.folder / sub).mkdir(parents=True, exist_ok=True)
        if self._ctx is None:
            self._ctx = zmq.Context()
        self.feed = FeedEnd(self._ctx, self.cfg.feed, self.name, self.metrics, self.rlog)
        self.metrics_address = self.metrics.serve(self.cfg.metrics)

    def _move(self, path: Path, where: str) -> Path:
        target = self.folder / where / path.name
        k = 1
        while target.exists():  # a file of the same name came before: keep both
            target = self.folder / where / f"{path.stem}.{k}{path.suffix}"
            k += 1
        os.replace(path, target)
        return target

    async def scan(self) -> int:
        """Handle every file in the folder now; returns how many were handled."""
        self.open()
        handled = 0
        for path in sorted(self.folder.glob("*.csv")):
            if not path.is_file() or path.name.startswith("."):
                continue
            try:
                data = path.read_bytes()
            except OSError as exc:
                self.rlog.warn(path.name, "unreadable", str(exc))
                continue
            try:
                rows = read_lab_file(data, self.models)
            except BadFile as exc:
                target = self._move(path, "rejected")
                target.with_name(target.name + ".reason").write_text(str(exc) + "\n")
                self.metrics.drop("?", "bad_file")
                log.warning("%s rejected: %s", path.name, exc)
                handled += 1
                continue
            names = sorted({m for m, _ in rows})
            for m in names:
                self.metrics.received.labels(self.name, m).inc(sum(1 for x, _ in rows if x == m))
            await self.feed.wait_subscribed(names)
            for model, body in rows:
                self.feed.send(model, body)
            self._move(path, "done")
            log.info("%s: %d lab result(s) sent", path.name, len(rows))
            handled += 1
        return handled

    async def run(self) -> None:
        self.open()
        watcher = asyncio.create_task(self.feed.watch())
        try:
            while not self._stop.is_set():
                await self.scan()
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(self._stop.wait(), self.cfg.poll)
        finally:
            watcher.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await watcher

    async def aclose(self) -> None:
        self.metrics.close()
        if self.feed is not None:
            self.feed.close()
        if self._own_ctx and self._ctx is not None:
            self._ctx.term()


def main(config_path: str) -> int:
    from daemon.bridges.common import run_bridge

    return run_bridge(LabFolder, config_path, "lab_folder")
