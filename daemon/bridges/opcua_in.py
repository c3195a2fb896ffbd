"""OPC UA in: a client of the plant's OPC UA server that puts input samples on the feed.

One subscription carries every configured node (sampling and publishing intervals as set,
no deadband, a queue per node so that a burst between two publications is not lost). The
changes that arrive together are applied to the model's table of last readings in
source-time order; a row is sent when an input changes a second time (the queue held
several values of it) and after the last change, stamped with the newest source timestamp
among the changes it holds (the server's clock, never the bridge's). Status codes (OPC UA Part 4,
the two severity bits): Good is used; Uncertain is used and counted; Bad makes the reading
missing, and the model gets no sample until every input is usable again (the daemon learns
nothing from a row with a hole in it).

A lost connection is a gap: the readings are forgotten (a row after the reconnection mixes
no value from before it), the bridge reconnects with doubling waits and subscribes again.

Lab results come as a node pair, value and drawn time; a result is sent when the drawn
time changes and both are usable.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import math

import zmq

from daemon.bridges.common import (
    FeedEnd,
    Metrics,
    backoff_sleep,
    epoch,
    number,
    opcua_client,
)
from daemon.config.bridges import BridgeConfig
from daemon.logsetup import RateLimitedLog

log = logging.getLogger("posteriord.bridge.opcua_in")

GOOD, UNCERTAIN, BAD = "good", "uncertain", "bad"


def severity(code) -> str:
    """Good, uncertain or bad, from the top two bits of an OPC UA status code."""
    value = getattr(code, "value", code)
    value = 0 if value is None else int(value)
    top = (value >> 30) & 3
    return GOOD if top == 0 else UNCERTAIN if top == 1 else BAD


def status_of(dv):
    """The status code of a DataValue (the attribute is StatusCode_ in older asyncua)."""
    code = getattr(dv, "StatusCode", None)
    if code is None:
        code = getattr(dv, "StatusCode_", None)
    return code


class _Model:
    def __init__(self, name: str, tags: list[str]):
        self.name = name
        self.tags = tags
        self.values: list[float | None] = [None] * len(tags)
        self.uncertain = [False] * len(tags)
        self.bad = [False] * len(tags)
        self.last_t = -math.inf
        self.new_t: float | None = None  # newest source time among changes not yet sent
        self.changed: set[int] = set()  # inputs changed since the last row


class _Lab:
    def __init__(self, model: str, value_node: str, drawn_node: str):
        self.model = model
        self.value_node = value_node
        self.drawn_node = drawn_node
        self.value: float | None = None
        self.drawn: float | None = None
        self.sent_drawn: float | None = None
        self.changed: set[str] = set()  # "value", "drawn": changed since the last send


class OpcUaIn:
    """The bridge; :meth:`run` until :meth:`stop` (or cancellation)."""

    def __init__(self, cfg: BridgeConfig, *, context: zmq.Context | None = None,
                 password: str | None = None):
        self.cfg = cfg
        self.name = cfg.name
        self.models: dict[str, _Model] = {}
        inputs = {m.name: [i.tag for i in m.inputs] for m in cfg.models}
        # node id -> (model, input index) pairs: one node may feed several models
        self.targets: dict[str, list[tuple[_Model, int]]] = {}
        for n in cfg.items["node"]:
            m = self.models.get(n["model"])
            if m is None:
                m = self.models[n["model"]] = _Model(n["model"], inputs[n["model"]])
            self.targets.setdefault(n["node"], []).append((m, m.tags.index(n["tag"])))
        self.labs = [_Lab(x["model"], x["value"], x["drawn"]) for x in cfg.items["lab"]]
        self.lab_nodes: dict[str, list[tuple[_Lab, str]]] = {}
        for lab in self.labs:
            self.lab_nodes.setdefault(lab.value_node, []).append((lab, "value"))
            self.lab_nodes.setdefault(lab.drawn_node, []).append((lab, "drawn"))
        names = sorted({*self.models, *(lab.model for lab in self.labs)})
        self.metrics = Metrics(self.name, names)
        self.rlog = RateLimitedLog(log)
        self._ctx = context
        self._own_ctx = context is None
        self.feed: FeedEnd | None = None
        self._password = password
        self._stop = asyncio.Event()
        self._flush_pending = False
        self._batch: list[tuple] = []
        self.connected = asyncio.Event()
        self.metrics_address = None

    @property
    def queue_size(self) -> int:
        """The monitored items' queue size asked of the server ([opcua_in] queue_size)."""
        c = self.cfg
        if c.queue_size:
            return c.queue_size
        return max(2, 2 * math.ceil(c.publishing_interval / c.sampling_interval - 1e-9))

    # ------------------------------------------------------------------ set-up
    def open(self) -> None:
        """Bind the feed and start the metrics endpoint (before :meth:`run`)."""
        if self.feed is not None:
            return
        if self._ctx is None:
            self._ctx = zmq.Context()
        self.feed = FeedEnd(self._ctx, self.cfg.feed, self.name, self.metrics, self.rlog)
        self.metrics_address = self.metrics.serve(self.cfg.metrics)

    def stop(self) -> None:
        self._stop.set()

    async def _client(self):
        c = self.cfg
        return await opcua_client(
            c.server, c.timeout, f"urn:posteriord:{self.name}", c.security_policy,
            c.security_mode, c.certificate, c.private_key, c.server_certificate, c.user,
            c.password_file, self._password)

    # ------------------------------------------------------------------ the loop
    async def run(self) -> None:
        self.open()
        watcher = asyncio.create_task(self.feed.watch())
        attempt = 0
        try:
            while not self._stop.is_set():
                was_up = False
                try:
                    client = await self._client()
                    try:
                        await client.connect()
                        sub = await self._subscribe(client)
                        was_up = True
                        attempt = 0
                        self.metrics.connected.labels(self.name).set(1)
                        self.connected.set()
                        log.info("connected to %s: %d node(s)", self.cfg.server,
                                 len(self.targets) + len(self.lab_nodes))
                        await self._watch(client)
                        with contextlib.suppress(Exception):
                            await sub.delete()
                    finally:
                        with contextlib.suppress(Exception):
                            await asyncio.wait_for(client.disconnect(), self.cfg.timeout)
                except asyncio.CancelledError:
                    raise
                except Exception as exc:  # noqa: BLE001 - any failure of the link: reconnect
                    self.rlog.warn(self.cfg.server, "connection",
                                   f"{type(exc).__name__}: {exc}"[:300])
                self.connected.clear()
                self.metrics.connected.labels(self.name).set(0)
                self._forget()
                if was_up:
                    self.metrics.reconnects.labels(self.name).inc()
                    self.metrics.gaps.labels(self.name).inc()
                if self._stop.is_set():
                    break
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(self._stop.wait(), 0)  # a stop while down
                stop = asyncio.create_task(self._stop.wait())
                pause = asyncio.create_task(backoff_sleep(attempt, self.cfg.reconnect_ivl,
                                                          self.cfg.reconnect_ivl_max))
                await asyncio.wait({stop, pause}, return_when=asyncio.FIRST_COMPLETED)
                stop.cancel()
                pause.cancel()
                attempt += 1
        finally:
            watcher.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await watcher

    async def _subscribe(self, client):
        from asyncua import ua

        c = self.cfg
        sub = await client.create_subscription(c.publishing_interval * 1000.0, self)
        ids = [*self.targets, *self.lab_nodes]
        nodes = [client.get_node(i) for i in ids]
        # deadband none: the default data change filter reports every change of value
        handles = await sub.subscribe_data_change(nodes, queuesize=self.queue_size,
                                                  sampling_interval=c.sampling_interval * 1000.0)
        for nid, h in zip(ids, handles, strict=True):
            if isinstance(h, ua.StatusCode):
                raise RuntimeError(f"the server refused to monitor {nid}: {h}")
        self._node_ids = {n.nodeid: i for n, i in zip(nodes, ids, strict=True)}
        return sub

    async def _watch(self, client) -> None:
        """Return when the server stops answering (or on stop): a read of its clock at
        every timeout interval."""
        from asyncua import ua

        clock = client.get_node(ua.NodeId(ua.ObjectIds.Server_ServerStatus_CurrentTime))
        while not self._stop.is_set():
            with contextlib.suppress(asyncio.TimeoutError):
                await asyncio.wait_for(self._stop.wait(), self.cfg.timeout / 2)
                return
            await asyncio.wait_for(clock.read_value(), self.cfg.timeout)

    def _forget(self) -> None:
        for m in self.models.values():
            m.values = [None] * len(m.tags)
            m.new_t = None
            m.changed.clear()
        for lab in self.labs:
            lab.value = lab.drawn = None
            lab.changed.clear()
        self._batch = []

    # ------------------------------------------------------------------ notifications
    def datachange_notification(self, node, val, data) -> None:
        """asyncua's handler call for one monitored item; never raises."""
        try:
            self._batch.append(self._reading(node, val, data))
        except Exception:  # noqa: BLE001 - a bad notification must not end the subscription
            log.exception("data change of %s could not be handled", node)
        if not self._flush_pending:
            # changes delivered together are applied before the row is sent
            self._flush_pending = True
            asyncio.get_running_loop().call_soon(self._flush)

    def status_change_notification(self, status) -> None:
        log.warning("subscription status changed: %s", status)

    def _reading(self, node, val, data) -> tuple:
        """(node id, value, severity, source time or None) of one notification."""
        nid = self._node_ids.get(node.nodeid) if hasattr(self, "_node_ids") else None
        if nid is None:
            nid = node.nodeid.to_string()
        dv = data.monitored_item.Value
        t = epoch(dv.SourceTimestamp)
        if t is None:
            t = epoch(dv.ServerTimestamp)
        return nid, val, severity(status_of(dv)), t

    def _flush(self) -> None:
        """Apply the changes delivered together in source-time order. A model's row is sent
        when a change comes for an input that already changed since its last row (a queue
        of several values per node: one row per value, none overwritten) and at the end."""
        self._flush_pending = False
        batch, self._batch = self._batch, []
        batch.sort(key=lambda r: -math.inf if r[3] is None else r[3])  # stable: arrival order
        try:
            for reading in batch:
                self._apply(*reading)
            for m in self.models.values():
                self._send_row(m)
            for lab in self.labs:
                self._send_lab(lab)
        except Exception:  # noqa: BLE001
            log.exception("flushing readings failed")

    def _apply(self, nid: str, val, sev: str, t: float | None) -> None:
        for m, i in self.targets.get(nid, ()):
            if i in m.changed:
                self._send_row(m)
            self.metrics.received.labels(self.name, m.name).inc()
            if t is None:
                self.metrics.drop(m.name, "no_time")
                self.rlog.warn(m.name, "no_time", f"{nid} carries no timestamp")
                m.values[i] = None
                continue
            f = None if sev == BAD else number(val)
            if sev == BAD:
                m.bad[i] = True
            elif f is None:
                self.metrics.drop(m.name, "bad_value")
                self.rlog.warn(m.name, "bad_value", f"{nid}: {type(val).__name__} "
                               f"{str(val)[:40]!r} is not a finite number")
            m.values[i] = f
            if f is not None:
                m.bad[i] = False
            m.uncertain[i] = sev == UNCERTAIN
            m.new_t = t if m.new_t is None else max(m.new_t, t)
            m.changed.add(i)
        for lab, part in self.lab_nodes.get(nid, ()):
            if part in lab.changed:
                self._send_lab(lab)
            lab.changed.add(part)
            self.metrics.received.labels(self.name, lab.model).inc()
            if part == "value":
                lab.value = None if sev == BAD else number(val)
            else:
                lab.drawn = None if sev == BAD else _drawn(val)

    def _send_row(self, m: _Model) -> None:
        t = m.new_t
        m.changed.clear()
        if t is None:
            return
        m.new_t = None
        if None in m.values:
            missing = [tag for tag, v in zip(m.tags, m.values, strict=True) if v is None]
            reason = "bad_quality" if any(m.bad) else "incomplete"
            self.metrics.drop(m.name, reason)
            self.rlog.warn(m.name, reason, f"no usable reading of {', '.join(missing)}")
            return
        if t <= m.last_t:
            self.metrics.drop(m.name, "not_newer")
            self.rlog.warn(m.name, "not_newer", f"source time {t!r} is not after the last "
                           f"row's {m.last_t!r}")
            return
        if any(m.uncertain):
            self.metrics.uncertain.labels(self.name, m.name).inc()
        m.last_t = t
        self.feed.send(m.name, {"t": t, "x": list(m.values)})

    def _send_lab(self, lab: _Lab) -> None:
        lab.changed.clear()
        if lab.drawn is None or lab.drawn == lab.sent_drawn:
            return
        if lab.value is None:
            return  # the value may still come with the next notification
        lab.sent_drawn = lab.drawn
        self.feed.send(lab.model, {"t": lab.drawn, "y": lab.value})

    async def aclose(self) -> None:
        self.metrics.close()
        if self.feed is not None:
            self.feed.close()
        if self._own_ctx and self._ctx is not None:
            self._ctx.term()


def _drawn(v) -> float | None:
    import datetime as dt

    if isinstance(v, dt.datetime):
        return epoch(v)
    f = number(v)
    return f if f is not None and f > 0 else None


def main(config_path: str) -> int:
    from daemon.bridges.common import run_bridge

    return run_bridge(OpcUaIn, config_path, "opcua_in")
