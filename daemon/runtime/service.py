"""The service loop: poll, drain, decode, call the runners, encode, publish.

Start-up order: lock the state folder; load its newest valid checkpoint and replay the
write-ahead log records after it; apply the config file as a reload would; write a
checkpoint; only then connect the feed, bind the publisher and the control socket, and
report ready. A second daemon on the same folder stops at the lock.

Every change of learned state is a write-ahead log record, appended before its effect is
published or acknowledged: a lab result that reached a posterior (learned or gated, with the
features it was matched with), a control action (freeze, resume, reset, acknowledge) and a
reload that replaces, adds or removes a model. Replay runs them through the same runner
methods as live processing (:meth:`ModelRunner.learn_row`, :meth:`ModelRunner.control`).
Feature samples are not logged; the feature buffers are in the checkpoints.

Shutdown order (tested): stop reading the feed; finish the batch in hand and publish its
results; answer nothing more on the control socket and close it; write a checkpoint and
unlock the state folder; close the publisher with its linger so queued predictions still
leave; stop the metrics server; terminate the context. Signal handlers only queue an event
and wake the poller; the loop acts on it. A failed write or fsync of the state folder
(:class:`daemon.runtime.store.DurabilityError`) stops the loop; :meth:`Service.run` then returns
``EXIT_DURABILITY``.
"""

from __future__ import annotations

import contextlib
import gc
import logging
import math
import re
import signal
import socket
import threading
import time
from collections import Counter, deque
from contextlib import contextmanager
from datetime import UTC, datetime

import numpy as np
import zmq
from prometheus_client import CollectorRegistry, start_http_server

from daemon.config import ModelConfig
from daemon.exitcodes import EXIT_DURABILITY, EXIT_OK
from daemon.logsetup import RateLimitedLog
from daemon.runtime import wire
from daemon.runtime.feed import Feed, FeedStats
from daemon.runtime.metrics import ServiceCollector
from daemon.runtime.notify import Notifier
from daemon.runtime.runner import (
    MAX_REWIND,
    ModelRunner,
    PredBatch,
    Rejected,
    predict_few_together,
)
from daemon.runtime.security import (
    DOMAIN_CONTROL,
    DOMAIN_PUBLISH,
    CurveKeys,
    Security,
    check_binds,
)
from daemon.runtime.store import DurabilityError, Recovery, StateDir, StoreError
from daemon.sharding import select

log = logging.getLogger("posteriord")

# Schema of the checkpoint body written by Service.state_body().
STATE_SCHEMA = "posteriord.state/1"
RECORD_KINDS = ("lab", "ctl", "model", "import")


class StateError(StoreError):
    """The state folder is intact but its content cannot be used (schema, bad record)."""

PUB_LINGER_MS = 2000
COMMANDS = ("ping", "status", "posterior", "sensitivities", "detectors", "acknowledge",
            "freeze", "resume", "reset", "checkpoint", "reload")


# most single samples of a model with dead times predicted together (see _feed)
_DELAYED_PENDING = 64


class _Pending:
    """A model's feature samples of one wake-up, waiting to be predicted and answered.

    ``ts``/``rows``/``ids`` are single samples (or the rows of a block holding lab values),
    ``blocks`` whole feature blocks ``(t, X, ids, has_id, packed)``; ``block`` tells which
    kind of message the buffered rows came in, so they are answered in kind.
    """

    __slots__ = ("ts", "rows", "ids", "blocks", "block")

    def __init__(self, block: bool):
        self.ts: list = []
        self.rows: list = []
        self.ids: list = []
        self.blocks: list = []
        self.block = block


# an epoch time in seconds between 2001 and 2286 as the runner's messages write it
_EPOCH = re.compile(r"(?<![\d.e+-])(\d{10}(?:\.\d+)?)(?![\d.e])")


def iso(t) -> str:
    """A sample time (epoch seconds) as ISO 8601 UTC, for log lines; ``-`` if none."""
    try:
        return datetime.fromtimestamp(float(t), UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    except (TypeError, ValueError, OverflowError, OSError):
        return "-"


def with_iso_times(text: str) -> str:
    """``text`` with each epoch time in it followed by its ISO form, so that a log line
    says which sample it is about: ``t=1767571200.0 (2026-01-05T00:00:00Z)``."""
    return _EPOCH.sub(lambda m: f"{m[1]} ({iso(m[1])})", text)


class _IsoTimes:
    """A log detail whose epoch times get their ISO form only when the line is written."""

    __slots__ = ("text",)

    def __init__(self, text: str):
        self.text = text

    def __str__(self) -> str:
        return with_iso_times(self.text)


class _RejectLog(RateLimitedLog):
    """The rejection log: a held-back line costs no formatting."""

    def warn(self, key: str, reason: str, detail: str) -> bool:
        return super().warn(key, reason, _IsoTimes(detail))


class Service:
    """posteriord's runner around :class:`daemon.runtime.runner.ModelRunner` objects."""

    def __init__(self, config, *, registry: CollectorRegistry | None = None,
                 context: zmq.Context | None = None, config_path: str | None = None,
                 fs=None, wall_clock=time.time):
        self.shard = config.daemon.shard_spec()
        # with a shard, this daemon is only ever given its share of the configured models
        config = type(config)(daemon=config.daemon, models=select(config.models, self.shard),
                              source=config.source)
        self.config = config
        self.config_path = config_path
        self.runners: dict[str, ModelRunner] = {m.name: ModelRunner(m) for m in config.models}
        self.security: Security | None = None
        self._feed_link: Feed | None = None
        self._feed_monitor = None  # what the loop polls for the feed watcher's requests
        self.feed_stats = FeedStats(config.daemon.feeds)
        self.received: Counter = Counter()
        self.rejected_unknown: Counter = Counter()
        self.reloads: Counter = Counter()
        self.registry = registry if registry is not None else CollectorRegistry()
        self.registry.register(ServiceCollector(self))
        self._ctx = context
        self._own_ctx = context is None
        self._events: deque = deque()
        self._stop = False
        self._rlog = _RejectLog(log, template="rejected model=%s reason=%s: %s")
        self._wake_r = self._wake_w = None
        self._http = None
        self.sub = self.pub = self.rep = None
        self.ready = threading.Event()
        self.closed_order: list[str] = []
        # durable state (see open_state); None: in memory only, as in socket-free runs
        self.store: StateDir | None = None
        self._fs = fs  # file system hook of the state folder (tests inject faults)
        self.exit_code = EXIT_OK
        self.recovery: Recovery | None = None
        self.replayed = 0
        self.wal_records = 0
        self.checkpoints = 0
        self.checkpoint_seq: int | None = None
        self._dirty = False
        self._last_checkpoint = time.monotonic()
        # admission only: a time beyond this clock plus daemon.future_tolerance is refused;
        # None (the backtest) admits any time, so a replay depends on the file alone
        self._wall_clock = wall_clock
        self._internal_logged: set = set()
        # the publisher's pred/ topic of each model, and its emitter (see _emitter)
        self._topics: dict[str, bytes] = {}
        self._emit: tuple | None = None

    # ------------------------------------------------------------------ hooks for later layers
    def extra_metrics(self):
        """Metric families of later layers (the service's own are in
        :data:`daemon.runtime.metrics.METRICS`)."""
        yield from ()

    # ------------------------------------------------------------------ durable state
    def open_state(self) -> None:
        """Lock the state folder, recover, replay, adopt the config, write a checkpoint.

        Raises :class:`daemon.runtime.store.LockedError` when another process holds the folder,
        :class:`daemon.runtime.store.CorruptionError` for a damaged log under ``on_corruption =
        "refuse"``, :class:`StateError` for content that cannot be used, and other
        :class:`daemon.runtime.store.StoreError` (including ``DurabilityError``) for file errors.
        """
        if self.store is not None:
            return
        d = self.config.daemon
        store = StateDir(d.state_dir, fsync=d.fsync, group_ms=d.group_commit * 1000.0,
                         fs=self._fs)
        for note in store.open():
            log.info("state: %s", note)
        try:
            with _gc_paused():
                rec = store.recover(d.on_corruption)
            for note in rec.notes:
                log.warning("state: %s", note)
            if rec.dropped_after_seq is not None:
                log.warning("state: on_corruption = \"checkpoint\": every record after seq %d "
                            "is dropped; the learned state is that of checkpoint %d plus "
                            "the intact records before the damage", rec.dropped_after_seq,
                            rec.checkpoint_seq)
            with _gc_paused():
                self.restore(rec, lenient=d.on_corruption == "checkpoint")
            same = {n: r.cfg for n, r in self.runners.items()} == \
                {m.name: m for m in self.config.models}
            self.adopt(self.config.models, at_start=True)
            self.store = store
            self.recovery = rec
            if same and rec.checkpoint is not None and rec.dropped_after_seq is None \
                    and not rec.corrupt_segments:
                # the config changed nothing: the state is the checkpoint plus the log, as a
                # crash before this checkpoint is durable would find it again, so it need
                # not hold up the start
                self.checkpoint_seq = rec.checkpoint_seq
                with _gc_paused():
                    store.begin_checkpoint(self.state_body)
                written = "being written in the background"
            else:
                self.checkpoint()
                written = "written"
        except BaseException:
            self.store = None
            store.close()
            raise
        log.info("state: %s holds checkpoint %d and %d record(s) after it; replayed %d; "
                 "checkpoint %d %s", store.path, rec.checkpoint_seq, len(rec.records),
                 self.replayed, store.last_seq, written)

    def restore(self, rec: Recovery, *, lenient: bool = False) -> None:
        """Rebuild the runners from a recovered checkpoint and replay the records after it.

        Without a checkpoint the runners start from the current config. Models are built
        from the settings saved with their state, as they were when it was learned; the
        caller then applies the current config (:meth:`adopt`). With ``lenient`` a record
        that cannot be replayed is logged and skipped instead of raising :class:`StateError`.
        """
        if rec.checkpoint is None:
            self.runners = {m.name: ModelRunner(m) for m in self.config.models}
        else:
            self.load_body(rec.checkpoint, rec.checkpoint_seq)
        self.replayed = 0
        # a lenient replay may skip records, and then keeps every snapshot
        snaps = None if lenient else _snapshots_needed(rec.records)
        terms = _ReplayTerms(self.runners, rec.records)
        for i, record in enumerate(rec.records):
            try:
                self.apply_record(record, True if snaps is None else snaps[i], terms.get(i))
            except (StateError, ValueError, KeyError, TypeError) as exc:
                if not lenient:
                    raise StateError(f"write-ahead log record {record.get('seq')} cannot be "
                                     f"replayed: {exc}. Set on_corruption = \"checkpoint\" to "
                                     f"skip such records") from None
                log.error("state: record %s skipped: %s", record.get("seq"), exc)
                continue
            self.replayed += 1
        for runner in self.runners.values():
            runner.alerts.clear()  # published before the restart, or moot by now

    def state_body(self) -> dict:
        """The checkpoint body: every runner's state and the service counters."""
        return {"schema": STATE_SCHEMA,
                "models": [r.to_state() for r in self.runners.values()],
                "received": dict(self.received),
                "rejected_unknown": dict(self.rejected_unknown),
                "reloads": dict(self.reloads)}

    def load_body(self, body: dict, seq: int = 0) -> None:
        """Inverse of :meth:`state_body`; raises :class:`StateError` on a body it cannot use."""
        if body.get("schema") != STATE_SCHEMA:
            raise StateError(f"checkpoint {seq} has schema {body.get('schema')!r}, this "
                             f"version reads {STATE_SCHEMA!r}")
        try:
            runners = {}
            for state in body["models"]:
                r = ModelRunner.from_state(state)
                runners[r.name] = r
            received = Counter(body["received"])
            unknown = Counter(body["rejected_unknown"])
            reloads = Counter(body["reloads"])
        except (ValueError, KeyError, TypeError) as exc:
            raise StateError(f"checkpoint {seq} cannot be loaded: {exc}") from None
        self.runners = runners
        self.received, self.rejected_unknown, self.reloads = received, unknown, reloads

    def apply_record(self, record: dict, snapshot: bool = True, terms=None) -> None:
        """Replay one write-ahead log record (see the module docstring for the kinds).

        ``snapshot=False`` for a lab record whose rewind snapshot no later record can use
        (see :func:`_snapshots_needed`); ``terms``: the basis terms of a lab record's
        features, evaluated with those of the records after it (:class:`_ReplayTerms`).
        The result is the same to the last bit.
        """
        kind = record.get("k")
        name = record.get("m")
        if kind not in RECORD_KINDS:
            raise StateError(f"unknown record kind {kind!r}")
        if kind == "model":
            if record["op"] == "new":
                self.runners[name] = ModelRunner(ModelConfig.from_state(record["config"]))
            elif record["op"] == "drop":
                self.runners.pop(name, None)
            else:
                raise StateError(f"unknown model operation {record['op']!r}")
            return
        if kind == "import":
            self.runners[name] = ModelRunner.from_state(record["state"], name)
            return
        runner = self.runners.get(name)
        if runner is None:
            raise StateError(f"record for model {name!r}, which the state does not hold")
        if kind == "ctl":
            # "note": the reason, who and when of a freeze or resume (absent in older logs)
            runner.control(record["cmd"], record.get("note"))
            return
        try:
            runner.replay(record, snapshot, terms)
        except Rejected as exc:
            raise StateError(f"lab result of {name} at t={record['t']!r} was learned before "
                             f"the restart but not in replay ({exc})") from None

    def adopt(self, models, *, at_start: bool = False) -> list[str]:
        """Apply model configs as a reload does; returns the names that kept their state.

        A model whose fingerprint is unchanged keeps its state (and takes the new non-learning
        settings); any other starts from its prior, and models not listed are removed. Live
        (not ``at_start``), each replacement, addition and removal is a log record; at
        start-up the checkpoint written next records the outcome.
        """
        old = self.runners
        runners: dict[str, ModelRunner] = {}
        records = []
        for m in models:
            r = old.get(m.name)
            if r is not None and r.cfg.fingerprint() == m.fingerprint():
                r.reconfigure(m)
                runners[m.name] = r
                continue
            runners[m.name] = ModelRunner(m)
            records.append({"k": "model", "m": m.name, "op": "new", "config": m.to_state()})
            if at_start and r is not None:
                log.warning("state: the learning settings of %s changed since its state was "
                            "saved (fingerprint %s, now %s); it starts from its prior",
                            m.name, r.cfg.fingerprint(), m.fingerprint())
        for name in old:
            if name not in runners:
                records.append({"k": "model", "m": name, "op": "drop"})
                if at_start:
                    log.warning("state: model %s is no longer configured; its saved state is "
                                "dropped", name)
        if not at_start:
            for record in records:
                self._log(record)
        self.runners = runners
        if records:
            self._dirty = True
        return sorted(n for n in runners if runners[n] is old.get(n))

    def _log(self, record: dict) -> None:
        """Append a record to the write-ahead log (raises DurabilityError on failure)."""
        if self.store is None:
            return
        self.store.append(record)
        self.wal_records += 1
        self._dirty = True

    def checkpoint(self) -> int:
        """Write a checkpoint now; returns its sequence number."""
        if self.store is None:
            raise StoreError("no state folder is open (an in-memory service)")
        if self.store.checkpoint_running:
            self._checkpoint_polled(self.store.wait_checkpoint())
        with _gc_paused():
            seq = self.store.checkpoint(self.state_body())
        self.checkpoints += 1
        self.checkpoint_seq = seq
        self._dirty = False
        self._last_checkpoint = time.monotonic()
        return seq

    def _housekeeping(self) -> None:
        """Periodic checkpoint (by time or by log size, written in the background), group
        commit."""
        store = self.store
        if store is None:
            return
        now = time.monotonic()
        if store.checkpoint_running:
            self._checkpoint_polled(store.poll_checkpoint())
        d = self.config.daemon
        if self._dirty and not store.checkpoint_running and (
                now - self._last_checkpoint >= d.checkpoint_every
                or 0 < d.checkpoint_wal_bytes <= store.wal_bytes):
            # a fork of the loop at this WAL position builds, encodes and writes it
            with _gc_paused():
                store.begin_checkpoint(self.state_body)
            # what has lived until a checkpoint is the models' learned state, which the
            # cyclic collector would otherwise visit in every full collection (seconds with
            # thousands of models); the feed and lab paths make no cyclic garbage (tested),
            # so frozen objects are freed by reference counting as before
            gc.freeze()
            self._dirty = False
            self._last_checkpoint = now
        else:
            store.maybe_sync(now)

    def _checkpoint_if_log_full(self) -> None:
        """The checkpoint by log size inside a batch, right after a lab record is logged.

        One wake-up may take a whole backlog (up to ``batch_limit`` messages, ``batch_bytes``
        of payload: minutes of lab records after an outage); checked only between wake-ups,
        the log would grow far past ``checkpoint_wal_bytes`` and a crash would replay all
        of it. Here every runner's state is exactly that of the log up to this record, so a
        fork is a checkpoint at this WAL position; the predictions still pending in the batch
        are not state.
        """
        store = self.store
        limit = self.config.daemon.checkpoint_wal_bytes
        if store is None or limit <= 0 or store.wal_bytes < limit:
            return
        if store.checkpoint_running:
            self._checkpoint_polled(store.poll_checkpoint())
            if store.checkpoint_running:
                return  # the log waits for the one being written
        with _gc_paused():
            store.begin_checkpoint(self.state_body)
        # _dirty stays set: the rest of the batch changes the feature buffers
        self._last_checkpoint = time.monotonic()

    def _checkpoint_polled(self, seq: int | None) -> None:
        """Account for a background checkpoint that ended (``seq``: it is durable)."""
        store = self.store
        if store.checkpoint_running:
            return
        for note in store.notes:
            log.error("state: %s", note)
        store.notes.clear()
        if seq is None:
            self._dirty = True  # it failed: the next turn tries again
            return
        self.checkpoints += 1
        self.checkpoint_seq = seq

    def _poll_ms(self) -> int:
        store = self.store
        if store is None:
            return 1000
        if store.checkpoint_running:
            wait = 0.05  # look after the background checkpoint
            if store.pending:
                wait = min(wait, self.config.daemon.group_commit)
        elif store.pending:
            wait = self.config.daemon.group_commit
        elif self._dirty:
            wait = self.config.daemon.checkpoint_every - (time.monotonic()
                                                          - self._last_checkpoint)
        else:
            return 1000
        return max(1, min(1000, math.ceil(wait * 1000.0)))

    # ------------------------------------------------------------------ sockets
    def open(self) -> None:
        """Open the state folder (:meth:`open_state`), then the sockets."""
        self.open_state()
        d = self.config.daemon
        keys = CurveKeys.from_config(d)
        check_binds({"publish": d.publish, "control": d.control}, keys)
        ctx = self._ctx = self._ctx or zmq.Context()
        # the authenticator must run before a CURVE server socket binds
        self.security = Security(ctx, keys)
        self.security.start()
        # the feed SUB with its reconnection policy and monitor thread (daemon.runtime.feed)
        self._feed_link = Feed(ctx, d, self.runners, self.security, self.feed_stats, log)
        self.sub = self._feed_link.sock
        self._feed_monitor = self._feed_link.wakeup
        self._feed_link.start()
        self.pub = ctx.socket(zmq.PUB)
        self.pub.setsockopt(zmq.LINGER, PUB_LINGER_MS)
        self.pub.setsockopt(zmq.SNDHWM, d.hwm)
        self.security.server(self.pub, DOMAIN_PUBLISH)
        self.pub.bind(d.publish)
        self.rep = ctx.socket(zmq.REP)
        self.rep.setsockopt(zmq.LINGER, 0)
        self.rep.setsockopt(zmq.MAXMSGSIZE, 65536)
        self.security.server(self.rep, DOMAIN_CONTROL)
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
        self.poller.register(self._feed_monitor, zmq.POLLIN)

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
        metrics = self.metrics_address
        log.info("ready: %d model(s); feed from %s, publishing on %s, control on %s, %s",
                 len(self.runners), ", ".join(self.config.daemon.feeds), self.publish_endpoint,
                 self.control_endpoint,
                 "metrics off" if metrics is None
                 else f"metrics on http://{_host(metrics[0])}:{metrics[1]}/metrics")
        # start-up objects never become garbage: keep them out of every later collection
        gc.freeze()
        self.ready.set()
        # the service manager (systemd Type=notify) starts dependants only now
        self._notify = Notifier.from_environment()
        self._notify.ready(f"{len(self.runners)} model(s)")
        wd_ms = self._notify.poll_ms
        # bound once: a paced feed turns this loop once per message
        tick, poll, poll_ms = self._notify.tick, self.poller.poll, self._poll_ms
        wake_fd = self._wake_r.fileno()  # the poller reports plain sockets by fd
        try:
            while not self._stop:
                tick()
                wait = poll_ms()
                socks = dict(poll(wait if wd_ms is None else min(wait, wd_ms)))
                if wake_fd in socks:
                    # empty the wake-up pipe; the events themselves are in the queue
                    with contextlib.suppress(BlockingIOError):
                        while self._wake_r.recv(4096):
                            continue
                while self._events:
                    self._event(self._events.popleft())
                if socks.get(self.sub):
                    self.drain()
                if socks.get(self._feed_monitor):
                    # take what the feed queued before any of its connections is dropped and
                    # made again: libzmq aborts (fq.cpp, "!_more") when a pipe goes away with
                    # a message of it half-taken
                    for _ in range(8):
                        if self.drain() < self.config.daemon.batch_limit:
                            break
                    self._feed_dropped()
                if socks.get(self.rep):
                    self._control()
                self._housekeeping()
        except DurabilityError as exc:
            # the folder refuses writes from now on; going on would learn what a restart
            # cannot know
            log.critical("state folder write failed, stopping: %s", exc)
            self.exit_code = EXIT_DURABILITY
        finally:
            self.close()
        return self.exit_code

    def _event(self, what: str) -> None:
        if what == "stop":
            log.info("stop requested")
            self._stop = True
        elif what == "reload":
            self.reload()

    def _feed_dropped(self) -> None:
        """Reconnect feeds as the feed watcher asks (see :mod:`daemon.runtime.feed`)."""
        self._feed_link.act()

    def drain(self) -> int:
        """Take queued feed messages without blocking, process, publish.

        At most ``batch_limit`` messages and, counting payloads, about ``batch_bytes``.
        """
        d = self.config.daemon
        limit = d.batch_limit
        budget = d.batch_bytes
        sub = self.sub
        recv = sub.recv
        batch = []
        while len(batch) < limit:
            if len(batch) == 1 and not sub.get(zmq.EVENTS) & zmq.POLLIN:
                # a paced feed wakes the loop for each message: asking whether another is
                # queued costs half the failed receive that would otherwise end the drain
                break
            try:
                # frames, not bytes: a frame tells whether more parts follow, which
                # recv_multipart asks the socket for (an option lookup) after every part
                frame = recv(zmq.NOBLOCK, copy=False)
            except zmq.Again:
                break
            frames = [frame.bytes]
            while frame.more:
                # the parts of a message arrive together: the rest is there
                frame = recv(zmq.NOBLOCK, copy=False)
                frames.append(frame.bytes)
            batch.append(frames)
            if len(frames) > 1:
                budget -= len(frames[-1])
                if budget <= 0:
                    break
        self.process(batch)
        return len(batch)

    def process(self, batch) -> None:
        """Decode and process a batch of feed messages (lists of frames), then publish.

        This is the whole per-message path; the backtest calls it without sockets, with a
        publisher that records what would have been sent.

        No cyclic garbage collection runs inside. A wake-up's working objects (a pending
        segment per model, its lists, each visit's results) live until its end: the young
        collections that many allocations trigger would promote them to the oldest
        generation, where they die soon after but count toward a full collection, which
        visits every object of every model (seconds with 10 000 trained models). Whatever
        survives the wake-up is collected as usual after it.
        """
        if not batch:
            return
        # inline rather than _gc_paused: a paced feed makes a wake-up of each message
        enabled = gc.isenabled()
        gc.disable()
        try:
            self._process(batch)
        finally:
            if enabled:
                gc.enable()

    def _process(self, batch) -> None:
        max_bytes = self.config.daemon.max_message_bytes
        # a view of the runners' specs, not a copy: nothing per model on each wake-up
        specs = _Specs(self.runners)
        pending: dict[str, _Pending] = {}
        self._dirty = True  # the feature buffers changed: the next checkpoint is due
        tol = self.config.daemon.future_tolerance
        latest = (self._wall_clock() + tol) if self._wall_clock is not None and tol > 0 \
            else math.inf
        for frames in batch:
            try:
                msg = wire.decode_feed(frames, specs, max_bytes)
                if msg.t[-1] > latest or (msg.block and not msg.increasing
                                          and max(msg.t) > latest):
                    raise wire.WireError("bad_time", _future_detail(msg.t, latest - tol),
                                         msg.seq)
            except wire.WireError as exc:
                name = _topic(frames)
                if name in self.runners:
                    self.received[name] += 1
                    self.runners[name].rejected[exc.reason] += 1
                    # a rejected message still arrived: its seq is no gap in the stream
                    self.runners[name].note_seq(exc.seq, exc.src)
                else:
                    self.received[""] += 1
                    self.rejected_unknown[exc.reason] += 1
                    name = ""
                self._rlog.warn(name, exc.reason, exc.detail)
                continue
            self.received[msg.model] += 1
            try:
                self._feed(msg, pending)
            except DurabilityError:
                raise
            except Exception as exc:  # noqa: BLE001 - one message must never stop the loop
                self._internal_error(msg.model, exc)
                pending.pop(msg.model, None)
        shared = self._shared(pending)
        for name, seg in pending.items():
            try:
                self._flush(self.runners[name], seg, shared=shared.get(name))
            except DurabilityError:
                raise
            except Exception as exc:  # noqa: BLE001
                self._internal_error(name, exc)

    def _internal_error(self, name: str, exc: BaseException) -> None:
        """Count and log an unexpected error while handling a model's message; carry on.

        The first of each kind per model is logged with its traceback, later ones through
        the rate-limited log. Learned state is safe: every change of it is logged to the
        write-ahead log only after it is complete, and a restart replays only what was.
        """
        runner = self.runners.get(name)
        if runner is not None:
            runner.rejected["internal_error"] += 1
        key = (name, type(exc).__name__)
        if key not in self._internal_logged:
            self._internal_logged.add(key)
            log.error("internal error handling a message of %s (counted as internal_error; "
                      "the daemon carries on)", name, exc_info=exc)
        else:
            self._rlog.warn(name, "internal_error", f"{type(exc).__name__}: "
                                                    f"{str(exc)[:200]}")

    def _feed(self, msg: wire.Feed, pending: dict) -> None:
        runner = self.runners[msg.model]
        if msg.seq is not None:
            runner.note_seq(msg.seq, msg.src)
        seg = pending.get(msg.model)
        if seg is None:
            seg = pending[msg.model] = _Pending(msg.block)
        elif seg.block != msg.block:
            self._flush(runner, seg)
            seg.block = msg.block
        elif runner.delayed and (seg.blocks or len(seg.ts) >= _DELAYED_PENDING or (
                seg.ts and msg.t[-1] - seg.ts[0] > runner.lookback_margin)):
            # a model with dead times predicts from rows up to a dead time old: answer what
            # is pending before newer rows push the ones it needs out of the buffer (so a
            # burst spanning hours gives what the same feed paced out gives)
            self._flush(runner, seg)
        if not msg.block and not msg.has_y:
            # the common message: one feature sample, buffered for a batched prediction
            self._buffer(runner, seg, msg.t[0], msg.x[0], msg.ids[0])
            return
        if msg.block and not msg.has_y and isinstance(msg.x, np.ndarray) and runner.add_block(
                msg.t, msg.x, msg.ids if msg.has_id else None, msg.increasing, msg.t_array):
            # the common block: features only, in order. Buffered with the model's other
            # such blocks of this wake-up, predicted with them in one call and answered one
            # message per block, as single samples are.
            seg.blocks.append((msg.t, msg.x, msg.ids, msg.has_id, msg.packed, msg.t_array))
            return
        parts = [] if msg.block else None
        for t, row, y, ident in zip(msg.t, msg.x, msg.y, msg.ids, strict=True):
            if row is not None and not self._buffer(runner, seg, t, row, ident):
                continue
            if y is not None:
                self._flush(runner, seg, parts)
                self._learn(runner, t, y, ident)
        if msg.block:
            self._flush(runner, seg, parts)
            if parts:
                ts = [t for p in parts for t in p[0]]
                ids = [i for p in parts for i in p[1]]
                self._publish(runner, ts, ids, _concat([p[2] for p in parts]), True,
                              any(i is not None for i in ids), msg.packed)

    def _buffer(self, runner: ModelRunner, seg: _Pending, t: float, row, ident) -> bool:
        """Buffer one feature sample for the next batched prediction; False if rejected."""
        try:
            runner.add_features(t, row, ident)
        except Rejected as exc:
            runner.rejected[exc.reason] += 1
            self._rlog.warn(runner.name, exc.reason, exc.detail)
            return False
        seg.ts.append(t)
        seg.rows.append(row)
        seg.ids.append(ident)
        return True

    def _flush_blocks(self, runner: ModelRunner, seg: _Pending) -> None:
        """Predict the buffered feature blocks of a model (together where that changes no
        bit of the result: `ModelRunner.predict_blocks`); answer each block."""
        blocks, seg.blocks = seg.blocks, []
        # each result is published before the next is asked for (see predict_blocks)
        batches = runner.predict_blocks([(ts, X, ids, ta) for ts, X, ids, _h, _p, ta in blocks])
        for (ts, _X, ids, has_id, packed, _ta), batch in zip(blocks, batches, strict=True):
            self._publish(runner, ts, ids, batch, True, has_id, packed)

    def _shared(self, pending: dict) -> dict:
        """The numbers of the wake-up's short visits, many models' rows computed together
        (`runner.predict_few_together`; the same bits as visit by visit)."""
        runners = self.runners
        visits = []
        for name, seg in pending.items():
            if not seg.block and not seg.blocks:
                r = runners[name]
                if r.few_together(seg.ts):
                    visits.append((name, r, seg.ts, seg.rows))
        if len(visits) < 2:
            return {}
        try:
            return predict_few_together(visits)
        except Exception as exc:  # noqa: BLE001 - each model then computes its own
            self._rlog.warn("", "internal_error", f"rows of several models together: "
                                                  f"{type(exc).__name__}: {str(exc)[:200]}")
            return {}

    def _flush(self, runner: ModelRunner, seg: _Pending, parts: list | None = None,
               shared: tuple | None = None) -> None:
        # buffered blocks first: everything published or learned after a flush must come
        # after the predictions of what was buffered before it
        if seg.blocks:
            self._flush_blocks(runner, seg)
        ts, rows, ids = seg.ts, seg.rows, seg.ids
        if not ts:
            return
        singles = parts is None and not seg.block
        batch = runner.predict(ts, rows, ids, singles=singles, shared=shared)
        if parts is not None:
            # a block predicted in pieces around its lab values still gets one message
            parts.append((ts, ids, batch))
        else:
            # ids.count: no generator per visit for the common run of samples without ids
            self._publish(runner, ts, ids, batch, seg.block, ids.count(None) != len(ids))
        seg.ts, seg.rows, seg.ids = [], [], []

    def _publish(self, runner: ModelRunner, ts: list, ids: list, batch, block: bool,
                 has_id: bool, packed: bool = False) -> None:
        topic = self._topics.get(runner.name)
        if topic is None:
            topic = self._topics[runner.name] = b"pred/" + runner.name.encode()
        level = runner.cfg.level
        trust = runner.trust
        if packed:
            # a block whose x came packed is answered in kind: the numbers as bins of
            # little-endian float64
            self.pub.send_multipart([topic, wire.pack_packed_block(
                batch.t, batch.mean, batch.std, batch.var, batch.lo, batch.hi, level,
                batch.dof, batch.status, trust, ids if has_id else None)])
        elif block:
            body = {"t": ts, "mean": batch.mean.tolist(), "std": batch.std.tolist(),
                    "var": batch.var.tolist(), "lo": batch.lo.tolist(),
                    "hi": batch.hi.tolist(), "level": level, "dof": batch.dof.tolist(),
                    "status": batch.status, "trust": trust}
            if has_id:
                body["id"] = ids
            self.pub.send_multipart([topic, wire.packb(body)])
        else:
            mean, std, var = batch.mean, batch.std, batch.var
            lo, hi, dof = batch.lo, batch.hi, batch.dof
            if type(mean) is not list:  # the general path's arrays (the short path: lists)
                mean, std, var = _floats(mean), _floats(std), _floats(var)
                lo, hi, dof = _floats(lo), _floats(hi), _floats(dof)
            emit = self._emitter()
            payloads = wire.pack_predictions(
                ts, mean, std, var, lo, hi, level, dof, batch.status,
                trust if batch.trust is None else batch.trust, ids if has_id else None)
            if not batch.marks:
                for p in payloads:
                    emit(topic, p)
            else:
                marks = dict(batch.marks)
                for i, p in enumerate(payloads):
                    emit(topic, p)
                    if i in marks:
                        # each sample's alerts right after its own prediction, as if it had
                        # come alone
                        runner.alerts += marks[i]
                        self._alerts(runner)
        if runner.alerts:
            self._alerts(runner)

    def _emitter(self):
        """A function sending one (topic, payload) message on the publisher.

        On a ZeroMQ socket two ``send`` calls cost a third of one ``send_multipart`` (which
        builds and checks a list each time); other publishers (the backtest's recorder) get
        ``send_multipart``. Made once per publisher, not on every visit.
        """
        pub = self.pub
        made = self._emit
        if made is not None and made[0] is pub:
            return made[1]
        self._emit = (pub, self._make_emitter(pub))
        return self._emit[1]

    @staticmethod
    def _make_emitter(pub):
        if isinstance(pub, zmq.Socket):
            send, more = pub.send, zmq.SNDMORE

            def emit(topic: bytes, payload: bytes) -> None:
                send(topic, more)
                send(payload)
            return emit
        return lambda topic, payload: pub.send_multipart([topic, payload])

    def _alerts(self, runner: ModelRunner) -> None:
        topic = b"alert/" + runner.name.encode()
        for event in runner.alerts:
            event = {"model": runner.name, **event}
            if event["kind"] == "state":
                log.warning("trust %s: %s -> %s (%s) at sample time %s", runner.name,
                            event["old"], event["new"],
                            ", ".join(r["name"] for r in event["reasons"]) or "no reasons",
                            iso(event.get("t")))
            elif event["kind"] == "action" and event["action"] in ("freeze", "resume"):
                pass  # logged by the control command, with who and why
            elif event["kind"] == "action":
                log.warning("%s: %s after %s at sample time %s", runner.name, event["action"],
                            event["reason"], iso(event.get("t")))
            self.pub.send_multipart([topic, wire.packb(event)])
        runner.alerts.clear()

    def _learn(self, runner: ModelRunner, t: float, y: float, ident) -> None:
        try:
            fit, record = runner.learn(t, y, ident)
        except Rejected as exc:
            runner.rejected[exc.reason] += 1
            self._rlog.warn(runner.name, exc.reason, exc.detail)
            return
        # logged before it is published: with fsync = "always" the fit/ message never tells
        # of a lab result a restart would not know
        self._log(record)
        self._checkpoint_if_log_full()
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
            except DurabilityError:
                raise
            except Exception as exc:  # noqa: BLE001 - a request must never stop the loop
                log.error("internal error handling a control request", exc_info=exc)
                reply = {"ok": False, "error": f"internal error: {type(exc).__name__}: "
                                               f"{str(exc)[:200]} (logged by the daemon)"}
            self.rep.send(wire.packb(_plain(reply)))

    def command(self, msg: dict) -> dict:
        """Execute one control command (also callable in-process)."""
        cmd = msg.get("cmd")
        if cmd == "ping":
            return {"ok": True}
        if cmd == "status":
            return {"ok": True, "models": {n: r.status() for n, r in self.runners.items()},
                    "state": self.state_status()}
        if cmd == "reload":
            ok, error = self.reload()
            return {"ok": ok} if ok else {"ok": False, "error": error}
        if cmd == "checkpoint":
            if self.store is None:
                return {"ok": False, "error": "checkpoint unavailable: no state folder is "
                                              "open (an in-memory service)"}
            seq = self.checkpoint()
            log.info("control: checkpoint %d written", seq)
            return {"ok": True, "seq": seq}
        if cmd not in COMMANDS:
            return {"ok": False, "error": f"unknown command {wire.show(cmd)}; expected one of "
                                          f"{', '.join(COMMANDS)}"}
        name = msg.get("model")
        runner = self.runners.get(name) if isinstance(name, str) else None
        if runner is None:
            models = sorted(self.runners)
            what = ("no model given" if name is None
                    else f"no model {wire.show(name)} in this daemon")
            return {"ok": False, "error": f"{cmd} needs a model ({what}); models: "
                                          f"{', '.join(models) or 'none'}",
                    "needs": "model", "models": models}
        if cmd in ("posterior", "sensitivities"):
            # "sensitivities": true adds them to the posterior (ctl asks for them)
            at = msg.get("at")
            if at is not None and not isinstance(at, dict):
                return {"ok": False, "error": f"\"at\" must be a map {{tag: value}}, got "
                                              f"{wire.show(at)}"}
            sens = None
            if cmd == "sensitivities" or msg.get("sensitivities"):
                try:
                    sens = runner.sensitivities(at)
                except (ValueError, TypeError) as exc:
                    return {"ok": False, "error": str(exc)[:300]}
            if cmd == "sensitivities":
                return {"ok": True, "model": name, **sens}
            reply = {"ok": True, "model": name, **runner.posterior()}
            if sens is not None:
                reply["sensitivities"] = sens
            return reply
        if cmd in ("detectors", "acknowledge"):
            if runner.monitor is None:
                return {"ok": False, "error": f"alerts are disabled for {name} "
                                              "([model.alerts] enabled = false)"}
            if cmd == "detectors":
                return {"ok": True, "model": name, **runner.monitor.view()}
        note = None
        if cmd in ("freeze", "resume"):
            note, error = _control_note(msg)
            if error:
                return {"ok": False, "error": error}
        self._control_action(runner, cmd, note)
        reply = {"ok": True, "model": name, "command": cmd}
        if note is not None and (note["reason"] or note["by"]):
            reply["note"] = runner.learning_note
        if cmd == "acknowledge":
            reply["state"] = runner.monitor.state
        return reply

    def _control_action(self, runner: ModelRunner, cmd: str, note: dict | None = None) -> None:
        runner.control(cmd, note)
        record = {"k": "ctl", "m": runner.name, "cmd": cmd}
        if note is not None:
            record["note"] = note
        self._log(record)
        if self.store is not None:
            self.store.sync()  # acknowledged actions are durable in either fsync mode
        if self.pub is not None and runner.alerts:
            self._alerts(runner)
        if note is not None:
            log.info("control: %s %s by %s: %s", cmd, runner.name, note["by"] or "(unnamed)",
                     note["reason"] or "(no reason given)")
        else:
            log.info("control: %s %s", cmd, runner.name)

    def state_status(self) -> dict | None:
        """The state folder's part of the ``status`` reply (None in memory)."""
        if self.store is None:
            return None
        return {"dir": self.store.path, "last_seq": self.store.last_seq,
                "checkpoint_seq": self.checkpoint_seq, "pending": self.store.pending,
                "fsync": self.store.fsync_mode, "replayed": self.replayed,
                "records": self.wal_records, "checkpoints": self.checkpoints,
                "checkpoint_running": self.store.checkpoint_running,
                "wal_bytes": self.store.wal_bytes}

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
        if self.security is not None:
            self.security.reload()  # key folders are re-read on every reload
        new = type(new)(daemon=new.daemon, models=select(new.models, self.shard),
                        source=new.source)
        old = self.runners
        try:
            kept = self.adopt(new.models)
        except (ValueError, ArithmeticError, MemoryError) as exc:
            # adopt builds every runner before it changes anything: the running models stay
            self.reloads["error"] += 1
            log.error("reload failed, keeping the current config: %s", exc)
            return False, f"{type(exc).__name__}: {exc}"
        runners = self.runners
        if self.store is not None:
            self.store.sync()
        if self.sub is not None:
            for name in set(old) - set(runners):
                self.sub.setsockopt(zmq.UNSUBSCRIBE, name.encode())
            for name in set(runners) - set(old):
                self.sub.setsockopt(zmq.SUBSCRIBE, name.encode())
        self.config = type(new)(daemon=self.config.daemon, models=new.models, source=new.source)
        self.reloads["ok"] += 1
        log.info("reloaded %s: %d model(s), kept learned state of %s", self.config_path,
                 len(runners), ", ".join(kept) or "none")
        return True, None

    # ------------------------------------------------------------------ shutdown
    def close(self) -> None:
        """Close everything in the documented order (idempotent)."""
        if getattr(self, "_notify", None) is not None:
            self._notify.stopping()
            self._notify.close()
            self._notify = None
        if self.sub is not None:
            self._feed_link.close()
            self._feed_link = self._feed_monitor = None
            self.closed_order.append("feed")
            self.sub = None
        if self.rep is not None:
            self.rep.close(linger=0)
            self.closed_order.append("control")
            self.rep = None
        if self.store is not None:
            self._close_state()
            self.closed_order.append("state")
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
        if self.security is not None:
            if self.security.auth is not None:
                self.closed_order.append("auth")
            self.security.stop()
            self.security = None
        if self._own_ctx and self._ctx is not None:
            self._ctx.term()
            self.closed_order.append("context")
            self._ctx = None
        log.info("stopped")


    def _close_state(self) -> None:
        store = self.store
        self.store = None
        try:
            if store.checkpoint_running:
                store.wait_checkpoint()  # the one below covers it anyway
            if store.failed is None:
                with _gc_paused():
                    seq = store.checkpoint(self.state_body())
                self.checkpoints += 1
                self.checkpoint_seq = seq
                log.info("state: checkpoint %d written on shutdown", seq)
            else:
                log.error("state: no checkpoint on shutdown, the folder refuses writes "
                          "(%s)", store.failed)
        except DurabilityError as exc:
            log.critical("state: checkpoint on shutdown failed: %s", exc)
            self.exit_code = EXIT_DURABILITY
        finally:
            try:
                store.close()
            except DurabilityError as exc:
                log.critical("state: closing the folder failed: %s", exc)
                self.exit_code = EXIT_DURABILITY


def _snapshots_needed(records: list) -> list[bool]:
    """For each record of a replay, whether a lab record's rewind snapshot may be used.

    A lab result keeps a snapshot of the learning state from just before it, for a later
    result drawn before it (:meth:`ModelRunner.learn_row`). In a replay the later records are
    known: when at least ``MAX_REWIND`` more lab records of the same model follow, all drawn
    after it, its entry is trimmed before any of them could rewind to it, so the snapshot
    (a copy of the detectors' state, most of a replayed record's bookkeeping) is work whose
    result is thrown away. A ``model`` or ``import`` record starts the model afresh: no
    result after it rewinds to one before it, so the records before it are counted as those
    of a model of their own (the late results among them still rewind to each other).
    Anything else keeps it.
    """
    out = [True] * len(records)
    later: dict = {}  # model -> [lab records after this one, earliest drawn time among them]
    for i in range(len(records) - 1, -1, -1):
        r = records[i]
        kind, name = r.get("k"), r.get("m")
        if kind in ("model", "import"):
            later.pop(name, None)
            continue
        if kind != "lab":
            continue
        t = r.get("t")
        if not isinstance(t, float) or t != t:
            continue
        seen = later.get(name)
        if seen is None:
            later[name] = [1, t]
            continue
        if seen[0] >= MAX_REWIND and seen[1] > t:
            out[i] = False
        seen[0] += 1
        seen[1] = min(seen[1], t)
    return out


class _ReplayTerms:
    """The basis terms of the lab records of a replay, a block of one model's records at a
    time.

    One basis call for up to :attr:`BLOCK` rows instead of one per record: a basis is
    evaluated elementwise, row by row (the batch/row equivalence every basis keeps, see
    DEVELOPERS.md), so each row has the bits of its own call; each is handed out as a copy,
    a fresh array as a call of its own returns. A block is evaluated with the runner that
    holds the model when its first record is replayed, and ends before the next ``model`` or
    ``import`` record of that model (which replaces the runner, and maybe its basis). A
    record whose features are not a list of the basis's length gets None, and the runner
    evaluates it as a live result (raising as it would).
    """

    BLOCK = 256

    def __init__(self, runners: dict, records: list):
        self.runners = runners
        self.records = records
        self.done: dict[int, np.ndarray | None] = {}
        # per model, the indices of its lab records in order, None where a record replaces
        # the runner; and where each lab record is in that list
        self.order: dict = {}
        self.at: dict[int, int] = {}
        for j, r in enumerate(records):
            kind = r.get("k")
            if kind == "lab" or kind in ("model", "import"):
                seq = self.order.setdefault(r.get("m"), [])
                if kind == "lab":
                    self.at[j] = len(seq)
                seq.append(j if kind == "lab" else None)

    def get(self, i: int):
        done = self.done
        if i in done:
            return done.pop(i)
        if i not in self.at:
            return None
        record = self.records[i]
        name = record.get("m")
        runner = self.runners.get(name)
        if runner is None:
            return None
        n_inputs = runner.basis.n_inputs
        k = self.at[i]
        rows, where = [], []
        for j in self.order[name][k:k + self.BLOCK]:
            if j is None:
                break
            x = self.records[j].get("x")
            if type(x) is list and len(x) == n_inputs:
                rows.append(x)
                where.append(j)
        try:
            block = runner.basis(np.array(rows, dtype=float))
        except (TypeError, ValueError):
            # some row is not numbers: each is evaluated (and refused) on its own
            done.update(dict.fromkeys(where))
            return done.pop(i, None)
        for j, row in zip(where, block, strict=True):
            done[j] = row.copy()
        return done.pop(i, None)


@contextmanager
def _gc_paused():
    """No cyclic garbage collection inside: a checkpoint creates and drops millions of
    acyclic lists and floats (freed by reference counting), and the collections they would
    trigger took most of its time."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def _concat(batches: list[PredBatch]) -> PredBatch:
    if len(batches) == 1:
        return batches[0]
    arrays = {f: np.concatenate([getattr(b, f) for b in batches])
              for f in ("t", "mean", "std", "var", "lo", "hi", "dof")}
    return PredBatch(ids=[i for b in batches for i in b.ids],
                     status=[s for b in batches for s in b.status], **arrays)


def _floats(a) -> list:
    """A prediction batch's numbers as a list of floats (the short path gives lists)."""
    return a if type(a) is list else a.tolist()


def _future_detail(ts, now: float) -> str:
    """Why a time is refused as in the future, with a hint at a wrong unit."""
    t = max(ts)
    ahead = t - now
    for unit, factor in (("milliseconds", 1e3), ("microseconds", 1e6),
                         ("nanoseconds", 1e9)):
        if abs(t / factor - now) < 366 * 86400:
            return (f"t={t!r} is {ahead:.3g} s ahead of this host's clock; it looks like "
                    f"epoch {unit} (t / {factor:g} is within a year of now): send seconds")
    return (f"t={t!r} is {ahead:.3g} s ahead of this host's clock (more than "
            "daemon.future_tolerance); check the publisher's clock and time unit")


class _Specs:
    """What `wire.decode_feed` asks of the models: ``get(name)`` -> ``(tags, index)``.

    Looks the runner up when asked, so the service builds nothing per model on a wake-up
    and always sees its current runners.
    """

    __slots__ = ("_runners",)

    def __init__(self, runners: dict):
        self._runners = runners

    def get(self, name):
        r = self._runners.get(name)
        return None if r is None else r.spec


def _topic(frames) -> str:
    try:
        return bytes(frames[0]).decode("utf-8") if frames else ""
    except UnicodeDecodeError:
        return ""


def _host(host: str) -> str:
    return f"[{host}]" if ":" in host else host


def _control_note(msg: dict) -> tuple[dict | None, str | None]:
    """The reason and who of a freeze or resume request, and the wall-clock time it came.

    Both are optional strings (``reason`` up to 500 characters, ``by`` up to 100); the time
    is only an audit stamp, never used for learning.
    """
    note = {}
    for key, limit in (("reason", 500), ("by", 100)):
        value = msg.get(key, "")
        if value is None:
            value = ""
        if not isinstance(value, str) or len(value) > limit:
            return None, (f"{key} must be a text of at most {limit} characters, got "
                          f"{wire.show(value)}")
        note[key] = value
    note["at"] = time.time()
    return note, None


def _plain(obj):
    """Replace nan by None so replies are plain data in any client language."""
    if isinstance(obj, float):
        return None if math.isnan(obj) else obj
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_plain(v) for v in obj]
    return obj
