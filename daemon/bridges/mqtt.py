"""MQTT in and out: JSON on a broker to the feed, predictions back to the broker.

Topics (``<prefix>`` is ``[mqtt] prefix``):

* ``<prefix>/in/<model>``: input samples and lab results, read with the configured QoS.
  ``{"t": 1767225600.0, "x": {"TI-104": 101.2, "FI-201": 14.0}}`` (``x`` as a map by tag or
  a list in input order) or a lab result ``{"t": <drawn>, "y": 2.31}``; ``t`` is seconds
  since 1970 (UTC) or an ISO 8601 text with its offset (``"2026-01-01T08:00:00Z"``).
* ``<prefix>/pred/<model>``: one message per prediction, retained (a screen that connects
  sees the last one at once): ``{"t", "mean", "std", "lo", "hi", "level", "status",
  "trust"}``.
* ``<prefix>/lab/<model>``: each lab result the daemon learned from or refused, retained:
  ``{"t", "y", "accepted", "reason", "z"}``.

The session is persistent (clean session off, a fixed client id = the bridge's name), so
with QoS 1 the broker keeps what arrives while the bridge restarts. A payload that is not
JSON, or not of this form, is a counted, logged rejection.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as _dt
import json
import logging
import math
import ssl
from pathlib import Path

import zmq

from daemon.bridges.common import (
    FeedEnd,
    Metrics,
    backoff_sleep,
    number,
    prediction_rows,
    read_output,
)
from daemon.config.bridges import BridgeConfig
from daemon.logsetup import RateLimitedLog

log = logging.getLogger("posteriord.bridge.mqtt")

MAX_PAYLOAD = 1 << 20


class BadPayload(ValueError):
    """An MQTT payload that cannot be used; counted and logged with this message."""


def _time(v) -> float:
    if isinstance(v, str):
        try:
            ts = _dt.datetime.fromisoformat(v)
        except ValueError:
            raise BadPayload(f"t {v[:40]!r} is not an ISO 8601 time") from None
        if ts.tzinfo is None:
            raise BadPayload(f"t {v[:40]!r} has no UTC offset")
        return ts.timestamp()
    f = number(v)
    if f is None or isinstance(v, bool):
        raise BadPayload("t must be seconds since 1970 or an ISO 8601 text")
    return f


def parse_payload(payload: bytes) -> dict:
    """A feed body from an MQTT payload (see the module's schema); raises BadPayload."""
    if len(payload) > MAX_PAYLOAD:
        raise BadPayload(f"{len(payload)} bytes > {MAX_PAYLOAD}")
    try:
        msg = json.loads(payload)
    except (ValueError, UnicodeDecodeError) as exc:
        raise BadPayload(f"not JSON ({type(exc).__name__})") from None
    if not isinstance(msg, dict):
        raise BadPayload("the payload is not a JSON object")
    unknown = set(msg) - {"t", "x", "y", "id"}
    if unknown:
        raise BadPayload(f"unknown keys {', '.join(sorted(unknown))[:80]}")
    if "t" not in msg:
        raise BadPayload("t is required")
    body: dict = {"t": _time(msg["t"])}
    x = msg.get("x")
    if x is not None:
        if isinstance(x, dict):
            vals = {str(k)[:100]: number(v) for k, v in x.items()}
            if None in vals.values() or any(isinstance(v, bool) for v in x.values()):
                raise BadPayload("every x value must be a finite number")
            body["x"] = vals
        elif isinstance(x, list):
            vals = [number(v) for v in x]
            if None in vals or any(isinstance(v, bool) for v in x):
                raise BadPayload("every x value must be a finite number")
            body["x"] = vals
        else:
            raise BadPayload("x must be an object by tag or a list")
    if "y" in msg:
        y = number(msg["y"])
        if y is None or isinstance(msg["y"], bool):
            raise BadPayload("y must be a finite number")
        body["y"] = y
    if "id" in msg:
        if not isinstance(msg["id"], int | str) or isinstance(msg["id"], bool):
            raise BadPayload("id must be an integer or a text")
        body["id"] = msg["id"]
    if "x" not in body and "y" not in body:
        raise BadPayload("neither x nor y")
    return body


def _json_number(v: float):
    return v if math.isfinite(v) else None  # JSON has no nan


class MqttBridge:
    """The bridge; :meth:`run` until :meth:`stop`."""

    def __init__(self, cfg: BridgeConfig, *, context: zmq.Context | None = None,
                 password: str | None = None):
        self.cfg = cfg
        self.name = cfg.name
        self.models = {m.name for m in cfg.models}
        self.metrics = Metrics(self.name, sorted(self.models))
        self.rlog = RateLimitedLog(log)
        self._ctx = context
        self._own_ctx = context is None
        self._password = password
        self.feed: FeedEnd | None = None
        self.sub = None
        self._stop = asyncio.Event()
        self.connected = asyncio.Event()
        self.metrics_address = None

    def stop(self) -> None:
        self._stop.set()

    def open(self) -> None:
        if self.feed is not None:
            return
        if self._ctx is None:
            self._ctx = zmq.Context()
        self.feed = FeedEnd(self._ctx, self.cfg.feed, self.name, self.metrics, self.rlog)
        sub = self.sub = self._ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.RCVHWM, 0)
        for name in self.models:
            sub.setsockopt(zmq.SUBSCRIBE, f"pred/{name}".encode())
            sub.setsockopt(zmq.SUBSCRIBE, f"fit/{name}".encode())
        sub.connect(self.cfg.subscribe)
        self.metrics_address = self.metrics.serve(self.cfg.metrics)

    def _client(self):
        import aiomqtt

        c = self.cfg
        tls = None
        if c.tls:
            tls = aiomqtt.TLSParameters(ca_certs=c.ca_file or None,
                                        cert_reqs=ssl.CERT_REQUIRED)
        password = self._password
        if c.user is not None and password is None:
            password = Path(c.password_file).read_text(encoding="utf-8").splitlines()[0]
        return aiomqtt.Client(c.host, c.port, username=c.user, password=password,
                              identifier=self.name, clean_session=False, tls_params=tls,
                              timeout=10)

    async def run(self) -> None:
        import aiomqtt

        self.open()
        watcher = asyncio.create_task(self.feed.watch())
        attempt = 0
        try:
            while not self._stop.is_set():
                was_up = False
                try:
                    async with self._client() as client:
                        await client.subscribe(f"{self.cfg.prefix}/in/+", qos=self.cfg.qos)
                        was_up = True
                        attempt = 0
                        self.metrics.connected.labels(self.name).set(1)
                        self.connected.set()
                        log.info("connected to %s:%d", self.cfg.host, self.cfg.port)
                        tasks = {asyncio.create_task(self._inbound(client)),
                                 asyncio.create_task(self._outbound(client)),
                                 asyncio.create_task(self._stop.wait())}
                        done, pending = await asyncio.wait(
                            tasks, return_when=asyncio.FIRST_COMPLETED)
                        for p in pending:
                            p.cancel()
                        for d in done:
                            if not d.cancelled() and d.exception() is not None:
                                raise d.exception()
                except aiomqtt.MqttError as exc:
                    self.rlog.warn(f"{self.cfg.host}:{self.cfg.port}", "connection", str(exc))
                except OSError as exc:
                    self.rlog.warn(f"{self.cfg.host}:{self.cfg.port}", "connection", str(exc))
                self.connected.clear()
                self.metrics.connected.labels(self.name).set(0)
                if was_up:
                    self.metrics.reconnects.labels(self.name).inc()
                if self._stop.is_set():
                    break
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

    async def _inbound(self, client) -> None:
        prefix = f"{self.cfg.prefix}/in/"
        async for message in client.messages:
            topic = message.topic.value
            model = topic[len(prefix):] if topic.startswith(prefix) else ""
            if model not in self.models:
                self.metrics.drop("?", "unknown_model")
                self.rlog.warn(topic[:100], "unknown_model", "no such model")
                continue
            self.metrics.received.labels(self.name, model).inc()
            payload = message.payload
            if isinstance(payload, str):
                payload = payload.encode()
            elif not isinstance(payload, bytes | bytearray):
                payload = b""
            try:
                body = parse_payload(bytes(payload))
            except BadPayload as exc:
                self.metrics.drop(model, "bad_message")
                self.rlog.warn(model, "bad_message", str(exc))
                continue
            self.feed.send(model, body)

    async def _outbound(self, client) -> None:
        loop = asyncio.get_running_loop()
        wake = asyncio.Event()
        fd = self.sub.getsockopt(zmq.FD)
        loop.add_reader(fd, wake.set)
        try:
            while True:
                while self.sub.poll(0):
                    await self._forward(client, self.sub.recv_multipart(zmq.NOBLOCK))
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(wake.wait(), 0.5)
                wake.clear()
        finally:
            loop.remove_reader(fd)

    async def _forward(self, client, frames) -> None:
        try:
            kind, model, body = read_output(frames)
            if kind == "pred":
                out = []
                for row in prediction_rows(body):
                    out.append({"t": row["t"], **{k: _json_number(row[k])
                                                  for k in ("mean", "std", "lo", "hi")},
                                "level": body.get("level"), "status": row["status"],
                                "trust": row["trust"]})
                topic = f"{self.cfg.prefix}/pred/{model}"
            elif kind == "fit":
                out = [{"t": float(body["t"]), "y": float(body["y"]),
                        "accepted": bool(body.get("accepted")), "reason": body.get("reason"),
                        "z": _json_number(float(body.get("z", math.nan)))}]
                topic = f"{self.cfg.prefix}/lab/{model}"
            else:
                return
        except (ValueError, KeyError, TypeError, UnicodeDecodeError) as exc:
            self.metrics.drop("?", "bad_message")
            self.rlog.warn("daemon output", "bad_message", f"{type(exc).__name__}: {exc}"[:200])
            return
        for item in out:
            await client.publish(topic, json.dumps(item), qos=self.cfg.qos, retain=True)
            self.metrics.published.labels(self.name, model).inc()

    async def aclose(self) -> None:
        self.metrics.close()
        if self.feed is not None:
            self.feed.close()
        if self.sub is not None:
            self.sub.close()
        if self._own_ctx and self._ctx is not None:
            self._ctx.term()


def main(config_path: str) -> int:
    from daemon.bridges.common import run_bridge

    return run_bridge(MqttBridge, config_path, "mqtt")
