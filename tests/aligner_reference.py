"""The feature buffer as it was before the ring buffer: rows in Python lists.

Kept as the reference the ring buffer (`daemon.runtime.alignment.Aligner`) must answer
exactly like, in the property tests and in ``tools/bench_buffer.py``. Unchanged from the
project's own list-based implementation except for its name; not used by the daemon.
"""

from __future__ import annotations

import math
from bisect import bisect_left, bisect_right
from collections.abc import Mapping, Sequence

import numpy as np

from daemon.runtime.alignment import _dead_times

__all__ = ["ListAligner"]


class ListAligner:
    """Bounded history of input rows, queried for the inputs a lab sample reflects.

    A lab sample drawn at time t reflects input i at ``t - dead_times_s[i]``. `lookup` takes,
    for each input, the last pushed row at or before that time if it is at most
    ``tolerance_s`` older, and returns None when any input has no such row (too old, forgotten,
    or not yet pushed). Rows older than ``history_s`` before the newest row are forgotten, and
    at most ``max_rows`` rows are kept, so memory is bounded. Lookups are O(log n) by bisection.
    Blank inputs (nan) are returned as nan.
    """

    SCHEMA = "historian.aligner/1"

    def __init__(
        self,
        tags: Sequence[str],
        dead_times_s: Sequence[float] | Mapping[str, float],
        history_s: float,
        *,
        tolerance_s: float = 300.0,
        max_rows: int = 100_000,
    ) -> None:
        self.tags = tuple(tags)
        if not self.tags:
            raise ValueError(f"tags={tags!r}: need at least one tag")
        self.dead_times_s = _dead_times(self.tags, dead_times_s)
        if not (math.isfinite(tolerance_s) and tolerance_s >= 0):
            raise ValueError(f"tolerance_s={tolerance_s!r}: must be finite and >= 0")
        need = max(self.dead_times_s) + tolerance_s
        if not (math.isfinite(history_s) and history_s >= need):
            raise ValueError(
                f"history_s={history_s!r}: must cover the longest dead time plus the "
                f"tolerance ({need} s)"
            )
        if not isinstance(max_rows, int) or max_rows < 1:
            raise ValueError(f"max_rows={max_rows!r}: expected an integer >= 1")
        self.history_s = float(history_s)
        self.tolerance_s = float(tolerance_s)
        self.max_rows = max_rows
        self._t: list[float] = []
        # _x[j] is row j itself (_r[j] < 0) or, for rows pushed as a block, the block's 2-D
        # array with the row at index _r[j]: a block costs two list extends, not one Python
        # object per row to create now and free when it is forgotten
        self._x: list = []
        self._r: list[int] = []
        self._head = 0  # rows before _head are forgotten; the lists are compacted now and then

    def __len__(self) -> int:
        return len(self._t) - self._head

    @property
    def n_stored(self) -> int:
        """Rows held in memory, including forgotten ones not compacted away yet."""
        return len(self._t)

    @property
    def oldest(self) -> float | None:
        return self._t[self._head] if len(self) else None

    @property
    def newest(self) -> float | None:
        return self._t[-1] if len(self) else None

    def push(self, t: float, x: Sequence[float]) -> None:
        """Add an input row at time ``t`` (strictly after the previous one), `tags` order."""
        t = float(t)
        if not math.isfinite(t):
            raise ValueError(f"t={t!r}: must be finite")
        if len(x) != len(self.tags):
            raise ValueError(f"row {x!r} has {len(x)} values, expected {len(self.tags)}")
        if self._t and t <= self._t[-1]:
            raise ValueError(f"t={t!r} is not after the previous row at {self._t[-1]!r}")
        self._t.append(t)
        self._x.append(tuple(float(v) for v in x))
        self._r.append(-1)
        self._trim()

    def push_trusted(self, t: float, x: list) -> None:
        """`push` without the checks, for callers that validated ``t`` and ``x`` already.

        ``t`` must be a finite float after the newest row and ``x`` a sequence of floats in
        `tags` order that the caller will not modify.
        """
        self._t.append(t)
        self._x.append(x)
        self._r.append(-1)
        self._trim()

    def push_many_trusted(self, ts: list, xs: list) -> None:
        """Several `push_trusted` rows at once (times increasing)."""
        self._t.extend(ts)
        self._x.extend(xs)
        self._r.extend([-1] * len(xs))
        self._trim()

    def push_block_trusted(self, ts: list, X: np.ndarray) -> None:
        """`push_many_trusted` of the rows of a 2-D float array, kept by reference.

        The caller must not modify ``X`` afterwards.
        """
        k = len(ts)
        self._t.extend(ts)
        self._x.extend([X] * k)
        self._r.extend(range(k))
        self._trim()

    def _trim(self) -> None:
        times = self._t
        cutoff = times[-1] - self.history_s
        head = self._head
        if times[head] >= cutoff and len(times) - head <= self.max_rows:
            return  # nothing to forget (the common case between compactions)
        if times[head] < cutoff:
            head = bisect_left(times, cutoff, head)
        head = max(head, len(times) - self.max_rows)
        if head >= 256 and 2 * head >= len(times):
            del self._t[:head]
            del self._x[:head]
            del self._r[:head]
            head = 0
        self._head = head

    def lookup(self, t_lab: float) -> tuple[float, ...] | None:
        """Inputs reflected by a lab sample drawn at ``t_lab``, or None if not available."""
        t_lab = float(t_lab)
        if not math.isfinite(t_lab):
            raise ValueError(f"t_lab={t_lab!r}: must be finite")
        times = self._t
        out = []
        for i, d in enumerate(self.dead_times_s):
            s = t_lab - d
            j = bisect_right(times, s, self._head) - 1
            if j < self._head or s - times[j] > self.tolerance_s:
                return None
            r = self._r[j]
            out.append(self._x[j][i] if r < 0 else float(self._x[j][r, i]))
        return tuple(out)

    def lookup_many(self, ts: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
        """`lookup` of several times at once: ``(values, available)``.

        ``values`` (m, n) holds the rows `lookup` returns (the same floats), with nan rows
        where it returns None; ``available`` (m,) bool. The times must be finite.
        """
        ts = np.asarray(ts, dtype=float)
        m, n = ts.size, len(self.tags)
        values = np.full((m, n), np.nan)
        ok = np.zeros(m, dtype=bool)
        if m == 0 or not len(self):
            return values, ok
        times_all = self._t
        dead = self.dead_times_s
        # only the rows any of the looked-up instants can fall on
        a = max(self._head, bisect_right(times_all, float(ts.min()) - max(dead),
                                         self._head) - 1)
        b = bisect_right(times_all, float(ts.max()) - min(dead), self._head)
        if b <= a:
            return values, ok
        times = np.asarray(times_all[a:b], dtype=float)
        rows = self._rows(a, b)
        ok[:] = True
        for i, d in enumerate(dead):
            s = ts - d
            j = np.searchsorted(times, s, side="right") - 1
            good = j >= 0
            jj = np.where(good, j, 0)
            good &= s - times[jj] <= self.tolerance_s
            values[:, i] = rows[jj, i]
            ok &= good
        values[~ok] = np.nan
        return values, ok

    def rows(self) -> np.ndarray:
        """The remembered rows as one float array of shape (len(self), len(tags))."""
        return self._rows(self._head, len(self._x))

    def _rows(self, start: int, end: int) -> np.ndarray:
        n = len(self.tags)
        xs, rs = self._x, self._r
        parts: list = []
        plain: list = []
        j = start
        while j < end:
            r = rs[j]
            if r < 0:
                plain.append(xs[j])
                j += 1
                continue
            if plain:
                parts.append(np.asarray(plain, dtype=float).reshape(len(plain), n))
                plain = []
            X = xs[j]
            # the block's rows r, r+1, ... follow one another up to its end
            stop = min(end, j + X.shape[0] - r)
            parts.append(X[r:r + stop - j])
            j = stop
        if plain:
            parts.append(np.asarray(plain, dtype=float).reshape(len(plain), n))
        if not parts:
            return np.empty((0, n))
        return np.concatenate(parts).astype(float, copy=False)

    def to_state(self) -> dict:
        """Plain-data state (settings and the remembered rows)."""
        return {
            "schema": self.SCHEMA,
            "tags": list(self.tags),
            "dead_times_s": list(self.dead_times_s),
            "history_s": self.history_s,
            "tolerance_s": self.tolerance_s,
            "max_rows": self.max_rows,
            "t": self._t[self._head :],
            # numpy converts the rows in a few calls; one by one took seconds for 200 models
            # of 5000 rows, with the service loop waiting
            "x": self.rows().tolist(),
        }

    @classmethod
    def from_state(cls, state: dict) -> ListAligner:
        """Inverse of `to_state` (the rows checked by numpy and kept as one block)."""
        if state.get("schema") != cls.SCHEMA:
            raise ValueError(f"unknown aligner schema {state.get('schema')!r}")
        al = cls(
            state["tags"],
            state["dead_times_s"],
            state["history_s"],
            tolerance_s=state["tolerance_s"],
            max_rows=state["max_rows"],
        )
        t = np.asarray(state["t"], dtype=float)
        x = np.asarray(state["x"], dtype=float)
        if not len(state["x"]):
            x = x.reshape(0, len(al.tags))
        if t.ndim != 1 or x.shape != (len(t), len(al.tags)):
            raise ValueError(f"aligner state has times of shape {t.shape} and rows of shape "
                             f"{x.shape}; expected ({len(t)}, {len(al.tags)}) rows")
        if not np.isfinite(t).all() or np.any(np.diff(t) <= 0):
            raise ValueError("aligner state times must be finite and increasing")
        if len(t):
            al.push_block_trusted(t.tolist(), np.ascontiguousarray(x))
        return al
