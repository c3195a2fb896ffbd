"""The service loop: poll, drain, decode, call the runners, encode, publish.

Shutdown order (tested): stop reading the feed; finish the batch in hand and publish its
results; answer nothing more on the control socket and close it; close the publisher with
its linger so queued predictions still leave; stop the metrics server; terminate the
context. Signal handlers only queue an event and wake the poller; the loop acts on it.
"""

from __future__ import annotations

import gc
import logging
import math
import signal
import socket
import threading
import time
from collections import Counter, deque

import numpy as np
import zmq
from prometheus_client import CollectorRegistry, start_http_server

from daemon import wire
from daemon.metrics import ServiceCollector
from daemon.models import ModelRunner, PredBatch, Rejected

log = logging.getLogger("posteriord")

PUB_LINGER_MS = 2000
COMMANDS = ("ping", "status", "posterior", "detectors", "acknowledge", "freeze", "resume",
            "reset", "checkpoint", "reload")


class RateLimitedLog:
    """Log a (model, reason) at most once per ``interval`` seconds, counting the rest."""

    def __init__(self, logger: logging.Logger, interval: float = 10.0):
        self._log = logger
        self._interval = interval
        self._last: dict = {}
        self._suppressed: Counter = Counter()

    def warn(self, model: str, reason: str, detail: str) -> None:
        key = (model, reason)
        now = time.monotonic()
        last = self._last.get(key)
        if last is not None and now - last < self._interval:
            self._suppressed[key] += 1
            return
        n = self._suppressed.pop(key, 0)
        self._last[key] = now
        more = f" ({n} more since last report)" if n else ""
        self._log.warning("rejected model=%s reason=%s: %s%s", model or "-", reason, detail, more)


class Service:
    """posteriord's runner around :class:`daemon.models.ModelRunner` objects."""

    def __init__(self, config, *, registry: CollectorRegistry | None = None,
                 context: zmq.Context | None = None, config_path: str | None = None):
        self.config = config
        self.config_path = config_path
        self.runners: dict[str, ModelRunner] = {m.name: ModelRunner(m) for m in config.models}
        self.received: Counter = Counter()
        self.rejected_unknown: Counter = Counter()
        self.reloads: Counter = Counter()
        self.registry = registry if registry is not None else CollectorRegistry()
        self.registry.register(ServiceCollector(self))
        self._ctx = context
        self._own_ctx = context is None
        self._events: deque = deque()
        self._stop = False
        self._rlog = RateLimitedLog(log)
        self._wake_r = self._wake_w = None
        self._http = None
        self.sub = self.pub = self.rep = None
        self.ready = threading.Event()
        self.closed_order: list[str] = []

    # ------------------------------------------------------------------ hooks for later layers
    def extra_metrics(self):
        return []

    # ------------------------------------------------------------------ sockets
    def open(self) -> None:
        d = self.config.daemon
        ctx = self._ctx = self._ctx or zmq.Context()
        self.sub = ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.RCVHWM, d.hwm)
        # no ZMQ_MAXMSGSIZE here: libzmq closes a connection that exceeds it as a protocol
        # error and never reconnects, so one oversize message would silence that feed for
        # good; the decoder drops (and counts) messages over max_message_bytes instead
        self.sub.setsockopt(zmq.RECONNECT_IVL, max(1, int(d.reconnect_ivl * 1000)))
        self.sub.setsockopt(zmq.RECONNECT_IVL_MAX, max(1, int(d.reconnect_ivl_max * 1000)))
        for name in self.runners:
            self.sub.setsockopt(zmq.SUBSCRIBE, name.encode())
        for ep in d.feeds:
            self.sub.connect(ep)
        self.pub = ctx.socket(zmq.PUB)
        self.pub.setsockopt(zmq.LINGER, PUB_LINGER_MS)
        self.pub.setsockopt(zmq.SNDHWM, d.hwm)
        self.pub.bind(d.publish)
        self.rep = ctx.socket(zmq.REP)
        self.rep.setsockopt(zmq.LINGER, 0)
        self.rep.setsockopt(zmq.MAXMSGSIZE, 65536)
        self.rep.bind(d.control)
        if d.metrics:
            host, _, port = d.metrics.rpartition(":")
            self._http, _thread = start_http_server(int(port), addr=host.strip("[]"),
                                                    registry=self.registry)
        self._wake_r, self._wake_w = socket.socketpair()
        self._wake_r.setblocking(False)
        self._wake_w.setblocking(False)
        self.poller = zmq.Poller()
        self.poller.register(self.sub, zmq.POLLIN)
        self.poller.register(self.rep, zmq.POLLIN)
        self.poller.register(self._wake_r, zmq.POLLIN)

    @property
    def publish_endpoint(self) -> str:
        return self.pub.getsockopt_string(zmq.LAST_ENDPOINT)

    @property
    def control_endpoint(self) -> str:
        return self.rep.getsockopt_string(zmq.LAST_ENDPOINT)

    @property
    def metrics_address(self):
        return None if self._http is None else self._http.server_address[:2]

    # ------------------------------------------------------------------ signals
    def install_signal_handlers(self) -> None:
        signal.signal(signal.SIGTERM, lambda *_: self.post_event("stop"))
        signal.signal(signal.SIGINT, lambda *_: self.post_event("stop"))
        signal.signal(signal.SIGHUP, lambda *_: self.post_event("reload"))

    def post_event(self, what: str) -> None:
        """Queue an event for the loop (safe from signal handlers and other threads)."""
        self._events.append(what)
        if self._wake_w is not None:
            try:
                self._wake_w.send(b"\0")
            except (BlockingIOError, OSError):
                pass  # the loop is already awake, or closing

    # ------------------------------------------------------------------ loop
    def run(self) -> int:
        if self.sub is None:
            self.open()
        log.info("ready: %d model(s), publishing on %s, control on %s", len(self.runners),
                 self.publish_endpoint, self.control_endpoint)
        # start-up objects never become garbage: keep them out of every later collection
        gc.freeze()
        self.ready.set()
        try:
            while not self._stop:
                socks = dict(self.poller.poll(1000))
                if self._wake_r in socks:
                    try:
                        while self._wake_r.recv(4096):
                            pass
                    except BlockingIOError:
                        pass
                while self._events:
                    self._event(self._events.popleft())
                if socks.get(self.sub):
                    self.drain()
                if socks.get(self.rep):
                    self._control()
        finally:
            self.close()
        return 0

    def _event(self, what: str) -> None:
        if what == "stop":
            log.info("stop requested")
            self._stop = True
        elif what == "reload":
            self.reload()

    def drain(self) -> int:
        """Take up to ``batch_limit`` feed messages without blocking, process, publish."""
        limit = self.config.daemon.batch_limit
        recv = self.sub.recv_multipart
        batch = []
        while len(batch) < limit:
            try:
                batch.append(recv(zmq.NOBLOCK))
            except zmq.Again:
                break
        self.process(batch)
        return len(batch)

    def process(self, batch) -> None:
        """Decode and process a batch of feed messages (lists of frames), then publish.

        This is the whole per-message path; the backtest calls it without sockets, with a
        publisher that records what would have been sent.
        """
        max_bytes = self.config.daemon.max_message_bytes
        specs = {name: r.spec for name, r in self.runners.items()}
        pending: dict[str, list] = {}
        for frames in batch:
            try:
                msg = wire.decode_feed(frames, specs, max_bytes)
            except wire.WireError as exc:
                name = _topic(frames)
                if name in self.runners:
                    self.received[name] += 1
                    self.runners[name].rejected[exc.reason] += 1
                else:
                    self.received[""] += 1
                    self.rejected_unknown[exc.reason] += 1
                    name = ""
                self._rlog.warn(name, exc.reason, exc.detail)
                continue
            self.received[msg.model] += 1
            self._feed(msg, pending)
        for name, seg in pending.items():
            self._flush(self.runners[name], seg)

    def _feed(self, msg: wire.Feed, pending: dict) -> None:
        runner = self.runners[msg.model]
        runner.note_seq(msg.seq)
        seg = pending.get(msg.model)
        if seg is None:
            seg = pending[msg.model] = [[], [], [], [], msg.block]
        elif seg[4] != msg.block:
            self._flush(runner, seg)
            seg[4] = msg.block
        if msg.block and not msg.has_y and isinstance(msg.x, np.ndarray) and runner.add_block(
                msg.t, msg.x, msg.ids if msg.has_id else None, msg.increasing):
            # the common block: features only, in order; predicted in one call
            self._flush(runner, seg)
            self._publish(runner, msg.t, msg.ids, runner.predict(msg.t, msg.x, msg.ids),
                          True, msg.has_id)
            return
        parts = [] if msg.block else None
        for t, row, y, ident in zip(msg.t, msg.x, msg.y, msg.ids, strict=True):
            if row is not None:
                try:
                    runner.add_features(t, row, ident)
                except Rejected as exc:
                    runner.rejected[exc.reason] += 1
                    self._rlog.warn(runner.name, exc.reason, exc.detail)
                    continue
                seg[0].append(t)
                seg[1].append(row)
                seg[2].append(ident)
            if y is not None:
                self._flush(runner, seg, parts)
                self._learn(runner, t, y, ident)
        if msg.block:
            self._flush(runner, seg, parts)
            if parts:
                ts = [t for p in parts for t in p[0]]
                ids = [i for p in parts for i in p[1]]
                self._publish(runner, ts, ids, _concat([p[2] for p in parts]), True,
                              any(i is not None for i in ids))

    def _flush(self, runner: ModelRunner, seg: list, parts: list | None = None) -> None:
        ts, rows, ids = seg[0], seg[1], seg[2]
        if not ts:
            return
        batch = runner.predict(ts, rows, ids)
        if parts is not None:
            # a block predicted in pieces around its lab values still gets one message
            parts.append((ts, ids, batch))
        else:
            self._publish(runner, ts, ids, batch, seg[4], any(i is not None for i in ids))
        seg[0], seg[1], seg[2] = [], [], []

    def _publish(self, runner: ModelRunner, ts: list, ids: list, batch, block: bool,
                 has_id: bool) -> None:
        topic = b"pred/" + runner.name.encode()
        level = runner.cfg.level
        mean, std, var = batch.mean.tolist(), batch.std.tolist(), batch.var.tolist()
        lo, hi, dof = batch.lo.tolist(), batch.hi.tolist(), batch.dof.tolist()
        send = self.pub.send_multipart
        trust = runner.trust
        if block:
            body = {"t": ts, "mean": mean, "std": std, "var": var, "lo": lo, "hi": hi,
                    "level": level, "dof": dof, "status": batch.status, "trust": trust}
            if has_id:
                body["id"] = ids
            send([topic, wire.packb(body)])
        else:
            status = batch.status
            for i, t in enumerate(ts):
                body = {"t": t, "mean": mean[i], "std": std[i], "var": var[i], "lo": lo[i],
                        "hi": hi[i], "level": level, "dof": dof[i], "status": status[i],
                        "trust": trust}
                if has_id and ids[i] is not None:
                    body["id"] = ids[i]
                send([topic, wire.packb(body)])
        if runner.alerts:
            self._alerts(runner)

    def _alerts(self, runner: ModelRunner) -> None:
        topic = b"alert/" + runner.name.encode()
        for event in runner.alerts:
            event = {"model": runner.name, **event}
            if event["kind"] == "state":
                log.warning("trust %s: %s -> %s (%s)", runner.name, event["old"], event["new"],
                            ", ".join(r["name"] for r in event["reasons"]) or "no reasons")
            elif event["kind"] == "action":
                log.warning("%s: %s after %s", runner.name, event["action"], event["reason"])
            self.pub.send_multipart([topic, wire.packb(event)])
        runner.alerts.clear()

    def _learn(self, runner: ModelRunner, t: float, y: float, ident) -> None:
        try:
            fit = runner.learn(t, y, ident)
        except Rejected as exc:
            runner.rejected[exc.reason] += 1
            self._rlog.warn(runner.name, exc.reason, exc.detail)
            return
        if not fit["accepted"]:
            self._rlog.warn(runner.name, fit["reason"], f"z={fit['z']:.2f} at t={fit['t']!r}")
        self.pub.send_multipart([b"fit/" + runner.name.encode(), wire.packb(fit)])
        if runner.alerts:
            self._alerts(runner)

    # ------------------------------------------------------------------ control
    def _control(self) -> None:
        while True:
            try:
                frames = self.rep.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            try:
                if len(frames) != 1:
                    raise wire.WireError("frames", "a command is one frame")
                reply = self.command(wire.decode_control(frames[0], 65536))
            except wire.WireError as exc:
                reply = {"ok": False, "error": str(exc)}
            self.rep.send(wire.packb(_plain(reply)))

    def command(self, msg: dict) -> dict:
        """Execute one control command (also callable in-process)."""
        cmd = msg.get("cmd")
        if cmd == "ping":
            return {"ok": True}
        if cmd == "status":
            return {"ok": True, "models": {n: r.status() for n, r in self.runners.items()}}
        if cmd == "reload":
            ok, error = self.reload()
            return {"ok": ok} if ok else {"ok": False, "error": error}
        if cmd == "checkpoint":
            return {"ok": False, "error": "checkpoint unavailable: this build keeps state in "
                                          "memory only (no state folder persistence yet)"}
        if cmd not in COMMANDS:
            return {"ok": False, "error": f"unknown command {cmd!r}; expected one of "
                                          f"{', '.join(COMMANDS)}"}
        name = msg.get("model")
        runner = self.runners.get(name) if isinstance(name, str) else None
        if runner is None:
            return {"ok": False, "error": f"{cmd} needs \"model\": one of "
                                          f"{', '.join(sorted(self.runners))}; got {name!r}"}
        if cmd == "posterior":
            return {"ok": True, "model": name, **runner.posterior()}
        if cmd in ("detectors", "acknowledge"):
            if runner.monitor is None:
                return {"ok": False, "error": f"alerts are disabled for {name} "
                                              "([model.alerts] enabled = false)"}
            if cmd == "detectors":
                return {"ok": True, "model": name, **runner.monitor.view()}
            runner.alerts.append(runner.monitor.acknowledge())
            if self.pub is not None:
                self._alerts(runner)
            log.info("control: acknowledge %s", name)
            return {"ok": True, "model": name, "command": cmd,
                    "state": runner.monitor.state}
        if cmd == "freeze":
            runner.frozen = True
        elif cmd == "resume":
            runner.frozen = False
        elif cmd == "reset":
            runner.reset()
            if runner.monitor is not None:
                runner.alerts.append({"t": runner.last_x_t, "kind": "reset",
                                      "state": runner.monitor.state})
                if self.pub is not None:
                    self._alerts(runner)
        log.info("control: %s %s", cmd, name)
        return {"ok": True, "model": name, "command": cmd}

    # ------------------------------------------------------------------ reload
    def reload(self):
        """Re-read the config file; keep learned state of models whose learning is unchanged."""
        from daemon.config import load

        if self.config_path is None:
            self.reloads["unavailable"] += 1
            return False, "no config file to reload (running the built-in demo config)"
        try:
            new = load(self.config_path)
        except (OSError, ValueError) as exc:
            self.reloads["error"] += 1
            log.error("reload failed, keeping the current config: %s", exc)
            return False, str(exc)
        if new.daemon != self.config.daemon:
            log.warning("reload: daemon settings changed; endpoints take effect on restart")
        old = self.runners
        runners = {}
        for m in new.models:
            r = old.get(m.name)
            if r is not None and r.cfg.fingerprint() == m.fingerprint():
                r.reconfigure(m)
                runners[m.name] = r
            else:
                runners[m.name] = ModelRunner(m)
        if self.sub is not None:
            for name in set(old) - set(runners):
                self.sub.setsockopt(zmq.UNSUBSCRIBE, name.encode())
            for name in set(runners) - set(old):
                self.sub.setsockopt(zmq.SUBSCRIBE, name.encode())
        kept = sorted(n for n in runners if runners[n] is old.get(n))
        self.runners = runners
        self.config = type(new)(daemon=self.config.daemon, models=new.models, source=new.source)
        self.reloads["ok"] += 1
        log.info("reloaded %s: %d model(s), kept learned state of %s", self.config_path,
                 len(runners), ", ".join(kept) or "none")
        return True, None

    # ------------------------------------------------------------------ shutdown
    def close(self) -> None:
        """Close everything in the documented order (idempotent)."""
        if self.sub is not None:
            self.sub.close(linger=0)
            self.closed_order.append("feed")
            self.sub = None
        if self.rep is not None:
            self.rep.close(linger=0)
            self.closed_order.append("control")
            self.rep = None
        if self.pub is not None:
            self.pub.close(linger=PUB_LINGER_MS)
            self.closed_order.append("publish")
            self.pub = None
        if self._http is not None:
            self._http.shutdown()
            self._http.server_close()
            self.closed_order.append("metrics")
            self._http = None
        for s in (self._wake_r, self._wake_w):
            if s is not None:
                s.close()
        self._wake_r = self._wake_w = None
        if self._own_ctx and self._ctx is not None:
            self._ctx.term()
            self.closed_order.append("context")
            self._ctx = None
        log.info("stopped")


def _concat(batches: list[PredBatch]) -> PredBatch:
    if len(batches) == 1:
        return batches[0]
    arrays = {f: np.concatenate([getattr(b, f) for b in batches])
              for f in ("t", "mean", "std", "var", "lo", "hi", "dof")}
    return PredBatch(ids=[i for b in batches for i in b.ids],
                     status=[s for b in batches for s in b.status], **arrays)


def _topic(frames) -> str:
    try:
        return bytes(frames[0]).decode("utf-8") if frames else ""
    except UnicodeDecodeError:
        return ""


def _plain(obj):
    """Replace nan by None so replies are plain data in any client language."""
    if isinstance(obj, float):
        return None if math.isnan(obj) else obj
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_plain(v) for v in obj]
    return obj
