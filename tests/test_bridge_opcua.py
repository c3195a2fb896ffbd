"""OPC UA bridges end to end: a real asyncua server plays the plant, the bridge feeds a real
in-process daemon, a real asyncua client reads posteriord's OPC UA server."""

from __future__ import annotations

import asyncio

import pytest

pytest.importorskip("asyncua", reason="the opcua extra (asyncua) is not installed")

from bridge_support import T0, TWO, BridgedService, Plant, stamp, until  # noqa: E402
from conftest import free_port, ipc, recv_until  # noqa: E402

from daemon.bridges.opcua_in import OpcUaIn, severity  # noqa: E402
from daemon.config.bridges import loads_bridge  # noqa: E402

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
            plant.vars.clear()
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
