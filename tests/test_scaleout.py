"""Shard selection and the output relay."""

from __future__ import annotations

import time
import zlib
from types import SimpleNamespace

import pytest
import zmq

from daemon.runtime.relay import Relay
from daemon.sharding import parse_shard, select, shard_of


def test_shard_is_crc32_of_the_name_modulo_n():
    """zlib.crc32 (the ISO-HDLC CRC-32) is the reference: any language computes the same."""
    names = [f"unit{u}.q{k}" for u in range(5) for k in range(40)]
    for n in (1, 2, 3, 7):
        for name in names:
            assert shard_of(name, n) == zlib.crc32(name.encode()) % n
    # a fixed value, so the mapping can be checked from another language (CRC-32 of "123456789"
    # is 0xCBF43926, the standard check value; from memory)
    assert zlib.crc32(b"123456789") == 0xCBF43926
    assert shard_of("123456789", 2) == 0xCBF43926 % 2


def test_shards_partition_the_models():
    models = [SimpleNamespace(name=f"m{i:03d}") for i in range(200)]
    for n in (1, 2, 5):
        parts = [select(models, (i, n)) for i in range(n)]
        assert sorted(m.name for p in parts for m in p) == sorted(m.name for m in models)
        assert all(len(p) > 0 for p in parts)
    assert select(models, None) == tuple(models)


@pytest.mark.parametrize("bad", ["", "1", "2/2", "-1/2", "a/b", "1/0", None, "1/2/3"])
def test_bad_shard_spec(bad):
    with pytest.raises(ValueError, match="shard"):
        parse_shard(bad)


def test_parse_shard():
    assert parse_shard("0/2") == (0, 2)
    assert parse_shard(" 3 / 4 ") == (3, 4)


def test_relay_forwards_subscriptions_up_and_messages_down():
    ctx = zmq.Context()
    a, b = ctx.socket(zmq.XPUB), ctx.socket(zmq.XPUB)
    pa = a.bind_to_random_port("tcp://127.0.0.1")
    pb = b.bind_to_random_port("tcp://127.0.0.1")
    relay = Relay([f"tcp://127.0.0.1:{pa}", f"tcp://127.0.0.1:{pb}"], "tcp://127.0.0.1:0",
                  context=ctx).start()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"pred/")
    sub.connect(relay.endpoint)
    try:
        # the dashboard's subscription reaches both shards through the relay
        for up in (a, b):
            assert up.poll(5000), "subscription did not travel upstream"
            assert up.recv() == b"\x01pred/"
        got = set()
        deadline = time.monotonic() + 10
        while len(got) < 2 and time.monotonic() < deadline:
            a.send_multipart([b"pred/m1", b"from a"])
            b.send_multipart([b"pred/m2", b"from b"])
            a.send_multipart([b"fit/m1", b"not subscribed"])
            while sub.poll(20):
                topic, body = sub.recv_multipart()
                assert topic.startswith(b"pred/")
                got.add(body)
        assert got == {b"from a", b"from b"}
    finally:
        sub.close()
        relay.stop()
        a.close(linger=0)
        b.close(linger=0)
        ctx.term()


def _models_toml(names):
    out = []
    for name in names:
        out.append(f'[[model]]\nname = "{name}"\n'
                   'inputs = [{ tag = "A", lo = 0, hi = 10 }, { tag = "B", lo = 0, hi = 10 }]\n'
                   '[model.basis]\ndegree = 1\n[model.prior]\nalpha = 0.01\n'
                   '[model.noise]\nguess = 0.5\n')
    return "\n".join(out)


def test_two_shards_and_a_relay_publish_what_one_daemon_publishes(tmp_path):
    """The same feed into one daemon and into two shards behind a relay: identical output."""
    import threading

    import msgpack
    import numpy as np

    from daemon.config import loads
    from daemon.runtime.service import Service

    names = [f"unit{k}.quality" for k in range(6)]
    assert all(select([SimpleNamespace(name=n) for n in names], (i, 2)) for i in range(2))
    ctx = zmq.Context()
    feed = ctx.socket(zmq.XPUB)
    feed.setsockopt(zmq.XPUB_VERBOSE, 1)  # every daemon's subscription, not just the first
    feed.setsockopt(zmq.SNDHWM, 0)  # a slow daemon must not lose feed messages here
    feed.setsockopt(zmq.LINGER, 0)
    feed_ep = f"ipc://{tmp_path}/feed"
    feed.bind(feed_ep)
    services, threads = {}, []
    for label, shard in (("single", ""), ("s0", "0/2"), ("s1", "1/2")):
        text = (f'[daemon]\nfeeds = ["{feed_ep}"]\npublish = "ipc://{tmp_path}/{label}-pub"\n'
                f'control = "ipc://{tmp_path}/{label}-ctl"\nmetrics = ""\n'
                f'state_dir = "{tmp_path}/{label}-state"\nshard = "{shard}"\n'
                f'log_level = "warning"\n\n' + _models_toml(names))
        svc = Service(loads(text, "<test>"))
        svc.open()
        services[label] = svc
        th = threading.Thread(target=svc.run, daemon=True)
        th.start()
        threads.append(th)
    assert sorted([*services["s0"].runners, *services["s1"].runners]) == sorted(names)
    relay = Relay([f"ipc://{tmp_path}/s0-pub", f"ipc://{tmp_path}/s1-pub"],
                  f"ipc://{tmp_path}/relay", context=ctx).start()
    direct, joined = ctx.socket(zmq.SUB), ctx.socket(zmq.SUB)
    for sock, ep in ((direct, f"ipc://{tmp_path}/single-pub"), (joined, relay.endpoint)):
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.SUBSCRIBE, b"pred/")
        sock.setsockopt(zmq.SUBSCRIBE, b"fit/")
        sock.connect(ep)
    rng = np.random.default_rng(3)
    try:
        subs = 0
        deadline = time.monotonic() + 10
        while subs < 2 * len(names) and time.monotonic() < deadline:
            if feed.poll(100):
                if feed.recv()[:1] == b"\x01":
                    subs += 1
        assert subs == 2 * len(names)
        # warm-up samples until both paths deliver every model; compare what follows
        seen = {"d": set(), "j": set()}
        t = 0.0
        while (len(seen["d"]) < len(names) or len(seen["j"]) < len(names)) and t < 2000:
            t += 1.0
            for n in names:
                feed.send_multipart([n.encode(), msgpack.packb({"t": t, "x": [5.0, 5.0]})])
            for key, sock in (("d", direct), ("j", joined)):
                while sock.poll(10):
                    topic, _ = sock.recv_multipart()
                    seen[key].add(topic)
        assert len(seen["d"]) == len(names) == len(seen["j"])
        start = t + 1
        expected = 0
        for k in range(300):
            t = start + k
            for j, n in enumerate(names):
                x = rng.uniform(0, 10, size=2)
                feed.send_multipart([n.encode(), msgpack.packb({"t": t, "x": x.tolist()})])
                expected += 1
                if k % 10 == 5:  # a lab result for the sample of 3 steps ago
                    y = float(x @ [1.0, -0.5] + j + rng.normal(0, 0.3))
                    feed.send_multipart([n.encode(), msgpack.packb({"t": t - 3, "y": y})])
                    expected += 1
        out = {"d": {}, "j": {}}
        deadline = time.monotonic() + 20
        for key, sock in (("d", direct), ("j", joined)):
            while len(out[key]) < expected and time.monotonic() < deadline:
                if sock.poll(100):
                    topic, payload = sock.recv_multipart()
                    body = msgpack.unpackb(payload)
                    if body["t"] >= start - 3 and not (topic.startswith(b"pred/")
                                                       and body["t"] < start):
                        out[key][(topic, body["t"])] = payload
        assert len(out["d"]) == expected
        assert out["j"].keys() == out["d"].keys()
        # Every published byte is a function of the feed alone, whatever one wake-up drained
        # (single samples are predicted row by row, their quantiles from their own dof): the
        # sharded daemons publish exactly what the single daemon does.
        for key, payload in out["d"].items():
            assert out["j"][key] == payload, key
    finally:
        for svc in services.values():
            svc.post_event("stop")
        for th in threads:
            th.join(10)
        direct.close()
        joined.close()
        relay.stop()
        feed.close()
        ctx.term()
