"""Fuzzing of the parsers facing the outside: every input decodes or is rejected with the
documented error, and a hostile size claim costs no memory. (The WAL and checkpoint readers
are fuzzed in tests/test_store.py; tools/fuzz.py runs the same targets under atheris.)"""

from __future__ import annotations

import tracemalloc

import msgpack
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from daemon.config import ConfigError, loads
from daemon.runtime import wire

SPECS = {"c301": (("TI-104", "FI-201"), {"TI-104": 0, "FI-201": 1})}
LIMIT = 65536

scalars = st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**64 - 1),
                    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12),
                    st.binary(max_size=12))
map_keys = st.one_of(st.text(max_size=6), st.integers(-2**63, 2**63))
values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=6), st.dictionaries(map_keys, inner, max_size=6)), max_leaves=30)
keys = st.sampled_from(["t", "x", "y", "id", "seq", "pad"])
messages = st.dictionaries(keys, values, max_size=6)


def _decode(frames):
    try:
        out = wire.decode_feed(frames, SPECS, LIMIT)
    except wire.WireError as exc:
        assert exc.reason in wire.REASONS
        return None
    assert isinstance(out, wire.Feed)
    assert len(out.t) == len(out.x) == len(out.y) == len(out.ids)
    return out


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(messages)
def test_structured_messages_decode_or_are_rejected(msg):
    _decode([b"c301", msgpack.packb(msg, use_bin_type=True)])


@settings(max_examples=400, deadline=None)
@given(st.lists(st.binary(max_size=64), max_size=4))
def test_random_frames_decode_or_are_rejected(frames):
    _decode(frames)
    _decode([b"c301", *frames[:1]])


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=200))
def test_random_control_payloads_are_rejected_cleanly(payload):
    try:
        msg = wire.decode_control(payload, LIMIT)
    except wire.WireError as exc:
        assert exc.reason in wire.REASONS
    else:
        assert isinstance(msg, dict) and isinstance(msg["cmd"], str)


def _nest(value, depth: int):
    for _ in range(depth):
        value = [value]
    return value


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from(["t", "x", "y", "id", "seq", "src", "pad"]), st.integers(0, 1500),
       scalars, st.booleans())
def test_depth_bombs_in_any_field_are_rejected_with_a_short_message(field, depth, leaf, block):
    """A value nested up to 1500 levels deep (msgpack itself refuses more than 1024) in any
    field, of a single message or of a block element: decoded or rejected, never a crash,
    and the error message stays short (it once formatted the value recursively)."""
    bomb = _nest(leaf, depth)
    body = {"t": [1.0, 2.0], "x": [[1.0, 2.0], [3.0, 4.0]]} if block else {"t": 1.0}
    if block and field in ("t", "x", "y", "id"):
        body[field] = [body.get(field, [1.0, 1.0])[0], bomb]
    else:
        body[field] = bomb
    try:
        payload = msgpack.packb(body, use_bin_type=True)
    except (ValueError, OverflowError):
        return  # msgpack's packer refuses so deep a value itself
    try:
        wire.decode_feed([b"c301", payload], SPECS, 1 << 20)
    except wire.WireError as exc:
        assert exc.reason in wire.REASONS
        assert len(str(exc)) < 300
    try:
        wire.decode_control(msgpack.packb({"cmd": "status", "model": bomb}), 1 << 20)
    except wire.WireError as exc:
        assert len(str(exc)) < 300


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(0, 200_000), st.sampled_from(["t", "x", "y", "id", "pad"]))
def test_size_bombs_are_refused_or_decoded_within_the_limit(n, field):
    """A flat array of up to 200 000 elements in any field: over the message limit it is
    refused as too_large before it is decoded; under it, decoded or rejected cleanly."""
    payload = msgpack.packb({"t": 1.0, field: [1] * n})
    try:
        wire.decode_feed([b"c301", payload], SPECS, LIMIT)
    except wire.WireError as exc:
        assert exc.reason in wire.REASONS and len(str(exc)) < 300
        if len(payload) > LIMIT:
            assert exc.reason == "too_large"


def test_hostile_length_claims_cost_no_memory():
    """msgpack headers that claim 4 G elements or bytes (msgpack spec: array32, map32, str32,
    bin32, ext32) are refused before anything of that size is allocated."""
    claims = [b"\xdd\xff\xff\xff\xff", b"\xdf\xff\xff\xff\xff", b"\xdb\xff\xff\xff\xff",
              b"\xc6\xff\xff\xff\xff", b"\xc9\xff\xff\xff\xff\x01",
              b"\x81\xa1x" + b"\x91" * 5000]  # deep nesting
    tracemalloc.start()
    try:
        for head in claims:
            assert _decode([b"c301", head + b"\x00" * 16]) is None
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 4 * 1024 * 1024


toml_scalars = st.one_of(st.integers(-10, 10**6).map(str), st.floats(-1e6, 1e6).map(repr),
                         st.sampled_from(['"5d"', '"x"', "true", "false", '""', '"0/2"',
                                          '"tcp://127.0.0.1:5"', "[]", "[1, 2]", "{}",
                                          '[{tag = "A", lo = 0, hi = 1}]', "nan", "inf"]))
sections = st.sampled_from(["daemon", "model.basis", "model.prior", "model.noise",
                            "model.forgetting", "model.gate", "model.lab", "model.alerts"])
names = st.sampled_from(["feeds", "publish", "name", "inputs", "degree", "alpha", "std", "guess",
                         "policy", "half_life", "q", "k", "release", "keep", "level", "shard",
                         "cusum_h", "head_start", "metrics", "hwm", "bogus"])


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(sections, names, toml_scalars), max_size=8),
       st.booleans())
def test_config_loader_accepts_or_explains(entries, with_model):
    lines = []
    if with_model:
        lines += ['[[model]]', 'name = "m"', 'inputs = [{tag = "A", lo = 0, hi = 1}]']
    for section, key, value in entries:
        lines += [f"[{section}]", f"{key} = {value}"]
    text = "\n".join(lines) + "\n"
    try:
        cfg = loads(text, "fuzz.toml")
    except ConfigError as exc:
        assert exc.file == "fuzz.toml" and str(exc).startswith("fuzz.toml")
    else:
        for m in cfg.models:
            m.build_posterior()  # a config that loads builds its models


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=300))
def test_config_loader_on_arbitrary_text(text):
    try:
        loads(text, "fuzz.toml")
    except ConfigError:
        pass
