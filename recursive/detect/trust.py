"""The trust state machine: :class:`Trust` turns named alarm reasons into a level (normal /
caution / untrusted by default) with hysteresis and acknowledgement."""

import bisect
from dataclasses import dataclass
from typing import Any

import numpy as np

from recursive.detect._common import (
    SCHEMA,
    _check_state,
    _construct,
    _count,
    _finite,
    _get,
    _nonnegative,
    _real,
)


@dataclass(frozen=True)
class TrustStep:
    """Result of :meth:`Trust.step`.

    ``reasons`` holds ``(name, level, value, limit)`` for every held reason, sorted by name,
    with its held level and the last reported value and limit. ``acknowledged`` is True when
    there is at least one held reason and all of them have been acknowledged at their current
    level.
    """

    state: str
    level: int
    changed: bool
    old: str
    reasons: tuple
    acknowledged: bool


class Trust:
    """Trust level of a model from named alarm reasons, with hysteresis.

    Parameters
    ----------
    levels : tuple of str, default ("normal", "caution", "untrusted")
        Names of the levels, lowest first; at least two distinct non-empty names.
    clear_after_count : int, default 3
        Consecutive steps a reason (at a level) must be absent before it clears, ``>= 1``.
    clear_after_time : float, default 0.0
        Clock time it must also have been absent, ``>= 0``.

    Notes
    -----
    Each :meth:`step` receives the clock value ``t`` and the currently *active* reasons as
    ``{name: (level, value, limit)}`` with ``1 <= level < len(levels)``. A reason is held at
    level :math:`\\ell` from the first step it is active at :math:`\\ell` or above; it is
    released from :math:`\\ell` once it has been below :math:`\\ell` (or absent) for at least
    ``clear_after_count`` consecutive steps *and* ``t - t_first >= clear_after_time``, where
    ``t_first`` is the clock value of the first of those steps. Raising is immediate; any step
    at :math:`\\ell` or above restarts the countdown for :math:`\\ell`, so a condition that
    flickers never clears and the state does not flap. A reason's held level is the highest
    level still held; the model's level is the maximum over held reasons (0 when none).

    :meth:`acknowledge` marks the held reasons as seen at their current level. A reason that
    later rises to a higher level, or clears and comes back, is unacknowledged again.
    """

    __slots__ = ("_levels", "_count", "_time", "_reasons", "_level", "_n", "_last_t")

    def __init__(
        self,
        levels: tuple = ("normal", "caution", "untrusted"),
        clear_after_count: int = 3,
        clear_after_time: float = 0.0,
    ) -> None:
        if isinstance(levels, str) or not isinstance(levels, (tuple, list)):
            raise ValueError(f"levels must be a tuple of names, got {levels!r}")
        lv = tuple(levels)
        if len(lv) < 2 or len(set(lv)) != len(lv):
            raise ValueError(f"levels must hold at least two distinct names, got {levels!r}")
        for name in lv:
            if not isinstance(name, str) or not name:
                raise ValueError(f"level names must be non-empty strings, got {name!r}")
        self._levels = lv
        self._count = _count("clear_after_count", clear_after_count, 1)
        self._time = _nonnegative("clear_after_time", clear_after_time)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {
            "levels": list(self._levels),
            "clear_after_count": self._count,
            "clear_after_time": self._time,
        }

    def reset(self) -> None:
        """Back to the lowest level with no reasons held."""
        # name -> {"held": {level: [absent_steps, absent_since]}, "value", "limit", "ack"}
        self._reasons: dict[str, dict] = {}
        self._level = 0
        self._n = 0
        self._last_t = 0.0

    @property
    def state(self) -> str:
        """Name of the current level."""
        return self._levels[self._level]

    @property
    def level(self) -> int:
        """Index of the current level."""
        return self._level

    @property
    def reasons(self) -> tuple:
        """Held reasons as ``(name, level, value, limit)``, sorted by name."""
        return self._result(self._level).reasons

    @property
    def holding(self) -> bool:
        """Whether any reason is held (``bool(reasons)``, without building them)."""
        return bool(self._reasons)

    @property
    def acknowledged(self) -> bool:
        """True when reasons are held and all are acknowledged at their current level."""
        return self._result(self._level).acknowledged

    def _check_active(self, active: Any) -> dict:
        if not isinstance(active, dict):
            raise ValueError(f"active must be a dict name -> (level, value, limit), got {active!r}")
        top = len(self._levels) - 1
        out = {}
        for name, entry in active.items():
            if not isinstance(name, str) or not name:
                raise ValueError(f"reason names must be non-empty strings, got {name!r}")
            if not isinstance(entry, (tuple, list)) or len(entry) != 3:
                raise ValueError(
                    f"reason {name!r} must map to (level, value, limit), got {entry!r}"
                )
            lvl, value, limit = entry
            if (
                isinstance(lvl, bool)
                or not isinstance(lvl, (int, np.integer))
                or not (1 <= lvl <= top)
            ):
                raise ValueError(
                    f"reason {name!r} level must be an integer in 1..{top}, got {lvl!r}"
                )
            out[name] = (int(lvl), _real(f"{name} value", value), _real(f"{name} limit", limit))
        return out

    def _result(self, old: int) -> TrustStep:
        reasons = []
        acked = bool(self._reasons)
        for name in sorted(self._reasons):
            r = self._reasons[name]
            held = max(r["held"])
            reasons.append((name, held, r["value"], r["limit"]))
            if r["ack"] < held:
                acked = False
        return TrustStep(
            self._levels[self._level],
            self._level,
            self._level != old,
            self._levels[old],
            tuple(reasons),
            acked,
        )

    def step(self, t: float, active: dict) -> TrustStep:
        """Advance one step at clock value ``t`` with the currently active reasons."""
        old = self._level
        self.advance(t, active)
        return self._result(old)

    def advance(self, t: float, active: dict, *, checked: bool = False) -> bool:
        """:meth:`step` without building its result; True if the level changed.

        With ``checked=True`` the caller vouches that ``active`` maps non-empty names to
        ``(level, value, limit)`` tuples of an int in ``1..len(levels)-1`` and two floats
        (the validation costs more than the step on a hot path).
        """
        if type(t) is not float or t - t != 0.0:  # a finite float passes as it is
            t = _finite("t", t)
        if self._n and t < self._last_t:
            raise ValueError(f"t must not decrease: got {t!r} after {self._last_t!r}")
        act = active if checked else self._check_active(active)
        old = self._level
        reasons = self._reasons
        for name, (lvl, value, limit) in act.items():
            r = reasons.get(name)
            if r is None:
                r = {"held": {}, "value": value, "limit": limit, "ack": 0}
                reasons[name] = r
            held = r["held"]
            for ell in range(1, lvl + 1):
                held[ell] = [0, 0.0]
            r["value"] = value
            r["limit"] = limit
        count, time_ = self._count, self._time
        level = 0
        # the new level is the highest one still held, found on the way
        for name in list(reasons) if reasons else ():
            r = reasons[name]
            entry = act.get(name)
            now = 0 if entry is None else entry[0]
            held = r["held"]
            for ell in list(held):
                if ell <= now:
                    continue
                rec = held[ell]
                if rec[0] == 0:
                    rec[1] = t
                rec[0] += 1
                if rec[0] >= count and t - rec[1] >= time_:
                    del held[ell]
            if not held:
                del reasons[name]
                continue
            top = max(held)
            if r["ack"] > top:
                r["ack"] = top
            if top > level:
                level = top
        self._level = level
        self._n += 1
        self._last_t = t
        return level != old

    def advance_quiet(self, ts: list) -> int:
        """``advance(t, {})`` for the times ``ts`` in turn while no held reason clears.

        Returns how many of ``ts`` were taken: all of them, or those before the first step
        at which a held reason would clear (or none if ``ts`` starts before the last step);
        the caller advances the rest one by one. Nothing is active in these steps, so
        they only count the absence of each held reason: the level stays, and the state
        afterwards is that of the same steps taken one at a time.

        Notes
        -----
        A record held ``c`` steps, absent since ``f``, clears at the step ``i`` (from 0)
        with ``c + i + 1 >= clear_count`` and ``ts[i] - f >= clear_time`` (``f = ts[0]``
        when ``c = 0``); the difference grows with ``ts[i]``, so the first such step is
        found by bisection.
        """
        m = len(ts)
        if not m or (self._n and ts[0] < self._last_t):
            return 0
        count, dur = self._count, self._time
        for r in self._reasons.values():
            for rec in r["held"].values():
                c = rec[0]
                first = rec[1] if c else ts[0]
                lo = max(0, count - c - 1)
                if lo < m:
                    i = bisect.bisect_left(range(m), True, lo=lo,
                                           key=lambda j, f=first: ts[j] - f >= dur)
                    m = min(m, i)
        if not m:
            return 0
        t0 = ts[0]
        for r in self._reasons.values():
            for rec in r["held"].values():
                if rec[0] == 0:
                    rec[1] = t0
                rec[0] += m
        self._n += m
        self._last_t = float(ts[m - 1])
        return m

    def acknowledge(self) -> None:
        """Mark every held reason as acknowledged at its current level (does not clear it)."""
        for r in self._reasons.values():
            r["ack"] = max(r["held"])

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        reasons = {}
        for name, r in self._reasons.items():
            reasons[name] = {
                "held": {str(ell): [rec[0], rec[1]] for ell, rec in r["held"].items()},
                "value": r["value"],
                "limit": r["limit"],
                "ack": r["ack"],
            }
        return {
            "schema": SCHEMA,
            "kind": "trust",
            "params": self.params(),
            "reasons": reasons,
            "steps": self._n,
            "last_t": self._last_t,
        }

    @classmethod
    def from_state(cls, state: dict) -> "Trust":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "trust")
        p = dict(state["params"])
        if "levels" in p:
            p["levels"] = tuple(p["levels"])
        obj = _construct(cls, p)
        top = len(obj._levels) - 1
        reasons = _get(state, "reasons")
        if not isinstance(reasons, dict):
            raise ValueError(f"reasons must be a dict, got {reasons!r}")
        for name, r in reasons.items():
            try:
                held = {int(ell): [int(rec[0]), float(rec[1])] for ell, rec in r["held"].items()}
                entry = {
                    "held": held,
                    "value": float(r["value"]),
                    "limit": float(r["limit"]),
                    "ack": int(r["ack"]),
                }
            except (KeyError, TypeError, ValueError, IndexError):
                raise ValueError(f"malformed state for reason {name!r}: {r!r}") from None
            if not held or not all(1 <= ell <= top for ell in held):
                raise ValueError(f"reason {name!r} has invalid held levels {sorted(held)!r}")
            obj._reasons[name] = entry
        obj._n = _count("steps", _get(state, "steps"), 0)
        obj._last_t = _finite("last_t", _get(state, "last_t"))
        obj._level = max((max(r["held"]) for r in obj._reasons.values()), default=0)
        return obj


class Commissioning:
    """Whether a new model is still being commissioned (its trust alerts do not count yet).

    Parameters
    ----------
    labs : int, default 30
        Commissioning ends once this many lab results have been learned; 0 turns this
        criterion off.
    duration : float, default 604800.0
        It also ends once this much clock time has passed since the first :meth:`step`;
        0 turns this criterion off. With both criteria off there is no commissioning.

    Notes
    -----
    Whichever criterion is met first ends it, and it never starts again (until
    :meth:`reset`). The clock is an argument: the caller passes the feed's sample time.
    """

    __slots__ = ("_labs", "_duration", "_start", "_learned", "_active")

    def __init__(self, labs: int = 30, duration: float = 7 * 86400.0) -> None:
        self._labs = _count("labs", labs, 0)
        self._duration = _nonnegative("duration", duration)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"labs": self._labs, "duration": self._duration}

    def reset(self) -> None:
        """Back to the start: commissioning again (unless both criteria are off)."""
        self._start: float | None = None
        self._learned = 0
        self._active = self._labs > 0 or self._duration > 0.0

    @property
    def active(self) -> bool:
        """True while commissioning."""
        return self._active

    @property
    def learned(self) -> int:
        """Lab results learned while commissioning."""
        return self._learned

    @property
    def start(self) -> float | None:
        """Clock value of the first step (None before it)."""
        return self._start

    @property
    def duration(self) -> float:
        """The longest commissioning in clock units (0: no such criterion)."""
        return self._duration

    def remaining(self, t: float) -> dict:
        """What is left at clock ``t``: ``{"labs": n or None, "time": s or None}`` (None for
        a criterion that is off); empty once commissioning has ended."""
        if not self._active:
            return {}
        start = t if self._start is None else self._start
        return {"labs": max(0, self._labs - self._learned) if self._labs else None,
                "time": max(0.0, self._duration - (t - start)) if self._duration else None}

    def step(self, t: float, learned: int = 0) -> bool:
        """Advance to clock ``t`` after ``learned`` more lab results; True if it ended now."""
        if not self._active:
            return False
        if not (type(t) is float and t - t == 0.0):
            t = _finite("t", t)
        if learned or type(learned) is not int:
            # (the common step, a prediction's, learned nothing: no check of a plain 0)
            self._learned += _count("learned", learned, 0)
        if self._start is None:
            self._start = t
        if (self._labs and self._learned >= self._labs) or \
                (self._duration and t - self._start >= self._duration):
            self._active = False
            return True
        return False

    def end(self) -> None:
        """End commissioning now (an operator's decision)."""
        self._active = False

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {"schema": SCHEMA, "kind": "commissioning", "params": self.params(),
                "start": self._start, "learned": self._learned, "active": self._active}

    @classmethod
    def from_state(cls, state: dict) -> "Commissioning":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "commissioning")
        obj = _construct(cls, state["params"])
        start = _get(state, "start")
        obj._start = None if start is None else _finite("start", start)
        obj._learned = _count("learned", _get(state, "learned"), 0)
        active = _get(state, "active")
        if not isinstance(active, bool):
            raise ValueError(f"active must be a bool, got {active!r}")
        obj._active = active
        return obj


class LabInterval:
    """Robust estimate of a lab schedule: the typical interval between samples and delay.

    Parameters
    ----------
    window : int, default 25
        Number of recent intervals (and delays) the medians are taken over, ``>= 3``.

    Notes
    -----
    Each :meth:`update` gives a result's drawn time ``t`` and the clock when it arrived.
    The interval is the median of the last ``window`` positive differences between
    consecutive drawn times (a result drawn at or before the previous one adds no
    interval), the delay the median of ``max(0, arrival - t)``. Medians are not moved by a
    single missing or rejected result, which doubles one interval only. Both are nan until
    three intervals have been seen.

    :meth:`stale_after` turns them into the age of the last learned result beyond which a
    model is stale: :math:`\\mathrm{clip}(f\\,\\tilde\\Delta + \\tilde d,\\ lo,\\ hi)`
    with :math:`\\tilde\\Delta` the median interval and :math:`\\tilde d` the median delay.
    Just before a result arrives, the age is one interval plus one delay; with
    :math:`f = 3`, two results in a row may be missing or rejected before it is stale.
    """

    __slots__ = ("_window", "_last", "_intervals", "_delays")

    MIN_INTERVALS = 3

    def __init__(self, window: int = 25) -> None:
        self._window = _count("window", window, 3)
        self.reset()

    def params(self) -> dict:
        """Parameters as a plain dict."""
        return {"window": self._window}

    def reset(self) -> None:
        """Forget everything seen."""
        self._last: float | None = None
        self._intervals: list[float] = []
        self._delays: list[float] = []

    @property
    def count(self) -> int:
        """Intervals held (at most ``window``)."""
        return len(self._intervals)

    @property
    def interval(self) -> float:
        """Median interval between drawn times (nan until three intervals)."""
        if len(self._intervals) < self.MIN_INTERVALS:
            return float("nan")
        return float(np.median(self._intervals))

    @property
    def delay(self) -> float:
        """Median delay from drawn time to arrival (nan until three intervals)."""
        if len(self._intervals) < self.MIN_INTERVALS or not self._delays:
            return float("nan")
        return float(np.median(self._delays))

    def update(self, t: float, arrival: float) -> None:
        """One lab result drawn at ``t`` that arrived at clock ``arrival``."""
        t = _finite("t", t)
        arrival = _finite("arrival", arrival)
        if self._last is not None and t > self._last:
            self._intervals.append(t - self._last)
            del self._intervals[:-self._window]
        if self._last is None or t > self._last:
            self._last = t
        self._delays.append(max(0.0, arrival - t))
        del self._delays[:-self._window]

    def stale_after(self, factor: float, lo: float, hi: float, fallback: float) -> float:
        """``clip(factor * interval + delay, lo, hi)``, or ``fallback`` until three intervals."""
        if len(self._intervals) < self.MIN_INTERVALS:
            return float(fallback)
        return float(min(max(factor * self.interval + self.delay, lo), hi))

    def to_state(self) -> dict:
        """Plain-data snapshot (parameters and state)."""
        return {"schema": SCHEMA, "kind": "lab_interval", "params": self.params(),
                "last": self._last, "intervals": list(self._intervals),
                "delays": list(self._delays)}

    @classmethod
    def from_state(cls, state: dict) -> "LabInterval":
        """Rebuild from :meth:`to_state` output."""
        state = _check_state(state, "lab_interval")
        obj = _construct(cls, state["params"])
        last = _get(state, "last")
        obj._last = None if last is None else _finite("last", last)
        try:
            iv = [float(v) for v in _get(state, "intervals")]
            dl = [float(v) for v in _get(state, "delays")]
        except (TypeError, ValueError):
            raise ValueError(f"malformed lab interval state: {state!r}") from None
        if not all(v > 0 and np.isfinite(v) for v in iv) or \
                not all(v >= 0 and np.isfinite(v) for v in dl):
            raise ValueError(f"lab intervals must be > 0 and delays >= 0: {state!r}")
        obj._intervals = iv[-obj._window:]
        obj._delays = dl[-obj._window:]
        return obj
