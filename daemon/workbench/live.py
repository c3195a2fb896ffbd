"""Live tools around a running daemon: replay a historian CSV onto its feed, record what it
publishes, watch it in a terminal.

Replay binds an XPUB socket at the feed endpoint (the daemon's SUB connects to its
``daemon.feeds``), waits until the daemon has subscribed to the models' topics, then sends
the feed messages of :func:`daemon.workbench.backtest.feed_messages` (feature blocks, lab results at
their drawn time after a lab delay) paced at a speed-up of the recorded time, or as fast as
possible.

Record file format (``.rec``), version 1::

    posteriord-record/1 {"created": 1767571200.0, "endpoint": "...", "topics": [...]}\\n
    <frame> <frame> ...

The first line is ASCII: the format name, a space, a JSON object, a newline. Each frame is a
4-byte big-endian unsigned length followed by that many bytes of MessagePack: an array
``[received, topic, payload]`` with the wall-clock time the message was received (float,
epoch seconds), the ZeroMQ topic frame as a string (``"pred/c301.bottoms_solvent"``) and the
message's payload exactly as it arrived (MessagePack binary, itself the MessagePack map
documented in the README). Frames are appended; a file cut short by a crash loses at most
its last frame, which the reader detects and skips.
"""

from __future__ import annotations

import json
import math
import os
import struct
import sys
import threading
import time
from collections import deque
from datetime import UTC, datetime

import zmq

from daemon.runtime import wire
from daemon.runtime.control_text import decimals_for, fmt_number
from daemon.runtime.security import ClientKeys, CurveServer, Handshake, apply_client

__all__ = [
    "FORMAT",
    "Counter",
    "RecordReader",
    "RecordWriter",
    "Screen",
    "open_feed",
    "read_record",
    "record",
    "render",
    "replay",
    "wait_subscribed",
    "watch",
    "watch_state",
    "watch_update",
]

FORMAT = "posteriord-record/1"
TOPICS = ("pred/", "fit/", "alert/")
_LEN = struct.Struct(">I")
MAX_FRAME = 1 << 28


# ---------------------------------------------------------------------------------- files
class RecordWriter:
    """Append messages to a record file, writing the header line if the file is new."""

    def __init__(self, path, *, endpoint: str = "", topics=TOPICS, models: dict | None = None):
        self.path = os.fspath(path)
        exists = os.path.exists(self.path) and os.path.getsize(self.path) > 0
        if exists:
            _read_header(self.path)
        self._fh = open(self.path, "ab")
        if not exists:
            head = {"created": time.time(), "endpoint": endpoint, "topics": list(topics)}
            if models:
                # what the config says of each model: target tag, unit, level, detectors
                head["models"] = models
            self._fh.write(f"{FORMAT} {json.dumps(head, sort_keys=True)}\n".encode("ascii"))
        self.n = 0

    def write(self, received: float, topic: bytes | str, payload: bytes) -> None:
        if isinstance(topic, bytes):
            topic = topic.decode("utf-8", errors="replace")
        frame = wire.pack([float(received), topic, bytes(payload)])
        self._fh.write(_LEN.pack(len(frame)) + frame)
        self.n += 1

    def flush(self) -> None:
        self._fh.flush()

    def close(self) -> None:
        if not self._fh.closed:
            self._fh.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def _read_header(path: str) -> tuple[dict, int]:
    with open(path, "rb") as fh:
        line = fh.readline(65536)
    if not line.endswith(b"\n") or not line.startswith(FORMAT.encode() + b" "):
        raise ValueError(f"{path}: not a {FORMAT} file (first line {line[:60]!r})")
    try:
        head = json.loads(line[len(FORMAT) + 1:].decode("ascii"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ValueError(f"{path}: bad header line: {exc}") from None
    if not isinstance(head, dict):
        raise ValueError(f"{path}: bad header line: not a JSON object")
    return head, len(line)


class RecordReader:
    """Iterate a record file: ``(received, topic, body)`` with the body decoded.

    ``raw=True`` yields the payload bytes instead of the body. After iteration
    ``truncated`` tells whether the file ended inside a frame (a torn last write).
    """

    def __init__(self, path, *, raw: bool = False):
        self.path = os.fspath(path)
        self.header, self._start = _read_header(self.path)
        # optional: {model: {"target", "unit", ...}} when the recorder was given a config
        self.models = self.header.get("models") if isinstance(self.header.get("models"),
                                                              dict) else {}
        self.raw = raw
        self.truncated = False
        self.n = 0

    def __iter__(self):
        self.truncated = False
        self.n = 0
        with open(self.path, "rb") as fh:
            fh.seek(self._start)
            while True:
                head = fh.read(4)
                if not head:
                    return
                if len(head) < 4:
                    self.truncated = True
                    return
                (size,) = _LEN.unpack(head)
                if size > MAX_FRAME:
                    raise ValueError(f"{self.path}: frame {self.n} claims {size} bytes; "
                                     f"the file is damaged")
                frame = fh.read(size)
                if len(frame) < size:
                    self.truncated = True
                    return
                try:
                    received, topic, payload = wire.unpack(frame, MAX_FRAME)
                except (wire.WireError, ValueError, TypeError):
                    raise ValueError(f"{self.path}: frame {self.n} is not a "
                                     f"[received, topic, payload] array") from None
                self.n += 1
                body = payload if self.raw else wire.unpack(payload, MAX_FRAME)
                yield received, topic, body


def read_record(path, *, raw: bool = False):
    """The messages of a record file, as a list of ``(received, topic, body)``."""
    return list(RecordReader(path, raw=raw))


# ---------------------------------------------------------------------------------- replay
def open_feed(ctx: zmq.Context, endpoint: str, *,
              curve: CurveServer | None = None) -> zmq.Socket:
    """An XPUB bound at ``endpoint``, with no send limit (a replay must not drop).

    With ``curve`` the XPUB is a CURVE server: the daemon connects as a CURVE client when
    its config has ``curve_secret_key`` and ``curve_feed_server_key`` (this side's public
    key), and its public key must be in the server's clients folder.
    """
    sock = ctx.socket(zmq.XPUB)
    sock.setsockopt(zmq.SNDHWM, 0)
    sock.setsockopt(zmq.LINGER, 5000)
    if curve is not None:
        curve.apply(sock)
    sock.bind(endpoint)
    return sock


def feed_handshake(sock: zmq.Socket, *, curve: bool) -> Handshake:
    """Watch who fails to connect to the replay's feed (for the "no subscriber" message)."""
    return Handshake(sock, curve=curve, peer="a subscriber", server=True)


def wait_subscribed(sock: zmq.Socket, topics, timeout: float, *,
                    handshake: Handshake | None = None) -> set:
    """Wait until subscriptions covering every one of ``topics`` reached ``sock``.

    Returns the topics still missing (empty on success) when ``timeout`` seconds pass.
    With ``handshake`` (from :func:`feed_handshake`) the failed handshakes of would-be
    subscribers are collected meanwhile, in ``handshake.failures``.
    """
    missing = set(topics)
    subs: set[bytes] = set()
    deadline = time.monotonic() + timeout
    poller = zmq.Poller()
    poller.register(sock, zmq.POLLIN)
    if handshake is not None:
        poller.register(handshake.monitor, zmq.POLLIN)
    while missing:
        left = deadline - time.monotonic()
        if left <= 0:
            break
        ready = dict(poller.poll(max(1, int(left * 1000))))
        if handshake is not None and handshake.monitor in ready:
            handshake.read()
        if sock not in ready:
            continue
        msg = sock.recv()
        if msg[:1] == b"\x01":
            subs.add(msg[1:])
        elif msg[:1] == b"\x00":
            subs.discard(msg[1:])
        missing = {t for t in missing if not any(t.encode().startswith(s) for s in subs)}
    return missing


def replay(sock: zmq.Socket, messages, *, speed: float | None = None,
           progress: bool = False) -> int:
    """Send ``messages`` (``(arrival, topic, body)``, as from `feed_messages`) on ``sock``.

    With ``speed`` (recorded seconds per wall-clock second) each message leaves when its
    arrival time comes round; ``None`` sends as fast as possible. Returns the number sent.
    """
    if speed is not None and not (math.isfinite(speed) and speed > 0):
        raise ValueError(f"speed={speed!r}: must be a positive number (or None for as fast "
                         f"as possible)")
    bar = _bar(len(messages)) if progress else None
    send = sock.send_multipart
    packb = wire.packb
    n = 0
    try:
        if messages:
            t0, w0 = messages[0][0], time.monotonic()
        for arrival, topic, body in messages:
            if speed is not None:
                lag = w0 + (arrival - t0) / speed - time.monotonic()
                if lag > 0:
                    time.sleep(lag)
            send([topic.encode(), packb(body)])
            n += 1
            if bar is not None and n % 64 == 0:
                bar.update(64)
    finally:
        if bar is not None:
            bar.update(n % 64)
            bar.close()
    return n


def _bar(total: int):
    try:
        from tqdm import tqdm
    except ImportError:
        return None
    # disable=None: no bar when stderr is not a terminal
    return tqdm(total=total, unit="msg", file=sys.stderr, disable=None, leave=False)


# ---------------------------------------------------------------------------------- record
def _subscriber(ctx: zmq.Context, endpoint: str, topics, models,
                curve: ClientKeys | None) -> tuple[zmq.Socket, Handshake]:
    sock = ctx.socket(zmq.SUB)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVHWM, 0)
    prefixes = [p + m for p in topics for m in models] if models else list(topics)
    for p in prefixes:
        sock.setsockopt(zmq.SUBSCRIBE, p.encode())
    apply_client(sock, curve)
    # a refused client receives nothing; the monitor tells a refusal from a quiet daemon
    hs = Handshake(sock, curve=curve is not None, admit="curve_clients")
    sock.connect(endpoint)
    return sock, hs


def _wait(sock: zmq.Socket, hs: Handshake, ms: int) -> bool:
    """Wait up to ``ms`` for a message; raise HandshakeError if the daemon refuses us."""
    poller = zmq.Poller()
    poller.register(sock, zmq.POLLIN)
    poller.register(hs.monitor, zmq.POLLIN)
    ready = dict(poller.poll(ms))
    if hs.monitor in ready:
        hs.check()
    return sock in ready


class Counter:
    """What a recording has taken so far, shown on ``stream`` (stderr), never in the file.

    On a terminal one line is rewritten in place (at most every ``every_tty`` seconds);
    elsewhere a line is printed every ``every`` seconds. `done` prints the final count.
    """

    def __init__(self, stream=None, *, every: float = 10.0, every_tty: float = 0.5):
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.every = every_tty if self.tty else every
        self.kinds = {"pred": 0, "fit": 0, "alert": 0}
        self.n = 0
        self.start = time.monotonic()
        self._shown = self.start

    def add(self, topic: bytes) -> None:
        self.n += 1
        kind = topic.partition(b"/")[0].decode("ascii", "replace")
        if kind in self.kinds:
            self.kinds[kind] += 1

    def text(self) -> str:
        kinds = ", ".join(f"{v} {k}" for k, v in self.kinds.items())
        return (f"record: {self.n} message{'s' if self.n != 1 else ''} ({kinds}) in "
                f"{_age(time.monotonic() - self.start)}")

    def tick(self) -> None:
        now = time.monotonic()
        if now - self._shown < self.every:
            return
        self._shown = now
        self.stream.write(("\r\x1b[K" if self.tty else "") + self.text()
                          + ("" if self.tty else "\n"))
        self.stream.flush()

    def done(self, path) -> None:
        self.stream.write(("\r\x1b[K" if self.tty else "") + self.text()
                          + f", appended to {os.fspath(path)}\n")
        self.stream.flush()


def record(endpoint: str, path, *, topics=TOPICS, models=(), stop: threading.Event | None = None,
           duration: float | None = None, count: int | None = None,
           ctx: zmq.Context | None = None, curve: ClientKeys | None = None,
           described: dict | None = None, counter: Counter | None = None) -> int:
    """Subscribe to ``endpoint`` and append every message to the record file ``path``.

    Runs until ``stop`` is set, ``duration`` seconds have passed or ``count`` messages were
    written; returns the number written. ``models`` restricts the topics to those models.
    The file is flushed whenever the stream pauses and at least every quarter second.
    ``curve`` makes the subscriber a CURVE client. ``described`` ({model: {"target",
    "unit", ...}}, from the config) goes into the header of a new file; ``counter`` shows
    the count while it runs. Raises :class:`~daemon.runtime.security.HandshakeError` when
    the daemon refuses the connection (what was written until then stays in the file).
    """
    own = ctx is None
    ctx = ctx or zmq.Context()
    sock, hs = _subscriber(ctx, endpoint, topics, models, curve)
    deadline = None if duration is None else time.monotonic() + duration
    n = 0
    try:
        with RecordWriter(path, endpoint=endpoint, topics=topics, models=described) as out:
            last_flush = time.monotonic()
            while (stop is None or not stop.is_set()) and (count is None or n < count):
                now = time.monotonic()
                if deadline is not None and now >= deadline:
                    break
                wait = 100 if deadline is None else max(0, min(100, int((deadline - now) * 1e3)))
                if counter is not None:
                    counter.tick()
                if not _wait(sock, hs, wait):
                    out.flush()
                    last_flush = time.monotonic()
                    continue
                while count is None or n < count:
                    try:
                        topic, payload = sock.recv_multipart(zmq.NOBLOCK)[:2]
                    except zmq.Again:
                        break
                    except ValueError:  # a one-frame message: not from a daemon
                        continue
                    out.write(time.time(), topic, payload)
                    n += 1
                    if counter is not None:
                        counter.add(topic)
                if time.monotonic() - last_flush > 0.25:
                    out.flush()
                    last_flush = time.monotonic()
    finally:
        hs.close()
        sock.close()
        if own:
            ctx.term()
    return n


# ---------------------------------------------------------------------------------- watch
#: event lines kept in a watch view (lab results, trust changes, actions)
EVENTS_KEPT = 200


def watch_state(endpoint: str = "", unit: str = "", *, models=(),
                units: dict | None = None) -> dict:
    """An empty view: fill it with `watch_update`, show it with `render`.

    ``models``: names known in advance (from the config), shown before their first message;
    ``units``: {model: unit} (the config's ``unit``), else ``unit`` for every model.
    """
    state = {"endpoint": endpoint, "unit": unit, "units": dict(units or {}), "now": None,
             "models": {}, "events": deque(maxlen=EVENTS_KEPT)}
    for name in models:
        _entry(state, name)
    return state


def _entry(state: dict, name: str) -> dict:
    return state["models"].setdefault(name, {
        "pred": None, "fit": None, "trust": None, "reasons": [], "seen": None, "n_pred": 0,
        "n_fit": 0, "n_alert": 0, "last_lab_t": None, "scale": None})


def _scale(m: dict, std) -> None:
    """The model's number scale: its latest finite predictive std."""
    if isinstance(std, int | float) and math.isfinite(std) and std > 0:
        m["scale"] = float(std)


def watch_update(state: dict, topic: str, body: dict, received: float) -> str | None:
    """Take one daemon message into the view (the last prediction, fit and alert per model).

    Returns the event line of a lab result, trust change or action (also kept in
    ``state["events"]``), None for other messages.
    """
    kind, _, name = topic.partition("/")
    if kind not in ("pred", "fit", "alert") or not name:
        return None
    m = _entry(state, name)
    m["seen"] = received
    state["now"] = received if state["now"] is None else max(state["now"], received)
    event = None
    if kind == "pred":
        if isinstance(body.get("t"), list):
            k = len(body["t"])
            row = {key: (body[key][-1] if isinstance(body.get(key), list) else body.get(key))
                   for key in ("t", "mean", "std", "lo", "hi", "status", "dof")}
            row["level"] = body.get("level")
            m["n_pred"] += k
        elif isinstance(body.get("t"), bytes | bytearray):
            row = _packed_last(body)
            m["n_pred"] += max(1, len(body["t"]) // 8)
        else:
            row = dict(body)
            m["n_pred"] += 1
        m["pred"] = row
        _scale(m, row.get("std"))
        if body.get("trust") is not None:
            m["trust"] = body["trust"]
    elif kind == "fit":
        m["fit"] = dict(body)
        m["n_fit"] += 1
        _scale(m, body.get("pred_std"))
        if body.get("accepted"):
            m["last_lab_t"] = body.get("t")
        if body.get("trust") is not None:
            m["trust"] = body["trust"]
        event = _lab_event(state, name, m, body)
    else:
        m["n_alert"] += 1
        if body.get("kind") == "state":
            m["trust"] = body.get("new")
            m["reasons"] = [r.get("name", "?") for r in body.get("reasons", [])
                            if isinstance(r, dict)]
            why = ", ".join(m["reasons"]) or "no reasons left"
            event = (f"{_stamp(body.get('t'))}  {name}  trust {body.get('old')} -> "
                     f"{body.get('new')} ({why})")
        elif body.get("kind") == "reset":
            m["reasons"] = []
            m["trust"] = body.get("state", m["trust"])
            event = f"{_stamp(body.get('t'))}  {name}  reset to its prior"
        elif body.get("kind") == "ack":
            event = f"{_stamp(body.get('t'))}  {name}  alert reasons acknowledged"
        elif body.get("kind") == "action":
            action = body.get("action")
            if action in ("freeze", "resume"):
                who = f" by {body['by']}" if body.get("by") else ""
                what = "learning frozen" if action == "freeze" else "learning resumed"
                if action == "freeze" and m["pred"]:
                    m["pred"]["status"] = "frozen"  # as the next prediction will say
                event = (f"{_stamp(body.get('t'))}  {name}  {what}{who}: "
                         f"{body.get('reason') or '(no reason given)'}")
            else:
                event = (f"{_stamp(body.get('t'))}  {name}  {action} after "
                         f"{body.get('reason')}")
    if event is not None:
        state["events"].append(event)
    return event


def _packed_last(body: dict) -> dict:
    """The last row of a packed block's answer (bins of little-endian float64)."""
    row = {"level": body.get("level")}
    for key in ("t", "mean", "std", "lo", "hi", "dof"):
        v = body.get(key)
        row[key] = (struct.unpack_from("<d", v, len(v) - 8)[0]
                    if isinstance(v, bytes | bytearray) and len(v) >= 8 else None)
    status = body.get("status")
    row["status"] = status[-1] if isinstance(status, list) and status else status
    return row


def _unit_of(state: dict, name: str) -> str:
    return state["units"].get(name) or state.get("unit") or ""


def _lab_event(state: dict, name: str, m: dict, f: dict) -> str:
    d = decimals_for(m["scale"])
    unit = _unit_of(state, name)
    pm, ps = f.get("pred_mean"), f.get("pred_std")
    if not isinstance(pm, int | float) or not math.isfinite(pm):
        pred = "no prediction yet"
    else:
        pred = f"pred {fmt_number(pm, d)} ± {fmt_number(ps, d)}"
    z = f.get("z")
    zs = f"z {z:+.2f}" if isinstance(z, int | float) and math.isfinite(z) else "z -"
    if f.get("accepted"):
        what = "learned" + (" (gate opened)" if f.get("reason") == "gate_open" else "")
    else:
        what = f"REJECTED ({f.get('reason')})"
    late = " late" if f.get("late") else ""
    return (f"{_stamp(f.get('t'))}  {name}  lab {fmt_number(f.get('y'), d)}{_u(unit)}  "
            f"{pred}  {zs}  {what}{late}")


def _u(unit: str) -> str:
    return f" {unit}" if unit else ""


def _stamp(t) -> str:
    if not isinstance(t, int | float) or not math.isfinite(t):
        return "-"
    return datetime.fromtimestamp(float(t), UTC).strftime("%Y-%m-%d %H:%M")


_COLORS = {"normal": "\x1b[32m", "caution": "\x1b[33m", "untrusted": "\x1b[31;1m"}
_RESET = "\x1b[0m"


def _age(seconds) -> str:
    if seconds is None or not math.isfinite(seconds):
        return "-"
    s = max(0.0, float(seconds))
    if s < 10:
        return f"{s:.1f}s"
    if s < 90:
        return f"{s:.0f}s"
    if s < 5400:
        return f"{s / 60:.0f}m"
    if s < 172800:
        h, rem = divmod(int(s), 3600)
        return f"{h}h{rem // 60:02d}m"
    return f"{s / 86400:.1f}d"


#: the width the layout is made for (a terminal of 80 columns shows every field)
WIDTH = 80


def render(state: dict, *, width: int | None = None, color: bool = False,
           events: int = 0) -> str:
    """The watch view as text: a title line, a header, two lines per model, and the last
    ``events`` event lines (lab results at their drawn time, trust changes, actions).

    Fits 80 columns. Pure: everything comes from ``state`` (``state["now"]`` is the
    wall-clock time the ages are measured against). Numbers show the model's std to two
    significant digits (`decimals_for`). Prediction and lab ages are in feed time (the time
    stamps of the messages), message age in wall-clock time.
    """
    now = state.get("now")
    models = state["models"]
    feed_t = max((m["pred"]["t"] for m in models.values()
                  if m["pred"] and isinstance(m["pred"].get("t"), int | float)), default=None)
    n = len(models)
    tail = f"  {n} model{'s' if n != 1 else ''}"
    if feed_t is not None:
        tail = f"  feed {datetime.fromtimestamp(feed_t, UTC):%Y-%m-%d %H:%M} UTC" + tail
    endpoint = state.get("endpoint", "")
    room = WIDTH - len("posteriord watch  ") - len(tail)
    if len(endpoint) > room:
        # a long ipc path: its start and end (the socket's name) within 80 columns
        keep = max(8, room - 1)
        endpoint = endpoint[:keep // 2] + "~" + endpoint[len(endpoint) - (keep - keep // 2):]
    title = f"posteriord watch  {endpoint}".rstrip() + tail
    levels = {m["pred"].get("level") for m in models.values() if m["pred"]}
    level = levels.pop() if len(levels) == 1 else None
    pct = f" ({100 * level:.0f}%)" if isinstance(level, int | float) else ""
    head = (f"{'model':<20} {'prediction':>18} {'interval' + pct:>17} {'status':<9} "
            f"{'trust':<9}")
    lines = [title, head]
    if not models:
        lines.append("(no messages yet)")
    for name in sorted(models):
        m = models[name]
        p, f = m["pred"], m["fit"]
        d = decimals_for(m["scale"])
        u = _u(_unit_of(state, name))
        if p:
            pred = f"{fmt_number(p.get('mean'), d)} ± {fmt_number(p.get('std'), d)}{u}"
            interval = f"[{fmt_number(p.get('lo'), d)}, {fmt_number(p.get('hi'), d)}]"
            status = str(p.get("status") or "-")
        else:
            pred, interval, status = "-", "-", "-"
        trust = m["trust"] or "-"
        trust_cell = f"{trust:<9}"
        if color and trust in _COLORS:
            trust_cell = f"{_COLORS[trust]}{trust:<9}{_RESET}"
        shown = name if len(name) <= 20 else name[:19] + "~"
        lines.append(f"{shown:<20} {pred:>18} {interval:>17} {status[:9]:<9} {trust_cell}")
        if m["seen"] is None:
            lines.append("  no messages yet")
            continue
        parts = []
        if f:
            mark = "" if f.get("accepted") else " REJECTED"
            z = f.get("z")
            zs = f", z {z:+.2f}" if isinstance(z, int | float) and math.isfinite(z) else ""
            parts.append(f"lab {fmt_number(f.get('y'), d)} "
                         f"({fmt_number(f.get('resid'), d, sign=True)}{zs}){mark}")
        lab_age = None
        if p and m["last_lab_t"] is not None and isinstance(p.get("t"), int | float):
            lab_age = p["t"] - m["last_lab_t"]
        if lab_age is not None:
            parts.append(f"lab age {_age(lab_age)}")
        msg_age = None if now is None or m["seen"] is None else now - m["seen"]
        parts.append(f"msg {_age(msg_age)}")
        if m["reasons"] and trust != "normal":
            # the reasons first; as many as leave the rest of the line within 80 columns
            room = WIDTH - len("  why: ; " + "; ".join(parts))
            why = "+".join(m["reasons"])
            k = len(m["reasons"])
            while len(why) > room and k > 1:
                k -= 1
                why = "+".join(m["reasons"][:k]) + f" +{len(m['reasons']) - k}"
            parts.insert(0, f"why: {why}")
        lines.append("  " + "; ".join(parts))
    if events and state.get("events"):
        lines.append("events (lab results at their drawn time, as they arrive):")
        lines += ["  " + e for e in list(state["events"])[-events:]]
    if width:
        lines = [_clip(line, width) for line in lines]
    return "\n".join(lines)


def _clip(line: str, width: int) -> str:
    # escape sequences take no room on the screen; count only what is printed
    out, shown, i = [], 0, 0
    while i < len(line):
        if line[i] == "\x1b":
            j = line.find("m", i)
            if j < 0:
                break
            out.append(line[i:j + 1])
            i = j + 1
            continue
        if shown >= width:
            i += 1
            continue
        out.append(line[i])
        shown += 1
        i += 1
    return "".join(out)


class Screen:
    """A frame redrawn in place at the bottom of a terminal, with text scrolling above it.

    On a terminal the previous frame is erased with ANSI cursor movement (no curses needed);
    elsewhere `show` prints nothing and `final` prints the last frame once.
    """

    def __init__(self, stream=None):
        self.stream = stream or sys.stdout
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._lines = 0
        self._frame = ""

    def _erase(self) -> None:
        if self._lines:
            self.stream.write(f"\x1b[{self._lines}F\x1b[J")
            self._lines = 0

    def show(self, frame: str) -> None:
        self._frame = frame
        if not self.tty:
            return
        self._erase()
        self.stream.write(frame + "\n")
        self._lines = frame.count("\n") + 1
        self.stream.flush()

    def above(self, text: str) -> None:
        """Print ``text`` above the frame (the frame is redrawn under it)."""
        if self.tty:
            self._erase()
            self.stream.write(text + "\n")
            if self._frame:
                self.stream.write(self._frame + "\n")
                self._lines = self._frame.count("\n") + 1
            self.stream.flush()
        else:
            self.stream.write(text + "\n")

    def final(self) -> None:
        """Leave the last frame on the screen (printed once when not a terminal)."""
        if not self.tty and self._frame:
            self.stream.write(self._frame + "\n")
            self.stream.flush()


def watch(endpoint: str, *, models=(), unit: str = "", duration: float | None = None,
          count: int | None = None, refresh: float = 0.5, stop: threading.Event | None = None,
          stream=None, color: bool | None = None, ctx: zmq.Context | None = None,
          curve: ClientKeys | None = None, known=(), units: dict | None = None,
          events: int = 8) -> dict:
    """Subscribe to a daemon's publisher and keep the view on the screen up to date.

    Stops when ``stop`` is set, after ``duration`` seconds or ``count`` messages; returns
    the final state. ``known`` (model names from the config) are shown before their first
    message, ``units`` ({model: unit}) label their numbers. On a terminal the last
    ``events`` event lines (lab results, trust changes, actions) are shown below the table;
    elsewhere each event line is printed as it comes and the table once at the end.
    ``curve`` makes the subscriber a CURVE client; raises
    :class:`~daemon.runtime.security.HandshakeError` when the daemon refuses it.
    """
    import shutil

    own = ctx is None
    ctx = ctx or zmq.Context()
    sock, hs = _subscriber(ctx, endpoint, TOPICS, models, curve)
    screen = Screen(stream)
    color = screen.tty if color is None else color
    state = watch_state(endpoint, unit, models=known, units=units)
    deadline = None if duration is None else time.monotonic() + duration
    drawn = 0.0
    n = 0

    def frame() -> str:
        if not screen.tty:
            return render(state, color=color)
        size = shutil.get_terminal_size()
        # the table, then as many event lines as the terminal has room for (up to events)
        table = 3 + 2 * len(state["models"])
        room = max(0, min(events, size.lines - table - 2))
        return render(state, width=size.columns, color=color, events=room)

    try:
        while (stop is None or not stop.is_set()) and (count is None or n < count):
            now = time.monotonic()
            if deadline is not None and now >= deadline:
                break
            if _wait(sock, hs, 100):
                while count is None or n < count:
                    try:
                        frames = sock.recv_multipart(zmq.NOBLOCK)
                    except zmq.Again:
                        break
                    if len(frames) != 2:
                        continue
                    try:
                        body = wire.unpack(frames[1], MAX_FRAME)
                    except wire.WireError:
                        continue
                    if isinstance(body, dict):
                        line = watch_update(state, frames[0].decode("utf-8", "replace"),
                                            body, time.time())
                        if line is not None and not screen.tty:
                            screen.above(line)
                    n += 1
            if time.monotonic() - drawn >= refresh:
                state["now"] = time.time()
                screen.show(frame())
                drawn = time.monotonic()
        state["now"] = time.time()
        screen.show(frame())
        screen.final()
    finally:
        hs.close()
        sock.close()
        if own:
            ctx.term()
    return state
