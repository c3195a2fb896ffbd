"""Durations: ``"250ms"``, ``"36h"``, ``"1h30m"`` read as seconds, and seconds written back."""

from __future__ import annotations

import math
import re
from typing import Any

_UNITS = {"w": 604800.0, "d": 86400.0, "h": 3600.0, "m": 60.0, "s": 1.0, "ms": 0.001}
_UNIT_ORDER = ("w", "d", "h", "m", "s", "ms")
_PART = r"(\d+(?:\.\d+)?|\.\d+)\s*(ms|[wdhms])"
_DURATION_RE = re.compile(rf"\s*(?:{_PART}\s*)+")
_PART_RE = re.compile(_PART)


def _suggest(number: str) -> str:
    return f'did you mean "{number}h"? (write "{number}s" for seconds)'


def bare_number_hint(value: Any) -> str:
    """The hint for a duration given without a unit ("" when ``value`` is not one)."""
    if isinstance(value, bool):
        return ""
    if isinstance(value, int | float) and math.isfinite(value) and value > 0:
        return _suggest(f"{value:g}")
    if isinstance(value, str) and re.fullmatch(r"\s*(\d+(\.\d*)?|\.\d+)\s*", value) \
            and float(value) != 0.0:
        return _suggest(value.strip())
    return ""


def parse_duration(value: Any) -> float:
    """A duration in seconds.

    Strings are one or more ``<number><unit>`` parts with units ``w``, ``d``, ``h``, ``m``,
    ``s``, ``ms`` from largest to smallest, each at most once: ``"250ms"``, ``"90s"``,
    ``"5m"``, ``"36h"``, ``"1.5d"``, ``"2w"``, ``"1h30m"``. A number without a unit is only
    accepted for zero (``0``, ``0.0`` or ``"0"``): ``half_life = 27`` is too easily meant as
    27 hours or days to be read silently as seconds.

    Raises
    ------
    ValueError
        For a negative, non-finite or empty value, a number other than 0 or a string
        without units (the message suggests one), an unknown or repeated unit, or anything
        that is neither a number nor a string.
    """
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ValueError(f"a duration must be a string like '36h' (or 0), got {value!r}")
    if not isinstance(value, str):
        seconds = float(value)
        if not math.isfinite(seconds) or seconds < 0:
            raise ValueError(f"a duration must be finite and >= 0, got {value!r}")
        if seconds != 0.0:
            raise ValueError(f"a duration needs a unit (w, d, h, m, s, ms), got {value!r}; "
                             f"{bare_number_hint(value)}")
        return 0.0
    if not value.strip():
        raise ValueError(f"a duration must not be empty, got {value!r}")
    if not _DURATION_RE.fullmatch(value):
        if re.fullmatch(r"\s*[+-]?(\d+(\.\d*)?|\.\d+)\s*", value):
            hint = bare_number_hint(value)
            if not hint and float(value) == 0.0:
                return 0.0
            raise ValueError(f"a duration string needs a unit (w, d, h, m, s, ms), "
                             f"like '90s', got {value!r}" + (f"; {hint}" if hint else ""))
        m = re.search(r"(\d+(?:\.\d+)?)\s*(?:min|mins|minutes?)\b", value, re.IGNORECASE)
        hint = f"; minutes are 'm' ('{m.group(1)}m')" if m else ""
        raise ValueError(f"a duration must look like '250ms', '90s', '5m', '36h', '5d', '2w' "
                         f"or '1h30m' (units w, d, h, m, s, ms), got {value!r}{hint}")
    seconds = 0.0
    last = -1
    for number, unit in _PART_RE.findall(value):
        rank = _UNIT_ORDER.index(unit)
        if rank <= last:
            raise ValueError(f"a duration lists its units once each, from largest to smallest "
                             f"(w d h m s ms), got {value!r}")
        last = rank
        seconds += float(number) * _UNITS[unit]
    if not math.isfinite(seconds):
        raise ValueError(f"a duration must be finite, got {value!r}")
    return seconds


def format_duration(seconds: float) -> str:
    """Write ``seconds`` the way :func:`parse_duration` reads it (``"10d"``, ``"1h30m"``).

    Whole milliseconds are written with units ``d h m s ms``; any other value as plain
    seconds (``"0.0001s"``).
    """
    s = float(seconds)
    if not math.isfinite(s) or s < 0:
        raise ValueError(f"seconds must be finite and >= 0, got {seconds!r}")
    ms = round(s * 1000.0)
    if ms == 0 and s == 0.0:
        return "0s"
    if ms == 0 or abs(ms / 1000.0 - s) > 1e-9 * max(1.0, s):
        return f"{s:g}s"
    out = []
    for unit, size in (("d", 86_400_000), ("h", 3_600_000), ("m", 60_000), ("s", 1000),
                       ("ms", 1)):
        n, ms = divmod(ms, size)
        if n:
            out.append(f"{n}{unit}")
    return "".join(out)


_DRIFT_RE = re.compile(r"\s*(\d+(?:\.\d*)?(?:[eE][+-]?\d+)?|\.\d+(?:[eE][+-]?\d+)?)"
                       r"\s+per\s+(\S.*?)\s*")


def parse_drift(value: Any) -> float:
    """A drift rate ``"<s> per <T>"`` as a random-walk variance rate ``q = s**2 / T`` per second.

    ``"2.5 per 1h"`` says the drifting quantity changes by about 2.5 units (one standard
    deviation) over one hour; a random walk's change grows with the square root of the
    time, so over ``4h`` it would be about 5. ``s`` is a number >= 0 and ``T`` a duration
    > 0 (:func:`parse_duration`).
    """
    if not isinstance(value, str):
        raise ValueError(f"a drift rate must be a string like '0.5 per 1h', got {value!r}")
    m = _DRIFT_RE.fullmatch(value)
    if m is None:
        raise ValueError(f"a drift rate must look like '0.5 per 1h' (a change, 'per', a "
                         f"duration), got {value!r}")
    s = float(m.group(1))
    try:
        span = parse_duration(m.group(2))
    except ValueError as exc:
        raise ValueError(f"the duration of a drift rate {value!r}: {exc}") from None
    if not span > 0:
        raise ValueError(f"the duration of a drift rate must be > 0, got {value!r}")
    q = s * s / span
    if not math.isfinite(q):
        raise ValueError(f"a drift rate must be finite, got {value!r}")
    return q


def drift_change(q: float, span: float = 3600.0) -> float:
    """The ``s`` of :func:`parse_drift` for a rate ``q`` per second over ``span`` seconds."""
    return math.sqrt(float(q) * span)


def format_drift(q: float) -> str:
    """Write a rate ``q`` per second the way :func:`parse_drift` reads it (``"0.5 per 1h"``).

    Written per hour with 6 significant digits (the value read back is within 1e-6)."""
    q = float(q)
    if not (math.isfinite(q) and q >= 0):
        raise ValueError(f"q must be finite and >= 0, got {q!r}")
    return f"{drift_change(q):.6g} per 1h"
