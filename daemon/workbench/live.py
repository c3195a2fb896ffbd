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
from datetime import UTC, datetime

import zmq

from daemon.runtime import wire
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
def watch_state(endpoint: str = "", unit: str = "") -> dict:
    """An empty view: fill it with `watch_update`, show it with `render`."""
    return {"endpoint": endpoint, "unit": unit, "now": None, "models": {}}


def watch_update(state: dict, topic: str, body: dict, received: float) -> None:
    """Take one daemon message into the view (the last prediction, fit and alert per model)."""
    kind, _, name = topic.partition("/")
    if kind not in ("pred", "fit", "alert") or not name:
        return
    m = state["models"].setdefault(name, {"pred": None, "fit": None, "trust": None,
                                          "reasons": [], "seen": None, "n_pred": 0,
                                          "n_fit": 0, "n_alert": 0, "last_lab_t": None})
    m["seen"] = received
    state["now"] = received if state["now"] is None else max(state["now"], received)
    if kind == "pred":
        if isinstance(body.get("t"), list):
            k = len(body["t"])
            row = {key: (body[key][-1] if isinstance(body.get(key), list) else body.get(key))
                   for key in ("t", "mean", "std", "lo", "hi", "status", "dof")}
            row["level"] = body.get("level")
            m["n_pred"] += k
        else:
            row = dict(body)
            m["n_pred"] += 1
        m["pred"] = row
        if body.get("trust") is not None:
            m["trust"] = body["trust"]
    elif kind == "fit":
        m["fit"] = dict(body)
        m["n_fit"] += 1
        if body.get("accepted"):
            m["last_lab_t"] = body.get("t")
        if body.get("trust") is not None:
            m["trust"] = body["trust"]
    else:
        m["n_alert"] += 1
        if body.get("kind") == "state":
            m["trust"] = body.get("new")
            m["reasons"] = [r.get("name", "?") for r in body.get("reasons", [])]
        elif body.get("kind") == "reset":
            m["reasons"] = []
            m["trust"] = body.get("state", m["trust"])


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


def _f(v, fmt: str = ".1f") -> str:
    if v is None or not isinstance(v, int | float) or not math.isfinite(v):
        return "-"
    return format(v, fmt)


def render(state: dict, *, width: int | None = None, color: bool = False) -> str:
    """The watch view as text: a title line, a header, one line per model.

    Pure: everything comes from ``state`` (``state["now"]`` is the wall-clock time the ages
    are measured against). Prediction and lab ages are in feed time (the time stamps of the
    messages), message age in wall-clock time.
    """
    unit = state.get("unit") or ""
    u = f" {unit}" if unit else ""
    now = state.get("now")
    feed_t = max((m["pred"]["t"] for m in state["models"].values()
                  if m["pred"] and isinstance(m["pred"].get("t"), int | float)), default=None)
    title = f"posteriord watch  {state.get('endpoint', '')}".rstrip()
    if feed_t is not None:
        title += f"  feed time {datetime.fromtimestamp(feed_t, UTC):%Y-%m-%d %H:%M} UTC"
    n = len(state["models"])
    title += f"  {n} model{'s' if n != 1 else ''}"
    head = (f"{'model':<24} {'prediction':>18} {'interval':>18} {'status':<9} {'trust':<9} "
            f"{'reasons':<24} {'last lab (resid, z)':<36} {'lab age':>8} {'msg age':>8}")
    lines = [title, head]
    if not state["models"]:
        lines.append("(no messages yet)")
    for name in sorted(state["models"]):
        m = state["models"][name]
        p, f = m["pred"], m["fit"]
        if p:
            pred = f"{_f(p.get('mean'))} ± {_f(p.get('std'))}{u}"
            lvl = p.get("level")
            pct = f"{100 * lvl:.0f}% " if isinstance(lvl, int | float) else ""
            interval = f"{pct}[{_f(p.get('lo'))}, {_f(p.get('hi'))}]"
            status = str(p.get("status") or "-")
        else:
            pred, interval, status = "-", "-", "-"
        trust = m["trust"] or "-"
        reasons = "+".join(m["reasons"]) if m["reasons"] and trust != "normal" else "-"
        if f:
            mark = "" if f.get("accepted") else " REJECTED"
            lab = (f"{_f(f.get('y'))} ({_f(f.get('resid'), '+.1f')}, "
                   f"{_f(f.get('z'), '+.2f')}){mark}")
        else:
            lab = "-"
        lab_age = None
        if p and m["last_lab_t"] is not None and isinstance(p.get("t"), int | float):
            lab_age = p["t"] - m["last_lab_t"]
        msg_age = None if now is None or m["seen"] is None else now - m["seen"]
        trust_cell = f"{trust:<9}"
        if color and trust in _COLORS:
            trust_cell = f"{_COLORS[trust]}{trust:<9}{_RESET}"
        line = (f"{name[:24]:<24} {pred:>18} {interval:>18} {status[:9]:<9} {trust_cell} "
                f"{reasons[:24]:<24} {lab[:36]:<36} {_age(lab_age):>8} {_age(msg_age):>8}")
        lines.append(line)
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
          curve: ClientKeys | None = None) -> dict:
    """Subscribe to a daemon's publisher and keep the view on the screen up to date.

    Stops when ``stop`` is set, after ``duration`` seconds or ``count`` messages; returns
    the final state. ``curve`` makes the subscriber a CURVE client; raises
    :class:`~daemon.runtime.security.HandshakeError` when the daemon refuses it.
    """
    import shutil

    own = ctx is None
    ctx = ctx or zmq.Context()
    sock, hs = _subscriber(ctx, endpoint, TOPICS, models, curve)
    screen = Screen(stream)
    color = screen.tty if color is None else color
    state = watch_state(endpoint, unit)
    deadline = None if duration is None else time.monotonic() + duration
    drawn = 0.0
    n = 0

    def width():
        return shutil.get_terminal_size().columns if screen.tty else None

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
                        watch_update(state, frames[0].decode("utf-8", "replace"), body,
                                     time.time())
                    n += 1
            if time.monotonic() - drawn >= refresh:
                state["now"] = time.time()
                screen.show(render(state, width=width(), color=color))
                drawn = time.monotonic()
        state["now"] = time.time()
        screen.show(render(state, width=width(), color=color))
        screen.final()
    finally:
        hs.close()
        sock.close()
        if own:
            ctx.term()
    return state
