"""The value kinds of settings (how a TOML value is converted, named and written back) and
the range checks applied after conversion."""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from daemon.config.durations import (
    bare_number_hint,
    format_drift,
    format_duration,
    parse_drift,
    parse_duration,
)
from daemon.config.errors import _Bad, _show
from daemon.endpoints import endpoint_problem, split_host_port
from daemon.sharding import parse_shard


@dataclass(frozen=True)
class _Kind:
    """How one type of value is read from TOML and written back.

    ``doc`` names the type in the documentation, ``noun`` is used with a check ("a number
    > 0"), ``expected`` is told to a value of the wrong type.
    """

    doc: str
    noun: str
    expected: str
    convert: Callable[[Any], Any]
    write: Callable[[Any], str] = _show


def _number(v: Any) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        raise _Bad("a finite number")
    return float(v)


def _integer(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int):
        raise _Bad("an integer")
    return v


def _boolean(v: Any) -> bool:
    if not isinstance(v, bool):
        raise _Bad("true or false")
    return v


def _nonempty_string(v: Any) -> str:
    if not isinstance(v, str) or not v:
        raise _Bad("a non-empty string")
    return v


def _shard(v: Any) -> str:
    if v == "":
        return v
    try:
        i, n = parse_shard(v)
    except ValueError:
        raise _Bad('"i/n" with 0 <= i < n (e.g. "0/2"), or "" for all models') from None
    return f"{i}/{n}"


def _path(v: Any) -> str:
    if not isinstance(v, str):
        raise _Bad('a file or folder path, or "" for none')
    return v


def _duration(v: Any) -> float:
    try:
        return parse_duration(v)
    except ValueError:
        hint = bare_number_hint(v)
        if hint:
            raise _Bad('a duration with a unit like "36h" or "5d" (a bare number is only '
                       'allowed for 0)', hint) from None
        raise _Bad('a duration like "36h" or "5d"') from None


_DRIFT_EXPECTED = ('a drift rate like "0.5 per 1h" (a change in target units, "per", a '
                   'duration with a unit)')


def _drift(v: Any) -> float:
    if isinstance(v, bool) or isinstance(v, int | float):
        raise _Bad(_DRIFT_EXPECTED, f'did you mean "{v:g} per 1h"?' if not isinstance(v, bool)
                   and math.isfinite(v) and v >= 0 else "")
    try:
        return parse_drift(v)
    except ValueError:
        hint = ""
        if isinstance(v, str):
            change, sep, span = v.partition(" per ")
            if sep and bare_number_hint(span):
                hint = f'did you mean "{change.strip()} per {span.strip()}h"?'
        raise _Bad(_DRIFT_EXPECTED, hint) from None


def _numbers(v: Any) -> tuple[float, ...]:
    if not isinstance(v, list):
        raise _Bad("an array of numbers")
    try:
        return tuple(_number(x) for x in v)
    except _Bad:
        raise _Bad("an array of finite numbers") from None


_ENDPOINT_EXAMPLE = '"tcp://127.0.0.1:5556", "ipc:///run/posteriord.sock" or "inproc://name"'


def _endpoint(v: Any) -> str:
    if not isinstance(v, str) or endpoint_problem(v) is not None:
        raise _Bad(f"a ZeroMQ endpoint like {_ENDPOINT_EXAMPLE}")
    return v


def _endpoints(v: Any) -> tuple[str, ...]:
    if not isinstance(v, list) or not v:
        raise _Bad('a non-empty array of ZeroMQ endpoints like ["tcp://127.0.0.1:5555"]')
    for x in v:
        if not isinstance(x, str) or endpoint_problem(x) is not None:
            raise _Bad(f"an array of ZeroMQ endpoints, each like {_ENDPOINT_EXAMPLE}")
    return tuple(v)


def _host_port(v: Any) -> str:
    if not isinstance(v, str):
        raise _Bad('"host:port" like "127.0.0.1:9108", or "" to disable')
    if v == "":
        return v
    host, port = split_host_port(v)
    if not host or not (port.isdigit() and 1 <= int(port) <= 65535):
        raise _Bad('"host:port" like "127.0.0.1:9108" (port 1..65535), or "" to disable')
    return v


_NAME_RE = re.compile(r"[A-Za-z0-9._-]{1,100}")
_NAME_EXPECTED = 'a name of 1 to 100 ASCII letters, digits, ".", "_" or "-"'


def _name(v: Any) -> str:
    if not isinstance(v, str) or not _NAME_RE.fullmatch(v):
        raise _Bad(_NAME_EXPECTED)
    return v


def _tag(v: Any) -> str:
    if not isinstance(v, str) or not v or any(c.isspace() for c in v):
        raise _Bad("a non-empty tag name without spaces")
    return v


def _choice(*options: str) -> _Kind:
    listed = ", ".join(f'"{o}"' for o in options)

    def convert(v: Any) -> str:
        if v not in options or not isinstance(v, str):
            raise _Bad(f"one of {listed}")
        return v

    return _Kind(", ".join(f"`{o}`" for o in options), "one of " + listed,
                 f"one of {listed}", convert)


def _write_duration(v: Any) -> str:
    return f'"{format_duration(v)}"'


def _write_number(v: Any) -> str:
    return f"{v:g}" if isinstance(v, float) and v == int(v) and abs(v) < 1e16 else _show(v)


NUMBER = _Kind("number", "a number", "a finite number", _number, _write_number)
INTEGER = _Kind("integer", "an integer", "an integer", _integer)
BOOLEAN = _Kind("boolean", "true or false", "true or false", _boolean)
STRING = _Kind("string", "a string", "a non-empty string", _nonempty_string)
DURATION = _Kind("duration", "a duration", 'a duration like "36h" or "5d"', _duration,
                 _write_duration)
DRIFT = _Kind('drift rate `"<s> per <T>"`', "a drift rate", _DRIFT_EXPECTED, _drift,
              lambda v: f'"{format_drift(v)}"')
NUMBERS = _Kind("array of numbers", "an array of numbers", "an array of finite numbers",
                _numbers)
ENDPOINT = _Kind("endpoint", "a ZeroMQ endpoint", f"a ZeroMQ endpoint like {_ENDPOINT_EXAMPLE}",
                 _endpoint)
ENDPOINTS = _Kind("array of endpoints", "an array of ZeroMQ endpoints",
                  'a non-empty array of ZeroMQ endpoints like ["tcp://127.0.0.1:5555"]',
                  _endpoints)
HOST_PORT = _Kind('"host:port" or ""', '"host:port"',
                  '"host:port" like "127.0.0.1:9108", or "" to disable', _host_port)
SHARD = _Kind('`"i/n"` or `""`', "a shard",
              '"i/n" with 0 <= i < n (e.g. "0/2"), or "" for all models', _shard)
PATH = _Kind('path or `""`', "a path", 'a file or folder path, or "" for none', _path)
NAME = _Kind("string of 1-100 `A-Z a-z 0-9 . _ -`", "a name", _NAME_EXPECTED, _name)
TAG = _Kind("string without spaces", "a tag", "a non-empty tag name without spaces", _tag)


@dataclass(frozen=True)
class _Check:
    """A range rule on a converted value; ``text`` completes "expected <noun> ..."."""

    text: str
    ok: Callable[[Any], bool]


GT0 = _Check("> 0", lambda v: v > 0)
GE0 = _Check(">= 0", lambda v: v >= 0)
GE1 = _Check(">= 1", lambda v: v >= 1)
OPEN01 = _Check("in (0, 1)", lambda v: 0 < v < 1)
GT1 = _Check("> 1", lambda v: v > 1)
UNIT01 = _Check("in [0, 1]", lambda v: 0 <= v <= 1)
ZERO_OR_GT1 = _Check("0 or > 1", lambda v: v == 0 or v > 1)
