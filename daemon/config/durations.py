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


def parse_duration(value: Any) -> float:
    """A duration in seconds.

    Numbers (int or float) are seconds. Strings are one or more ``<number><unit>`` parts with
    units ``w``, ``d``, ``h``, ``m``, ``s``, ``ms`` from largest to smallest, each at most
    once: ``"250ms"``, ``"90s"``, ``"5m"``, ``"36h"``, ``"1.5d"``, ``"2w"``, ``"1h30m"``.

    Raises
    ------
    ValueError
        For a negative, non-finite or empty value, a string without units, an unknown or
        repeated unit, or anything that is neither a number nor a string.
    """
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ValueError(f"a duration must be a number of seconds or a string like '36h', "
                         f"got {value!r}")
    if not isinstance(value, str):
        seconds = float(value)
        if not math.isfinite(seconds) or seconds < 0:
            raise ValueError(f"a duration must be finite and >= 0, got {value!r}")
        return seconds
    if not value.strip():
        raise ValueError(f"a duration must not be empty, got {value!r}")
    if not _DURATION_RE.fullmatch(value):
        if re.fullmatch(r"\s*[+-]?(\d+(\.\d*)?|\.\d+)\s*", value):
            raise ValueError(f"a duration string needs a unit (w, d, h, m, s, ms), "
                             f"like '90s', got {value!r}")
        raise ValueError(f"a duration must look like '250ms', '90s', '5m', '36h', '5d', '2w' "
                         f"or '1h30m' (units w, d, h, m, s, ms), got {value!r}")
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
