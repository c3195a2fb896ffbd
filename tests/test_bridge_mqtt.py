"""The MQTT bridge end to end: a real mosquitto broker on a free loopback port, the bridge,
a real in-process daemon, and a test client on the broker's other side."""

from __future__ import annotations

import asyncio
import json
import shutil
import socket
import subprocess
import time

import pytest

aiomqtt = pytest.importorskip("aiomqtt", reason="the mqtt extra (aiomqtt) is not installed")

from bridge_support import T0, TWO, BridgedService  # noqa: E402
from conftest import free_port, ipc  # noqa: E402

from daemon.bridges.mqtt import BadPayload, MqttBridge, parse_payload  # noqa: E402
from daemon.config.loader import loads_bridge  # noqa: E402

MOSQUITTO = shutil.which("mosquitto") or (
    "/usr/sbin/mosquitto" if shutil.which("mosquitto", path="/usr/sbin") else None)


@pytest.fixture
def broker(tmp_path):
    if MOSQUITTO is None:
        pytest.skip("mosquitto is not installed (Debian package mosquitto)")
    port = free_port()
    conf = tmp_path / "mosquitto.conf"
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n")
    proc = subprocess.Popen([MOSQUITTO, "-c", str(conf)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    deadline = time.monotonic() + 10
    while True:  # until the broker accepts connections
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            break
        except OSError:
            if proc.poll() is not None or time.monotonic() > deadline:
                proc.kill()
                raise AssertionError(f"mosquitto did not start: {proc.stderr.read()!r}") from None
            time.sleep(0.02)
    yield port
    proc.terminate()
    proc.wait(10)


def test_payload_schema():
    assert parse_payload(b'{"t": 5, "x": {"A": 1, "B": 2.5}}') == {"t": 5.0,
                                                                  "x": {"A": 1.0, "B": 2.5}}
    # ISO 8601 with an offset; the value is the standard library's
    assert parse_payload(b'{"t": "2026-01-01T00:00:00Z", "y": 3}')["t"] == 1767225600.0
    for bad in (b"not json", b"[1, 2]", b'{"x": [1, 2]}', b'{"t": "2026-01-01T00:00:00", '
                b'"y": 1}', b'{"t": 1, "x": [1, NaN]}', b'{"t": 1, "x": [true, 1]}',
                b'{"t": 1}', b'{"t": 1, "y": "2"}', b'{"t": 1, "x": 3}', b'{"t": 1, "q": 1}'):
        with pytest.raises(BadPayload):
            parse_payload(bad)


def test_mqtt_end_to_end(sock_dir, broker):
    feed = ipc(sock_dir, "mqtt")
    svc = BridgedService(sock_dir, [TWO], [feed])
    text = svc.toml + (f'[mqtt]\nport = {broker}\nfeed = "{feed}"\nsubscribe = "{svc.publish}"\n'
                       'reconnect_ivl = "100ms"\nreconnect_ivl_max = "200ms"\n')
    bridge = MqttBridge(loads_bridge(text, "mqtt"))

    async def scenario():
        task = asyncio.create_task(bridge.run())
        try:
            await asyncio.wait_for(bridge.connected.wait(), 10)
            async with aiomqtt.Client("127.0.0.1", broker, identifier="screen") as client:
                await client.subscribe("posteriord/pred/two", qos=1)
                await client.subscribe("posteriord/lab/two", qos=1)
                # sent before the daemon may have subscribed: the bridge holds them
                rows = [(T0 + 10, [1.0, 2.0]), (T0 + 20, {"A": 3.0, "B": 1.0}),
                        (T0 + 30, [2.0, 2.0])]
                for t, x in rows:
                    await client.publish("posteriord/in/two", json.dumps({"t": t, "x": x}),
                                         qos=1)
                await client.publish("posteriord/in/two", b"{broken", qos=1)
                await client.publish("posteriord/in/nosuch", b'{"t": 1, "y": 1}', qos=1)
                await client.publish("posteriord/in/two", json.dumps({"t": T0 + 30, "y": 6.0}),
                                     qos=1)
                preds, labs = [], []
                async with asyncio.timeout(10):
                    async for m in client.messages:
                        body = json.loads(m.payload)
                        (labs if m.topic.value.endswith("lab/two") else preds).append(body)
                        if labs:
                            break
                # every sample arrived once, in order, stamped with its own time
                assert [p["t"] for p in preds] == [t for t, _ in rows]
                assert labs[0]["t"] == T0 + 30 and labs[0]["y"] == 6.0
            # retained: a screen connecting now gets the last prediction at once
            async with aiomqtt.Client("127.0.0.1", broker, identifier="late") as late:
                await late.subscribe("posteriord/pred/two", qos=1)
                async with asyncio.timeout(10):
                    async for m in late.messages:
                        assert m.retain and json.loads(m.payload)["t"] == T0 + 30
                        break
            m = bridge.metrics
            assert m.value("posteriord_bridge_dropped_total", model="two",
                           reason="bad_message") == 1
            assert m.value("posteriord_bridge_dropped_total", model="?",
                           reason="unknown_model") == 1
        finally:
            bridge.stop()
            await asyncio.wait_for(task, 10)
            await bridge.aclose()

    asyncio.run(scenario())
    assert svc.alive()
