"""OPC UA out: an OPC UA server serving the daemon's predictions to the operator screens.

Per model, an object ``<model>`` in the namespace ``[opcua_out] namespace`` holds:

=============  ========  ===========================================================
variable       type      value
=============  ========  ===========================================================
Mean           Double    predicted mean (EngineeringUnits property when configured)
Std            Double    predictive standard deviation (same unit)
Lo, Hi         Double    bounds of the prediction interval at the model's level
Level          Double    that level (e.g. 0.95)
Status         String    learning, stale, frozen or unidentified
Trust          String    normal, caution or untrusted
LabValue       Double    last lab result learned from or offered (y of ``fit/``)
LabTime        DateTime  the time that sample was drawn
=============  ========  ===========================================================

Mean, Std, Lo and Hi carry the prediction's time as their source timestamp and a status code
derived from status and trust (:func:`quality`); Status and Trust are always Good (they are
facts about the model, whatever they say). Of a block of predictions the last row is
written: a screen shows the newest value, and the rows before it are superseded in the same
instant.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as _dt
import hashlib
import hmac
import logging
import math
import os
from pathlib import Path

import zmq

from daemon.bridges.common import (
    Metrics,
    backoff_sleep,
    certificate_uri,
    opcua_client,
    prediction_rows,
    read_output,
)
from daemon.config.bridges import BridgeConfig
from daemon.logsetup import RateLimitedLog

log = logging.getLogger("posteriord.bridge.opcua_out")

# OPC UA Part 4 status codes (numeric values from Part 6's StatusCode.csv, from memory)
GOOD = 0x00000000
UNCERTAIN = 0x40000000                 # Uncertain: the value is usable with care
UNCERTAIN_LAST_USABLE = 0x40900000     # Uncertain_LastUsableValue: no recent calibration
BAD = 0x80000000                       # Bad: do not use
BAD_WAITING_FOR_INITIAL_DATA = 0x80320000


def quality(status: str, trust: str | None) -> int:
    """The OPC UA status code of a prediction's numbers.

    =================  ==========================  ======================================
    trust \\ status     learning                    stale, frozen
    =================  ==========================  ======================================
    normal             Good                        Uncertain_LastUsableValue / Uncertain
    caution            Uncertain                   Uncertain
    untrusted          Bad                         Bad
    =================  ==========================  ======================================

    and Bad_WaitingForInitialData while the model is unidentified (it has no prediction to
    give). Why: an operator screen or a controller reading the value acts on the severity
    alone. Untrusted means the drift detectors found the model wrong: the value must not be
    used (Bad). Caution means some detector is raised but not confirmed, and stale means no
    lab result has confirmed the model for a while: the value is still the best estimate,
    to be used with care (Uncertain; stale as LastUsableValue, since what ages is the last
    calibration). Frozen is an operator's choice to stop learning; the value is kept but
    no longer corrected by lab results (Uncertain).
    """
    if status == "unidentified":
        return BAD_WAITING_FOR_INITIAL_DATA
    if trust == "untrusted":
        return BAD
    if trust == "caution":
        return UNCERTAIN
    if status == "stale":
        return UNCERTAIN_LAST_USABLE
    if status == "learning":
        return GOOD
    return UNCERTAIN  # frozen, or a status this bridge does not know


# ------------------------------------------------------------------ users
_SCRYPT = {"n": 2 ** 14, "r": 8, "p": 1}


def hash_password(password: str, salt: bytes | None = None) -> str:
    """A ``scrypt$<salt hex>$<hash hex>`` line part for the users file."""
    salt = os.urandom(16) if salt is None else salt
    digest = hashlib.scrypt(password.encode(), salt=salt, dklen=32, **_SCRYPT)
    return f"scrypt${salt.hex()}${digest.hex()}"


def read_users(path: str) -> dict[str, str]:
    """name -> stored hash, from ``name:scrypt$salt$hash`` lines (# comments allowed)."""
    users = {}
    for n, line in enumerate(Path(path).read_text(encoding="utf-8").splitlines(), 1):
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        name, sep, stored = line.partition(":")
        if not sep or not stored.startswith("scrypt$") or stored.count("$") != 2:
            raise ValueError(f"{path}:{n}: expected name:scrypt$salt$hash, got {line[:40]!r}")
        users[name] = stored
    return users


def check_password(stored: str, password: str) -> bool:
    _, salt, digest = stored.split("$")
    got = hashlib.scrypt(password.encode(), salt=bytes.fromhex(salt), dklen=32, **_SCRYPT)
    return hmac.compare_digest(got.hex(), digest)


class _Users:
    """asyncua user manager: user names from the users file; anonymous only if allowed."""

    def __init__(self, users: dict[str, str], anonymous: bool):
        self.users = users
        self.anonymous = anonymous

    def get_user(self, iserver, username=None, password=None, certificate=None):
        from asyncua.crypto.permission_rules import User, UserRole

        if username is None and certificate is None:
            return User(role=UserRole.User) if self.anonymous else None
        if username is not None:
            stored = self.users.get(username)
            if stored is None or password is None or not check_password(stored, password):
                log.warning("refused user %r", username[:64])
                return None
            return User(role=UserRole.User, name=username)
        # a certificate identity: its channel already passed the trusted-clients check
        return User(role=UserRole.User)


def _load_certs(folder: str) -> set[bytes]:
    """DER bytes of every certificate (DER or PEM) in ``folder``."""
    from cryptography import x509
    from cryptography.hazmat.primitives.serialization import Encoding

    out = set()
    for p in sorted(Path(folder).iterdir()):
        if not p.is_file():
            continue
        data = p.read_bytes()
        try:
            cert = (x509.load_pem_x509_certificate(data) if b"-----BEGIN" in data
                    else x509.load_der_x509_certificate(data))
        except ValueError:
            log.warning("%s is not a certificate; ignored", p)
            continue
        out.add(cert.public_bytes(Encoding.DER))
    return out


class _Trusted:
    """asyncua certificate validator: the client's certificate must be one of the folder's."""

    def __init__(self, folder: str):
        self.folder = folder
        self.trusted = _load_certs(folder)

    async def __call__(self, cert, app_description) -> None:
        from asyncua.ua.uaerrors import BadCertificateUntrusted
        from cryptography.hazmat.primitives.serialization import Encoding

        der = cert.public_bytes(Encoding.DER) if hasattr(cert, "public_bytes") else bytes(cert)
        if der not in self.trusted:
            log.warning("refused a client certificate not in %s (%s)", self.folder,
                        getattr(app_description, "ApplicationUri", "?"))
            raise BadCertificateUntrusted()


def _datavalue(value, kind, code: int, t: float | None, server_time: bool = True):
    """A DataValue with the status code and source timestamp; the server timestamp is now
    (the server's own variables) or left out (a write to another server: it sets its own)."""
    from asyncua import ua

    source = None if t is None else _dt.datetime.fromtimestamp(t, _dt.UTC)
    now = _dt.datetime.now(_dt.UTC) if server_time else None
    variant = ua.Variant(value, kind)
    try:
        return ua.DataValue(variant, StatusCode=ua.StatusCode(code), SourceTimestamp=source,
                            ServerTimestamp=now)
    except TypeError:  # asyncua before 1.1 names the field StatusCode_
        return ua.DataValue(variant, StatusCode_=ua.StatusCode(code), SourceTimestamp=source,
                            ServerTimestamp=now)


class _Writer:
    """The client that writes the served values to nodes of an existing server.

    Only the newest value of each node waits to be written: a server slower than the
    predictions, or away for a while, gets the current values when it can take them, never
    a backlog of superseded ones. The link is watched, lost, and made again like the
    opcua-in bridge's; after a reconnection every node is written afresh.
    """

    def __init__(self, cfg: BridgeConfig, metrics: Metrics, rlog: RateLimitedLog,
                 password: str | None = None):
        self.cfg = cfg
        self.metrics = metrics
        self.rlog = rlog
        self.name = cfg.name
        self._password = password
        self.targets: dict[tuple[str, str], list[str]] = {}
        self.model_of: dict[str, str] = {}
        for w in cfg.items["write"]:
            self.targets.setdefault((w["model"], w["variable"]), []).append(w["node"])
            self.model_of[w["node"]] = w["model"]
        self.pending: dict[str, tuple] = {}  # node id -> (value, variant type, code, t)
        self.last: dict[str, tuple] = {}  # what was last offered per node (rewritten on reconnect)
        self.types: dict[str, object] = {}  # node id -> the node's variant type
        self.wake = asyncio.Event()
        self.connected = asyncio.Event()
        self.written = 0  # writes the server accepted

    def offer(self, model: str, var: str, value, vtype, code: int, t: float | None) -> None:
        for nid in self.targets.get((model, var), ()):
            self.pending[nid] = self.last[nid] = (value, vtype, code, t)
            self.wake.set()

    async def run(self, stop: asyncio.Event) -> None:
        c = self.cfg
        attempt = 0
        while not stop.is_set():
            was_up = False
            try:
                client = await opcua_client(
                    c.write_server, c.write_timeout, f"urn:posteriord:{self.name}:writer",
                    c.write_security_policy, c.write_security_mode, c.write_certificate,
                    c.write_private_key, c.write_server_certificate, c.write_user,
                    c.write_password_file, self._password)
                try:
                    await client.connect()
                    await self._types(client)
                    was_up = True
                    attempt = 0
                    self.pending = {**self.last, **self.pending}
                    self.metrics.connected.labels(self.name).set(1)
                    self.connected.set()
                    log.info("writing to %s: %d node(s)", c.write_server, len(self.model_of))
                    await self._loop(client, stop)
                finally:
                    with contextlib.suppress(Exception):
                        await asyncio.wait_for(client.disconnect(), c.write_timeout)
            except asyncio.CancelledError:
                raise
            except Exception as exc:  # noqa: BLE001 - any failure of the link: reconnect
                self.rlog.warn(c.write_server, "connection", f"{type(exc).__name__}: {exc}"[:300])
            self.connected.clear()
            self.metrics.connected.labels(self.name).set(0)
            if was_up:
                self.metrics.reconnects.labels(self.name).inc()
                self.metrics.gaps.labels(self.name).inc()
            if stop.is_set():
                break
            waits = {asyncio.create_task(stop.wait()), asyncio.create_task(
                backoff_sleep(attempt, c.reconnect_ivl, c.reconnect_ivl_max))}
            await asyncio.wait(waits, return_when=asyncio.FIRST_COMPLETED)
            for w in waits:
                w.cancel()
            attempt += 1

    async def _types(self, client) -> None:
        """The variant type of every target node (a Float node takes a Float variant)."""
        from asyncua import ua

        for nid in self.model_of:
            node = client.get_node(nid)
            try:
                self.types[nid] = await node.read_data_type_as_variant_type()
            except ua.UaError as exc:
                self.types[nid] = None
                self.rlog.warn(nid, "write_refused", f"its data type cannot be read: {exc}")

    async def _loop(self, client, stop: asyncio.Event) -> None:
        from asyncua import ua

        clock = client.get_node(ua.NodeId(ua.ObjectIds.Server_ServerStatus_CurrentTime))
        timeout = self.cfg.write_timeout
        while not stop.is_set():
            if self.pending:
                batch, self.pending = self.pending, {}
                try:
                    await asyncio.wait_for(self._write(client, batch), timeout)
                except BaseException:
                    self.pending = {**batch, **self.pending}  # newer offers win
                    raise
                continue
            waits = {asyncio.create_task(self.wake.wait()), asyncio.create_task(stop.wait())}
            done, _ = await asyncio.wait(waits, timeout=timeout / 2,
                                         return_when=asyncio.FIRST_COMPLETED)
            for w in waits:
                w.cancel()
            self.wake.clear()
            if not done:  # idle: is the server still there?
                await asyncio.wait_for(clock.read_value(), timeout)

    async def _write(self, client, batch: dict[str, tuple]) -> None:
        from asyncua import ua

        ids, dvs = [], []
        for nid, (value, vtype, code, t) in batch.items():
            want = self.types.get(nid)
            if want is None:
                self.metrics.drop(self.model_of[nid], "write_refused")
                continue
            if want == ua.VariantType.Float and vtype == ua.VariantType.Double:
                vtype = want
            elif want != vtype:
                self.metrics.drop(self.model_of[nid], "write_refused")
                self.rlog.warn(nid, "write_refused", f"the node holds {want.name}, the value "
                               f"is {vtype.name}")
                continue
            ids.append(ua.NodeId.from_string(nid))
            if self.cfg.write_timestamps:
                dvs.append(_datavalue(value, vtype, code, t, server_time=False))
            else:
                dvs.append(ua.DataValue(ua.Variant(value, vtype)))
        if not ids:
            return
        results = await client.uaclient.write_attributes(ids, dvs, ua.AttributeIds.Value)
        for nid, result in zip(ids, results, strict=True):
            if result.is_good():
                self.written += 1
            else:
                name = nid.to_string()
                self.metrics.drop(self.model_of.get(name, "?"), "write_refused")
                self.rlog.warn(name, "write_refused", f"the server answered {result.name}")


class OpcUaOut:
    """The server bridge; :meth:`run` until :meth:`stop`."""

    NUMBERS = ("Mean", "Std", "Lo", "Hi")

    def __init__(self, cfg: BridgeConfig, *, context: zmq.Context | None = None,
                 write_password: str | None = None):
        self.cfg = cfg
        self.name = cfg.name
        self.units = {m["name"]: m["unit"] for m in cfg.items["model"]}
        self.model_names = [m.name for m in cfg.models]
        self.metrics = Metrics(self.name, self.model_names)
        self.rlog = RateLimitedLog(log)
        self._ctx = context
        self._own_ctx = context is None
        self.server = None
        self.nodes: dict[str, dict[str, object]] = {}
        self.sub = None
        self._stop = asyncio.Event()
        self.ready = asyncio.Event()
        self.written = 0
        # time of the last prediction served per model, and a signal at each write (the
        # bench and the tests wait on it)
        self.last_t: dict[str, float] = {}
        self.changed = asyncio.Event()
        self.writer = (_Writer(cfg, self.metrics, self.rlog, password=write_password)
                       if cfg.write_server is not None else None)

    def stop(self) -> None:
        self._stop.set()

    async def open(self) -> None:
        from asyncua import Server, ua

        c = self.cfg
        s = Server()
        await s.init()
        s.set_endpoint(c.endpoint)
        s.set_server_name(f"posteriord predictions ({self.name})")
        uri = certificate_uri(c.certificate)
        if uri:  # OPC UA Part 4: the server's application URI is its certificate's
            await s.set_application_uri(uri)
        if c.security_policy == "Basic256Sha256":
            await s.load_certificate(c.certificate)
            await s.load_private_key(c.private_key)
            s.set_security_policy([ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt
                                   if c.security_mode == "sign_and_encrypt"
                                   else ua.SecurityPolicyType.Basic256Sha256_Sign])
            if c.trusted_clients:
                s.set_certificate_validator(_Trusted(c.trusted_clients))
        else:
            s.set_security_policy([ua.SecurityPolicyType.NoSecurity])
        users = read_users(c.users) if c.users else {}
        tokens = []
        if c.anonymous:
            tokens.append(ua.AnonymousIdentityToken)
        if users:
            tokens.append(ua.UserNameIdentityToken)
        if hasattr(s, "set_identity_tokens"):
            s.set_identity_tokens(tokens)
        else:  # asyncua 1.1
            s.set_security_IDs(["Anonymous"] * c.anonymous + ["Username"] * bool(users))
        s.set_user_manager(_Users(users, c.anonymous)) if hasattr(s, "set_user_manager") \
            else setattr(s.iserver, "user_manager", _Users(users, c.anonymous))
        idx = await s.register_namespace(c.namespace)
        for name in self.model_names:
            obj = await s.nodes.objects.add_object(ua.NodeId(name, idx), name)
            nodes = {}
            for var in self.NUMBERS + ("Level", "LabValue"):
                nodes[var] = await obj.add_variable(ua.NodeId(f"{name}.{var}", idx), var,
                                                    ua.Variant(math.nan, ua.VariantType.Double))
            for var in ("Status", "Trust"):
                nodes[var] = await obj.add_variable(ua.NodeId(f"{name}.{var}", idx), var,
                                                    ua.Variant("", ua.VariantType.String))
            nodes["LabTime"] = await obj.add_variable(
                ua.NodeId(f"{name}.LabTime", idx), "LabTime",
                ua.Variant(_dt.datetime(1601, 1, 1), ua.VariantType.DateTime))
            unit = self.units.get(name)
            if unit is not None:
                eu = ua.EUInformation(
                    NamespaceUri="http://www.opcfoundation.org/UA/units/un/cefact", UnitId=-1,
                    DisplayName=ua.LocalizedText(unit), Description=ua.LocalizedText(unit))
                for var in ("Mean", "Std", "Lo", "Hi", "LabValue"):
                    await nodes[var].add_property(ua.NodeId(f"{name}.{var}.EngineeringUnits",
                                                            idx),
                                                  ua.QualifiedName("EngineeringUnits", 0), eu)
            # nothing to show before the first prediction
            for var in self.NUMBERS:
                await s.write_attribute_value(nodes[var].nodeid, _datavalue(
                    math.nan, ua.VariantType.Double, BAD_WAITING_FOR_INITIAL_DATA, None))
            self.nodes[name] = nodes
        await s.start()
        self.server = s
        self.idx = idx
        if self._ctx is None:
            self._ctx = zmq.Context()
        sub = self.sub = self._ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.RCVHWM, 0)
        for name in self.model_names:
            sub.setsockopt(zmq.SUBSCRIBE, f"pred/{name}".encode())
            sub.setsockopt(zmq.SUBSCRIBE, f"fit/{name}".encode())
        sub.connect(c.subscribe)
        self.metrics_address = self.metrics.serve(c.metrics)
        self.ready.set()

    async def run(self) -> None:
        if self.server is None:
            await self.open()
        writer = None if self.writer is None else asyncio.create_task(
            self.writer.run(self._stop))
        try:
            await self._serve()
        finally:
            if writer is not None:
                self._stop.set()
                await writer

    async def _serve(self) -> None:
        loop = asyncio.get_running_loop()
        wake = asyncio.Event()
        fd = self.sub.getsockopt(zmq.FD)
        loop.add_reader(fd, wake.set)
        try:
            while not self._stop.is_set():
                while self.sub.poll(0):
                    await self._take(self.sub.recv_multipart(zmq.NOBLOCK))
                waits = {asyncio.create_task(wake.wait()), asyncio.create_task(self._stop.wait())}
                _, pending = await asyncio.wait(waits, timeout=0.5,
                                                return_when=asyncio.FIRST_COMPLETED)
                for p in waits:
                    p.cancel()
                wake.clear()
        finally:
            loop.remove_reader(fd)

    async def _take(self, frames) -> None:
        from asyncua import ua

        try:
            kind, model, body = read_output(frames)
            nodes = self.nodes.get(model)
            if nodes is None:
                self.metrics.drop(model[:100] or "?", "unknown_model")
                return
            self.metrics.received.labels(self.name, model).inc()
            values = []  # (variable, value, variant type, status code, source time)
            if kind == "pred":
                row = prediction_rows(body)[-1]
                code = quality(row["status"], row["trust"])
                values += [(var, row[var.lower()], ua.VariantType.Double, code, row["t"])
                           for var in self.NUMBERS]
                level = body.get("level")
                if isinstance(level, float):
                    values.append(("Level", level, ua.VariantType.Double, GOOD, row["t"]))
                values += [(var, str(row[var.lower()]), ua.VariantType.String, GOOD, row["t"])
                           for var in ("Status", "Trust")]
                self.last_t[model] = row["t"]
            elif kind == "fit":
                t, y = float(body["t"]), float(body["y"])
                values += [("LabValue", y, ua.VariantType.Double, GOOD, t),
                           ("LabTime", _dt.datetime.fromtimestamp(t, _dt.UTC),
                            ua.VariantType.DateTime, GOOD, t)]
            write = self.server.write_attribute_value
            for var, value, vtype, code, t in values:
                await write(nodes[var].nodeid, _datavalue(value, vtype, code, t))
                if self.writer is not None:
                    self.writer.offer(model, var, value, vtype, code, t)
            self.written += 1
            self.metrics.published.labels(self.name, model).inc()
            self.changed.set()
        except (ValueError, KeyError, TypeError, UnicodeDecodeError) as exc:
            self.metrics.drop("?", "bad_message")
            self.rlog.warn("daemon output", "bad_message", f"{type(exc).__name__}: {exc}"[:200])

    async def aclose(self) -> None:
        self.metrics.close()
        if self.server is not None:
            with contextlib.suppress(Exception):
                await self.server.stop()
            self.server = None
        if self.sub is not None:
            self.sub.close()
        if self._own_ctx and self._ctx is not None:
            self._ctx.term()


def main(config_path: str) -> int:
    from daemon.bridges.common import run_bridge

    return run_bridge(OpcUaOut, config_path, "opcua_out")
