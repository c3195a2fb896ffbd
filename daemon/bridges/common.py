"""What every bridge shares: the feed end that waits for the daemon's subscriptions, the
reading of the daemon's outputs, metrics and counted rejections.

The feed end is an XPUB: unlike a PUB it sees the subscriptions of the daemon's SUB, so a
bridge holds the samples of a model until the daemon has subscribed to it (a PUB would drop
them silently: the slow-joiner loss). Held samples sit in a bounded queue per model; what
overflows is counted as dropped, never lost without a sign.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import datetime as _dt
import math
from pathlib import Path

import numpy as np
import zmq
from prometheus_client import CollectorRegistry, Counter, Gauge, start_http_server

from daemon.logsetup import RateLimitedLog
from daemon.runtime import wire

# Why a bridge did not pass something on: a bounded set, so they can be metric labels.
REASONS = (
    "bad_value",      # a reading that is not a finite number (or not a number at all)
    "bad_quality",    # the OPC UA status of a reading is Bad: the reading is missing
    "no_time",        # neither a source nor a server timestamp
    "not_newer",      # a row no later than the last one published for the model
    "incomplete",     # some input of the model has no usable reading yet
    "no_subscriber",  # the daemon was not subscribed and the hold queue was full
    "bad_message",    # an MQTT payload or daemon output that cannot be read
    "unknown_model",  # a topic or file naming no configured model
    "bad_lab",        # a lab result without a usable value or drawn time
    "bad_file",       # a lab CSV file that cannot be read as a whole
    "write_refused",  # a value an existing OPC UA server did not take (type, access, status)
)

HOLD = 10000  # samples held per model while the daemon is not subscribed


def epoch(ts: _dt.datetime | None) -> float | None:
    """Seconds since 1970 of an OPC UA timestamp (naive ones are UTC), or None."""
    if ts is None:
        return None
    if ts.tzinfo is None:
        ts = ts.replace(tzinfo=_dt.UTC)
    t = ts.timestamp()
    # OPC UA's "no time" is the minimum DateTime (year 1601), before 1970
    return t if t > 0 else None


def number(v) -> float | None:
    """A reading as a finite float, or None (booleans count as 0 and 1, like a digital tag)."""
    if isinstance(v, bool):
        return float(v)
    if isinstance(v, int | float | np.integer | np.floating):
        f = float(v)
        return f if math.isfinite(f) else None
    return None


# Every metric family of the bridges, declared once: (attribute, type, name, labels, help).
# docs/bridge-metrics.md is generated from this table (:func:`metrics_markdown`).
BRIDGE_METRICS = (
    ("received", "counter", "posteriord_bridge_received_total", ("bridge", "model"),
     "Readings, lab results or daemon outputs received by the bridge."),
    ("published", "counter", "posteriord_bridge_published_total", ("bridge", "model"),
     "Messages passed on by the bridge (to the feed, the broker or the served variables)."),
    ("dropped", "counter", "posteriord_bridge_dropped_total", ("bridge", "model", "reason"),
     "What the bridge did not pass on, by reason."),
    ("uncertain", "counter", "posteriord_bridge_uncertain_total", ("bridge", "model"),
     "Rows sent although a reading in them had an Uncertain OPC UA status."),
    ("reconnects", "counter", "posteriord_bridge_reconnects_total", ("bridge",),
     "Connections to the plant side (OPC UA server, broker, written server) lost and made "
     "again."),
    ("gaps", "counter", "posteriord_bridge_gaps_total", ("bridge",),
     "Interruptions of the readings: a lost connection or subscription (what changed "
     "meanwhile is not known)."),
    ("connected", "gauge", "posteriord_bridge_connected", ("bridge",),
     "1 while the bridge is connected to the plant side."),
    ("subscribed", "gauge", "posteriord_bridge_daemon_subscribed", ("bridge", "model"),
     "1 while a daemon is subscribed to the model on the bridge's feed; while it is 0 the "
     "bridge holds the samples (a bounded queue; overflow is dropped as no_subscriber)."),
)


class Metrics:
    """The Prometheus series of one bridge, in its own registry, known at zero from the start."""

    def __init__(self, bridge: str, models=(), registry: CollectorRegistry | None = None):
        self.bridge = bridge
        self.registry = registry or CollectorRegistry()
        for attr, kind, name, labels, help_ in BRIDGE_METRICS:
            family = Counter if kind == "counter" else Gauge
            # prometheus_client adds _total to a counter's name itself
            setattr(self, attr, family(name.removesuffix("_total"), help_, list(labels),
                                       registry=self.registry))
        self.reconnects.labels(bridge)
        self.gaps.labels(bridge)
        self.connected.labels(bridge).set(0)
        self.models: set[str] = set()
        for m in models:
            self.known(m)
        self._http = None

    def known(self, model: str) -> None:
        b = self.bridge
        self.models.add(model)
        self.received.labels(b, model)
        self.published.labels(b, model)
        self.uncertain.labels(b, model)
        for reason in REASONS:
            self.dropped.labels(b, model, reason)

    def drop(self, model: str, reason: str, n: int = 1) -> None:
        self.dropped.labels(self.bridge, model, reason).inc(n)

    def value(self, family: str, **labels) -> float:
        """One sample of the registry (for the bench and the tests)."""
        v = self.registry.get_sample_value(family, {"bridge": self.bridge, **labels})
        return 0.0 if v is None else v

    def serve(self, address: str) -> tuple[str, int] | None:
        """Serve /metrics on ``host:port`` (port 0: any free port); "" serves nothing."""
        if not address:
            return None
        host, _, port = address.rpartition(":")
        self._http, _ = start_http_server(int(port), addr=host.strip("[]"),
                                          registry=self.registry)
        return self._http.server_address[:2]

    def close(self) -> None:
        if self._http is not None:
            self._http.shutdown()
            self._http.server_close()
            self._http = None


class FeedEnd:
    """The bridge's end of the daemon's feed: an XPUB bound on ``endpoint``.

    :meth:`send` passes a sample on at once when the daemon is subscribed to its model, and
    holds it otherwise (at most :data:`HOLD` per model, the oldest dropped and counted). Each
    message carries ``src`` (the bridge's name) and ``seq`` (per model), so the daemon counts
    what is lost on the way.
    """

    def __init__(self, ctx: zmq.Context, endpoint: str, name: str, metrics: Metrics,
                 log: RateLimitedLog, hold: int = HOLD):
        self.sock = ctx.socket(zmq.XPUB)
        self.sock.setsockopt(zmq.LINGER, 2000)
        self.sock.setsockopt(zmq.SNDHWM, 0)
        self.sock.setsockopt(zmq.XPUB_VERBOSE, 1)
        try:
            self.sock.bind(endpoint)
        except zmq.ZMQError:
            self.sock.close(linger=0)  # an open socket would hang the context's term()
            raise
        self.endpoint = self.sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self.name = name
        self.metrics = metrics
        self.log = log
        self.hold = hold
        self.subscribed: set[str] = set()
        self.held: dict[str, collections.deque] = {}
        self.seq: collections.Counter = collections.Counter()
        self._gauges_set = False

    def _is_subscribed(self, model: str) -> bool:
        return model in self.subscribed or any(model.startswith(s) for s in self.subscribed)

    def take_events(self) -> None:
        """Read the subscription changes that have arrived, and flush what they unblock."""
        changed = False
        while self.sock.poll(0):
            raw = self.sock.recv(zmq.NOBLOCK)
            if raw[:1] == b"\x01":
                self.subscribed.add(raw[1:].decode("utf-8", "replace"))
                changed = True
            elif raw[:1] == b"\x00":
                self.subscribed.discard(raw[1:].decode("utf-8", "replace"))
                changed = True
        if changed or not self._gauges_set:
            self._gauges_set = True
            for model in self.metrics.models:
                self.metrics.subscribed.labels(self.name, model).set(
                    self._is_subscribed(model))
        for model, queue in self.held.items():
            if queue and self._is_subscribed(model):
                while queue:
                    self._send(model, queue.popleft())

    async def _readable(self, timeout: float = 0.5) -> None:
        """Return when the socket may have news, or after ``timeout`` s.

        Its file descriptor only tells that the state may have changed (it is edge
        triggered), so every caller drains what is there, and the timeout covers an edge
        taken by a send.
        """
        loop = asyncio.get_running_loop()
        ready = asyncio.Event()
        fd = self.sock.getsockopt(zmq.FD)
        loop.add_reader(fd, ready.set)
        try:
            with contextlib.suppress(asyncio.TimeoutError):
                await asyncio.wait_for(ready.wait(), timeout)
        finally:
            loop.remove_reader(fd)

    async def watch(self) -> None:
        """Follow the subscriptions for as long as the bridge runs."""
        while True:
            self.take_events()
            await self._readable()

    async def wait_subscribed(self, models, timeout: float | None = None) -> None:
        async def wait():
            while True:
                self.take_events()
                if all(self._is_subscribed(m) for m in models):
                    return
                await self._readable(0.1)

        await asyncio.wait_for(wait(), timeout)

    def _send(self, model: str, body: dict) -> None:
        self.seq[model] += 1
        body["seq"] = self.seq[model]
        body["src"] = self.name
        self.sock.send_multipart([model.encode(), wire.pack(body)])
        self.metrics.published.labels(self.name, model).inc()

    def send(self, model: str, body: dict) -> None:
        self.take_events()
        if self._is_subscribed(model):
            self._send(model, body)
            return
        queue = self.held.get(model)
        if queue is None:
            queue = self.held[model] = collections.deque()
        if len(queue) >= self.hold:
            queue.popleft()
            self.metrics.drop(model, "no_subscriber")
            self.log.warn(model, "no_subscriber", f"the daemon is not subscribed; holding "
                          f"the newest {self.hold} samples")
        queue.append(body)

    def close(self) -> None:
        self.sock.close()


# ------------------------------------------------------------------ the daemon's outputs
def prediction_rows(body: dict) -> list[dict]:
    """The rows of a ``pred/`` message (single, block or packed) as plain dicts.

    Raises :class:`ValueError` for a body that does not have the published form.
    """
    t = body.get("t")
    keys = ("mean", "std", "lo", "hi")
    if isinstance(t, int | float) and not isinstance(t, bool):
        row = {k: float(body[k]) for k in keys}
        row.update(t=float(t), status=str(body["status"]), trust=body.get("trust"))
        return [row]
    if body.get("packed"):
        cols = {k: np.frombuffer(body[k], dtype="<f8") for k in ("t", *keys)}
    elif isinstance(t, list):
        cols = {k: np.asarray(body[k], dtype=float) for k in ("t", *keys)}
    else:
        raise ValueError("t is neither a number nor a list")
    n = len(cols["t"])
    status = body["status"]
    if isinstance(status, str):
        status = [status] * n
    trust = body.get("trust")
    if not isinstance(trust, list):
        trust = [trust] * n
    if any(len(c) != n for c in cols.values()) or len(status) != n or len(trust) != n:
        raise ValueError("columns of different lengths")
    return [{"t": float(cols["t"][i]), **{k: float(cols[k][i]) for k in keys},
             "status": str(status[i]), "trust": trust[i]} for i in range(n)]


def read_output(frames, max_bytes: int = 1 << 24) -> tuple[str, str, dict]:
    """(kind, model, body) of a daemon output message; raises ValueError if unreadable."""
    if len(frames) != 2:
        raise ValueError(f"{len(frames)} frames")
    kind, _, model = bytes(frames[0]).decode("utf-8").partition("/")
    body = wire.unpack(bytes(frames[1]), max_bytes)
    if not isinstance(body, dict):
        raise ValueError("the payload is not a map")
    return kind, model, body


async def backoff_sleep(attempt: int, first: float, most: float) -> None:
    """Wait before reconnection ``attempt`` (0, 1, ...): doubling from ``first`` to ``most``."""
    await asyncio.sleep(min(most, first * 2.0 ** min(attempt, 30)))


async def opcua_client(url: str, timeout: float, default_uri: str, policy: str, mode: str,
                       certificate: str, private_key: str, server_certificate: str,
                       user: str | None, password_file: str, password: str | None = None):
    """An asyncua client (not connected) with the security and identity of a bridge's
    settings; the password is the first line of ``password_file`` unless given."""
    from asyncua import Client, ua
    from asyncua.crypto.security_policies import SecurityPolicyBasic256Sha256

    client = Client(url, timeout=timeout)
    client.application_uri = certificate_uri(certificate) or default_uri
    if policy == "Basic256Sha256":
        await client.set_security(
            SecurityPolicyBasic256Sha256, certificate=certificate, private_key=private_key,
            server_certificate=server_certificate or None,
            mode=(ua.MessageSecurityMode.SignAndEncrypt if mode == "sign_and_encrypt"
                  else ua.MessageSecurityMode.Sign))
    if user is not None:
        client.set_user(user)
        if password is None:
            password = Path(password_file).read_text(encoding="utf-8").splitlines()[0]
        client.set_password(password)
    return client


def certificate_uri(path: str) -> str | None:
    """The application URI in a certificate's subject alternative names (OPC UA Part 6
    wants the session's application URI to be that one), or None."""
    if not path:
        return None
    from cryptography import x509

    data = Path(path).read_bytes()
    cert = (x509.load_pem_x509_certificate(data) if b"-----BEGIN" in data
            else x509.load_der_x509_certificate(data))
    try:
        san = cert.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
    except x509.ExtensionNotFound:
        return None
    uris = san.get_values_for_type(x509.UniformResourceIdentifier)
    return uris[0] if uris else None


def run_bridge(factory, config_path: str, section: str) -> int:
    """Run one bridge process: its ``[section]`` of the config, SIGTERM/SIGINT to stop.

    ``factory`` builds the bridge from its config; the bridge has ``run()`` and ``aclose()``
    coroutines and a ``stop()`` that the signal handlers call (they only ask; the bridge's
    own loop decides when it has stopped).
    """
    import asyncio
    import signal

    from daemon.config.loader import load_bridge

    bridge = factory(load_bridge(config_path, section))

    async def go():
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(sig, bridge.stop)
        try:
            await bridge.run()
        finally:
            await bridge.aclose()

    asyncio.run(go())
    return 0


def metrics_markdown() -> str:
    """The text of ``docs/bridge-metrics.md``."""
    out = ["# Bridge metrics\n",
           "<!-- Generated by daemon.bridges.common.metrics_markdown(); edit BRIDGE_METRICS "
           "in\ndaemon/bridges/common.py and regenerate, do not edit by hand. -->\n",
           "Each bridge serves these on its own Prometheus endpoint (`metrics` in its table, "
           "docs/bridges.md), labelled with its `name`. The series of the configured models "
           "exist from the start at zero, so `increase()` sees the first event.\n",
           "Reasons (`reason` of `posteriord_bridge_dropped_total`): "
           + ", ".join(f"`{r}`" for r in REASONS) + ".\n",
           "| Metric | Type | Labels | Help |", "|---|---|---|---|"]
    for _, kind, name, labels, help_ in BRIDGE_METRICS:
        out.append(f"| `{name}` | {kind} | {', '.join(f'`{x}`' for x in labels)} | {help_} |")
    out.append("")
    return "\n".join(out)
