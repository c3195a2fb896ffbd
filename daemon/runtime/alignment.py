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

__all__ = ["Aligner", "apply_dead_time", "buffer_memory"]


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


def _step(t0: float, t1: float) -> float:
    """The period of a clock through ``t0`` and ``t1`` (0.0 if ``t0 + period != t1``).

    A publisher that stamps its samples ``start + k * period`` with a decimal period (0.1 s)
    has ``t1 - t0`` off the period in the last bits; that period rounded to a few decimals
    (well above the rounding of ``t1``) is tried first, then the difference itself."""
    st = t1 - t0
    q = math.ulp(t1) * 1024.0
    nice = round(st, max(0, -math.floor(math.log10(q)))) if q < 1.0 else st
    if nice > 0.0 and nice != st and t0 + nice == t1:
        return nice
    return st if t0 + st == t1 else 0.0


class _Clock:
    """Times of rows on a regular clock, kept as runs instead of one float per row.

    Rows are numbered by a counter that only grows. Row g of run k is at exactly
    ``t0[k] + (g - g[k]) * step[k]`` (its first row at exactly ``t0[k]``): a run is extended
    only by a time that this formula gives back to the last bit, so every time is the one
    pushed (the step is set by a run's second row: `_step`). A feed sent every second (or
    every T seconds, from a start time) is one run; each gap or irregular time starts a new
    one. Runs before the oldest row kept are dropped.
    """

    __slots__ = ("g", "t0", "step", "head")

    def __init__(self) -> None:
        self.g: list[int] = []
        self.t0: list[float] = []
        self.step: list[float] = []
        self.head = 0

    def runs(self) -> int:
        return len(self.g) - self.head

    def add(self, g: int, t: float) -> bool:
        """Row ``g`` (the next counter) at time ``t`` (after the previous row); True when it
        starts a new run."""
        gs = self.g
        k = len(gs) - 1
        if k >= self.head and (t != 0.0 or math.copysign(1.0, t) > 0):  # -0.0: its own run
            c = g - gs[k]
            t0 = self.t0[k]
            if c == 1:
                st = _step(t0, t)
                if st:
                    self.step[k] = st
                    return False
            elif t0 + c * self.step[k] == t:
                return False
        gs.append(g)
        self.t0.append(t)
        self.step.append(0.0)
        return True

    def add_many(self, g: int, ts: np.ndarray, limit: int) -> bool:
        """Rows ``g, g + 1, ...`` at times ``ts`` (increasing, after the previous row).

        Returns False, leaving the runs of the rows before ``g`` intact, as soon as there are
        more than ``limit`` runs (the times are not on a regular clock).
        """
        gs, t0s, steps = self.g, self.t0, self.step
        m, j = len(ts), 0
        plain = ~((ts == 0.0) & np.signbit(ts))  # -0.0 always starts its own run
        while j < m:
            k = len(gs) - 1
            if k >= self.head and plain[j]:
                c = g + j - gs[k]
                t0 = t0s[k]
                if c == 1:
                    st = _step(t0, float(ts[j]))
                    if st:
                        steps[k] = st
                        j += 1
                        continue
                else:
                    eq = (t0 + (c + np.arange(m - j)) * steps[k] == ts[j:]) & plain[j:]
                    run = m - j if eq.all() else int(eq.argmin())
                    if run:
                        j += run
                        continue
            gs.append(g + j)
            t0s.append(float(ts[j]))
            steps.append(0.0)
            j += 1
            if self.runs() > limit:
                return False
        return True

    def forget(self, lo: int) -> None:
        """Drop the runs that end before row ``lo``."""
        gs, h = self.g, self.head
        while h + 1 < len(gs) and gs[h + 1] <= lo:
            h += 1
        if h >= 64 and 2 * h >= len(gs):
            del self.g[:h], self.t0[:h], self.step[:h]
            h = 0
        self.head = h

    def time(self, g: int) -> float:
        k = bisect_right(self.g, g, self.head) - 1
        c = g - self.g[k]
        return self.t0[k] + c * self.step[k] if c else self.t0[k]

    def find(self, s: float, hi: int) -> tuple[int, float]:
        """The last row before ``hi`` at or before ``s`` and its time (-1 and nan before
        every run kept)."""
        gs = self.g
        k = bisect_right(self.t0, s, self.head) - 1
        if k < self.head:
            return -1, math.nan
        t0, st = self.t0[k], self.step[k]
        if not st:
            return gs[k], t0
        last = (gs[k + 1] if k + 1 < len(gs) else hi) - gs[k] - 1
        i = min(int((s - t0) / st), last)
        while i < last and t0 + (i + 1) * st <= s:
            i += 1
        while i > 0 and t0 + i * st > s:
            i -= 1
        return gs[k] + i, (t0 + i * st if i else t0)

    def find_many(self, s: np.ndarray, hi: int) -> tuple[np.ndarray, np.ndarray]:
        """`find` of an array of instants, and the times of the rows found (where >= 0)."""
        h = self.head
        t0s, steps = np.array(self.t0[h:]), np.array(self.step[h:])
        gs = np.array(self.g[h:] + [hi])
        k = np.maximum(t0s.searchsorted(s, "right") - 1, 0)
        t0, st = t0s[k], steps[k]
        last = gs[k + 1] - gs[k] - 1
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            i = np.where(st > 0, (s - t0) / np.where(st > 0, st, 1.0), 0.0)
        i = np.clip(np.nan_to_num(i, nan=0.0, posinf=0.0, neginf=0.0), 0, last)
        i = i.astype(np.int64)
        while True:
            up = (i < last) & (t0 + (i + 1) * st <= s)
            if not up.any():
                break
            i += up
        while True:
            down = (i > 0) & (t0 + i * st > s)
            if not down.any():
                break
            i -= down
        g = np.where(s >= t0, gs[k] + i, -1)
        return g, np.where(i > 0, t0 + i * st, t0)

    def times(self, lo: int, hi: int) -> np.ndarray:
        """The times of rows ``lo..hi-1``."""
        h = self.head
        gs = np.array(self.g[h:])
        g = np.arange(lo, hi)
        k = gs.searchsorted(g, "right") - 1
        i = g - gs[k]
        t0 = np.array(self.t0[h:])[k]
        return np.where(i > 0, t0 + i * np.array(self.step[h:])[k], t0)


class Aligner:
    """Bounded history of input rows, queried for the inputs a lab sample reflects.

    A lab sample drawn at time t reflects input i at ``t - dead_times_s[i]``. `lookup` takes,
    for each input, the last pushed row at or before that time if it is at most
    ``tolerance_s`` older, and returns None when any input has no such row (too old, forgotten,
    or not yet pushed). Rows older than ``history_s`` before the newest row are forgotten, and
    at most ``max_rows`` rows are kept, so memory is bounded. Lookups are O(log n) by bisection.
    Blank inputs (nan) are returned as nan.

    The rows live in a ring buffer of float64, no Python object per row: the readings in one
    array of ``len(tags)`` columns, which starts small and doubles when full, up to
    ``max_rows`` rows (then the newest row overwrites the oldest). The times of a feed on a
    regular clock (every T seconds from some start, gaps allowed) are kept as a few runs of
    start, step and count (`_Clock`); when the runs get more than one per 64 rows the times
    go to a float64 array beside the readings, until the buffer is reset or restored from its
    state. Times ``start + k * T`` with T a whole or binary number of seconds (1, 5, 0.25)
    stay on the clock across gaps; with a decimal T (0.1 s) a run that starts after a gap
    rarely reproduces the publisher's rounding, and the times go to the array. Times with
    jitter (stamped by a clock read) go to the array. See :meth:`estimate_bytes`.
    """

    SCHEMA = "historian.aligner/1"
    # rows allocated by the first push; then doubled up to max_rows
    FIRST_CAPACITY = 64
    # the times are kept as runs while there are at most max(8, rows // 64) of them
    ROWS_PER_RUN = 64

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
        self._width = n
        # ring: row k (0 = oldest) of the _len remembered is in slot (_start + k) % _cap;
        # rows are also numbered by a counter, _next for the next row pushed
        self._cap = 0
        self._x = np.empty((0, n))
        self._start = 0
        self._len = 0
        self._next = 0
        # the times: as runs (_clock), or in the array _t (then _clock is None)
        self._clock: _Clock | None = _Clock()
        self._t: np.ndarray | None = None
        # memoryviews (_xm flat, row-major): element access and bisection on them make
        # Python floats without numpy's per-call overhead, for single rows
        self._xm = memoryview(self._x.reshape(-1))
        self._tm: memoryview | None = None
        # the oldest and newest remembered times as Python floats (None when empty)
        self._first: float | None = None
        self._last: float | None = None

    @staticmethod
    def estimate_bytes(n_inputs: int, max_rows: int, *, regular: bool = True) -> int:
        """Bytes of the arrays of a full buffer of ``max_rows`` rows.

        ``8 * n_inputs * max_rows`` (float64 readings) when the times are on a regular clock
        (kept as runs, a few hundred bytes: not counted), ``8 * (n_inputs + 1) * max_rows``
        when they are not (``regular=False``: one float64 time per row as well). A buffer
        bounded by its time span holds fewer rows, in arrays of up to twice the rows held
        (they grow by doubling); while they double, old and new exist together for a moment.
        """
        return 8 * (int(n_inputs) + (0 if regular else 1)) * int(max_rows)

    @property
    def nbytes(self) -> int:
        """Bytes of the arrays allocated now (readings, and times when not kept as runs)."""
        return self._x.nbytes + (0 if self._t is None else self._t.nbytes)

    @property
    def regular(self) -> bool:
        """True while the times are kept as runs of a regular clock."""
        return self._clock is not None

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
        full = n == cap
        if not full:
            p = self._start + n
            if p >= cap:
                p -= cap
            self._len = n + 1
        elif cap == self.max_rows:
            # full: the new row takes the oldest one's slot
            p = self._start
            nxt = p + 1
            self._start = 0 if nxt == cap else nxt
        else:
            self._make_room(1)
            self.push_trusted(t, x)
            return
        g = self._next
        self._next = g + 1
        clock = self._clock
        if clock is None:
            self._tm[p] = t
        else:
            gs = clock.g
            k = len(gs) - 1
            c = g - gs[k] if gs else 0
            if c > 1 and t and clock.t0[k] + c * clock.step[k] == t:
                pass  # on the clock (the common case; `_Clock.add` does the same)
            elif clock.add(g, t) and clock.runs() > max(8, self._len // self.ROWS_PER_RUN):
                self._to_array(g)
                self._tm[p] = t
                clock = None
        xm = self._xm
        b = p * self._width
        for v in x:
            xm[b] = v
            b += 1
        self._last = t
        if full:
            if clock is None:
                self._first = self._tm[self._start]
            else:  # the oldest row is in the first run kept, or starts the next one
                lo = g + 1 - n
                h, gs = clock.head, clock.g
                if h + 1 < len(gs) and gs[h + 1] <= lo:
                    clock.forget(lo)
                    h = clock.head
                c = lo - gs[h]
                self._first = clock.t0[h] + c * clock.step[h] if c else clock.t0[h]
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
        skip = k - self.max_rows
        if skip > 0:  # only the newest max_rows can be kept
            ts, X, k = ts[skip:], X[skip:], self.max_rows
        # fromiter takes a list of floats in half the time asarray does
        ts = np.asarray(ts, dtype=float) if isinstance(ts, np.ndarray) else \
            np.fromiter(ts, float, k)
        if self._len + k > self._cap:
            self._make_room(k)
        if skip > 0:
            self._next += skip  # the rows never kept are numbered all the same
        cap, n = self._cap, self._len
        p = self._start + n
        if p >= cap:
            p -= cap
        a = min(k, cap - p)  # rows up to the end of the arrays, then from slot 0
        self._x[p:p + a] = X[:a]
        if a < k:
            self._x[:k - a] = X[a:]
        g = self._next
        self._len = n + k
        self._next = g + k
        clock = self._clock
        if clock is not None and not clock.add_many(
                g, ts, max(8, self._len // self.ROWS_PER_RUN)):
            self._to_array(g)
            clock = None
        if clock is None:
            self._t[p:p + a] = ts[:a]
            if a < k:
                self._t[:k - a] = ts[a:]
        last = float(ts[-1])
        self._last = last
        if self._first is None:
            self._first = float(ts[0])
        if self._first < last - self.history_s:
            self._forget_before(last - self.history_s)

    def _to_array(self, upto: int) -> None:
        """Times from runs to an array; the runs hold the rows up to (not with) ``upto``."""
        cap, st = self._cap, self._start
        lo = self._next - self._len
        t = np.empty(cap)
        have = self._clock.times(lo, upto)
        a = min(len(have), cap - st)
        t[st:st + a] = have[:a]
        t[:len(have) - a] = have[a:]
        self._t, self._tm, self._clock = t, memoryview(t), None

    def _make_room(self, k: int) -> None:
        """Room for ``k`` more rows (k <= max_rows): grow the arrays, else forget the oldest."""
        cap, n = self._cap, self._len
        if cap < self.max_rows:
            new = max(cap, self.FIRST_CAPACITY)
            while new < n + k:
                new *= 2
            new = min(new, self.max_rows)
            x = np.empty((new, len(self.tags)))
            x[:n] = self._ordered(self._x, 0, n)
            if self._t is not None:
                t = np.empty(new)
                t[:n] = self._ordered(self._t, 0, n)
                self._t, self._tm = t, memoryview(t)
            self._x, self._cap, self._start = x, new, 0
            self._xm = memoryview(x.reshape(-1))
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
            if self._clock is not None:
                self._clock.forget(self._next)
            return
        p = self._start + m
        if p >= self._cap:
            p -= self._cap
        self._start = p
        self._oldest_moved()

    def _oldest_moved(self) -> None:
        if self._clock is None:
            self._first = self._tm[self._start]
        else:
            lo = self._next - self._len
            self._clock.forget(lo)
            self._first = self._clock.time(lo)

    def _forget_before(self, cutoff: float) -> None:
        """Forget the rows older than ``cutoff`` (never the newest)."""
        if self._clock is None:
            self._drop(int(self._count(cutoff, "left")))
        else:
            g, _ = self._clock.find(math.nextafter(cutoff, -math.inf), self._next)
            self._drop(max(0, g - (self._next - self._len) + 1))

    def _count(self, s, side: str = "right"):
        """How many remembered times (in the array) are <= s (side "right") or < s
        ("left"); s may be an array. The one or two runs of slots that hold the rows are
        each sorted and all of the first come before the second, so the counts add up."""
        st, end, cap, t = self._start, self._start + self._len, self._cap, self._t
        if end <= cap:
            return t[st:end].searchsorted(s, side)
        return t[st:].searchsorted(s, side) + t[:end - cap].searchsorted(s, side)

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
        xm, w, tol = self._xm, self._width, self.tolerance_s
        st, end, cap = self._start, self._start + n, self._cap
        out = []
        clock = self._clock
        if clock is not None:
            nxt = self._next
            lo = nxt - n
            for i, d in enumerate(self.dead_times_s):
                s = t_lab - d
                g, tg = clock.find(s, nxt)
                if g < lo or s - tg > tol:
                    return None
                p = st + g - lo
                if p >= cap:
                    p -= cap
                out.append(xm[p * w + i])
            return tuple(out)
        # bisection in the one or two runs of slots that hold the rows in order
        tm = self._tm
        wrapped = end > cap
        hi = cap if wrapped else end
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
        if self._clock is not None:
            lo = self._next - self._len
            g, t = self._clock.find_many(s, self._next)
            j = g - lo
            found = j >= 0
            p = np.where(found, j, 0) + self._start
            p[p >= self._cap] -= self._cap
        else:
            j = self._count(s) - 1
            found = j >= 0
            p = np.where(found, j, 0) + self._start
            p[p >= self._cap] -= self._cap
            t = self._t[p]
        ok = (found & (s - t <= self.tolerance_s)).all(axis=1)
        values = self._x[p, self._cols]
        values[~ok] = np.nan
        return values, ok

    def rows(self) -> np.ndarray:
        """The remembered rows as one float array of shape (len(self), len(tags))."""
        return np.array(self._ordered(self._x, 0, self._len))

    def times(self) -> np.ndarray:
        """The remembered times, oldest first (a copy)."""
        if self._clock is not None:
            return self._clock.times(self._next - self._len, self._next)
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
            "t": self.times().tolist(),
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


def _size(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024


# a sample id remembered for lab results that name their sample (an entry of the runner's
# ids map: the key, its time and the map's own entry), measured with tracemalloc for
# 10-character strings and for integers (about 150 and 130 B)
ID_BYTES = 150


def buffer_memory(models) -> list[str]:
    """Lines for ``check-config``: each model's feature buffer when full, and the total.

    ``models`` are model configs (``name``, ``inputs``, ``keep_count``). A buffer holds at
    most ``keep_count`` rows (fewer when ``keep`` is shorter than keep_count sample periods):
    `Aligner.estimate_bytes` with the times on a regular clock, and without.
    """
    lines = ["feature buffers when full (float64, keep_count rows; 8 B a row more when the "
             "sample times are off a regular clock):"]
    total = total_irregular = 0
    width = max((len(m.name) for m in models), default=0)
    for m in models:
        n, rows = len(m.inputs), int(m.keep_count)
        b = Aligner.estimate_bytes(n, rows)
        bi = Aligner.estimate_bytes(n, rows, regular=False)
        total += b
        total_irregular += bi
        what = f"{n} input{'s' if n != 1 else ''} x {rows} rows"
        lines.append(f"  {m.name:<{width}}  {what:<22}  {_size(b):>10}  ({_size(bi)} off "
                     f"the clock)")
    lines.append(f"  {'total':<{width}}  {'':<22}  {_size(total):>10}  "
                 f"({_size(total_irregular)} off the clock)")
    lines.append(f"  feeds that name their samples by id add about {ID_BYTES} B a row for "
                 f"the ids")
    return lines
