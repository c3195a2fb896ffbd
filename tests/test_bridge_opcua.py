"""OPC UA bridges end to end: a real asyncua server plays the plant, the bridge feeds a real
in-process daemon, a real asyncua client reads posteriord's OPC UA server."""

from __future__ import annotations

import asyncio

import pytest

pytest.importorskip("asyncua", reason="the opcua extra (asyncua) is not installed")

from bridge_support import T0, TWO, BridgedService, Plant, make_cert, stamp, until  # noqa: E402
from conftest import free_port, ipc, recv_until  # noqa: E402

from daemon.bridges.opcua_in import OpcUaIn, severity  # noqa: E402
from daemon.config.loader import loads_bridge  # noqa: E402

GOOD, UNCERTAIN, BAD = 0x00000000, 0x40000000, 0x80000000  # OPC UA Part 4, the severity bits
BAD_SENSOR = 0x808C0000  # Bad_SensorFailure, OPC UA Part 4 / Part 6 StatusCode.csv (from memory)
UNCERTAIN_LAST = 0x40900000  # Uncertain_LastUsableValue (from memory)


def test_severity_bits():
    # OPC UA Part 4, 7.34: the top two bits are 00 good, 01 uncertain, 10 and 11 bad
    assert severity(0) == "good"
    assert severity(0x00960000) == "good"  # Good_LocalOverride
    assert severity(UNCERTAIN_LAST) == "uncertain"
    assert severity(BAD_SENSOR) == "bad"
    assert severity(0xC0000000) == "bad"


def _in_toml(plant_url: str, feed: str, **extra) -> str:
    lines = ["[opcua_in]", f'server = "{plant_url}"', f'feed = "{feed}"',
             'sampling_interval = "20ms"', 'publishing_interval = "20ms"',
             'reconnect_ivl = "100ms"', 'reconnect_ivl_max = "200ms"', 'timeout = "1s"']
    lines += [f"{k} = {v}" for k, v in extra.items()]
    for tag in ("A", "B"):
        lines += ["[[opcua_in.node]]", 'model = "two"', f'tag = "{tag}"',
                  f'node = "ns=2;s={tag}"']
    lines += ["[[opcua_in.lab]]", 'model = "two"', 'value = "ns=2;s=Q"',
              'drawn = "ns=2;s=Qdrawn"']
    return "\n".join(lines) + "\n"


def test_opcua_in_feeds_the_daemon(sock_dir):
    port = free_port()
    plant = Plant(port, ["A", "B", "Q", "Qdrawn"])
    feed = ipc(sock_dir, "opcua-in")
    svc = BridgedService(sock_dir, [TWO], [feed])
    cfg = loads_bridge(svc.toml + _in_toml(plant.url, feed, anonymous="true"), "opcua_in")
    bridge = OpcUaIn(cfg)
    bridge.open()
    m = bridge.metrics

    def value(family, **labels):
        return m.value(family, **labels)

    async def pred_at(t):
        got = await asyncio.to_thread(
            recv_until, svc.out, lambda msg: msg[0] == "pred/two" and msg[1]["t"] == t)
        return got

    async def scenario():
        await plant.start()
        task = asyncio.create_task(bridge.run())
        try:
            await asyncio.wait_for(bridge.connected.wait(), 10)
            await bridge.feed.wait_subscribed(["two"], 10)
            steps = [  # (t, A, status A, B, status B, expect a prediction)
                (T0 + 10, 1.0, GOOD, 2.0, GOOD, True),
                (T0 + 20, 3.0, GOOD, 4.0, UNCERTAIN_LAST, True),
                (T0 + 30, 5.0, GOOD, 6.0, BAD_SENSOR, False),
                (T0 + 40, 7.0, GOOD, 8.0, GOOD, True),
            ]
            seen = []
            for t, a, sa, b, sb, expect in steps:
                await plant.write("A", a, t, sa)
                await plant.write("B", b, t, sb)
                if expect:
                    got = await pred_at(t)
                    seen += [msg[1]["t"] for msg in got if msg[0] == "pred/two"]
            # the prediction times are the server's source timestamps; none for the Bad one
            assert seen == [T0 + 10, T0 + 20, T0 + 40]
            assert value("posteriord_bridge_uncertain_total", model="two") >= 1
            assert value("posteriord_bridge_dropped_total", model="two",
                         reason="bad_quality") >= 1
            # a lab result: the value, then its drawn time
            await plant.write("Q", 9.5, T0 + 41)
            await plant.write("Qdrawn", stamp(T0 + 40), T0 + 41)
            fit = await asyncio.to_thread(recv_until, svc.out, lambda msg: msg[0] == "fit/two")
            assert fit[-1][1]["t"] == T0 + 40 and fit[-1][1]["y"] == 9.5
            # the plant's server goes away and comes back on the same port
            await plant.stop()
            await until(lambda: not bridge.connected.is_set(), what="loss noticed")
            await plant.start()
            await asyncio.wait_for(bridge.connected.wait(), 10)
            assert value("posteriord_bridge_reconnects_total") == 1
            assert value("posteriord_bridge_gaps_total") == 1
            await plant.write("A", 1.5, T0 + 50)
            await plant.write("B", 2.5, T0 + 50)
            await pred_at(T0 + 50)
        finally:
            bridge.stop()
            await asyncio.wait_for(task, 10)
            await plant.stop()
            await bridge.aclose()

    asyncio.run(scenario())
    status = svc.ctl("status")
    assert svc.alive(), status


def _out_toml(endpoint: str, publish: str, **extra) -> str:
    lines = ["[opcua_out]", f'endpoint = "{endpoint}"', f'subscribe = "{publish}"']
    lines += [f"{k} = {v}" for k, v in extra.items()]
    lines += ["[[opcua_out.model]]", 'name = "two"', 'unit = "%wt"']
    return "\n".join(lines) + "\n"


async def _read(client, name: str):
    from asyncua import ua

    idx = await client.get_namespace_index("urn:posteriord:predictions")
    out = {}
    for var in ("Mean", "Std", "Lo", "Hi", "Status", "Trust", "LabValue", "LabTime"):
        node = client.get_node(ua.NodeId(f"{name}.{var}", idx))
        try:
            out[var] = await node.read_data_value(raise_on_bad_status=False)
        except TypeError:  # asyncua 1.1 returns bad values without raising
            out[var] = await node.read_data_value()
    return out


def _code(dv) -> int:
    code = getattr(dv, "StatusCode", None) or getattr(dv, "StatusCode_", None)
    return code.value


def test_opcua_out_serves_the_predictions(sock_dir):
    from asyncua import Client, ua

    from daemon.bridges.common import epoch
    from daemon.bridges.opcua_out import OpcUaOut

    svc = BridgedService(sock_dir, [TWO], [])
    url = f"opc.tcp://127.0.0.1:{free_port()}/posteriord"
    cfg = loads_bridge(svc.toml + _out_toml(url, svc.publish, anonymous="true"), "opcua_out")
    bridge = OpcUaOut(cfg)

    async def scenario():
        await bridge.open()
        task = asyncio.create_task(bridge.run())
        try:
            async with Client(url, timeout=5) as client:
                before = await _read(client, "two")
                # OPC UA Part 6 StatusCode.csv: Bad_WaitingForInitialData (from memory)
                assert _code(before["Mean"]) == 0x80320000
                # the daemon's SUB may not have reached the bridge yet: probe until it has
                t = T0
                while True:
                    t += 1.0
                    svc.feed.send("two", {"t": t, "x": [1.0, 2.0]})
                    await asyncio.to_thread(svc.barrier)
                    await asyncio.sleep(0.05)
                    if bridge.written:
                        break
                preds = []
                rng = [(3.0, 1.0, 7.5), (2.0, 5.0, 12.0), (6.0, 1.0, 15.0)]
                for a, b, y in rng:
                    t += 10.0
                    svc.feed.send("two", {"t": t, "x": [a, b]})
                    svc.feed.send("two", {"t": t, "y": y})
                    got = await asyncio.to_thread(svc.barrier)
                    preds += [body for topic, body in got if topic == "pred/two"]
                last = preds[-1]
                fits = [b for topic, b in got if topic == "fit/two"]
                assert fits and fits[-1]["t"] == t

                async def written():
                    now = await _read(client, "two")
                    done = (epoch(now["Mean"].SourceTimestamp) == last["t"]
                            and now["LabValue"].Value.Value == 15.0)
                    return now if done else None

                deadline = asyncio.get_running_loop().time() + 10
                while (now := await written()) is None:
                    assert asyncio.get_running_loop().time() < deadline, "values not served"
                for var in ("Mean", "Std", "Lo", "Hi"):
                    dv = now[var]
                    assert dv.Value.Value == last[var.lower()], var
                    assert epoch(dv.SourceTimestamp) == last["t"], var
                assert now["Status"].Value.Value == last["status"]
                assert now["Trust"].Value.Value == last["trust"]
                # the mapping of docs/connecting-a-plant.md: learning and normal is Good
                expected = {("learning", "normal"): 0, ("learning", "caution"): 0x40000000,
                            ("stale", "normal"): 0x40900000, ("stale", "caution"): 0x40000000,
                            ("learning", "untrusted"): 0x80000000,
                            ("stale", "untrusted"): 0x80000000,
                            }[(last["status"], last["trust"])]
                assert _code(now["Mean"]) == expected
                assert now["LabValue"].Value.Value == 15.0
                assert epoch(now["LabTime"].Value.Value) == t
                # engineering units on the mean (OPC UA Part 8 EUInformation)
                idx = await client.get_namespace_index("urn:posteriord:predictions")
                mean = client.get_node(ua.NodeId("two.Mean", idx))
                eu = await mean.get_child(["0:EngineeringUnits"])
                assert (await eu.read_value()).DisplayName.Text == "%wt"
        finally:
            bridge.stop()
            await asyncio.wait_for(task, 10)
            await bridge.aclose()

    asyncio.run(scenario())


def test_opcua_out_security(sock_dir, tmp_path):
    from asyncua import Client
    from asyncua.crypto.security_policies import SecurityPolicyBasic256Sha256

    from daemon.bridges.opcua_out import OpcUaOut, hash_password

    svc = BridgedService(sock_dir, [TWO], [])
    url = f"opc.tcp://127.0.0.1:{free_port()}/posteriord"

    async def certs():
        trusted = tmp_path / "trusted"
        trusted.mkdir()
        server = await make_cert(tmp_path, "server", "urn:test:posteriord", server=True)
        good = await make_cert(tmp_path, "screen", "urn:test:screen")
        stranger = await make_cert(tmp_path, "stranger", "urn:test:stranger")
        (trusted / "screen.der").write_bytes(good[0].read_bytes())
        return trusted, server, good, stranger

    trusted, server_cert, good, stranger = asyncio.run(certs())
    users = tmp_path / "users"
    users.write_text("# operator screens\nscreen:" + hash_password("s3cret") + "\n")
    extra = {"security_policy": '"Basic256Sha256"', "certificate": f'"{server_cert[0]}"',
             "private_key": f'"{server_cert[1]}"', "trusted_clients": f'"{trusted}"',
             "users": f'"{users}"'}
    cfg = loads_bridge(svc.toml + _out_toml(url, svc.publish, **extra), "opcua_out")
    bridge = OpcUaOut(cfg)

    async def connect(cert_key, user=None, password=None, policy=True):
        client = Client(url, timeout=3)
        client.application_uri = {good: "urn:test:screen",
                                  stranger: "urn:test:stranger"}[cert_key]
        if policy:
            await client.set_security(SecurityPolicyBasic256Sha256, certificate=str(cert_key[0]),
                                      private_key=str(cert_key[1]),
                                      server_certificate=str(server_cert[0]))
        if user is not None:
            client.set_user(user)
            client.set_password(password)
        try:
            await client.connect()
        except Exception as exc:  # noqa: BLE001 - whatever the refusal is called
            return exc
        try:
            await _read(client, "two")
            return "ok"
        finally:
            await client.disconnect()

    async def scenario():
        await bridge.open()
        task = asyncio.create_task(bridge.run())
        try:
            assert await connect(good, "screen", "s3cret") == "ok"
            # a certificate the server does not trust, with the right password
            # (the refusals are the OPC UA status codes of Part 4, named as asyncua names them)
            refused = await connect(stranger, "screen", "s3cret")
            assert type(refused).__name__ == "BadCertificateUntrusted", refused
            # the trusted certificate with a wrong password, and anonymously
            refused = await connect(good, "screen", "guess")
            assert type(refused).__name__ == "BadUserAccessDenied", refused
            refused = await connect(good)
            assert type(refused).__name__ == "BadIdentityTokenRejected", refused
            # no security at all: the server offers no such endpoint
            assert await connect(good, "screen", "s3cret", policy=False) != "ok"
        finally:
            bridge.stop()
            await asyncio.wait_for(task, 10)
            await bridge.aclose()

    asyncio.run(scenario())


def test_opcua_in_queue_keeps_a_burst_between_publications(sock_dir):
    """Five changes of both inputs while the server holds its publications back: with a
    queue of 8 per node every one of them becomes a row; with a queue of 1 (what a server
    keeps when asked for none) only the last survives."""
    from daemon.bridges.opcua_in import OpcUaIn

    port = free_port()
    plant = Plant(port, ["A", "B", "Q", "Qdrawn"])
    feeds = [ipc(sock_dir, "q8"), ipc(sock_dir, "q1")]
    svc = BridgedService(sock_dir, [TWO], feeds)

    def bridge_for(feed, queue):
        cfg = loads_bridge(svc.toml + _in_toml(plant.url, feed, anonymous="true",
                                               queue_size=queue), "opcua_in")
        return OpcUaIn(cfg)

    async def burst(bridge, t0):
        task = asyncio.create_task(bridge.run())
        try:
            await asyncio.wait_for(bridge.connected.wait(), 10)
            await bridge.feed.wait_subscribed(["two"], 10)
            # a row the bridge has surely sent: the burst comes after it
            await plant.write("A", 1.0, t0)
            await plant.write("B", 1.0, t0)
            await asyncio.to_thread(recv_until, svc.out,
                                    lambda m: m[0] == "pred/two" and m[1]["t"] == t0)
            subs = list(plant.server.iserver.subscription_service.subscriptions.values())
            assert len(subs) == 1
            # SetPublishingMode (OPC UA Part 4, 5.13.4): the server keeps queueing the
            # monitored items' changes but sends none until publishing is enabled again
            await subs[0].set_publishing_mode(False)
            times = [t0 + k for k in range(1, 6)]
            for k, t in enumerate(times):
                await plant.write("A", 2.0 + k, t)
                await plant.write("B", 3.0 + k, t)
            await subs[0].set_publishing_mode(True)
            got = await asyncio.to_thread(recv_until, svc.out,
                                          lambda m: m[0] == "pred/two" and m[1]["t"] == times[-1])
            return [m[1]["t"] for m in got if m[0] == "pred/two"], times
        finally:
            bridge.stop()
            await asyncio.wait_for(task, 10)
            await bridge.aclose()

    async def scenario():
        await plant.start()
        try:
            big = bridge_for(feeds[0], 8)
            assert big.queue_size == 8
            seen, times = await burst(big, T0 + 100)
            assert seen == times
            assert big.metrics.value("posteriord_bridge_published_total", model="two") == 6
            one = bridge_for(feeds[1], 1)
            seen, times = await burst(one, T0 + 200)
            assert seen == times[-1:]
        finally:
            await plant.stop()

    asyncio.run(scenario())
    assert svc.alive()


def test_opcua_in_default_queue_size():
    from conftest import toml_config

    _TWO_TOML = toml_config({}, [TWO])
    cfg = loads_bridge(_TWO_TOML + _in_toml("opc.tcp://h:4840", "ipc:///tmp/x",
                                            anonymous="true"), "opcua_in")
    # 20 ms publishing / 20 ms sampling: one sampling per interval, twice that, at least 2
    from daemon.bridges.opcua_in import OpcUaIn

    assert OpcUaIn(cfg).queue_size == 2
    cfg = loads_bridge(_TWO_TOML + _in_toml("opc.tcp://h:4840", "ipc:///tmp/x",
                                            anonymous="true").replace(
        'publishing_interval = "20ms"', 'publishing_interval = "1s"'), "opcua_in")
    assert OpcUaIn(cfg).queue_size == 100


def test_opcua_in_security(sock_dir, tmp_path):
    """The bridge as a client of a plant server that offers Basic256Sha256 with sign and
    encrypt only, trusts one client certificate (asyncua's own trust store and validator)
    and wants a user name: the bridge with that certificate and the right password feeds the
    daemon; a stranger's certificate, a wrong password or no security at all are refused."""
    from daemon.bridges.opcua_in import OpcUaIn

    async def certs():
        trusted = tmp_path / "trusted"
        trusted.mkdir()
        plant_cert = await make_cert(tmp_path, "plant", "urn:test:plant", server=True)
        bridge_cert = await make_cert(tmp_path, "bridge", "urn:test:bridge")
        stranger = await make_cert(tmp_path, "stranger", "urn:test:stranger")
        (trusted / "bridge.der").write_bytes(bridge_cert[0].read_bytes())
        return trusted, plant_cert, bridge_cert, stranger

    trusted, plant_cert, bridge_cert, stranger = asyncio.run(certs())
    plant = Plant(free_port(), ["A", "B", "Q", "Qdrawn"],
                  security={"certificate": plant_cert[0], "private_key": plant_cert[1],
                            "trusted": trusted, "users": {"bridge": "pl4nt"}})
    feed = ipc(sock_dir, "secure-in")
    svc = BridgedService(sock_dir, [TWO], [feed])
    (tmp_path / "good").write_text("pl4nt\n")
    (tmp_path / "bad").write_text("guess\n")

    def bridge(cert_key, password="good", policy='"Basic256Sha256"'):
        extra = {"security_policy": policy, "certificate": f'"{cert_key[0]}"',
                 "private_key": f'"{cert_key[1]}"', "server_certificate": f'"{plant_cert[0]}"',
                 "user": '"bridge"', "password_file": f'"{tmp_path / password}"'}
        return OpcUaIn(loads_bridge(svc.toml + _in_toml(plant.url, feed, **extra), "opcua_in"))

    async def refusal(b):
        client = await b._client()
        try:
            await client.connect()
        except Exception as exc:  # noqa: BLE001 - whatever the refusal is called
            return exc
        await client.disconnect()
        return "connected"

    async def scenario():
        await plant.start()
        try:
            # the refusals are OPC UA status codes of Part 4, as asyncua names them
            got = await refusal(bridge(stranger))
            assert type(got).__name__ == "BadCertificateUntrusted", got
            assert plant.refused_certificates == 1
            got = await refusal(bridge(bridge_cert, "bad"))
            assert type(got).__name__ == "BadUserAccessDenied", got
            assert plant.users.refused == ["bridge"]
            assert await refusal(bridge(bridge_cert, policy='"none"')) != "connected"
            # the stranger's bridge keeps trying (with its back-off) and never gets in
            loose = bridge(stranger)
            task = asyncio.create_task(loose.run())
            try:
                await until(lambda: plant.refused_certificates >= 3, what="two more refusals")
                assert not loose.connected.is_set()
                assert loose.metrics.value("posteriord_bridge_connected") == 0
                assert loose.metrics.value("posteriord_bridge_reconnects_total") == 0
            finally:
                loose.stop()
                await asyncio.wait_for(task, 10)
                await loose.aclose()
            # the trusted certificate with the right password: readings reach the daemon,
            # stamped with the plant's source time
            good = bridge(bridge_cert)
            task = asyncio.create_task(good.run())
            try:
                await asyncio.wait_for(good.connected.wait(), 10)
                await good.feed.wait_subscribed(["two"], 10)
                await plant.write("A", 1.0, T0 + 10)
                await plant.write("B", 2.0, T0 + 10)
                await asyncio.to_thread(recv_until, svc.out,
                                        lambda m: m[0] == "pred/two" and m[1]["t"] == T0 + 10)
            finally:
                good.stop()
                await asyncio.wait_for(task, 10)
                await good.aclose()
        finally:
            await plant.stop()

    asyncio.run(scenario())
    assert svc.alive()


class _Dcs:
    """An asyncua server playing an existing control-system server with a few writable
    variables of its own types, and one that is read-only."""

    def __init__(self, port: int):
        self.url = f"opc.tcp://127.0.0.1:{port}/dcs"
        self.server = None
        self.vars = {}

    async def start(self):
        from asyncua import Server, ua

        if self.server is not None:
            await self.server.start()
            return
        s = Server()
        await s.init()
        s.set_endpoint(self.url)
        idx = await s.register_namespace("urn:test:dcs")
        obj = await s.nodes.objects.add_object(idx, "C301")
        kinds = {"QI.Mean": ua.VariantType.Double, "QI.Std": ua.VariantType.Float,
                 "QI.Status": ua.VariantType.String, "QI.LabTime": ua.VariantType.DateTime,
                 "QI.Locked": ua.VariantType.Double}
        for name, kind in kinds.items():
            start = stamp(T0 - 1e6) if kind == ua.VariantType.DateTime else (
                "" if kind == ua.VariantType.String else 0.0)
            v = await obj.add_variable(ua.NodeId(name, idx), name, ua.Variant(start, kind))
            if name != "QI.Locked":
                await v.set_writable()
            self.vars[name] = v
        self.server = s
        await s.start()

    def read(self, name: str):
        from asyncua import ua

        return self.server.iserver.aspace.read_attribute_value(self.vars[name].nodeid,
                                                               ua.AttributeIds.Value)

    async def stop(self):
        if self.server is not None:
            await self.server.stop()


def test_opcua_out_writes_to_an_existing_server(sock_dir):
    """The served values also go to nodes of another server, the bridge being its client:
    values, status codes and source timestamps equal the daemon's pred/ and fit/ messages;
    a Float node gets a Float; a read-only node is a counted refusal; after that server
    comes back the current values are written again."""
    from daemon.bridges.common import epoch
    from daemon.bridges.opcua_out import OpcUaOut, quality

    dcs = _Dcs(free_port())
    svc = BridgedService(sock_dir, [TWO], [])
    url = f"opc.tcp://127.0.0.1:{free_port()}/posteriord"
    writes = [("Mean", "QI.Mean"), ("Std", "QI.Std"), ("Status", "QI.Status"),
              ("LabTime", "QI.LabTime"), ("Lo", "QI.Locked")]
    extra = {"write_server": f'"{dcs.url}"', "write_anonymous": "true",
             "write_timeout": '"1s"', "reconnect_ivl": '"100ms"', "reconnect_ivl_max": '"200ms"'}
    text = _out_toml(url, svc.publish, anonymous="true", **extra)
    for var, node in writes:
        text += f'[[opcua_out.write]]\nmodel = "two"\nvariable = "{var}"\nnode = "ns=2;s={node}"\n'
    bridge = OpcUaOut(loads_bridge(svc.toml + text, "opcua_out"))
    w = bridge.writer

    async def scenario():
        from asyncua import ua

        await dcs.start()
        await bridge.open()
        task = asyncio.create_task(bridge.run())
        try:
            await asyncio.wait_for(w.connected.wait(), 10)
            t = T0
            while True:  # the daemon's SUB may not have reached the bridge yet
                t += 1.0
                svc.feed.send("two", {"t": t, "x": [1.0, 2.0]})
                await asyncio.to_thread(svc.barrier)
                await asyncio.sleep(0.05)
                if bridge.written:
                    break
            preds = []
            for a, b, y in [(3.0, 1.0, 7.5), (2.0, 5.0, 12.0)]:
                t += 10.0
                svc.feed.send("two", {"t": t, "x": [a, b]})
                svc.feed.send("two", {"t": t, "y": y})
                got = await asyncio.to_thread(svc.barrier)
                preds += [body for topic, body in got if topic == "pred/two"]
            last = preds[-1]

            def current():
                return epoch(dcs.read("QI.Mean").SourceTimestamp) == last["t"] \
                    and epoch(dcs.read("QI.LabTime").Value.Value) == t

            await until(current, what="values written to the DCS")
            code = quality(last["status"], last["trust"])
            mean, std, status = dcs.read("QI.Mean"), dcs.read("QI.Std"), dcs.read("QI.Status")
            assert mean.Value.Value == last["mean"]
            assert mean.StatusCode.value == code and std.StatusCode.value == code
            # a Float node holds the IEEE single nearest the mean (numpy.float32)
            import numpy as np

            assert std.Value.VariantType == ua.VariantType.Float
            assert std.Value.Value == float(np.float32(last["std"]))
            assert epoch(std.SourceTimestamp) == last["t"]
            assert status.Value.Value == last["status"]
            await until(lambda: bridge.metrics.value("posteriord_bridge_dropped_total",
                                                    model="two", reason="write_refused"),
                        what="the read-only node refused")
            assert dcs.read("QI.Locked").Value.Value == 0.0
            # the DCS restarts and has lost the value meanwhile: it is written again
            await dcs.stop()
            await until(lambda: not w.connected.is_set(), what="loss noticed")
            await dcs.server.write_attribute_value(dcs.vars["QI.Mean"].nodeid,
                                                   ua.DataValue(ua.Variant(-1.0)))
            await dcs.start()
            await asyncio.wait_for(w.connected.wait(), 10)
            await until(lambda: dcs.read("QI.Mean").Value.Value == last["mean"],
                        what="the value written again")
            assert epoch(dcs.read("QI.Mean").SourceTimestamp) == last["t"]
            assert bridge.metrics.value("posteriord_bridge_reconnects_total") == 1
        finally:
            bridge.stop()
            await asyncio.wait_for(task, 10)
            await bridge.aclose()
            await dcs.stop()

    asyncio.run(scenario())
