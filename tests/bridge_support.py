"""Shared parts of the bridge tests: an in-process daemon whose feed list also names the
bridge's feed, and an OPC UA server playing the plant."""

from __future__ import annotations

import asyncio
import datetime as dt
import threading
from dataclasses import replace
from pathlib import Path

import zmq
from conftest import PROBE_MODEL, FeedPublisher, ServiceHarness, ipc, toml_config

from daemon.config import loads

T0 = 1_767_225_600.0  # 2026-01-01 00:00 UTC: in the past, so never refused as future

TWO = {"name": "two", "inputs": [{"tag": "A", "lo": 0, "hi": 10}, {"tag": "B", "lo": 0, "hi": 10}],
       "basis": {"kind": "identity"}, "noise": {"std": 0.1}}


class BridgedService(ServiceHarness):
    """:class:`ServiceHarness` whose daemon also subscribes to the bridges' feeds."""

    def __init__(self, folder, models, feeds, extra_toml: str = "", **daemon):
        from daemon.runtime.service import Service

        ctx = zmq.Context()
        # Link.__init__ only (the parent's __init__ would build its own config)
        super(ServiceHarness, self).__init__(ctx, FeedPublisher(ctx))
        settings = {"feeds": [self.feed.endpoint, *feeds], "publish": ipc(folder, "pub"),
                    "control": ipc(folder, "ctl"), "metrics": "",
                    "state_dir": str(folder / "state"), "log_level": "warning", **daemon}
        self.toml = toml_config(settings, [*models, PROBE_MODEL]) + extra_toml
        config = loads(self.toml, "<test>")
        config = replace(config, daemon=replace(config.daemon, metrics="127.0.0.1:0"))
        self.config = config
        self.svc = Service(config)
        self.svc.open()
        publish, control = self.svc.publish_endpoint, self.svc.control_endpoint
        self.publish = publish
        self.metrics_address = self.svc.metrics_address
        self.error = None
        self.thread = threading.Thread(target=self._run, name="posteriord", daemon=True)
        self.thread.start()
        self.stopped = False
        self.connect(publish, control, [m["name"] for m in models])


def stamp(t: float) -> dt.datetime:
    return dt.datetime.fromtimestamp(t, dt.UTC)


class PlantUsers:
    """An asyncua user manager of the plant's server: these names and passwords only."""

    def __init__(self, users: dict[str, str]):
        self.users = users
        self.refused: list[str] = []

    def get_user(self, iserver, username=None, password=None, certificate=None):
        from asyncua.crypto.permission_rules import User, UserRole

        if username is not None and self.users.get(username) == password:
            return User(role=UserRole.User, name=username)
        self.refused.append(username)
        return None


class Plant:
    """An asyncua server with one variable per tag name (ns=2;s=<tag>).

    ``security``: ``certificate`` and ``private_key`` of the server (Basic256Sha256 with sign
    and encrypt, the only endpoint then); optionally ``trusted`` (a folder: asyncua's own
    trust store and validator admit only the client certificates in it) and ``users``
    (name -> password; anonymous sessions are then refused).
    """

    def __init__(self, port: int, tags, *, security=None):
        self.port = port
        self.tags = list(tags)
        self.url = f"opc.tcp://127.0.0.1:{port}/plant"
        self.security = security or {}
        self.server = None
        self.vars = {}

    async def start(self) -> None:
        from asyncua import Server, ua

        if self.server is not None:  # stopped before: the same address space comes back
            await self.server.start()
            return
        sec = self.security
        self.users = PlantUsers(sec["users"]) if "users" in sec else None
        s = Server(user_manager=self.users)
        await s.init()
        s.set_endpoint(self.url)
        s.set_server_name("test plant")
        if sec:
            await s.load_certificate(sec["certificate"])
            await s.load_private_key(sec["private_key"])
            s.set_security_policy([ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt])
        if "trusted" in sec:
            from asyncua.crypto.truststore import TrustStore
            from asyncua.crypto.validator import CertificateValidator, CertificateValidatorOptions

            store = TrustStore([Path(sec["trusted"])], [])
            await store.load()
            self.validator = CertificateValidator(
                CertificateValidatorOptions.TRUSTED_VALIDATION
                | CertificateValidatorOptions.PEER_CLIENT, store)
            s.set_certificate_validator(self._validate)
        if self.users is not None:
            s.set_identity_tokens([ua.UserNameIdentityToken])
        idx = await s.register_namespace("urn:test:plant")
        obj = await s.nodes.objects.add_object(idx, "unit")
        for tag in self.tags:
            if tag.endswith("drawn"):
                v = await obj.add_variable(ua.NodeId(tag, idx), tag, ua.Variant(
                    dt.datetime(1601, 1, 1), ua.VariantType.DateTime))
            else:
                v = await obj.add_variable(ua.NodeId(tag, idx), tag, 0.0)
            self.vars[tag] = v
        self.server = s
        for tag in self.tags:
            # Bad_WaitingForInitialData (OPC UA Part 6 StatusCode.csv, from memory): what a
            # server reports before its first reading
            value = dt.datetime(1601, 1, 1) if tag.endswith("drawn") else 0.0
            await self.write(tag, value, T0 - 1000, 0x80320000)
        await s.start()

    async def _validate(self, cert, app_description) -> None:
        try:
            await self.validator(cert, app_description)
        except Exception:
            self.refused_certificates += 1
            raise

    refused_certificates = 0

    async def write(self, tag: str, value, t: float, status: int = 0) -> None:
        from asyncua import ua

        kind = ua.VariantType.DateTime if isinstance(value, dt.datetime) else \
            ua.VariantType.Double
        code = ua.StatusCode(status)
        try:
            dv = ua.DataValue(ua.Variant(value, kind), StatusCode=code,
                              SourceTimestamp=stamp(t), ServerTimestamp=stamp(t))
        except TypeError:  # asyncua before 1.1 names the field StatusCode_
            dv = ua.DataValue(ua.Variant(value, kind), StatusCode_=code,
                              SourceTimestamp=stamp(t), ServerTimestamp=stamp(t))
        await self.server.write_attribute_value(self.vars[tag].nodeid, dv)

    async def stop(self) -> None:
        if self.server is not None:
            await self.server.stop()


async def until(condition, timeout: float = 10.0, what: str = "condition"):
    """Poll ``condition()`` on the loop (each poll yields) until truthy; fail at the deadline."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout
    while True:
        v = condition()
        if v:
            return v
        if loop.time() > deadline:
            raise AssertionError(f"{what} not reached within {timeout} s")
        await asyncio.sleep(0.01)


async def make_cert(folder, name: str, uri: str, *, server: bool = False):
    """A fresh self-signed application certificate (DER) and its key (PEM) in ``folder``."""
    from asyncua.crypto.cert_gen import setup_self_signed_certificate
    from cryptography.x509.oid import ExtendedKeyUsageOID

    key, cert = folder / f"{name}.pem", folder / f"{name}.der"
    use = ExtendedKeyUsageOID.SERVER_AUTH if server else ExtendedKeyUsageOID.CLIENT_AUTH
    await setup_self_signed_certificate(key, cert, uri, "localhost", [use],
                                        {"commonName": name})
    return cert, key


class PlantThread:
    """A :class:`Plant` on an event loop of its own thread, for tests whose bridges and
    daemon are subprocesses: :meth:`write` blocks until the server has the value."""

    def __init__(self, port: int, tags, **kw):
        self.plant = Plant(port, tags, **kw)
        self.url = self.plant.url
        self.loop = asyncio.new_event_loop()
        self.thread = threading.Thread(target=self.loop.run_forever, name="plant", daemon=True)
        self.thread.start()

    def _call(self, coro, timeout: float = 30.0):
        return asyncio.run_coroutine_threadsafe(coro, self.loop).result(timeout)

    def start(self) -> None:
        self._call(self.plant.start())

    def write(self, tag: str, value, t: float, status: int = 0) -> None:
        self._call(self.plant.write(tag, value, t, status))

    def write_together(self, values: dict, t: float) -> None:
        """Write several tags in one step of the server's loop, as one scan of a plant's
        controller does: no publishing cycle falls between them, so a subscriber gets them
        in one notification (two separate writes may straddle a cycle on a busy machine,
        and the bridge then sends a row with one input new and one old)."""
        async def many():
            for tag, value in values.items():
                await self.plant.write(tag, value, t)
        self._call(many())

    def close(self) -> None:
        try:
            self._call(self.plant.stop())
        finally:
            self.loop.call_soon_threadsafe(self.loop.stop)
            self.thread.join(10)
            self.loop.close()
