"""Logging of every posteriord process: plain text or one JSON object per line, and the
rate-limited warnings that the daemon and the bridges share (a flood of bad input must not
flood the log, and what was held back is counted in the next line)."""

from __future__ import annotations

import json
import logging
import sys
import time
from collections import Counter


class _JsonFormatter(logging.Formatter):
    def format(self, record):
        out = {"ts": round(record.created, 3), "level": record.levelname.lower(),
               "logger": record.name, "msg": record.getMessage()}
        if record.exc_info:
            out["exc"] = self.formatException(record.exc_info)
        return json.dumps(out)


def setup_logging(level: str, fmt: str) -> None:
    handler = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        handler.setFormatter(_JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level.upper())


class RateLimitedLog:
    """At most one log line per key every ``interval`` seconds; the next line that is let
    through says how many were held back in between.

    ``template`` formats :meth:`warn`'s ``(key, reason, detail)``; :meth:`__call__` takes a
    level, a key and a format of its own. The clock is ``time.monotonic`` (a wall-clock step
    neither silences nor floods the log).
    """

    def __init__(self, logger: logging.Logger, interval: float = 10.0,
                 template: str = "%s: %s (%s)"):
        self._log = logger
        self._interval = interval
        self._template = template
        self._last: dict = {}
        self._held: Counter = Counter()

    def __call__(self, level: int, key, fmt: str, *args) -> bool:
        """Log ``fmt % args`` at ``level`` unless ``key`` was logged less than ``interval``
        ago; True when the line was written."""
        now = time.monotonic()
        last = self._last.get(key)
        if last is not None and now - last < self._interval:
            self._held[key] += 1
            return False
        self._last[key] = now
        n = self._held.pop(key, 0)
        more = f" ({n} more since the last report)" if n else ""
        self._log.log(level, fmt + "%s", *args, more)
        return True

    def warn(self, key: str, reason: str, detail: str) -> bool:
        """A warning about ``reason`` at ``key`` (a model, a server), limited per pair."""
        return self(logging.WARNING, (key, reason), self._template, key or "-", reason, detail)
