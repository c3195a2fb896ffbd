"""Shared helpers of the daemon integration tests.

Everything goes over real sockets: the test publishes the feed on an XPUB bound to a free
loopback port (so it can see when the daemon's SUB has subscribed), reads the daemon's
output on a SUB, talks to the control socket with a REQ, and scrapes the metrics over HTTP.
Nothing waits with a bare sleep: every wait polls a socket (or a condition) with a deadline.

The daemon's PUB has no way to say when a subscriber has joined, so every daemon under test
also runs a one-input "probe" model. Feed messages are handled in order, so once the
prediction for a probe sample comes back, every output of what was sent before it has been
published (:meth:`Link.barrier`).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import socket
import tempfile
import threading
import time
import urllib.request
from dataclasses import replace
from pathlib import Path

import msgpack
import pytest
import zmq
from prometheus_client.parser import text_string_to_metric_families

from daemon.config import loads
from daemon.workbench import plant

MODEL = "c301.bottoms_solvent"
PROBE = "probe"
TIMEOUT = 10.0

PROBE_MODEL = {"name": PROBE, "inputs": [{"tag": "p", "lo": 0, "hi": 1}],
               "basis": {"kind": "identity"}}


# ---------------------------------------------------------------------------------- basics
def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago (the kernel picks it)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def sock_dir(tmp_path):
    """A folder for ipc:// endpoints; short, because a socket path has at most 107 bytes."""
    if len(str(tmp_path)) <= 80:
        yield tmp_path
        return
    short = Path(tempfile.mkdtemp(prefix="pd-"))
    try:
        yield short
    finally:
        shutil.rmtree(short, ignore_errors=True)


def ipc(folder: Path, name: str) -> str:
    return f"ipc://{folder / name}"


def wait_until(condition, timeout: float = TIMEOUT, what: str = "condition", step=0.02):
    """Poll ``condition()`` until it returns something truthy; fail after ``timeout`` s."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"{what} not reached within {timeout} s")
        time.sleep(step)


def decode_output(frames) -> tuple[str, dict]:
    """A daemon output message: (topic, body), decoded with msgpack itself."""
    assert len(frames) == 2, f"output message with {len(frames)} frames"
    return bytes(frames[0]).decode(), msgpack.unpackb(bytes(frames[1]), raw=False)


def recv_until(sock, predicate, timeout: float = TIMEOUT, decode=decode_output) -> list:
    """Receive (and decode) messages until one satisfies ``predicate``.

    Returns every message received, the matching one last. Raises AssertionError when the
    deadline passes first.
    """
    deadline = time.monotonic() + timeout
    got: list = []
    while True:
        left = deadline - time.monotonic()
        if left <= 0:
            raise AssertionError(f"no matching message within {timeout} s; got {len(got)}, "
                                 f"last ones: {got[-3:]!r:.600}")
        if sock.poll(max(1, int(left * 1000))):
            item = decode(sock.recv_multipart())
            got.append(item)
            if predicate(item):
                return got


def recv_count(sock, n: int, timeout: float = TIMEOUT) -> list:
    """Exactly the next ``n`` messages."""
    got: list = []
    if n == 0:
        return got
    recv_until(sock, lambda m: got.append(m) or len(got) >= n, timeout)
    return got


# ---------------------------------------------------------------------------------- config
def _toml_key(k: str) -> str:
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else json.dumps(k)


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"no TOML for {v!r}")


def toml_config(daemon: dict, models: list[dict]) -> str:
    """TOML text for a ``[daemon]`` table and ``[[model]]`` tables (sub-tables as dicts)."""
    lines = ["[daemon]"] + [f"{k} = {_toml_value(v)}" for k, v in daemon.items()]
    for m in models:
        lines += ["", "[[model]]"]
        lines += [f"{k} = {_toml_value(v)}" for k, v in m.items() if not isinstance(v, dict)]
        for k, v in m.items():
            if isinstance(v, dict):
                lines.append(f"[model.{k}]")
                lines += [f"{kk} = {_toml_value(vv)}" for kk, vv in v.items()]
    return "\n".join(lines) + "\n"


class Recorder:
    """Stands in for the PUB socket of an in-process Service: keeps every (topic, body)."""

    def __init__(self):
        self.out: list[tuple[str, dict]] = []

    def send_multipart(self, frames) -> None:
        self.out.append((bytes(frames[0]).decode(),
                         msgpack.unpackb(bytes(frames[1]), raw=False)))

    def bodies(self, prefix: str) -> list[dict]:
        return [b for topic, b in self.out if topic.startswith(prefix)]


def c301_model(name: str = MODEL, **tables) -> dict:
    """A model of the simulated C-301 column; keyword arguments replace whole sub-tables."""
    m = {
        "name": name,
        "level": 0.95,
        "inputs": [{"tag": tag, "lo": lo, "hi": hi} for tag, (lo, hi) in plant.RANGES.items()],
        "basis": {"kind": "polynomial", "degree": 2, "interactions": True,
                  "family": "legendre"},
        "prior": {"alpha": 1e-4},
        "noise": {"guess": 10.0, "strength": 2.0},
        "forgetting": {"policy": "stabilized", "half_life": "1d"},
        "gate": {"k": 4.0, "release": 3},
        "lab": {"keep": "12h", "keep_count": 5000, "tolerance": "2m", "stale_after": "12h"},
        "alerts": dict(DETECTORS_FROM_THE_START),
    }
    for key, value in tables.items():
        if value is None:
            m.pop(key, None)
        elif key == "alerts":
            m[key] = {**DETECTORS_FROM_THE_START, **value}
        else:
            m[key] = value
    return m


# The daemon tests judge the detectors from the first result: no commissioning, and the
# learned region from n_inputs + 1 results (tests of those two turn them back on).
DETECTORS_FROM_THE_START = {"commissioning_labs": 0, "commissioning_time": "0s",
                            "region_min_samples": 1}


# ---------------------------------------------------------------------------------- sockets
class FeedPublisher:
    """The test's end of the feed: an XPUB, so the daemon's subscriptions can be awaited."""

    def __init__(self, ctx: zmq.Context):
        self.sock = ctx.socket(zmq.XPUB)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.setsockopt(zmq.SNDHWM, 0)  # a burst must not be dropped on our side
        self.sock.setsockopt(zmq.XPUB_VERBOSE, 1)
        port = self.sock.bind_to_random_port("tcp://127.0.0.1")
        self.endpoint = f"tcp://127.0.0.1:{port}"
        self.subscribed: set[str] = set()
        self.events: list[tuple[str, str]] = []

    def _take(self, frames) -> tuple[str, str]:
        raw = bytes(frames[0])
        kind, topic = ("sub" if raw[:1] == b"\x01" else "unsub"), raw[1:].decode()
        (self.subscribed.add if kind == "sub" else self.subscribed.discard)(topic)
        self.events.append((kind, topic))
        return kind, topic

    def wait_subscribed(self, names, timeout: float = TIMEOUT) -> None:
        names = set(names)
        if names <= self.subscribed:
            return
        recv_until(self.sock, lambda _: names <= self.subscribed, timeout, decode=self._take)

    def wait_event(self, kind: str, topic: str, timeout: float = TIMEOUT) -> None:
        recv_until(self.sock, lambda e: e == (kind, topic), timeout, decode=self._take)

    def drain_events(self) -> None:
        """Take the subscription changes that have arrived, without waiting."""
        while self.sock.poll(0):
            self._take(self.sock.recv_multipart())

    def send(self, topic: str, body) -> None:
        self.sock.send_multipart([topic.encode(), msgpack.packb(body, use_bin_type=True)])

    def send_frames(self, frames: list[bytes]) -> None:
        self.sock.send_multipart(frames)


class Control:
    """A REQ client of the control socket; every reply must come within ``timeout``."""

    def __init__(self, ctx: zmq.Context, endpoint: str, timeout: float = TIMEOUT):
        self.sock = ctx.socket(zmq.REQ)
        self.sock.setsockopt(zmq.LINGER, 0)
        self.sock.setsockopt(zmq.RCVTIMEO, int(timeout * 1000))
        self.sock.setsockopt(zmq.SNDTIMEO, int(timeout * 1000))
        self.sock.connect(endpoint)

    def raw(self, frames: list[bytes]) -> dict:
        self.sock.send_multipart(frames)
        try:
            return msgpack.unpackb(self.sock.recv(), raw=False)
        except zmq.Again:
            raise AssertionError("no reply on the control socket") from None

    def __call__(self, cmd: str, **fields) -> dict:
        return self.raw([msgpack.packb({"cmd": cmd, **fields})])


def scrape(address) -> dict:
    """All samples of the daemon's /metrics, keyed by (sample name, frozenset of labels)."""
    host, port = address
    with urllib.request.urlopen(f"http://{host}:{port}/metrics", timeout=TIMEOUT) as r:
        text = r.read().decode()
    out = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def metric(samples: dict, name: str, **labels) -> float:
    """One sample's value; 0 for a counter sample not exported yet."""
    return samples.get((name, frozenset(labels.items())), 0.0)


def rejected(samples: dict, model: str, reason: str) -> float:
    return metric(samples, "posteriord_rejected_total", model=model, reason=reason)


# ---------------------------------------------------------------------------------- a daemon
class Link:
    """The test's sockets around one running daemon (in-process or a subprocess)."""

    def __init__(self, ctx: zmq.Context, feed: FeedPublisher):
        self.ctx = ctx
        self.feed = feed
        self.out = None
        self.ctl = None
        self._probe_t = 0.0

    def connect(self, publish: str, control: str, names, timeout: float = TIMEOUT) -> None:
        """Wait for the daemon's subscriptions, then for its first output to reach us."""
        self.feed.wait_subscribed(set(names) | {PROBE}, timeout)
        self.out = self.ctx.socket(zmq.SUB)
        self.out.setsockopt(zmq.LINGER, 0)
        self.out.setsockopt(zmq.RCVHWM, 0)
        # predictions and fits only: other topics (alerts...) belong to other tests
        self.out.setsockopt(zmq.SUBSCRIBE, b"pred/")
        self.out.setsockopt(zmq.SUBSCRIBE, b"fit/")
        self.out.connect(publish)
        self.ctl = Control(self.ctx, control)
        # slow joiner: probe samples are lost until our subscription reaches the daemon
        deadline = time.monotonic() + timeout
        while True:
            self._probe_t += 1.0
            self.feed.send(PROBE, {"t": self._probe_t, "x": [0.5]})
            if self.out.poll(20):
                break
            if time.monotonic() > deadline:
                raise AssertionError("no output from the daemon")
        self.barrier()

    def barrier(self, timeout: float = TIMEOUT) -> list[tuple[str, dict]]:
        """Outputs of everything sent so far (probe outputs left out), in publication order."""
        self._probe_t += 1.0
        t = self._probe_t
        self.feed.send(PROBE, {"t": t, "x": [0.5]})
        got = recv_until(self.out, lambda m: m[0] == f"pred/{PROBE}" and m[1]["t"] == t,
                         timeout)
        return [m for m in got if not m[0].endswith(f"/{PROBE}")]

    def posterior(self, model: str = MODEL) -> dict:
        reply = self.ctl("posterior", model=model)
        assert reply["ok"], reply
        return reply

    def close(self) -> None:
        for s in (self.out, self.ctl.sock if self.ctl else None, self.feed.sock):
            if s is not None:
                s.close(linger=0)


class ServiceHarness(Link):
    """An in-process :class:`daemon.runtime.service.Service` running in a thread."""

    def __init__(self, folder: Path, models: list[dict], *, metrics: bool = True,
                 own_context: bool = True, **daemon):
        from daemon.runtime.service import Service

        ctx = zmq.Context()
        super().__init__(ctx, FeedPublisher(ctx))
        settings = {"feeds": [self.feed.endpoint], "publish": ipc(folder, "pub"),
                    "control": ipc(folder, "ctl"), "metrics": "",
                    "state_dir": str(folder / "state"), "log_level": "warning", **daemon}
        config = loads(toml_config(settings, [*models, PROBE_MODEL]), "<test>")
        if metrics:
            # port 0 is refused by the parser (a config names a real port) but lets the
            # kernel pick a free one here; Service.metrics_address tells which
            config = replace(config, daemon=replace(config.daemon, metrics="127.0.0.1:0"))
        self.config = config
        self.svc = Service(config, context=None if own_context else ctx)
        self.svc.open()
        # read before the loop thread owns the sockets
        publish, control = self.svc.publish_endpoint, self.svc.control_endpoint
        self.metrics_address = self.svc.metrics_address
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._run, name="posteriord", daemon=True)
        self.thread.start()
        self.stopped = False
        self.connect(publish, control, [m["name"] for m in models])

    def _run(self) -> None:
        try:
            self.rc = self.svc.run()
        except BaseException as exc:  # kept for the test to report
            self.error = exc
            raise

    def model_config(self, name: str = MODEL):
        return next(m for m in self.config.models if m.name == name)

    def scrape(self) -> dict:
        return scrape(self.metrics_address)

    def alive(self) -> bool:
        return self.thread.is_alive() and self.error is None

    def stop(self) -> list[str]:
        """Stop the loop (as a signal would), join it, close the test's sockets."""
        if not self.stopped:
            self.stopped = True
            self.svc.post_event("stop")
            self.thread.join(TIMEOUT)
            assert not self.thread.is_alive(), "the service loop did not stop"
            self.close()
            self.ctx.term()
        if self.error is not None:
            raise AssertionError(f"the service loop failed: {self.error!r}")
        return self.svc.closed_order


@pytest.fixture
def start_service(sock_dir):
    """Factory of in-process daemons; each is stopped at the end of the test."""
    started: list[ServiceHarness] = []
    n = [0]

    def start(models: list[dict], **kwargs) -> ServiceHarness:
        n[0] += 1
        folder = sock_dir / f"s{n[0]}"
        folder.mkdir()
        h = ServiceHarness(folder, models, **kwargs)
        started.append(h)
        return h

    yield start
    for h in started:
        h.stop()


def blas_env() -> dict:
    """Environment of daemon subprocesses: one BLAS thread, as tools/test runs them."""
    env = dict(os.environ)
    env.update(OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    return env
