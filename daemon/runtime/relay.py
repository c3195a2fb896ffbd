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
import sys
import threading

import zmq

from daemon.exitcodes import EXIT_RUNTIME, EXIT_USAGE
from daemon.runtime.security import (
    ClientKeys,
    CurveServer,
    Handshake,
    SecurityError,
    apply_client,
    client_keys,
)


class Relay:
    """XSUB (connects to the shards) -> XPUB (bound for dashboards), in a thread.

    ``upstream_keys`` makes the XSUB a CURVE client of the shards: one
    :class:`~daemon.runtime.security.ClientKeys` for all of them, or one per upstream
    endpoint (shards with keys of their own). ``downstream`` makes the XPUB a CURVE server
    (its key pair and the ZAP authenticator admitting the dashboards' keys). With
    ``watch_handshakes`` a socket monitor watches the handshakes with the shards and
    :meth:`upstream_failures` tells why a shard refused; it must then be called regularly
    (libzmq queues the monitor events until they are read).
    """

    def __init__(self, upstream: list[str], bind: str, *, context: zmq.Context | None = None,
                 upstream_keys: ClientKeys | list[ClientKeys] | None = None,
                 downstream: CurveServer | None = None, watch_handshakes: bool = False):
        if isinstance(upstream_keys, list) and len(upstream_keys) != len(upstream):
            raise ValueError(f"upstream_keys: one per upstream endpoint ({len(upstream)}) or "
                             f"one for all, got {len(upstream_keys)}")
        self.ctx = context or zmq.Context()
        self._own = context is None
        self.xsub = self.ctx.socket(zmq.XSUB)
        self.xsub.setsockopt(zmq.LINGER, 0)
        curve = upstream_keys is not None
        self.handshake = (Handshake(self.xsub, curve=curve, peer="the shard")
                          if watch_handshakes else None)
        for i, ep in enumerate(upstream):
            # the CURVE options are taken at connect: each shard may have its own server key
            apply_client(self.xsub, upstream_keys[i] if isinstance(upstream_keys, list)
                         else upstream_keys)
            self.xsub.connect(ep)
        self.xpub = self.ctx.socket(zmq.XPUB)
        self.xpub.setsockopt(zmq.LINGER, 0)
        if downstream is not None:
            downstream.apply(self.xpub)
        self.xpub.bind(bind)
        # a control pair lets another thread stop the proxy cleanly
        self._ctl_in = self.ctx.socket(zmq.PAIR)
        self._ctl_out = self.ctx.socket(zmq.PAIR)
        addr = f"inproc://posteriord-relay-{id(self)}"
        self._ctl_in.bind(addr)
        self._ctl_out.connect(addr)
        self._thread: threading.Thread | None = None

    def upstream_failures(self, timeout: int = 0) -> list[tuple[str, str]]:
        """``(endpoint, reason)`` of each failed handshake with a shard since the last call.

        Waits up to ``timeout`` ms for a monitor event. Call from one thread only.
        """
        if self.handshake is None:
            raise RuntimeError("upstream_failures needs Relay(..., watch_handshakes=True)")
        return self.handshake.read(timeout)

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
        if self.handshake is not None:
            self.handshake.close()
        for s in (self.xsub, self.xpub, self._ctl_in, self._ctl_out):
            s.close(linger=0)
        if self._own:
            self.ctx.term()


def _relay_keys(args) -> tuple[ClientKeys | list[ClientKeys] | None, tuple | None]:
    servers = args.curve_server_key or []
    if servers and len(servers) not in (1, len(args.connect)):
        raise SecurityError(f"--curve-server-key: give one for all shards or one per --connect "
                            f"({len(args.connect)}), got {len(servers)}")
    if (servers or args.curve_clients) and not args.curve_key:
        raise SecurityError("--curve-server-key and --curve-clients need --curve-key (this "
                            "relay's NAME.key_secret)")
    if args.curve_key and not (servers or args.curve_clients):
        raise SecurityError("--curve-key alone does nothing: add --curve-server-key (CURVE to "
                            "the shards) and/or --curve-clients (CURVE for the dashboards)")
    up = None
    if servers:
        keys = [client_keys(args.curve_key, path) for path in servers]
        up = keys[0] if len(keys) == 1 else keys
    down = (args.curve_key, args.curve_clients) if args.curve_clients else None
    return up, down


def main_relay(args) -> int:
    """``posteriord relay``: run until SIGTERM/SIGINT."""
    try:
        up, down = _relay_keys(args)
    except SecurityError as exc:
        print(f"posteriord relay: {exc}", file=sys.stderr)
        return EXIT_USAGE
    ctx = zmq.Context()
    server = None
    try:
        if down is not None:
            server = CurveServer(ctx, *down)
        relay = Relay(args.connect, args.bind, context=ctx, upstream_keys=up,
                      downstream=server, watch_handshakes=True)
    except (SecurityError, zmq.ZMQError) as exc:
        print(f"posteriord relay: {exc}", file=sys.stderr)
        if server is not None:
            server.stop()
        ctx.term()
        return EXIT_USAGE if isinstance(exc, SecurityError) else EXIT_RUNTIME
    stop = threading.Event()
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda *_: stop.set())
    relay.start()
    print(f"relay: {', '.join(args.connect)} -> {relay.endpoint}", flush=True)
    told = set()
    while not stop.is_set():
        # a refused relay keeps running (the shard may admit it after a SIGHUP) but says
        # why, once per shard and reason
        for ep, text in relay.upstream_failures(200):
            if (ep, text) not in told:
                told.add((ep, text))
                print(f"posteriord relay: {ep}: {text}", file=sys.stderr, flush=True)
    relay.stop()
    if server is not None:
        server.stop()
    ctx.term()
    return 0


def add_relay_command(sub) -> None:
    r = sub.add_parser(
        "relay", help="join the publishers of several shards into one endpoint",
        description="Forward the shards' publications to one endpoint for dashboards. With "
                    "CURVE shards give --curve-key and --curve-server-key (the relay's public "
                    "key must be in each shard's curve_clients folder); with --curve-clients "
                    "the dashboard side is a CURVE server too, with the same key pair. A shard "
                    "refusing the relay is reported on stderr; the relay keeps running.")
    r.add_argument("--connect", action="append", required=True,
                   help="a shard's publish endpoint (repeat for each shard)")
    r.add_argument("--bind", default="tcp://127.0.0.1:5566",
                   help="endpoint for dashboards (default tcp://127.0.0.1:5566)")
    r.add_argument("--curve-key", metavar="PATH",
                   help="this relay's key pair: the NAME.key_secret file written by "
                        "`posteriord keys new` (it holds both keys; mode 0600)")
    r.add_argument("--curve-server-key", metavar="PATH", action="append",
                   help="the shards' public key file (NAME.key): once for all shards, or "
                        "once per --connect in the same order")
    r.add_argument("--curve-clients", metavar="DIR",
                   help="make the dashboard side a CURVE server admitting the public keys "
                        "in this folder")
    r.set_defaults(func=main_relay)
