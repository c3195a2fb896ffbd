"""The feed socket: its subscriptions, and what happens when a feed connection drops.

libzmq reconnects a SUB by itself, with ZMQ_RECONNECT_IVL .. ZMQ_RECONNECT_IVL_MAX, only after
a plain connection loss (the publisher went away). After a protocol error it gives the
endpoint up for good: a handshake that fails because the CURVE keys do not match or one side
is not using CURVE, or a message over ZMQ_MAXMSGSIZE. And a handshake that fails because the
publisher hung up (a wrong server key) is retried at ZMQ_RECONNECT_IVL for ever, without
growing, as each retry starts a fresh connecter. So the daemon watches the socket's monitor
events and reconnects those endpoints itself, after its own back-off (``reconnect_ivl``,
doubling up to ``reconnect_ivl_max``), telling the causes apart:

``handshake_failed``
    An ``EVENT_HANDSHAKE_FAILED_*`` before the disconnection. The endpoint is disconnected at
    once (which also stops libzmq's own fixed-rate retries) and connected again after the
    back-off. Logged as a warning, at most once per endpoint and cause every 10 s.
``protocol_error``
    A disconnection after a good handshake that libzmq does not follow with a reconnection
    attempt of its own within the back-off: usually a message over ZMQ_MAXMSGSIZE. Reconnected
    by the daemon; a rate-limited warning.
``publisher_gone``
    A disconnection that libzmq follows with its own reconnection attempts: the publisher
    stopped or restarted. Not a fault: logged at info level (rate-limited); libzmq's own
    back-off applies.

The back-off is reset once a connection has stayed up for ``reconnect_ivl_max``.

A thread owns the monitor socket and keeps the schedule; the service loop owns the SUB. The
thread sends the loop what to do (disconnect, connect) over an inproc PAIR socket
(:attr:`Feed.wakeup`, which the loop polls); the loop calls :meth:`Feed.act`.

Subscriptions: a SUB sends all its subscriptions through its send pipe when it connects, and
libzmq drops those beyond the send high-water mark (ZMQ_SNDHWM, 1000 by default) without a
word; the models past the thousandth would never see a message, after every reconnection
again. The feed socket's send pipe carries nothing but subscriptions (one per model, a bounded
number), so its ZMQ_SNDHWM is 0, no limit.
"""

from __future__ import annotations

import contextlib
import logging
import threading
import time
from collections import Counter

import zmq
from zmq.utils.monitor import parse_monitor_message

from daemon.logsetup import RateLimitedLog

CAUSES = ("handshake_failed", "protocol_error", "publisher_gone")
LOG_INTERVAL = 10.0  # seconds between two log lines of the same endpoint and cause

_HANDSHAKE_FAILED = {
    zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL: "the publisher hung up during the handshake",
    zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL: "security mechanism or protocol error",
    zmq.EVENT_HANDSHAKE_FAILED_AUTH: "the publisher refused the daemon's key",
}
_EVENTS = (zmq.EVENT_CONNECTED | zmq.EVENT_CONNECT_DELAYED | zmq.EVENT_CONNECT_RETRIED
           | zmq.EVENT_DISCONNECTED | zmq.EVENT_HANDSHAKE_SUCCEEDED
           | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
           | zmq.EVENT_HANDSHAKE_FAILED_AUTH | zmq.EVENT_MONITOR_STOPPED)
_LIBZMQ_RECONNECTING = (zmq.EVENT_CONNECT_RETRIED, zmq.EVENT_CONNECT_DELAYED,
                        zmq.EVENT_CONNECTED)


class FeedStats:
    """Counters of the feed connections, per configured endpoint (and cause).

    Every series of the configured endpoints exists from the start, at zero; the watcher
    thread writes, the metrics scrape reads copies.
    """

    def __init__(self, endpoints):
        self.endpoints = tuple(endpoints)
        self.disconnects: Counter = Counter({ep: 0 for ep in self.endpoints})
        self.reconnects: Counter = Counter({ep: 0 for ep in self.endpoints})
        self.failures: Counter = Counter({(ep, c): 0 for ep in self.endpoints for c in CAUSES})


class _Endpoint:
    """What the watcher knows about one endpoint."""

    __slots__ = ("delay", "failed", "up_since", "pending", "due")

    def __init__(self, delay: float):
        self.delay = delay
        self.failed: tuple[int, int] | None = None  # (event, value) of a failed handshake
        self.up_since: float | None = None
        self.pending: str | None = None  # "check" (wait and see) or "connect"
        self.due = 0.0


class Feed:
    """The daemon's feed SUB socket, its monitor thread and its reconnection policy.

    Parameters
    ----------
    ctx : zmq.Context
    daemon : daemon.config.DaemonConfig
        ``feeds``, ``hwm``, ``max_message_bytes``, ``reconnect_ivl``, ``reconnect_ivl_max``.
    topics : iterable of str
        The model names to subscribe to.
    security : daemon.runtime.security.Security
        Makes the socket a CURVE client when configured.
    stats : FeedStats
        Where the counts go.
    logger : logging.Logger
    """

    def __init__(self, ctx: zmq.Context, daemon, topics, security, stats: FeedStats,
                 logger: logging.Logger):
        self.endpoints = tuple(daemon.feeds)
        self.ivl = float(daemon.reconnect_ivl)
        self.ivl_max = float(daemon.reconnect_ivl_max)
        self.stats = stats
        self._log = logger
        self._say = RateLimitedLog(logger, LOG_INTERVAL)
        sub = self.sock = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.RCVHWM, daemon.hwm)
        # see the module docstring: subscriptions beyond the send HWM are dropped
        sub.setsockopt(zmq.SNDHWM, 0)
        # ZMQ_MAXMSGSIZE bounds the memory one message can take; the margin lets a message a
        # little over the limit reach the decoder and be counted too_large
        sub.setsockopt(zmq.MAXMSGSIZE, 2 * daemon.max_message_bytes + 4096)
        sub.setsockopt(zmq.RECONNECT_IVL, max(1, round(self.ivl * 1000)))
        sub.setsockopt(zmq.RECONNECT_IVL_MAX, max(1, round(self.ivl_max * 1000)))
        self._monitor = sub.get_monitor_socket(_EVENTS)
        for name in topics:
            sub.setsockopt(zmq.SUBSCRIBE, name.encode())
        security.client(sub)
        self._state = {ep: _Endpoint(self.ivl) for ep in self.endpoints}
        # the watcher's requests to the loop, over an inproc pair: a zmq.Poller reports a
        # zmq socket as itself (a plain socket it reports as its file number)
        addr = f"inproc://posteriord-feed-{id(self):x}"
        self.wakeup = ctx.socket(zmq.PAIR)
        self._wake_w = ctx.socket(zmq.PAIR)  # used by the watcher thread only
        for s in (self.wakeup, self._wake_w):
            s.setsockopt(zmq.LINGER, 0)
            s.setsockopt(zmq.SNDHWM, 0)
            s.setsockopt(zmq.RCVHWM, 0)
        self.wakeup.bind(addr)
        self._wake_w.connect(addr)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, name="posteriord-feed",
                                        daemon=True)

    # ------------------------------------------------------------------ loop thread
    def start(self) -> None:
        """Connect the feeds and start watching them."""
        for ep in self.endpoints:
            self.sock.connect(ep)
        self._thread.start()

    def act(self) -> None:
        """Carry out the disconnections and connections the watcher asked for."""
        while True:
            try:
                what, ep = (f.decode() for f in self.wakeup.recv_multipart(zmq.NOBLOCK))
            except zmq.Again:
                return
            if what in ("disconnect", "reconnect"):
                with contextlib.suppress(zmq.ZMQError):  # not connected any more
                    self.sock.disconnect(ep)
            if what in ("connect", "reconnect"):
                self.sock.connect(ep)

    def close(self) -> None:
        """Stop the watcher and close the sockets (idempotent)."""
        if self.sock is None:
            return
        self._stop.set()
        if self._thread.is_alive():
            self.sock.disable_monitor()  # EVENT_MONITOR_STOPPED wakes the watcher
            self._thread.join(5.0)
        for s in (self._monitor, self._wake_w, self.wakeup, self.sock):
            if not s.closed:
                s.close(linger=0)
        self.sock = None

    # ------------------------------------------------------------------ watcher thread
    def _watch(self) -> None:
        mon = self._monitor
        try:
            while not self._stop.is_set():
                now = time.monotonic()
                self._due(now)
                wait = min([1.0] + [s.due - now for s in self._state.values() if s.pending])
                if not mon.poll(max(1, round(wait * 1000))):
                    continue
                event = parse_monitor_message(mon.recv_multipart())
                if event["event"] == zmq.EVENT_MONITOR_STOPPED:
                    return
                try:
                    self._event(event, time.monotonic())
                except Exception:  # a bug here must not end the watching
                    self._log.exception("feed: monitor event %r not handled", event)
        finally:
            mon.close(linger=0)
            self._wake_w.close(linger=0)

    def _post(self, what: str, ep: str) -> None:
        self._wake_w.send_multipart([what.encode(), ep.encode()])

    def _targets(self, ep: str) -> list[str]:
        """The configured endpoints an event's endpoint stands for."""
        if ep in self._state:
            return [ep]
        # libzmq may report an endpoint otherwise than configured (a resolved host name)
        return list(self.endpoints)

    def _event(self, event: dict, now: float) -> None:
        ep = event["endpoint"].decode("utf-8", "replace")
        for target in self._targets(ep):
            self._endpoint_event(target, event["event"], event["value"], now)

    def _endpoint_event(self, ep: str, kind: int, value: int, now: float) -> None:
        st = self._state[ep]
        if kind in _HANDSHAKE_FAILED:
            st.failed = (kind, value)
        elif kind == zmq.EVENT_HANDSHAKE_SUCCEEDED:
            st.failed = None
            st.up_since = now
            self._log.debug("feed %s: connected", ep)
        elif kind == zmq.EVENT_DISCONNECTED:
            self._disconnected(ep, st, now)
        elif kind in _LIBZMQ_RECONNECTING and st.pending == "check":
            # libzmq reconnects by itself: the publisher went away
            st.pending = None
            self.stats.failures[(ep, "publisher_gone")] += 1
            self._say(logging.INFO, (ep, "publisher_gone"), "feed %s: the publisher went "
                      "away; reconnecting when it is back", ep)

    def _disconnected(self, ep: str, st: _Endpoint, now: float) -> None:
        self.stats.disconnects[ep] += 1
        if st.up_since is not None and now - st.up_since >= self.ivl_max:
            st.delay = self.ivl  # the link had been good: start the back-off afresh
        st.up_since = None
        if st.failed is not None:
            kind, value = st.failed
            st.failed = None
            self.stats.failures[(ep, "handshake_failed")] += 1
            self._post("disconnect", ep)  # also stops libzmq's fixed-rate retries
            if st.pending != "connect":
                st.pending, st.due = "connect", now + st.delay
                self._say(logging.WARNING, (ep, "handshake_failed"), "feed %s: handshake "
                          "failed (%s, %s): the CURVE keys do not match, or one side is not "
                          "using CURVE (check [daemon] curve_feed_server_key and the "
                          "publisher's keys); retrying in %.3g s", ep, _HANDSHAKE_FAILED[kind],
                          _detail(kind, value), st.delay)
                st.delay = min(2.0 * st.delay, self.ivl_max)
            return
        if st.pending is None:
            st.pending, st.due = "check", now + st.delay

    def _due(self, now: float) -> None:
        for ep, st in self._state.items():
            if st.pending is None or st.due > now:
                continue
            if st.pending == "check":
                # no reconnection attempt of libzmq's own: it gave the endpoint up
                self.stats.failures[(ep, "protocol_error")] += 1
                self._say(logging.WARNING, (ep, "protocol_error"), "feed %s: connection "
                          "dropped after a protocol error, usually a message over "
                          "ZMQ_MAXMSGSIZE (twice [daemon] max_message_bytes); reconnected "
                          "after %.3g s", ep, st.delay)
                what = "reconnect"
                st.delay = min(2.0 * st.delay, self.ivl_max)
            else:
                what = "connect"
            st.pending = None
            self.stats.reconnects[ep] += 1
            self._post(what, ep)


_PROTOCOL_ERRORS = {getattr(zmq, n): n.lower() for n in dir(zmq)
                    if n.startswith("PROTOCOL_ERROR_")}


def _detail(kind: int, value: int) -> str:
    """The event's value in words: an errno, a ZAP status or a ZMTP protocol error."""
    if kind == zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL:
        return f"errno {value}"
    if kind == zmq.EVENT_HANDSHAKE_FAILED_AUTH:
        return f"ZAP status {value}"
    return _PROTOCOL_ERRORS.get(value, f"protocol error 0x{value:08x}")
