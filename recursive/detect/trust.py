"""The trust state machine: :class:`Trust` turns named alarm reasons into a level (normal /
caution / untrusted by default) with hysteresis and acknowledgement."""

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
        t = _finite("t", t)
        if self._n and t < self._last_t:
            raise ValueError(f"t must not decrease: got {t!r} after {self._last_t!r}")
        act = active if checked else self._check_active(active)
        old = self._level
        for name, (lvl, value, limit) in act.items():
            r = self._reasons.get(name)
            if r is None:
                r = {"held": {}, "value": value, "limit": limit, "ack": 0}
                self._reasons[name] = r
            held = r["held"]
            for ell in range(1, lvl + 1):
                held[ell] = [0, 0.0]
            r["value"] = value
            r["limit"] = limit
        for name in list(self._reasons):
            r = self._reasons[name]
            now = act[name][0] if name in act else 0
            held = r["held"]
            for ell in list(held):
                if ell <= now:
                    continue
                rec = held[ell]
                if rec[0] == 0:
                    rec[1] = t
                rec[0] += 1
                if rec[0] >= self._count and t - rec[1] >= self._time:
                    del held[ell]
            if not held:
                del self._reasons[name]
            elif r["ack"] > max(held):
                r["ack"] = max(held)
        self._level = max((max(r["held"]) for r in self._reasons.values()), default=0)
        self._n += 1
        self._last_t = t
        return self._level != old

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
