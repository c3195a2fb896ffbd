#!/usr/bin/env python3
"""Samples per second through the OPC UA path, against the plain ZeroMQ feed, in one run.

OPC UA path: a test plant server (asyncua) -> the opcua-in bridge -> the daemon -> the
opcua-out bridge's server. ZeroMQ path: the same daemon fed directly on its feed socket, the
prediction read on its publish socket. Both are closed loops: sample k+1 is written once the
prediction of sample k has arrived at the end of the path, so the figure is the rate one
sensor can sustain and its inverse the end-to-end latency. Everything runs on loopback, in
one process (the daemon in its own thread).

    python tools/bench_opcua.py [--samples 300] [--publishing-interval 5ms]
"""

from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import logging
import socket
import statistics
import sys
import tempfile
import threading
import time
from dataclasses import replace
from pathlib import Path

import msgpack
import zmq

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from daemon.config import loads  # noqa: E402
from daemon.config.bridges import parse_bridge  # noqa: E402

T0 = time.time() - 1800.0  # in the past, so never refused as future


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def config_text(folder: Path, plant: str, out: str, pub_ivl: str) -> tuple[str, str]:
    direct = f"tcp://127.0.0.1:{free_port()}"
    bridge_feed = f"ipc://{folder}/opcua-in"
    text = f"""
[daemon]
feeds = ["{direct}", "{bridge_feed}"]
publish = "ipc://{folder}/pub"
control = "ipc://{folder}/ctl"
metrics = ""
state_dir = "{folder}/state"
log_level = "warning"
fsync = "group"

[[model]]
name = "two"
inputs = [{{tag = "A", lo = 0, hi = 10}}, {{tag = "B", lo = 0, hi = 10}}]
basis = {{kind = "identity"}}
noise = {{std = 0.1}}

[[model]]
name = "direct"
inputs = [{{tag = "A", lo = 0, hi = 10}}, {{tag = "B", lo = 0, hi = 10}}]
basis = {{kind = "identity"}}
noise = {{std = 0.1}}

[opcua_in]
server = "{plant}"
feed = "{bridge_feed}"
sampling_interval = "{pub_ivl}"
publishing_interval = "{pub_ivl}"
anonymous = true
[[opcua_in.node]]
model = "two"
tag = "A"
node = "ns=2;s=A"
[[opcua_in.node]]
model = "two"
tag = "B"
node = "ns=2;s=B"

[opcua_out]
endpoint = "{out}"
subscribe = "ipc://{folder}/pub"
anonymous = true
"""
    return text, direct


async def plant_server(url: str):
    from asyncua import Server

    s = Server()
    await s.init()
    s.set_endpoint(url)
    idx = await s.register_namespace("urn:bench:plant")
    obj = await s.nodes.objects.add_object(idx, "unit")
    from asyncua import ua

    nodes = {tag: await obj.add_variable(ua.NodeId(tag, idx), tag, 0.0) for tag in "AB"}
    await s.start()
    return s, nodes


async def write(server, node, value: float, t: float) -> None:
    from asyncua import ua

    stamp = dt.datetime.fromtimestamp(t, dt.UTC)
    try:
        dv = ua.DataValue(ua.Variant(value, ua.VariantType.Double), SourceTimestamp=stamp,
                          ServerTimestamp=stamp)
    except TypeError:
        dv = ua.DataValue(ua.Variant(value, ua.VariantType.Double), SourceTimestamp=stamp)
    await server.write_attribute_value(node.nodeid, dv)


async def bench(n: int, pub_ivl: str) -> dict:
    from daemon.bridges.opcua_in import OpcUaIn
    from daemon.bridges.opcua_out import OpcUaOut
    from daemon.runtime.service import Service

    folder = Path(tempfile.mkdtemp(prefix="pd-bench-"))
    plant_url = f"opc.tcp://127.0.0.1:{free_port()}/plant"
    out_url = f"opc.tcp://127.0.0.1:{free_port()}/posteriord"
    text, direct = config_text(folder, plant_url, out_url, pub_ivl)
    import tomllib

    config = loads(text, "<bench>")
    doc = tomllib.loads(text)
    ctx = zmq.Context()
    feed = ctx.socket(zmq.XPUB)
    feed.setsockopt(zmq.XPUB_VERBOSE, 1)
    feed.bind(direct)
    svc = Service(replace(config, daemon=replace(config.daemon)))
    svc.open()
    thread = threading.Thread(target=svc.run, daemon=True)
    thread.start()
    out_sub = ctx.socket(zmq.SUB)
    out_sub.setsockopt(zmq.SUBSCRIBE, b"pred/direct")
    out_sub.connect(svc.publish_endpoint)

    plant, nodes = await plant_server(plant_url)
    bridge_in = OpcUaIn(parse_bridge(doc, "opcua_in", "<bench>", config.models))
    bridge_out = OpcUaOut(parse_bridge(doc, "opcua_out", "<bench>", config.models))
    await bridge_out.open()
    tasks = [asyncio.create_task(bridge_in.run()), asyncio.create_task(bridge_out.run())]
    try:
        await asyncio.wait_for(bridge_in.connected.wait(), 30)
        await bridge_in.feed.wait_subscribed(["two"], 30)

        # ZeroMQ: wait for the daemon's subscription, then for our SUB to be joined
        while not feed.poll(10):
            pass
        feed.recv()
        t = T0
        while True:
            t += 1.0
            feed.send_multipart([b"direct", msgpack.packb({"t": t, "x": [1.0, 2.0]})])
            if out_sub.poll(50):
                out_sub.recv_multipart()
                break
        lat_z = []
        start = time.perf_counter()
        for k in range(n):
            t += 1.0
            s0 = time.perf_counter()
            feed.send_multipart([b"direct", msgpack.packb({"t": t, "x": [k % 10, 2.0]})])
            while True:
                _, body = out_sub.recv_multipart()
                if msgpack.unpackb(body)["t"] == t:
                    break
            lat_z.append(time.perf_counter() - s0)
        zmq_rate = n / (time.perf_counter() - start)

        # OPC UA: priming samples until one comes through (the bridges' subscriptions, the
        # out bridge's SUB joining the daemon); times after the nodes' initial values
        t = time.time() + 1.0
        while True:
            t += 1.0
            await write(plant, nodes["A"], 1.0, t)
            await write(plant, nodes["B"], 2.0, t)
            try:
                await until_served(bridge_out, t, 0.5)
                break
            except TimeoutError:
                continue
        lat_o = []
        start = time.perf_counter()
        for k in range(n):
            t += 1.0
            s0 = time.perf_counter()
            await write(plant, nodes["A"], float(k % 10), t)
            await write(plant, nodes["B"], 2.0, t)
            await until_served(bridge_out, t, 30)
            lat_o.append(time.perf_counter() - s0)
        opc_rate = n / (time.perf_counter() - start)
        return {"samples": n, "publishing_interval": pub_ivl,
                "opcua_per_s": opc_rate, "zmq_per_s": zmq_rate,
                "ratio": opc_rate / zmq_rate,
                "opcua_latency_ms_median": 1000 * statistics.median(lat_o),
                "zmq_latency_ms_median": 1000 * statistics.median(lat_z),
                "dropped": {k: v for k, v in _dropped(bridge_in).items() if v}}
    finally:
        bridge_in.stop()
        bridge_out.stop()
        await asyncio.gather(*tasks, return_exceptions=True)
        await bridge_in.aclose()
        await bridge_out.aclose()
        await plant.stop()
        svc.post_event("stop")
        thread.join(30)
        feed.close(0)
        out_sub.close(0)
        ctx.term()


async def until_served(bridge_out, t: float, timeout: float) -> None:
    async def wait():
        while bridge_out.last_t.get("two") != t:
            bridge_out.changed.clear()
            await bridge_out.changed.wait()

    await asyncio.wait_for(wait(), timeout)


def _dropped(bridge) -> dict:
    out = {}
    for fam in bridge.metrics.registry.collect():
        if fam.name == "posteriord_bridge_dropped":
            for s in fam.samples:
                if s.name.endswith("_total"):
                    out[s.labels["reason"]] = s.value
    return out


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--samples", type=int, default=300)
    p.add_argument("--publishing-interval", default="5ms")
    args = p.parse_args(argv)
    logging.basicConfig(level=logging.ERROR)
    r = asyncio.run(bench(args.samples, args.publishing_interval))
    print(f"samples {r['samples']}, OPC UA publishing interval {r['publishing_interval']}")
    print(f"OPC UA path (plant -> opcua-in -> daemon -> opcua-out): {r['opcua_per_s']:8.1f} "
          f"samples/s, median latency {r['opcua_latency_ms_median']:.2f} ms")
    print(f"plain ZeroMQ feed (feed -> daemon -> publish):          {r['zmq_per_s']:8.1f} "
          f"samples/s, median latency {r['zmq_latency_ms_median']:.2f} ms")
    print(f"ratio OPC UA / ZeroMQ: {r['ratio']:.3f}")
    if r["dropped"]:
        print(f"dropped by the bridge: {r['dropped']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
