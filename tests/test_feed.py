"""The feed socket over real sockets: reconnection back-off, causes, and many subscriptions.

A publisher the daemon cannot complete a handshake with (CURVE on one side only, or the
wrong server key) must give a few log lines naming the handshake, not thousands naming
ZMQ_MAXMSGSIZE; a publisher that stops is no fault; and every model gets its subscription
through, more of them than libzmq's default high-water mark of 1000 (from memory: the
ZMQ_SNDHWM default in the zmq_setsockopt manual), on every (re)connection.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import replace

import msgpack
import pytest
import zmq
import zmq.auth
from conftest import (
    PROBE,
    FeedPublisher,
    free_port,
    ipc,
    metric,
    recv_until,
    scrape,
    toml_config,
    wait_until,
)

from daemon.config import loads
from daemon.runtime.feed import CAUSES, Feed, FeedStats
from daemon.runtime.security import CurveKeys, Security, new_keys
from daemon.runtime.service import Service

FAILURES = "posteriord_feed_connection_failures_total"
RECONNECTS = "posteriord_feed_reconnects_total"
TINY = {"inputs": [{"tag": "a", "lo": 0, "hi": 1}], "basis": {"kind": "identity"}}


def feed_warnings(caplog) -> list[str]:
    return [r.getMessage() for r in caplog.records
            if r.name == "posteriord" and r.levelno >= logging.WARNING
            and r.getMessage().startswith("feed ")]


# ---------------------------------------------------------------------------------- policy
def _feed(ctx, ivl: float, ivl_max: float) -> Feed:
    text = toml_config({"feeds": [f"tcp://127.0.0.1:{free_port()}"],
                        "reconnect_ivl": f"{ivl}s", "reconnect_ivl_max": f"{ivl_max}s"}, [])
    d = loads(text, "<test>").daemon
    return Feed(ctx, d, ["m"], Security(ctx, CurveKeys()), FeedStats(d.feeds),
                logging.getLogger("posteriord"))


def test_back_off_doubles_up_to_the_maximum_and_restarts_after_a_good_link():
    """The documented policy (docs/settings.md, reconnect_ivl_max: "the wait doubles up to
    this"), driven with monitor events and clock values given by the test."""
    ctx = zmq.Context()
    feed = _feed(ctx, 0.5, 3.0)
    try:
        ep = feed.endpoints[0]
        st = feed._state[ep]
        waits, t = [], 100.0
        for _ in range(6):
            feed._endpoint_event(ep, zmq.EVENT_CONNECTED, 0, t)
            feed._endpoint_event(ep, zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL,
                                 zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH, t)
            feed._endpoint_event(ep, zmq.EVENT_DISCONNECTED, 0, t)
            waits.append(st.due - t)
            t = st.due
            feed._due(t)
        assert waits == [0.5, 1.0, 2.0, 3.0, 3.0, 3.0]
        assert feed.stats.failures[(ep, "handshake_failed")] == 6
        assert feed.stats.reconnects[ep] == 6
        # each failure asked the loop for a disconnection now and a connection at its due time
        asked = []
        while feed.wakeup.poll(0):
            asked.append(tuple(f.decode() for f in feed.wakeup.recv_multipart()))
        assert asked == [("disconnect", ep), ("connect", ep)] * 6
        # a link that stayed up for reconnect_ivl_max starts the back-off afresh
        feed._endpoint_event(ep, zmq.EVENT_HANDSHAKE_SUCCEEDED, 0, t)
        t += 3.0
        feed._endpoint_event(ep, zmq.EVENT_DISCONNECTED, 0, t)
        assert st.pending == "check" and st.due - t == 0.5
    finally:
        feed.close()
        ctx.term()


def test_disconnection_causes_are_told_apart():
    ctx = zmq.Context()
    feed = _feed(ctx, 0.5, 3.0)
    try:
        ep = feed.endpoints[0]
        st = feed._state[ep]
        # libzmq follows the disconnection with its own retries: the publisher went away
        feed._endpoint_event(ep, zmq.EVENT_HANDSHAKE_SUCCEEDED, 0, 10.0)
        feed._endpoint_event(ep, zmq.EVENT_DISCONNECTED, 0, 20.0)
        feed._endpoint_event(ep, zmq.EVENT_CONNECT_RETRIED, 500, 20.0)
        feed._due(30.0)
        assert st.pending is None and feed.stats.reconnects[ep] == 0
        # no retry of its own within the back-off: libzmq gave up (a protocol error)
        feed._endpoint_event(ep, zmq.EVENT_HANDSHAKE_SUCCEEDED, 0, 40.0)
        feed._endpoint_event(ep, zmq.EVENT_DISCONNECTED, 0, 41.0)
        feed._due(41.4)
        assert feed.stats.reconnects[ep] == 0
        feed._due(41.5)
        assert feed.stats.reconnects[ep] == 1
        assert [tuple(f.decode() for f in feed.wakeup.recv_multipart())] == \
            [("reconnect", ep)]
        got = {c: feed.stats.failures[(ep, c)] for c in CAUSES}
        assert got == {"handshake_failed": 0, "protocol_error": 1, "publisher_gone": 1}
        assert feed.stats.disconnects[ep] == 2
    finally:
        feed.close()
        ctx.term()


# ---------------------------------------------------------------------------------- handshakes
@pytest.fixture
def keys(tmp_path):
    folder = tmp_path / "keys"
    out = {name: new_keys(str(folder), name) for name in ("daemon", "feed", "other")}
    allowed = tmp_path / "allowed"
    allowed.mkdir()
    out["allowed"] = str(allowed)
    return out


class Daemon:
    """A Service in a thread, its feed pointed at ``feed_ep``; metrics over HTTP."""

    def __init__(self, folder, feed_ep: str, models: list[dict], **daemon):
        settings = {"feeds": [feed_ep], "publish": ipc(folder, "pub"),
                    "control": ipc(folder, "ctl"), "metrics": "",
                    "state_dir": str(folder / "state"), "log_level": "warning",
                    "reconnect_ivl": "10ms", "reconnect_ivl_max": "80ms", **daemon}
        config = loads(toml_config(settings, models), "<test>")
        config = replace(config, daemon=replace(config.daemon, metrics="127.0.0.1:0"))
        self.svc = Service(config)
        self.svc.open()
        self.address = self.svc.metrics_address
        self.thread = threading.Thread(target=self.svc.run, daemon=True)
        self.thread.start()

    def count(self, name: str, **labels) -> float:
        return metric(scrape(self.address), name, **labels)

    def stop(self) -> None:
        self.svc.post_event("stop")
        self.thread.join(10)
        assert not self.thread.is_alive()


@pytest.mark.parametrize("case", ["plain publisher, CURVE daemon",
                                  "CURVE publisher, plain daemon",
                                  "wrong server key"])
def test_failing_handshake_backs_off_and_names_the_handshake(keys, sock_dir, caplog, case):
    caplog.set_level(logging.INFO, logger="posteriord")
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    daemon = {}
    if case != "plain publisher, CURVE daemon":
        pub.curve_publickey, pub.curve_secretkey = zmq.auth.load_certificate(keys["feed"][1])
        pub.curve_server = True
    if case != "CURVE publisher, plain daemon":
        server = keys["other"] if case == "wrong server key" else keys["feed"]
        daemon = {"curve_secret_key": keys["daemon"][1], "curve_clients": keys["allowed"],
                  "curve_admins": keys["allowed"], "curve_feed_server_key": server[0]}
    ep = f"tcp://127.0.0.1:{pub.bind_to_random_port('tcp://127.0.0.1')}"
    d = Daemon(sock_dir, ep, [{"name": "m", **TINY}], **daemon)
    try:
        # several failures, each after the back-off; without it thousands a second
        wait_until(lambda: d.count(FAILURES, endpoint=ep, cause="handshake_failed") >= 6,
                   what="six failed handshakes")
        wait_until(lambda: d.count(RECONNECTS, endpoint=ep) >= 5, what="five reconnections")
        for other in ("protocol_error", "publisher_gone"):
            assert d.count(FAILURES, endpoint=ep, cause=other) == 0
    finally:
        d.stop()
        pub.close()
        ctx.term()
    lines = feed_warnings(caplog)
    assert 1 <= len(lines) <= 3, lines
    for line in lines:
        assert "handshake failed" in line and "CURVE" in line, line
        assert "MAXMSGSIZE" not in line, line


# ---------------------------------------------------------------------------------- many models
def _xpub(ctx, endpoint: str | None = None) -> FeedPublisher:
    """A FeedPublisher, on ``endpoint`` when given (a restarted publisher)."""
    feed = FeedPublisher(ctx)
    if endpoint is None:
        return feed
    feed.sock.close(linger=0)
    sock = ctx.socket(zmq.XPUB)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.SNDHWM, 0)
    sock.setsockopt(zmq.XPUB_VERBOSE, 1)

    def bind():
        try:
            sock.bind(endpoint)
        except zmq.ZMQError:  # the old publisher's port is released asynchronously
            return False
        return True

    wait_until(bind, what=f"a bind to {endpoint}")
    feed.sock, feed.endpoint = sock, endpoint
    return feed


def test_every_one_of_1500_models_answers_across_reconnections(sock_dir, caplog):
    caplog.set_level(logging.INFO, logger="posteriord")
    names = [f"m{i:04d}" for i in range(1500)]
    everyone = {*names, PROBE}
    ctx = zmq.Context()
    feed = _xpub(ctx)
    d = Daemon(sock_dir, feed.endpoint,
               [{"name": n, **TINY} for n in names]
               + [{"name": PROBE, "inputs": [{"tag": "p", "lo": 0, "hi": 1}],
                   "basis": {"kind": "identity"}}],
               max_message_bytes=4096)
    out = ctx.socket(zmq.SUB)
    out.setsockopt(zmq.LINGER, 0)
    out.setsockopt(zmq.RCVHWM, 0)
    out.setsockopt(zmq.SUBSCRIBE, b"pred/")
    out.connect(d.svc.publish_endpoint)
    t = [0.0]

    def answered() -> set[str]:
        """Send one sample to every model; the models whose prediction came back."""
        t[0] += 1.0
        for n in names:
            feed.send(n, {"t": t[0], "x": [0.5]})
        got: set[str] = set()
        # a probe sample sent last: its prediction comes after every other one
        probe_t = t[0] + 0.5
        feed.send(PROBE, {"t": probe_t, "x": [0.5]})
        recv_until(out, lambda m: got.add(m[0]) or m == ("pred/probe", probe_t),
                   decode=lambda f: (bytes(f[0]).decode(),
                                     msgpack.unpackb(bytes(f[1]))["t"]))
        return {g.removeprefix("pred/") for g in got} - {PROBE}

    def ready():
        # our subscription to the daemon's output is in place once a probe answer arrives
        t[0] += 1.0
        feed.send(PROBE, {"t": t[0], "x": [0.5]})
        return out.poll(20)

    try:
        feed.wait_subscribed(everyone)
        wait_until(ready, what="the daemon's first output")
        assert answered() == set(names)

        # the daemon's own reconnection: an oversize message drops the connection
        seen = len(feed.events)
        feed.send(names[0], {"t": t[0], "pad": "p" * 20000})
        recv_until(feed.sock, lambda _: sum(1 for k, _t in feed.events[seen:]
                                            if k == "sub") >= len(everyone),
                   decode=feed._take)
        assert {tp for k, tp in feed.events[seen:] if k == "sub"} == everyone
        assert d.count(RECONNECTS, endpoint=feed.endpoint) == 1
        assert answered() == set(names)

        # a publisher restart: a new one binds the same endpoint
        feed.sock.close(linger=0)
        wait_until(lambda: d.count(FAILURES, endpoint=feed.endpoint,
                                   cause="publisher_gone") == 1, what="the drop counted")
        feed = _xpub(ctx, feed.endpoint)
        feed.wait_subscribed(everyone)
        assert answered() == set(names)
    finally:
        out.close()
        feed.sock.close(linger=0)
        d.stop()
        ctx.term()
    # the oversize message is a warning; the publisher's restart is none
    lines = feed_warnings(caplog)
    assert len(lines) == 1 and "MAXMSGSIZE" in lines[0], lines
    assert any("publisher went away" in r.getMessage() and r.levelno == logging.INFO
               for r in caplog.records)
