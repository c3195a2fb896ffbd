"""Lab matching: which input readings a lab result reflects.

A sample drawn at time t reflects input i as it was at ``t - dead_time[i]``. `Aligner` is the
live feature buffer that answers that question for late lab results; `apply_dead_time` is its
batch twin for whole histories (the backtest and tune use it, and must agree with it).
"""

from __future__ import annotations

import math
from bisect import bisect_right
from collections.abc import Mapping, Sequence

import numpy as np

__all__ = ["Aligner", "apply_dead_time"]


def _dead_times(tags: tuple[str, ...], dead_times_s) -> tuple[float, ...]:
    if isinstance(dead_times_s, Mapping):
        unknown = set(dead_times_s) - set(tags)
        if unknown:
            raise ValueError(f"dead times for unknown tags {sorted(unknown)}; tags are {tags}")
        dead = tuple(float(dead_times_s.get(tag, 0.0)) for tag in tags)
    else:
        dead = tuple(float(d) for d in dead_times_s)
        if len(dead) != len(tags):
            raise ValueError(f"dead_times_s={dead_times_s!r}: need {len(tags)} values for {tags}")
    for tag, d in zip(tags, dead, strict=True):
        if not (math.isfinite(d) and d >= 0):
            raise ValueError(f"dead time of {tag} = {d!r}: must be finite and >= 0")
    return dead


def apply_dead_time(
    t: np.ndarray,
    X: np.ndarray,
    lab_t: np.ndarray,
    dead_times_s: Sequence[float],
    *,
    tolerance_s: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Inputs as seen by lab samples drawn at ``lab_t``, batch version of `Aligner`.

    Input i for a lab sample drawn at time s is the last row of ``X`` at or before
    ``s - dead_times_s[i]``, if that row is at most ``tolerance_s`` older. Returns
    ``(values, available)``: ``values`` (m, n) with nan rows where any input is unavailable,
    ``available`` (m,) bool.
    """
    t = np.asarray(t, dtype=float)
    X = np.asarray(X, dtype=float)
    lab_t = np.asarray(lab_t, dtype=float)
    if t.ndim != 1 or X.ndim != 2 or X.shape[0] != t.size:
        raise ValueError(f"t {t.shape} and X {X.shape} do not match")
    if t.size > 1 and not np.all(np.diff(t) > 0):
        bad = int(np.argmin(np.diff(t) > 0)) + 1
        raise ValueError(
            f"t must increase strictly; t[{bad}]={float(t[bad])!r} after {float(t[bad - 1])!r}"
        )
    if not (math.isfinite(tolerance_s) and tolerance_s >= 0):
        raise ValueError(f"tolerance_s={tolerance_s!r}: must be finite and >= 0")
    n = X.shape[1]
    dead = _dead_times(tuple(str(i) for i in range(n)), dead_times_s)
    values = np.empty((lab_t.size, n))
    available = np.ones(lab_t.size, dtype=bool)
    for i, d in enumerate(dead):
        s = lab_t - d
        j = np.searchsorted(t, s, side="right") - 1
        ok = j >= 0
        jj = np.where(ok, j, 0)
        ok &= s - t[jj] <= tolerance_s
        values[:, i] = X[jj, i]
        available &= ok
    values[~available] = np.nan
    return values, available


class Aligner:
    """Bounded history of input rows, queried for the inputs a lab sample reflects.

    A lab sample drawn at time t reflects input i at ``t - dead_times_s[i]``. `lookup` takes,
    for each input, the last pushed row at or before that time if it is at most
    ``tolerance_s`` older, and returns None when any input has no such row (too old, forgotten,
    or not yet pushed). Rows older than ``history_s`` before the newest row are forgotten, and
    at most ``max_rows`` rows are kept, so memory is bounded. Lookups are O(log n) by bisection.
    Blank inputs (nan) are returned as nan.

    The rows live in a ring buffer: the times in one float64 array, the readings in one
    float64 array of ``len(tags)`` columns, no Python object per row. The arrays start small
    and double when full, up to ``max_rows`` rows; then the newest row overwrites the oldest.
    A full buffer holds :meth:`estimate_bytes` bytes (8 per time and 8 per reading).
    """

    SCHEMA = "historian.aligner/1"
    # rows allocated by the first push; then doubled up to max_rows
    FIRST_CAPACITY = 64

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
        n = len(self.tags)
        self._dead = np.array(self.dead_times_s, dtype=float)
        self._cols = np.arange(n)
        # ring: row k (0 = oldest) of the _len remembered is in slot (_start + k) % _cap
        self._cap = 0
        self._t = np.empty(0)
        self._x = np.empty((0, n))
        self._start = 0
        self._len = 0
        # memoryviews of the arrays (_xm flat, row-major): element access and bisection on
        # them make Python floats without numpy's per-call overhead, for single rows
        self._tm = memoryview(self._t)
        self._xm = memoryview(self._x.reshape(-1))
        self._width = n
        # the oldest and newest remembered times as Python floats (None when empty)
        self._first: float | None = None
        self._last: float | None = None

    @staticmethod
    def estimate_bytes(n_inputs: int, max_rows: int) -> int:
        """Bytes of the arrays of a full buffer: ``8 * (n_inputs + 1) * max_rows``.

        A time and ``n_inputs`` readings per row, float64 each. This is what `nbytes` reaches
        once ``max_rows`` rows have been held; a buffer bounded by its time span first
        holds fewer rows, in arrays of up to twice the rows held (they grow by doubling).
        While the arrays double, the old and the new arrays exist together for a moment.
        """
        return 8 * (int(n_inputs) + 1) * int(max_rows)

    @property
    def nbytes(self) -> int:
        """Bytes of the arrays allocated now (times and readings)."""
        return self._t.nbytes + self._x.nbytes

    @property
    def capacity(self) -> int:
        """Rows the arrays hold before they grow (or, at ``max_rows``, wrap around)."""
        return self._cap

    def __len__(self) -> int:
        return self._len

    @property
    def n_stored(self) -> int:
        """Rows held in memory (the remembered ones: a ring buffer keeps nothing else)."""
        return self._len

    @property
    def oldest(self) -> float | None:
        return self._first

    @property
    def newest(self) -> float | None:
        return self._last

    def push(self, t: float, x: Sequence[float]) -> None:
        """Add an input row at time ``t`` (strictly after the previous one), `tags` order."""
        t = float(t)
        if not math.isfinite(t):
            raise ValueError(f"t={t!r}: must be finite")
        if len(x) != len(self.tags):
            raise ValueError(f"row {x!r} has {len(x)} values, expected {len(self.tags)}")
        if self._last is not None and t <= self._last:
            raise ValueError(f"t={t!r} is not after the previous row at {self._last!r}")
        self.push_trusted(t, [float(v) for v in x])

    def push_trusted(self, t: float, x) -> None:
        """`push` without the checks, for callers that validated ``t`` and ``x`` already.

        ``t`` must be a finite float after the newest row and ``x`` a sequence of floats in
        `tags` order (copied into the buffer).
        """
        n, cap = self._len, self._cap
        if n < cap:
            p = self._start + n
            if p >= cap:
                p -= cap
            self._len = n + 1
        elif cap == self.max_rows:
            # full: the new row takes the oldest one's slot
            p = self._start
            nxt = p + 1
            self._start = 0 if nxt == cap else nxt
            self._first = self._tm[self._start] if n > 1 else None
        else:
            self._make_room(1)
            self.push_trusted(t, x)
            return
        self._tm[p] = t
        xm = self._xm
        b = p * self._width
        for v in x:
            xm[b] = v
            b += 1
        self._last = t
        first = self._first
        if first is None:
            self._first = t
        elif first < t - self.history_s:
            self._forget_before(t - self.history_s)

    def push_many_trusted(self, ts: list, xs: list) -> None:
        """Several `push_trusted` rows at once (times increasing)."""
        if len(ts):
            self.push_block_trusted(ts, np.asarray(xs, dtype=float).reshape(len(ts),
                                                                             len(self.tags)))

    def push_block_trusted(self, ts: list, X: np.ndarray) -> None:
        """`push_many_trusted` of the rows of a 2-D float array (copied into the buffer)."""
        k = len(ts)
        if not k:
            return
        if k > self.max_rows:  # only the newest max_rows can be kept
            ts, X, k = ts[k - self.max_rows:], X[k - self.max_rows:], self.max_rows
        if self._len + k > self._cap:
            self._make_room(k)
        cap, n = self._cap, self._len
        p = self._start + n
        if p >= cap:
            p -= cap
        a = min(k, cap - p)  # rows up to the end of the arrays, then from slot 0
        self._t[p:p + a] = ts[:a]
        self._x[p:p + a] = X[:a]
        if a < k:
            self._t[:k - a] = ts[a:]
            self._x[:k - a] = X[a:]
        self._len = n + k
        last = float(ts[-1])
        self._last = last
        if self._first is None:
            self._first = float(ts[0])
        if self._first < last - self.history_s:
            self._forget_before(last - self.history_s)

    def _make_room(self, k: int) -> None:
        """Room for ``k`` more rows (k <= max_rows): grow the arrays, else forget the oldest."""
        cap, n = self._cap, self._len
        if cap < self.max_rows:
            new = max(cap, self.FIRST_CAPACITY)
            while new < n + k:
                new *= 2
            new = min(new, self.max_rows)
            t, x = np.empty(new), np.empty((new, len(self.tags)))
            if n:
                t[:n] = self._ordered(self._t, 0, n)
                x[:n] = self._ordered(self._x, 0, n)
            self._t, self._x, self._cap, self._start = t, x, new, 0
            self._tm, self._xm = memoryview(t), memoryview(x.reshape(-1))
            cap = new
        drop = n + k - cap
        if drop > 0:
            self._drop(drop)

    def _drop(self, m: int) -> None:
        """Forget the ``m`` oldest rows (m <= len)."""
        n = self._len - m
        self._len = n
        if not n:
            self._start = 0
            self._first = self._last = None
            return
        p = self._start + m
        if p >= self._cap:
            p -= self._cap
        self._start = p
        self._first = self._tm[p]

    def _forget_before(self, cutoff: float) -> None:
        """Forget the rows older than ``cutoff`` (never the newest)."""
        self._drop(int(self._count(cutoff, "left")))

    def _segments(self) -> tuple[np.ndarray, np.ndarray | None]:
        """The remembered times in order, as one or two views of the ring."""
        st, end, cap = self._start, self._start + self._len, self._cap
        if end <= cap:
            return self._t[st:end], None
        return self._t[st:], self._t[:end - cap]

    def _count(self, s, side: str = "right"):
        """How many remembered times are <= s (side "right") or < s ("left"); s may be an
        array. The two segments are each sorted and all of the first come before the
        second, so the counts add up."""
        a, b = self._segments()
        c = a.searchsorted(s, side)
        if b is not None:
            c = c + b.searchsorted(s, side)
        return c

    def _ordered(self, arr: np.ndarray, i: int, j: int) -> np.ndarray:
        """Rows i..j-1 (0 = oldest) of a ring array, in order (a view when contiguous)."""
        cap = self._cap
        a, b = self._start + i, self._start + j
        if b <= cap:
            return arr[a:b]
        if a >= cap:
            return arr[a - cap:b - cap]
        return np.concatenate((arr[a:], arr[:b - cap]))

    def lookup(self, t_lab: float) -> tuple[float, ...] | None:
        """Inputs reflected by a lab sample drawn at ``t_lab``, or None if not available."""
        t_lab = float(t_lab)
        if not math.isfinite(t_lab):
            raise ValueError(f"t_lab={t_lab!r}: must be finite")
        n = self._len
        if not n:
            return None
        # bisection in the one or two runs of slots that hold the rows in order
        tm, xm, w, tol = self._tm, self._xm, self._width, self.tolerance_s
        st, end, cap = self._start, self._start + n, self._cap
        wrapped = end > cap
        hi = cap if wrapped else end
        out = []
        for i, d in enumerate(self.dead_times_s):
            s = t_lab - d
            if wrapped and s >= tm[0]:
                p = bisect_right(tm, s, 0, end - cap) - 1
            else:
                p = bisect_right(tm, s, st, hi) - 1
                if p < st:
                    return None
            if s - tm[p] > tol:
                return None
            out.append(xm[p * w + i])
        return tuple(out)

    def lookup_many(self, ts: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
        """`lookup` of several times at once: ``(values, available)``.

        ``values`` (m, n) holds the rows `lookup` returns (the same floats), with nan rows
        where it returns None; ``available`` (m,) bool. The times must be finite.
        """
        ts = np.asarray(ts, dtype=float)
        m, n = ts.size, len(self.tags)
        if m == 0 or not self._len:
            return np.full((m, n), np.nan), np.zeros(m, dtype=bool)
        s = ts.reshape(m, 1) - self._dead  # (m, n): the instant each input is read at
        j = self._count(s) - 1
        found = j >= 0
        p = np.where(found, j, 0) + self._start
        p[p >= self._cap] -= self._cap
        ok = (found & (s - self._t[p] <= self.tolerance_s)).all(axis=1)
        values = self._x[p, self._cols]
        values[~ok] = np.nan
        return values, ok

    def rows(self) -> np.ndarray:
        """The remembered rows as one float array of shape (len(self), len(tags))."""
        return np.array(self._ordered(self._x, 0, self._len))

    def times(self) -> np.ndarray:
        """The remembered times, oldest first (a copy)."""
        return np.array(self._ordered(self._t, 0, self._len))

    def to_state(self) -> dict:
        """Plain-data state (settings and the remembered rows)."""
        return {
            "schema": self.SCHEMA,
            "tags": list(self.tags),
            "dead_times_s": list(self.dead_times_s),
            "history_s": self.history_s,
            "tolerance_s": self.tolerance_s,
            "max_rows": self.max_rows,
            "t": self._ordered(self._t, 0, self._len).tolist(),
            # numpy converts the rows in a few calls; one by one took seconds for 200 models
            # of 5000 rows, with the service loop waiting
            "x": self._ordered(self._x, 0, self._len).tolist(),
        }

    @classmethod
    def from_state(cls, state: dict) -> Aligner:
        """Inverse of `to_state` (the rows checked by numpy)."""
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
            al.push_block_trusted(t, x)
        return al
