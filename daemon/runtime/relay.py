"""Scale-out helpers: shard selection and the output relay.

Several daemons can share one feed: with ``shard = "i/n"`` a daemon takes only the models
whose stable hash (CRC-32 of the UTF-8 name) modulo ``n`` is ``i`` and subscribes only to
their topics, so ZeroMQ filters at the publisher. Dashboards subscribe to every shard, or to
one ``posteriord relay``: an XSUB socket connected to the shards' publishers and an XPUB
socket bound for the dashboards, joined by ``zmq.proxy`` (subscriptions flow upstream, so the
shards still only send what someone asked for).
"""

from __future__ import annotations

import contextlib
import signal
import threading

import zmq


class Relay:
    """XSUB (connects to the shards) -> XPUB (bound for dashboards), in a thread."""

    def __init__(self, upstream: list[str], bind: str, *, context: zmq.Context | None = None):
        self.ctx = context or zmq.Context()
        self._own = context is None
        self.xsub = self.ctx.socket(zmq.XSUB)
        self.xsub.setsockopt(zmq.LINGER, 0)
        for ep in upstream:
            self.xsub.connect(ep)
        self.xpub = self.ctx.socket(zmq.XPUB)
        self.xpub.setsockopt(zmq.LINGER, 0)
        self.xpub.bind(bind)
        # a control pair lets another thread stop the proxy cleanly
        self._ctl_in = self.ctx.socket(zmq.PAIR)
        self._ctl_out = self.ctx.socket(zmq.PAIR)
        addr = f"inproc://posteriord-relay-{id(self)}"
        self._ctl_in.bind(addr)
        self._ctl_out.connect(addr)
        self._thread: threading.Thread | None = None

    @property
    def endpoint(self) -> str:
        return self.xpub.getsockopt_string(zmq.LAST_ENDPOINT)

    def run(self) -> None:
        """Forward until :meth:`stop` (blocking)."""
        # a terminated context ends the proxy as TERMINATE does
        with contextlib.suppress(zmq.ContextTerminated):
            zmq.proxy_steerable(self.xsub, self.xpub, None, self._ctl_in)

    def start(self) -> Relay:
        self._thread = threading.Thread(target=self.run, name="posteriord-relay", daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        self._ctl_out.send(b"TERMINATE")
        if self._thread is not None:
            self._thread.join(5)
        for s in (self.xsub, self.xpub, self._ctl_in, self._ctl_out):
            s.close(linger=0)
        if self._own:
            self.ctx.term()


def main_relay(args) -> int:
    """``posteriord relay``: run until SIGTERM/SIGINT."""
    relay = Relay(args.connect, args.bind)
    stop = threading.Event()
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stop.set())
    relay.start()
    print(f"relay: {', '.join(args.connect)} -> {relay.endpoint}", flush=True)
    stop.wait()
    relay.stop()
    return 0


def add_relay_command(sub) -> None:
    r = sub.add_parser("relay", help="join the publishers of several shards into one endpoint")
    r.add_argument("--connect", action="append", required=True,
                   help="a shard's publish endpoint (repeat for each shard)")
    r.add_argument("--bind", default="tcp://127.0.0.1:5566",
                   help="endpoint for dashboards (default tcp://127.0.0.1:5566)")
    r.set_defaults(func=main_relay)
