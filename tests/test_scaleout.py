"""Shard selection and the output relay."""

from __future__ import annotations

import time
import zlib
from types import SimpleNamespace

import pytest
import zmq

from daemon.relay import Relay, parse_shard, select, shard_of


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
