"""The daemon's TOML configuration: one table of settings, parsed into frozen dataclasses.

Every setting is declared once, as a :class:`Setting` row in :data:`SETTINGS` (section, key,
type, default, check, help, and whether it affects learning). The parser, the error messages,
the model fingerprint and the generated documentation (:func:`settings_markdown`, committed as
``docs/settings.md``) all read that table, so they cannot disagree. Adding a section (say
``[model.alerts]``) means adding a :class:`Section`, its rows, and the matching dataclass fields.

Errors are :class:`ConfigError` and say where (file, model, key), what was expected and what
arrived. Unknown keys are errors, with a suggestion when a known key is close.
"""

from __future__ import annotations

import contextlib
import difflib
import hashlib
import json
import math
import re
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field, fields
from importlib import resources
from pathlib import Path
from typing import Any

from daemon.endpoints import endpoint_problem, is_loopback, split_host_port
from daemon.sharding import parse_shard
from recursive import Exponential, Gate, Posterior, RandomWalk, Stabilized
from recursive.basis import FAMILIES, Basis, Identity, Input, Polynomial

__all__ = [
    "SECTIONS",
    "SETTINGS",
    "Config",
    "ConfigError",
    "DaemonConfig",
    "InputConfig",
    "ModelConfig",
    "Section",
    "Setting",
    "demo_config",
    "describe",
    "format_duration",
    "load",
    "loads",
    "parse_duration",
    "settings_markdown",
]

# Version of the canonical text hashed by ModelConfig.fingerprint(); bump it if that text
# changes meaning, so that old fingerprints can never match new ones by accident.
FINGERPRINT_SCHEMA = 1
# Schema of ModelConfig.to_state(), the settings of a model kept in a state folder.
MODEL_STATE_SCHEMA = "posteriord.model-config/1"

_MIB = 1024 * 1024


# ---------------------------------------------------------------------------------- errors
class ConfigError(ValueError):
    """A configuration that cannot be used.

    Attributes
    ----------
    file : str or None
        The file (or ``"<string>"``, ``"<demo>"``) the setting came from.
    key : str or None
        Full path of the offending key, e.g. ``"model[2].forgetting.half_life"`` or
        ``"daemon.publish"``; None for errors about the whole file (unreadable, bad TOML).
    expected : str
        What a valid value looks like.
    got : str
        What arrived, written as TOML (``"tomorrow"``, ``-1``, ``nothing`` for a missing key).
    where : str
        The model the key belongs to, e.g. ``model[2] "c301.solvent"`` ("" outside models).
    hint : str
        A "did you mean" suggestion for an unknown key, or "".
    """

    def __init__(self, file: str | None, key: str | None, expected: str, got: str, *,
                 where: str = "", local_key: str | None = None, hint: str = ""):
        self.file = file
        self.key = key
        self.expected = expected
        self.got = got
        self.where = where
        self.hint = hint
        parts = []
        if file:
            parts.append(f"{file}: ")
        if where:
            parts.append(f"{where} ")
        shown = local_key if local_key is not None else key
        if shown:
            parts.append(f"key {shown}: ")
        parts.append(f"expected {expected}, got {got}")
        if hint:
            parts.append(f"; {hint}")
        super().__init__("".join(parts))


class _Bad(Exception):
    """A value failed a type or range check; ``expected`` says what would have passed."""

    def __init__(self, expected: str):
        super().__init__(expected)
        self.expected = expected


class _Missing:
    def __repr__(self) -> str:
        return "REQUIRED"


#: Default of a setting that must be given.
REQUIRED: Any = _Missing()


def _show(value: Any, limit: int = 120) -> str:
    """``value`` written as TOML, shortened to about ``limit`` characters."""
    if value is REQUIRED:
        return "nothing (the key is missing)"
    if isinstance(value, str):
        text = json.dumps(value, ensure_ascii=False)
    elif isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, int):
        text = str(value)
    elif isinstance(value, float):
        text = "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf") \
            if math.isinf(value) else repr(value)
    elif isinstance(value, list | tuple):
        text = "[" + ", ".join(_show(v, limit) for v in value) + "]"
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{k} = {_show(v, limit)}" for k, v in value.items()) + "}"
    elif value is None:
        text = "nothing"
    elif hasattr(value, "isoformat"):
        text = value.isoformat()
    else:
        text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


# ---------------------------------------------------------------------------------- durations
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


# ---------------------------------------------------------------------------------- value kinds
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
        raise _Bad('a duration like "36h" or "5d"') from None


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


# ---------------------------------------------------------------------------------- the table
@dataclass(frozen=True)
class Section:
    """A TOML table holding settings.

    Attributes
    ----------
    name : str
        Dotted name, e.g. ``"model.forgetting"``; the last part is the key in the parent table.
    noun : str
        How messages and documentation refer to it, e.g. ``"[model.forgetting]"``.
    help : str
        One paragraph for the documentation.
    array : bool
        True for an array of tables (``[[model]]``, the ``inputs`` of a model).
    """

    name: str
    noun: str
    help: str
    array: bool = False

    @property
    def key(self) -> str:
        return self.name.rpartition(".")[2]

    @property
    def parent(self) -> str:
        return self.name.rpartition(".")[0]


@dataclass(frozen=True)
class Setting:
    """One configuration setting.

    Attributes
    ----------
    section : str
        Name of the :class:`Section` holding the key.
    key : str
        Key in that TOML table.
    field : str
        Attribute of the dataclass the value lands in.
    kind : _Kind
        Value type (how it is read, named and written).
    default : Any
        Value when the key is absent (already converted), :data:`REQUIRED`, or None for
        "not set".
    help : str
        Meaning, for the documentation.
    check : _Check or None
        Range rule on the converted value.
    learning : bool
        True if changing the setting changes what a model learns: it enters
        :meth:`ModelConfig.fingerprint`, and a reload then starts that model afresh.
    default_doc : str or None
        Text for the documentation's default column when the default depends on other keys.
    """

    section: str
    key: str
    field: str
    kind: _Kind
    default: Any
    help: str
    check: _Check | None = None
    learning: bool = False
    default_doc: str | None = None

    def parse(self, raw: Any) -> Any:
        """Convert and check a TOML value; raises ``_Bad`` with the expectation."""
        value = self.kind.convert(raw)
        if self.check is not None and not self.check.ok(value):
            raise _Bad(f"{self.kind.noun} {self.check.text}")
        return value

    def type_doc(self) -> str:
        return self.kind.doc + (f" {self.check.text}" if self.check else "")

    def default_text(self) -> str:
        if self.default_doc is not None:
            return self.default_doc
        if self.default is REQUIRED:
            return "required"
        if self.default is None:
            return "not set"
        return f"`{self.kind.write(self.default)}`"


SECTIONS: tuple[Section, ...] = (
    Section("daemon", "[daemon]",
            "Sockets, logging and housekeeping of the service. Every key is optional."),
    Section("model", "[[model]]",
            "One `[[model]]` table per soft sensor. `name` and `inputs` are required; the "
            "sub-tables below are optional and take their defaults when absent.", array=True),
    Section("model.inputs", "an inputs entry",
            "The measured inputs of the model, as an array of inline tables: "
            '`inputs = [{tag = "TI-104", lo = 95, hi = 125, dead_time = "5m"}, ...]`. '
            "Tags must be unique within the model; the order is the order of the basis "
            "terms.", array=True),
    Section("model.basis", "[model.basis]",
            "The basis functions phi(x) of the linear-in-the-weights model y = w'phi(x) + e."),
    Section("model.prior", "[model.prior]",
            "The Gaussian prior of the weights before any lab result is learned."),
    Section("model.noise", "[model.noise]",
            "The lab noise: either known (`std`) or learned from the residuals, starting from "
            "a guess (`guess`) worth `strength` lab results."),
    Section("model.forgetting", "[model.forgetting]",
            "How old lab results lose weight as time passes, so the model follows a process "
            "that drifts."),
    Section("model.gate", "[model.gate]",
            "The robust gate: a lab result far from the prediction is not learned from, unless "
            "it is one of a run of same-sign rejections (a real change in the process)."),
    Section("model.lab", "[model.lab]",
            "Matching late lab results with the input readings of the time the sample was "
            "drawn, and the stale status."),
    Section("model.alerts", "[model.alerts]",
            "Drift detectors and the trust state (normal / caution / untrusted) published on "
            "`alert/<model>`. Detectors on lab results work on the standardized residual z; "
            "those on predictions on the predictive std and the inputs."),
)

_day = 86400.0
_hour = 3600.0

SETTINGS: tuple[Setting, ...] = (
    # [daemon]
    Setting("daemon", "feeds", "feeds", ENDPOINTS, ("tcp://127.0.0.1:5555",),
            "Endpoints the SUB socket connects to for input readings and lab results."),
    Setting("daemon", "publish", "publish", ENDPOINT, "tcp://127.0.0.1:5556",
            "Endpoint the PUB socket binds to for predictions and alerts."),
    Setting("daemon", "control", "control", ENDPOINT, "tcp://127.0.0.1:5557",
            "Endpoint the REP socket binds to for control requests (status, reload, reset)."),
    Setting("daemon", "metrics", "metrics", HOST_PORT, "127.0.0.1:9108",
            'Address of the Prometheus HTTP endpoint; "" disables it.'),
    Setting("daemon", "state_dir", "state_dir", STRING, "state",
            "Folder of the learned state: a write-ahead log and checkpoints (relative to the "
            "daemon's working directory unless absolute). Created with mode 0700; one daemon "
            "at a time holds its lock."),
    Setting("daemon", "log_level", "log_level", _choice("debug", "info", "warning", "error"),
            "info", "Least severe log level written."),
    Setting("daemon", "log_format", "log_format", _choice("text", "json"), "text",
            "Log lines as plain text or as one JSON object per line."),
    Setting("daemon", "batch_limit", "batch_limit", INTEGER, 16384,
            "Most messages taken per wake-up before they are processed and the control "
            "socket and signals get a turn. A wake-up takes only what is queued, so at low "
            "load batches stay small (latency); under load they grow, and each model "
            "predicts more samples per call (throughput).", GE1),
    Setting("daemon", "batch_bytes", "batch_bytes", INTEGER, 64 * _MIB,
            "Most payload bytes taken per wake-up (the batch ends after the message that "
            "crosses it), which bounds the memory a batch of large block messages holds.",
            GE1),
    Setting("daemon", "max_message_bytes", "max_message_bytes", INTEGER, _MIB,
            "Largest accepted message; longer ones are dropped.", GE1),
    Setting("daemon", "reconnect_ivl", "reconnect_ivl", DURATION, 0.1,
            "First wait before reconnecting a lost feed.", GT0),
    Setting("daemon", "reconnect_ivl_max", "reconnect_ivl_max", DURATION, 10.0,
            "Longest wait between reconnection attempts (the wait doubles up to this); at "
            "least `reconnect_ivl`.", GT0),
    Setting("daemon", "hwm", "hwm", INTEGER, 100_000,
            "High-water mark (queued messages) of the sockets; 0 means no limit.", GE0),
    Setting("daemon", "checkpoint_every", "checkpoint_every", DURATION, 300.0,
            "Interval between checkpoints of the learned state (one is also written at "
            "start-up, on shutdown and on the `checkpoint` command).", GT0),
    Setting("daemon", "fsync", "fsync", _choice("group", "always"), "group",
            "When write-ahead log records reach the disk: `group` fsyncs at most once per "
            "`group_commit` (a power loss may lose that much; a crash of the process loses "
            "nothing); `always` fsyncs every record, and a `fit/` message is published only "
            "after its record is durable."),
    Setting("daemon", "group_commit", "group_commit", DURATION, 0.05,
            "Longest time a log record waits for its fsync with `fsync = \"group\"`.", GE0),
    Setting("daemon", "on_corruption", "on_corruption", _choice("refuse", "checkpoint"),
            "refuse",
            "What start-up does with a damaged write-ahead log (a torn last record is always "
            "dropped and never counts as damage): `refuse` exits with code 6 and leaves the "
            "folder for a decision; `checkpoint` starts from the newest checkpoint plus the "
            "intact records before the damage and logs what was dropped."),
    Setting("daemon", "shard", "shard", SHARD, "",
            'Run only the models whose CRC-32 of the name modulo n is i (`"i/n"`), and '
            "subscribe only to their topics; several daemons then share one feed. "
            '`""` runs every model.'),
    Setting("daemon", "curve_secret_key", "curve_secret_key", PATH, "",
            "The daemon's CURVE key pair (a `NAME.key_secret` file from `posteriord keys new`, "
            'mode 0600). Set: publish and control are CURVE servers, the feed a CURVE client. '
            '`""`: no CURVE, and publish and control must bind to loopback or ipc.'),
    Setting("daemon", "curve_clients", "curve_clients", PATH, "",
            "Folder of the public keys (`*.key`) allowed to subscribe to the publish socket "
            "(re-read on SIGHUP)."),
    Setting("daemon", "curve_admins", "curve_admins", PATH, "",
            "Folder of the public keys allowed to send control commands (re-read on SIGHUP)."),
    Setting("daemon", "curve_feed_server_key", "curve_feed_server_key", PATH, "",
            "Public key of the feed publisher when it is a CURVE server; `\"\"` connects "
            "without CURVE."),
    # [[model]]
    Setting("model", "name", "name", NAME, REQUIRED,
            "Model name, unique across models; also the topic of its messages."),
    Setting("model", "level", "level", NUMBER, 0.95,
            "Probability of the published prediction interval.", OPEN01),
    # inputs = [{...}, ...]
    Setting("model.inputs", "tag", "tag", TAG, REQUIRED, "Tag name of the reading.",
            learning=True),
    Setting("model.inputs", "lo", "lo", NUMBER, REQUIRED,
            "Low end of the instrument range, in engineering units. Polynomial bases map "
            "[lo, hi] to [-1, 1]; readings outside the range are flagged.", learning=True),
    Setting("model.inputs", "hi", "hi", NUMBER, REQUIRED,
            "High end of the instrument range; greater than `lo`.", learning=True),
    Setting("model.inputs", "dead_time", "dead_time", DURATION, 0.0,
            "Transport delay: a lab sample drawn at time t is matched with this input's "
            "reading at t - dead_time.", GE0, learning=True),
    # [model.basis]
    Setting("model.basis", "kind", "basis_kind", _choice("identity", "polynomial"),
            "polynomial",
            "`identity`: 1 and the raw readings (weights are sensitivities in engineering "
            "units); `polynomial`: products of 1-D polynomials of the scaled readings.",
            learning=True),
    Setting("model.basis", "degree", "degree", INTEGER, 1,
            "Largest total degree of a polynomial term.", GE1, learning=True),
    Setting("model.basis", "interactions", "interactions", BOOLEAN, True,
            "Include cross terms (TI-104*FI-201); false keeps only powers of single inputs.",
            learning=True),
    Setting("model.basis", "family", "family", _choice(*FAMILIES), "legendre",
            "1-D polynomial family; Legendre and Chebyshev are better conditioned than "
            "monomials on [-1, 1].", learning=True),
    # [model.prior]
    Setting("model.prior", "alpha", "alpha", NUMBER, 1.0,
            "Prior precision of each weight, in 1/(target unit)^2 when the noise is at its "
            "guess: the prior standard deviation of a weight is 1/sqrt(alpha). The constant "
            "term always has a flat prior. 0 gives a flat prior on every weight.", GE0,
            learning=True),
    Setting("model.prior", "mean", "prior_mean", NUMBERS, None,
            "Prior mean of the weights (e.g. a commissioning model), one number per basis "
            "term in the order `check-config` lists them.", learning=True,
            default_doc="zeros"),
    # [model.noise]
    Setting("model.noise", "std", "noise_std", NUMBER, None,
            "Known lab noise standard deviation, in target units; when set the noise is not "
            "learned and predictions are Gaussian.", GT0, learning=True,
            default_doc="not set (learned)"),
    Setting("model.noise", "guess", "noise_guess", NUMBER, 1.0,
            "Prior guess of the noise standard deviation, in target units (learned noise).",
            GT0, learning=True),
    Setting("model.noise", "strength", "noise_strength", NUMBER, 2.0,
            "Weight of the guess, in lab results (pseudo-observations); 0 is the "
            "uninformative prior.", GE0, learning=True),
    # [model.forgetting]
    Setting("model.forgetting", "policy", "forgetting",
            _choice("stabilized", "exponential", "random_walk", "none"), "stabilized",
            "`stabilized`: old information decays toward the prior (never less certain than "
            "the prior); `exponential`: all information decays (can wind up when inputs do "
            "not move); `random_walk`: the weights drift with variance `q` per second; "
            "`none`: no forgetting.", learning=True),
    Setting("model.forgetting", "half_life", "half_life", DURATION, 5 * _day,
            "Time after which a lab result counts half. With `random_walk` it is optional and "
            "applies to the noise estimate only; not allowed with `none`.", GT0,
            learning=True, default_doc='`"5d"` (not set for `random_walk` and `none`)'),
    Setting("model.forgetting", "q", "q", NUMBER, None,
            "Random-walk variance added to each weight per second, in the weights' units "
            "squared; required with `random_walk`, not allowed otherwise.", GT0,
            learning=True),
    # [model.gate]
    Setting("model.gate", "k", "gate", NUMBER, 4.0,
            "A lab result whose standardized residual |z| exceeds k is not learned from; 0 "
            "turns the gate off.", GE0, learning=True),
    Setting("model.gate", "release", "gate_release", INTEGER, 3,
            "After this many consecutive same-sign rejections the gate opens and learns "
            "again; 0 keeps it shut.", GE0, learning=True),
    # [model.lab]
    Setting("model.lab", "keep", "keep", DURATION, 12 * _hour,
            "How long input readings are kept for matching late lab results.", GT0),
    Setting("model.lab", "keep_count", "keep_count", INTEGER, 5000,
            "Most input rows kept per model.", GE1),
    Setting("model.lab", "tolerance", "tolerance", DURATION, 120.0,
            "Largest gap between a lab sample time and the input row matched with it.", GE0),
    Setting("model.lab", "stale_after", "stale_after", DURATION, 12 * _hour,
            'Predictions are marked "stale" when no lab result was accepted for this long '
            "(also the staleness alert, reason `stale`).", GT0),
    # [model.alerts]
    Setting("model.alerts", "enabled", "alerts", BOOLEAN, True,
            "Run the detectors and the trust state; false publishes no alerts."),
    Setting("model.alerts", "cusum_k", "cusum_k", NUMBER, 0.5,
            "Reference value k of the two-sided tabular CUSUM on z (mean shift), in units "
            "of z.", GT0),
    Setting("model.alerts", "cusum_h", "cusum_h", NUMBER, 5.0,
            "Decision interval h of the mean-shift CUSUM (reason `mean_shift`, untrusted).",
            GT0),
    Setting("model.alerts", "head_start", "head_start", NUMBER, 0.0,
            "Fast-initial-response head start of the CUSUM, in [0, h).", GE0),
    Setting("model.alerts", "spread_sigma", "spread_sigma", NUMBER, 1.5,
            "Standard deviation of z the spread CUSUM is tuned to detect (reason `spread`, "
            "caution).", GT1),
    Setting("model.alerts", "spread_h", "spread_h", NUMBER, 5.0,
            "Decision interval of the spread CUSUM.", GT0),
    Setting("model.alerts", "hold", "hold", INTEGER, 5,
            "Lab results during which a CUSUM signal stays an active reason.", GE1),
    Setting("model.alerts", "calibration_half_life", "calibration_half_life", NUMBER, 50.0,
            "Half-life, in lab results, of the weighted interval coverage, log score and "
            "CRPS.", GT0),
    Setting("model.alerts", "coverage_min", "coverage_min", NUMBER, 0.8,
            "Weighted coverage of the interval below which the model is `miscalibrated` "
            "(caution); judged after 20 lab results.", UNIT01),
    Setting("model.alerts", "std_limit", "std_limit", NUMBER, None,
            "Predictive std above which the model is untrusted (reason `uncertainty`), in "
            "the target's units; not set: no absolute limit.", GT0),
    Setting("model.alerts", "std_ratio", "std_ratio", NUMBER, 3.0,
            "Predictive std over its own typical value above which the model is in caution "
            "(reason `uncertainty_ratio`); 0 disables.", ZERO_OR_GT1),
    Setting("model.alerts", "std_half_life", "std_half_life", NUMBER, 50.0,
            "Half-life, in lab results, of the typical predictive std (taken at lab times).",
            GT0),
    Setting("model.alerts", "leverage_limit", "leverage_limit", NUMBER, 3.0,
            "Leverage phi'V phi (weight uncertainty in units of the noise variance) above "
            "which the inputs are an extrapolation (reason `extrapolation`, caution); 0 "
            "disables.", GE0),
    Setting("model.alerts", "region_limit", "region_limit", NUMBER, 5.0,
            "Mahalanobis distance of the inputs from those the model learned on above which "
            "they are outside the learned region (reason `outside_region`, caution); 0 "
            "disables.", GE0),
    Setting("model.alerts", "region_half_life", "region_half_life", NUMBER, 200.0,
            "Half-life, in lab results, of the learned-region mean and covariance.", GT0),
    Setting("model.alerts", "drift_window", "drift_window", DURATION, 7 * _day,
            "Window over which the movement of the weight posterior is measured.", GT0),
    Setting("model.alerts", "drift_limit", "drift_limit", NUMBER, 6.0,
            "Mahalanobis distance of the weight change over the window, in the older "
            "posterior's metric, above which the model is drifting (reason `param_drift`, "
            "caution); 0 disables.", GE0),
    Setting("model.alerts", "clear_count", "clear_count", INTEGER, 3,
            "Evaluations a reason must be absent before it clears (hysteresis).", GE1),
    Setting("model.alerts", "clear_time", "clear_time", DURATION, _hour,
            "Time a reason must also be absent before it clears.", GE0),
    Setting("model.alerts", "auto_flatten", "auto_flatten", BOOLEAN, False,
            "On a mean-shift signal, apply one extra forgetting step toward the prior so the "
            "model re-learns quickly, and publish that it did.", learning=True),
    Setting("model.alerts", "flatten_keep", "flatten_keep", NUMBER, 0.2,
            "Share of the learned information kept by that step.", UNIT01, learning=True),
)

# Rules that involve more than one key; checked in _finish_model / _finish_daemon.
RULES: tuple[str, ...] = (
    "`daemon.control` differs from `daemon.publish` (both are bound).",
    "`daemon.reconnect_ivl_max` >= `daemon.reconnect_ivl`.",
    "Model names are unique; each model has at least one input; tags are unique within a "
    "model; `hi` > `lo`.",
    "`prior.mean`, when given, has one number per basis term.",
    "With `basis.kind = \"identity\"`, `degree`, `interactions` and `family` are not allowed.",
    "`noise.std` excludes `noise.guess` and `noise.strength`.",
    "`forgetting.q` is required with `policy = \"random_walk\"` and not allowed otherwise; "
    "`forgetting.half_life` is not allowed with `policy = \"none\"`.",
    "`gate.release` is not allowed with `gate.k = 0`.",
    "`alerts.head_start` < `alerts.cusum_h`.",
)

_BY_SECTION: dict[str, tuple[Setting, ...]] = {
    s.name: tuple(r for r in SETTINGS if r.section == s.name) for s in SECTIONS
}
_SECTION: dict[str, Section] = {s.name: s for s in SECTIONS}


def _children(section: str) -> dict[str, Section]:
    return {s.key: s for s in SECTIONS if s.parent == section}


def _default(section: str, key: str) -> Any:
    for row in _BY_SECTION[section]:
        if row.key == key:
            return row.default
    raise KeyError(f"{section}.{key}")


# ---------------------------------------------------------------------------------- dataclasses
@dataclass(frozen=True)
class DaemonConfig:
    """The ``[daemon]`` table (see :data:`SETTINGS` for meanings)."""

    feeds: tuple[str, ...] = _default("daemon", "feeds")
    publish: str = _default("daemon", "publish")
    control: str = _default("daemon", "control")
    metrics: str = _default("daemon", "metrics")
    state_dir: str = _default("daemon", "state_dir")
    log_level: str = _default("daemon", "log_level")
    log_format: str = _default("daemon", "log_format")
    batch_limit: int = _default("daemon", "batch_limit")
    batch_bytes: int = _default("daemon", "batch_bytes")
    max_message_bytes: int = _default("daemon", "max_message_bytes")
    reconnect_ivl: float = _default("daemon", "reconnect_ivl")
    reconnect_ivl_max: float = _default("daemon", "reconnect_ivl_max")
    hwm: int = _default("daemon", "hwm")
    checkpoint_every: float = _default("daemon", "checkpoint_every")
    fsync: str = _default("daemon", "fsync")
    group_commit: float = _default("daemon", "group_commit")
    on_corruption: str = _default("daemon", "on_corruption")
    shard: str = _default("daemon", "shard")
    curve_secret_key: str = _default("daemon", "curve_secret_key")
    curve_clients: str = _default("daemon", "curve_clients")
    curve_admins: str = _default("daemon", "curve_admins")
    curve_feed_server_key: str = _default("daemon", "curve_feed_server_key")

    def shard_spec(self) -> tuple[int, int] | None:
        return parse_shard(self.shard) if self.shard else None


@dataclass(frozen=True)
class InputConfig:
    """One entry of a model's ``inputs``; times in seconds."""

    tag: str
    lo: float
    hi: float
    dead_time: float = _default("model.inputs", "dead_time")


@dataclass(frozen=True)
class ModelConfig:
    """One ``[[model]]`` table; durations in seconds, ``q`` per second.

    Built by :func:`load` / :func:`loads`, which check every value; direct construction is
    not checked.
    """

    name: str
    inputs: tuple[InputConfig, ...]
    basis_kind: str = _default("model.basis", "kind")
    degree: int = _default("model.basis", "degree")
    interactions: bool = _default("model.basis", "interactions")
    family: str = _default("model.basis", "family")
    alpha: float = _default("model.prior", "alpha")
    prior_mean: tuple[float, ...] | None = _default("model.prior", "mean")
    noise_std: float | None = _default("model.noise", "std")
    noise_guess: float = _default("model.noise", "guess")
    noise_strength: float = _default("model.noise", "strength")
    forgetting: str = _default("model.forgetting", "policy")
    half_life: float | None = _default("model.forgetting", "half_life")
    q: float | None = _default("model.forgetting", "q")
    gate: float | None = _default("model.gate", "k")
    gate_release: int = _default("model.gate", "release")
    level: float = _default("model", "level")
    keep: float = _default("model.lab", "keep")
    keep_count: int = _default("model.lab", "keep_count")
    tolerance: float = _default("model.lab", "tolerance")
    stale_after: float = _default("model.lab", "stale_after")
    alerts: bool = _default("model.alerts", "enabled")
    cusum_k: float = _default("model.alerts", "cusum_k")
    cusum_h: float = _default("model.alerts", "cusum_h")
    head_start: float = _default("model.alerts", "head_start")
    spread_sigma: float = _default("model.alerts", "spread_sigma")
    spread_h: float = _default("model.alerts", "spread_h")
    hold: int = _default("model.alerts", "hold")
    calibration_half_life: float = _default("model.alerts", "calibration_half_life")
    coverage_min: float = _default("model.alerts", "coverage_min")
    std_limit: float | None = _default("model.alerts", "std_limit")
    std_ratio: float = _default("model.alerts", "std_ratio")
    std_half_life: float = _default("model.alerts", "std_half_life")
    leverage_limit: float = _default("model.alerts", "leverage_limit")
    region_limit: float = _default("model.alerts", "region_limit")
    region_half_life: float = _default("model.alerts", "region_half_life")
    drift_window: float = _default("model.alerts", "drift_window")
    drift_limit: float = _default("model.alerts", "drift_limit")
    clear_count: int = _default("model.alerts", "clear_count")
    clear_time: float = _default("model.alerts", "clear_time")
    auto_flatten: bool = _default("model.alerts", "auto_flatten")
    flatten_keep: float = _default("model.alerts", "flatten_keep")

    def build_basis(self) -> Basis:
        """The basis: :class:`Identity`, or :class:`Polynomial` on inputs scaled to [-1, 1]."""
        inputs = [Input(i.tag, i.lo, i.hi) for i in self.inputs]
        if self.basis_kind == "identity":
            return Identity(inputs)
        return Polynomial(inputs, self.degree, interactions=self.interactions,
                          family=self.family, scale=True)

    def build_posterior(self, basis: Basis | None = None) -> Posterior:
        """A fresh posterior for this model (pass ``basis`` to reuse one already built).

        The constant term gets a flat prior (``basis.alpha_vector``); forgetting half-lives
        and ``q`` are per second, the daemon's unit of time.
        """
        basis = self.build_basis() if basis is None else basis
        if self.forgetting == "stabilized":
            policy = Stabilized(self.half_life)
        elif self.forgetting == "exponential":
            policy = Exponential(self.half_life)
        elif self.forgetting == "random_walk":
            policy = RandomWalk(self.q, self.half_life)
        else:
            policy = None
        gate = None
        if self.gate:
            gate = Gate(self.gate, self.gate_release if self.gate_release > 0 else None)
        return Posterior(basis.n_features, alpha=basis.alpha_vector(self.alpha),
                         prior_mean=self.prior_mean, noise_std=self.noise_std,
                         noise_prior=(self.noise_guess, self.noise_strength),
                         forgetting=policy, gate=gate)

    def learning_settings(self) -> dict:
        """The settings that affect learning (rows with ``learning=True``), as plain data."""
        out: dict[str, Any] = {}
        for row in SETTINGS:
            if row.learning and row.section.startswith("model") \
                    and row.section != "model.inputs":
                value = getattr(self, row.field)
                out[row.field] = list(value) if isinstance(value, tuple) else value
        rows = [r for r in _BY_SECTION["model.inputs"] if r.learning]
        out["inputs"] = [{r.field: getattr(i, r.field) for r in rows} for i in self.inputs]
        return out

    def fingerprint(self) -> str:
        """Stable hash (16 hex digits) of :meth:`learning_settings`.

        Equal fingerprints mean a reloaded model may keep its learned state. The name,
        ``level`` and the ``[model.lab]`` settings do not enter it. Durations enter as
        seconds, so ``"10d"`` and ``"240h"`` give the same fingerprint.
        """
        text = json.dumps({"fingerprint_schema": FINGERPRINT_SCHEMA,
                           "settings": self.learning_settings()},
                          sort_keys=True, separators=(",", ":"), allow_nan=False)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]

    def to_state(self) -> dict:
        """Every setting of the model as plain data, with a schema key (for state folders)."""
        out: dict[str, Any] = {"schema": MODEL_STATE_SCHEMA}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name == "inputs":
                value = [{g.name: getattr(i, g.name) for g in fields(i)} for i in value]
            elif isinstance(value, tuple):
                value = list(value)
            out[f.name] = value
        return out

    @classmethod
    def from_state(cls, state: dict) -> ModelConfig:
        """Inverse of :meth:`to_state`; raises ValueError on anything else."""
        if not isinstance(state, dict) or state.get("schema") != MODEL_STATE_SCHEMA:
            got = state.get("schema") if isinstance(state, dict) else type(state).__name__
            raise ValueError(f"model config schema must be {MODEL_STATE_SCHEMA!r}, got {got!r}")
        names = {f.name for f in fields(cls)}
        keys = set(state) - {"schema"}
        if keys != names:
            raise ValueError(f"model config keys differ from the settings: missing "
                             f"{sorted(names - keys)}, unknown {sorted(keys - names)}")
        values = dict(state)
        del values["schema"]
        try:
            values["inputs"] = tuple(InputConfig(**i) for i in values["inputs"])
        except TypeError as exc:
            raise ValueError(f"bad inputs in a model config: {exc}") from None
        if values["prior_mean"] is not None:
            values["prior_mean"] = tuple(float(v) for v in values["prior_mean"])
        return cls(**values)


@dataclass(frozen=True)
class Config:
    """A whole configuration file."""

    daemon: DaemonConfig = field(default_factory=DaemonConfig)
    models: tuple[ModelConfig, ...] = ()
    source: str = "<string>"


# ---------------------------------------------------------------------------------- parsing
@dataclass(frozen=True)
class _Ctx:
    """Where the keys being parsed live: ``prefix`` starts the full key path."""

    file: str | None
    where: str = ""
    prefix: str = ""

    def error(self, local: str, expected: str, got: str, hint: str = "") -> ConfigError:
        key = f"{self.prefix}.{local}" if self.prefix else local
        return ConfigError(self.file, key, expected, got, where=self.where, local_key=local,
                           hint=hint)


def _unknown(ctx: _Ctx, local: str, key: str, allowed: list[str], noun: str) -> ConfigError:
    close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
    hint = f'did you mean "{close[0]}"?' if close else ""
    return ctx.error(local, f"a key of {noun} ({', '.join(allowed)})",
                     f"unknown key {json.dumps(key, ensure_ascii=False)}", hint)


def _parse_table(section: str, table: dict, ctx: _Ctx, local_prefix: str
                 ) -> tuple[dict[str, Any], set[str]]:
    """Values (by field) and the set of fields given explicitly, for one TOML table."""
    rows = _BY_SECTION[section]
    allowed = [r.key for r in rows] + list(_children(section))
    for key in table:
        if key not in allowed:
            raise _unknown(ctx, local_prefix + key, key, allowed, _SECTION[section].noun)
    values: dict[str, Any] = {}
    present: set[str] = set()
    for row in rows:
        local = local_prefix + row.key
        if row.key in table:
            raw = table[row.key]
            try:
                values[row.field] = row.parse(raw)
            except _Bad as bad:
                raise ctx.error(local, bad.expected, _show(raw)) from None
            present.add(row.field)
        elif row.default is REQUIRED:
            raise ctx.error(local, row.kind.expected, _show(REQUIRED))
        else:
            values[row.field] = row.default
    return values, present


def _subtable(table: dict, key: str, ctx: _Ctx, local: str) -> dict:
    raw = table.get(key, {})
    if not isinstance(raw, dict):
        raise ctx.error(local, f"a table ({_SECTION['model.' + key].noun})", _show(raw))
    return raw


def _parse_daemon(doc: dict, file: str | None) -> DaemonConfig:
    ctx = _Ctx(file)
    raw = doc.get("daemon", {})
    if not isinstance(raw, dict):
        raise ctx.error("daemon", "a table ([daemon])", _show(raw))
    values, _ = _parse_table("daemon", raw, ctx, "daemon.")
    if values["control"] == values["publish"]:
        raise ctx.error("daemon.control", "an endpoint different from daemon.publish",
                        _show(values["control"]))
    if values["curve_secret_key"]:
        for key in ("curve_clients", "curve_admins"):
            if not values[key]:
                raise ctx.error(f"daemon.{key}", "a folder of allowed public keys (required "
                                "with daemon.curve_secret_key)", _show(REQUIRED))
    else:
        for key in ("curve_clients", "curve_admins", "curve_feed_server_key"):
            if values[key]:
                raise ctx.error(f"daemon.{key}", 'no value (daemon.curve_secret_key is "")',
                                _show(values[key]))
        for key in ("publish", "control"):
            if not is_loopback(values[key]):
                raise ctx.error(f"daemon.{key}", "a loopback or ipc endpoint, or CURVE "
                                "(daemon.curve_secret_key): without it anyone on the network "
                                "could " + ("read the predictions" if key == "publish"
                                            else "send commands"), _show(values[key]))
    if values["reconnect_ivl_max"] < values["reconnect_ivl"]:
        raise ctx.error("daemon.reconnect_ivl_max",
                        f"a duration >= daemon.reconnect_ivl "
                        f"({format_duration(values['reconnect_ivl'])})",
                        _show(raw.get("reconnect_ivl_max")))
    return DaemonConfig(**values)


_INPUTS_EXPECTED = 'an array of input tables like [{tag = "TI-104", lo = 95, hi = 125}]'


def _parse_inputs(table: dict, ctx: _Ctx) -> tuple[InputConfig, ...]:
    raw = table.get("inputs", REQUIRED)
    if raw is REQUIRED or not isinstance(raw, list) or not raw:
        raise ctx.error("inputs", _INPUTS_EXPECTED, _show(raw))
    out: list[InputConfig] = []
    first: dict[str, int] = {}
    for j, item in enumerate(raw):
        base = f"inputs[{j}]"
        if not isinstance(item, dict):
            raise ctx.error(base, 'an input table like {tag = "TI-104", lo = 95, hi = 125}',
                            _show(item))
        values, _ = _parse_table("model.inputs", item, ctx, base + ".")
        if values["tag"] in first:
            raise ctx.error(f"{base}.tag",
                            f"a tag not used by an earlier input (inputs[{first[values['tag']]}])",
                            _show(item["tag"]))
        first[values["tag"]] = j
        if not values["hi"] > values["lo"]:
            raise ctx.error(f"{base}.hi", f"a number > lo ({_write_number(values['lo'])})",
                            _show(item["hi"]))
        out.append(InputConfig(**values))
    return tuple(out)


def _local(fieldname: str) -> str:
    """The key of a model field relative to its ``[[model]]`` table (``"forgetting.q"``)."""
    for row in SETTINGS:
        if row.field == fieldname and row.section.startswith("model"):
            sub = row.section.partition(".")[2]
            return f"{sub}.{row.key}" if sub else row.key
    raise KeyError(fieldname)


def _parse_model(i: int, raw: Any, file: str | None) -> ModelConfig:
    ctx = _Ctx(file, f"model[{i}]", f"model[{i}]")
    if not isinstance(raw, dict):
        raise ConfigError(file, f"model[{i}]", "a [[model]] table", _show(raw))
    name_row = next(r for r in _BY_SECTION["model"] if r.key == "name")
    # a valid name makes the error messages clearer; a bad one is reported by _parse_table
    with contextlib.suppress(_Bad):
        name = name_row.parse(raw.get("name"))
        ctx = _Ctx(file, f'model[{i}] "{name}"', f"model[{i}]")
    values, present = _parse_table("model", raw, ctx, "")
    values["inputs"] = _parse_inputs(raw, ctx)
    for sub in SECTIONS:
        if sub.parent != "model" or sub.array:
            continue
        table = _subtable(raw, sub.key, ctx, sub.key)
        v, p = _parse_table(sub.name, table, ctx, sub.key + ".")
        values.update(v)
        present |= p
    return _finish_model(values, present, raw, ctx)


def _given(raw: dict, fieldname: str) -> Any:
    """The raw TOML value of a model field (for messages)."""
    node: Any = raw
    for part in _local(fieldname).split("."):
        node = node.get(part, REQUIRED) if isinstance(node, dict) else REQUIRED
    return node


def _finish_model(values: dict, present: set[str], raw: dict, ctx: _Ctx) -> ModelConfig:
    def not_allowed(fieldname: str, why: str) -> ConfigError:
        return ctx.error(_local(fieldname), f"no value ({why})", _show(_given(raw, fieldname)))

    if values["basis_kind"] == "identity":
        for f in ("degree", "interactions", "family"):
            if f in present:
                raise not_allowed(f, 'it only applies to basis.kind = "polynomial"')
    if values["noise_std"] is not None:
        for f in ("noise_guess", "noise_strength"):
            if f in present:
                raise not_allowed(f, "noise.std is set, so the noise is not learned")
    policy = values["forgetting"]
    if policy == "random_walk":
        if values["q"] is None:
            raise ctx.error("forgetting.q", 'a number > 0 (required with policy = '
                            '"random_walk")', _show(REQUIRED))
        if "half_life" not in present:
            values["half_life"] = None
    else:
        if "q" in present:
            raise not_allowed("q", f'q only applies to policy = "random_walk", '
                              f'policy is "{policy}"')
        if policy == "none":
            if "half_life" in present:
                raise not_allowed("half_life", 'policy is "none"')
            values["half_life"] = None
    if values["gate"] == 0.0:
        if "gate_release" in present:
            raise not_allowed("gate_release", "gate.k = 0 turns the gate off")
        values["gate"] = None
    if values["head_start"] >= values["cusum_h"]:
        raise ctx.error("alerts.head_start", f"a number in [0, cusum_h = {values['cusum_h']:g})",
                        _show(_given(raw, "head_start")))
    model = ModelConfig(**values)
    if model.prior_mean is not None:
        names = model.build_basis().names
        if len(model.prior_mean) != len(names):
            raise ctx.error("prior.mean",
                            f"an array of {len(names)} numbers, one per basis term "
                            f"({', '.join(names)})", _show(_given(raw, "prior_mean")))
    return model


def _parse_document(doc: dict, source: str) -> Config:
    file = source
    top = [s.name for s in SECTIONS if not s.parent]
    for key in doc:
        if key not in top:
            close = difflib.get_close_matches(key, top, n=1, cutoff=0.6)
            raise ConfigError(file, key, f"a top-level key ({', '.join(top)})",
                              f"unknown key {json.dumps(key, ensure_ascii=False)}",
                              hint=f'did you mean "{close[0]}"?' if close else "")
    daemon = _parse_daemon(doc, file)
    raw_models = doc.get("model", [])
    if not isinstance(raw_models, list):
        raise ConfigError(file, "model", "an array of [[model]] tables", _show(raw_models))
    models = []
    seen: dict[str, int] = {}
    for i, raw in enumerate(raw_models):
        m = _parse_model(i, raw, file)
        if m.name in seen:
            ctx = _Ctx(file, f'model[{i}] "{m.name}"', f"model[{i}]")
            raise ctx.error("name",
                            f"a name not used by an earlier model (model[{seen[m.name]}])",
                            _show(m.name))
        seen[m.name] = i
        models.append(m)
    return Config(daemon=daemon, models=tuple(models), source=source)


def loads(text: str, source: str = "<string>") -> Config:
    """Parse a configuration from TOML text; ``source`` names it in error messages."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(source, None, "valid TOML", str(exc)) from None
    return _parse_document(doc, source)


def load(path: str | Path) -> Config:
    """Read and parse a configuration file.

    Raises
    ------
    ConfigError
        If the file cannot be read, is not UTF-8 TOML, or holds a bad setting.
    """
    source = str(path)
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise ConfigError(source, None, "a readable file", exc.strerror or str(exc)) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(source, None, "UTF-8 text", str(exc)) from None
    return loads(text, source)


def demo_config() -> Config:
    """The built-in demo configuration (the packaged ``daemon/demo.toml``)."""
    text = resources.files("daemon.config").joinpath("demo.toml").read_text(encoding="utf-8")
    return loads(text, "<demo>")


# ---------------------------------------------------------------------------------- describe
def _num(v: float) -> str:
    return f"{v:g}"


def _bind(endpoint: str) -> str:
    return endpoint if is_loopback(endpoint) else f"{endpoint}  (reachable from other hosts)"


def describe(config: Config) -> str:
    """Human-readable summary: the daemon endpoints, then each model and its terms."""
    d = config.daemon
    lines = [f"configuration: {config.source}", "", "daemon:"]
    for ep in d.feeds:
        lines.append(f"  feed (SUB connects)    {ep}")
    lines.append(f"  publish (PUB binds)    {_bind(d.publish)}")
    lines.append(f"  control (REP binds)    {_bind(d.control)}")
    if d.metrics:
        note = "" if is_loopback(f"tcp://{d.metrics}") else "  (reachable from other hosts)"
        lines.append(f"  metrics (HTTP)         http://{d.metrics}/metrics{note}")
    else:
        lines.append("  metrics (HTTP)         disabled")
    lines.append(f"  state_dir              {d.state_dir}")
    lines.append(f"  log                    {d.log_level}, {d.log_format}")
    lines.append(f"  batch_limit            {d.batch_limit} messages, {d.batch_bytes} bytes per "
                 f"wake-up")
    lines.append(f"  max_message_bytes      {d.max_message_bytes}")
    lines.append(f"  hwm                    {d.hwm}" + (" (no limit)" if d.hwm == 0 else ""))
    lines.append(f"  reconnect              {format_duration(d.reconnect_ivl)} .. "
                 f"{format_duration(d.reconnect_ivl_max)}")
    lines.append(f"  checkpoint every       {format_duration(d.checkpoint_every)}")
    sync = "every record" if d.fsync == "always" else \
        f"grouped, at most {format_duration(d.group_commit)} apart"
    lines.append(f"  fsync                  {sync}")
    lines.append(f"  on corruption          {d.on_corruption}")
    lines.append("")
    n = len(config.models)
    lines.append(f"{n} model{'s' if n != 1 else ''}" + (":" if n else ""))
    for m in config.models:
        lines.extend(_describe_model(m))
    return "\n".join(lines)


def _describe_model(m: ModelConfig) -> list[str]:
    basis = m.build_basis()
    lines = ["", f"model {m.name}  (fingerprint {m.fingerprint()})", "  inputs:"]
    width = max(len(i.tag) for i in m.inputs)
    for i in m.inputs:
        lines.append(f"    {i.tag:<{width}}  range {_num(i.lo)} .. {_num(i.hi)}"
                     f"  dead time {format_duration(i.dead_time)}")
    if m.basis_kind == "identity":
        lines.append(f"  basis: identity (raw engineering units), {basis.n_features} terms:")
    else:
        lines.append(f"  basis: polynomial, {m.family}, degree {m.degree}, "
                     f"{'with' if m.interactions else 'without'} interactions, inputs scaled "
                     f"to [-1, 1], {basis.n_features} terms:")
    mean = m.prior_mean if m.prior_mean is not None else (0.0,) * basis.n_features
    width = max(len(t) for t in basis.names)
    alphas = basis.alpha_vector(m.alpha)
    for j, term in enumerate(basis.names):
        prior = "flat prior" if alphas[j] == 0 else \
            f"prior mean {_num(mean[j])}, prior sd {_num(1.0 / math.sqrt(alphas[j]))}"
        lines.append(f"    {j:>3}  {term:<{width}}  {prior}")
    lines.append(f"  prior: alpha {_num(m.alpha)} (flat on the constant term)"
                 + ("" if m.prior_mean is not None else ", mean zero"))
    if m.noise_std is not None:
        lines.append(f"  noise: known, std {_num(m.noise_std)} (Gaussian predictions)")
    else:
        lines.append(f"  noise: learned, guess {_num(m.noise_guess)} worth "
                     f"{_num(m.noise_strength)} lab results (Student-t predictions)")
    if m.forgetting == "none":
        lines.append("  forgetting: none")
    elif m.forgetting == "random_walk":
        noise = "noise estimate kept" if m.half_life is None else \
            f"noise half-life {format_duration(m.half_life)}"
        lines.append(f"  forgetting: random walk, q {_num(m.q)} per second, {noise}")
    else:
        lines.append(f"  forgetting: {m.forgetting}, half-life {format_duration(m.half_life)}")
    if m.gate is None:
        lines.append("  gate: off")
    else:
        rel = "never opens" if m.gate_release == 0 else \
            f"opens after {m.gate_release} same-sign rejections"
        lines.append(f"  gate: |z| > {_num(m.gate)} rejected, {rel}")
    lines.append(f"  interval level: {_num(m.level)}")
    lines.append(f"  lab matching: tolerance {format_duration(m.tolerance)}, keep "
                 f"{format_duration(m.keep)} or {m.keep_count} rows, stale after "
                 f"{format_duration(m.stale_after)}")
    return lines


# ---------------------------------------------------------------------------------- docs
_INTRO = """\
# Settings

<!-- Generated by daemon.config.settings_markdown(); edit the table in daemon/config.py and
regenerate, do not edit by hand. -->

posteriord reads one TOML file (`posteriord run --config FILE`; `posteriord check-config
FILE` checks it and prints what it understood). `daemon/config/demo.toml` is a complete example.

* Durations are a number of seconds or a string of `<number><unit>` parts, largest unit
  first, each unit once: `"250ms"`, `"90s"`, `"5m"`, `"36h"`, `"1.5d"`, `"2w"`, `"1h30m"`.
* Unknown keys are errors (with a suggestion when a known key is close), and so are keys that
  would have no effect given the other settings.
* Errors name the file, the model (`model[0]` is the first `[[model]]` table) and the key,
  and say what was expected and what was found.
* Settings marked *learning* enter the model's fingerprint: when a reload changes one of
  them, that model starts again from its prior; other changes keep what it has learned.
"""


def _cell(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def settings_markdown() -> str:
    """The documentation of every setting (the text of ``docs/settings.md``)."""
    out = [_INTRO]
    for sec in SECTIONS:
        rows = _BY_SECTION[sec.name]
        title = f"`{sec.noun}`" if sec.noun.startswith("[") else f"`{sec.name}`"
        out.append(f"## {title}\n")
        out.append(sec.help + "\n")
        if not rows:
            continue
        model = sec.name.startswith("model")
        head = "| key | type | default | meaning |" + (" learning |" if model else "")
        rule = "|---|---|---|---|" + ("---|" if model else "")
        out.append(head)
        out.append(rule)
        for r in rows:
            line = (f"| `{r.key}` | {_cell(r.type_doc())} | {_cell(r.default_text())} | "
                    f"{_cell(r.help)} |")
            if model:
                line += " yes |" if r.learning else " no |"
            out.append(line)
        out.append("")
    out.append("## Rules between settings\n")
    out.extend(f"* {rule}" for rule in RULES)
    out.append("")
    return "\n".join(out)
