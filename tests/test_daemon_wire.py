"""Unit tests of daemon.runtime.wire: feed and control decoding, every rejection reason, encoding.

Encoded bytes are checked against the layouts of the MessagePack specification
(github.com/msgpack/msgpack, spec.md: fixmap 0x80|n, fixarray 0x90|n, fixstr 0xa0|n,
nil 0xc0, false 0xc2, true 0xc3, bin 8 0xc4, float 64 0xcb big-endian IEEE 754, negative
fixint 0xe0..0xff, ext formats 0xc7..0xc9 and 0xd4..0xd8) with float bytes from
``struct.pack(">d", ...)``.
"""

from __future__ import annotations

import math
import struct

import msgpack
import numpy as np
import pytest

from daemon.runtime import wire
from daemon.runtime.wire import (
    MAX_BLOCK,
    MAX_ID_LEN,
    REASONS,
    WireError,
    decode_control,
    decode_feed,
)
from daemon.workbench import plant

MODEL = "c301.bottoms_solvent"
TAGS = plant.TAGS
SPECS = {MODEL: (TAGS, {tag: i for i, tag in enumerate(TAGS)})}
ROW = [110.0, 14.0, 1.2, 5.0]
LIMIT = 4096


def f64(x: float) -> bytes:
    return b"\xcb" + struct.pack(">d", x)


def frames(body, topic: str = MODEL) -> list[bytes]:
    return [topic.encode(), msgpack.packb(body, use_bin_type=True)]


def decode(body, topic: str = MODEL):
    return decode_feed(frames(body, topic), SPECS, LIMIT)


def rows(msg) -> list:
    """The feature rows of a decoded message as plain lists (a block may hold an array)."""
    return [None if r is None else [float(v) for v in r] for r in msg.x]


def reason_of(frame_list) -> str:
    with pytest.raises(WireError) as info:
        decode_feed(frame_list, SPECS, LIMIT)
    assert info.value.reason in REASONS
    return info.value.reason


# ---------------------------------------------------------------------------------- encoding
def test_pack_writes_the_msgpack_spec_layouts():
    # msgpack spec: fixmap of 1 entry, fixstr "t", float 64
    assert wire.pack({"t": 1.5}) == b"\x81\xa1t" + f64(1.5)
    # fixarray of 5: nil, true, false, positive fixint 1, negative fixint -1
    assert wire.pack([None, True, False, 1, -1]) == b"\x95\xc0\xc3\xc2\x01\xff"
    # bytes are bin 8 (use_bin_type), not raw strings
    assert wire.pack(b"ab") == b"\xc4\x02ab"
    assert wire.packb({"t": 1.5, "x": [1.0]}) == wire.pack({"t": 1.5, "x": [1.0]})


def test_non_finite_floats_travel_as_ieee_754_doubles():
    # IEEE 754: the quiet nan 0x7ff8000000000000 and infinities survive the round trip
    assert wire.pack(math.inf) == f64(math.inf) == b"\xcb\x7f\xf0" + b"\x00" * 6
    assert wire.pack(-math.inf) == b"\xcb\xff\xf0" + b"\x00" * 6
    back = wire.unpack(wire.pack([math.nan, math.inf]), LIMIT)
    assert math.isnan(back[0]) and back[1] == math.inf


PRED_KEYS = ("t", "mean", "std", "var", "lo", "hi", "level", "dof", "status", "trust")


@pytest.mark.parametrize("ident", [None, 7, -3, 2**40, "lab-17", "x" * MAX_ID_LEN])
def test_a_single_prediction_has_the_bytes_msgpack_gives_its_map(ident):
    # reference: msgpack.packb of the dict (the library's own map encoding, keys in
    # insertion order), for ordinary, signed-zero, subnormal, huge and non-finite numbers
    rng = np.random.default_rng(5)
    specials = [0.0, -0.0, 5e-324, 1.7976931348623157e308, math.inf, -math.inf, math.nan]
    for i in range(300):
        nums = rng.standard_normal(8) * 10.0 ** rng.integers(-300, 300, 8)
        nums = [float(v) for v in nums]
        if i % 3 == 0:
            nums[int(rng.integers(8))] = specials[i // 3 % len(specials)]
        status = ("learning", "stale", "unidentified", "frozen", "waiting")[i % 5]
        trust = (None, "normal", "caution", "untrusted", "commissioning")[i % 5]
        body = dict(zip(PRED_KEYS, [*nums, status, trust], strict=True))
        if ident is not None:
            body["id"] = ident
        assert wire.pack_prediction(*nums, status, trust, ident) == msgpack.packb(body), i


def test_a_prediction_with_numbers_that_are_not_floats_is_the_map_too():
    # an int is written as a msgpack int, a bool as true: the dict's encoding, not a float
    for nums in ([1, 0.5, 0.5, 0.25, -1.0, 1.0, 0.95, 40.0],
                 [1.0, True, 0.5, 0.25, -1.0, 1.0, 0.95, 40.0],
                 [1.0, 0.5, 0.5, 0.25, -1.0, 1.0, 0.95, np.float64(40.0)]):
        body = dict(zip(PRED_KEYS, [*nums, "learning", "normal"], strict=True))
        assert wire.pack_prediction(*nums, "learning", "normal") == msgpack.packb(body)


def test_a_visits_predictions_are_the_bytes_msgpack_gives_each_map():
    # reference: msgpack.packb of each row's dict, for visits whose rows share the status and
    # trust or not, with and without ids, and with numbers that are not floats
    rng = np.random.default_rng(6)
    statuses = ("learning", "stale", "unidentified")
    trusts = (None, "normal", "caution")
    for i in range(400):
        k = int(rng.integers(1, 6))
        cols = [[float(v) for v in rng.standard_normal(k)] for _ in range(7)]
        if i % 7 == 0:
            cols[int(rng.integers(7))][0] = int(rng.integers(-5, 5))
        if i % 11 == 0:
            cols[int(rng.integers(7))][-1] = math.nan
        level = 0.95 if i % 13 else 1
        status = [statuses[0]] * k if i % 3 else [str(rng.choice(statuses)) for _ in range(k)]
        if i % 4 == 0:
            trust = [str(rng.choice(trusts[1:])) for _ in range(k)]
        elif i % 4 == 1:
            trust = [trusts[2]] * k
        else:
            trust = trusts[i % 3]
        ids = None if i % 5 else [None if rng.random() < 0.3 else int(j) for j in range(k)]
        got = wire.pack_predictions(*cols[:6], level, cols[6], status, trust, ids)
        want = []
        for j in range(k):
            nums = [cols[0][j], cols[1][j], cols[2][j], cols[3][j], cols[4][j], cols[5][j],
                    level, cols[6][j]]
            tr = trust[j] if type(trust) is list else trust
            body = dict(zip(PRED_KEYS, [*nums, status[j], tr], strict=True))
            if ids is not None and ids[j] is not None:
                body["id"] = ids[j]
            want.append(msgpack.packb(body))
        assert got == want, i


def test_a_packed_block_answer_is_the_bytes_msgpack_gives_its_map():
    # reference: msgpack.packb of the dict the daemon used to build, over the sizes where
    # the bin header (8-bit, 16-bit, 32-bit length) and the status array header change
    rng = np.random.default_rng(11)
    f = wire.packed_floats
    for k in (1, 15, 16, 31, 32, 255, 256, 8191, 8192, 9000):
        for case in range(4):
            a = [rng.normal(size=k) for _ in range(7)]
            a[2][0] = math.inf if case == 1 else a[2][0]
            a[1][-1] = math.nan if case == 2 else a[1][-1]
            status = ["learning"] * k if case != 3 else \
                [("learning", "stale", "waiting")[i % 3] for i in range(k)]
            trust = (None, "normal", "caution", "untrusted")[case]
            ids = None if case % 2 == 0 else [f"S-{i}" for i in range(k)]
            for level in (0.95, 1.0 - 1e-9):
                body = {"t": f(a[0]), "mean": f(a[1]), "std": f(a[2]), "var": f(a[3]),
                        "lo": f(a[4]), "hi": f(a[5]), "level": level, "dof": f(a[6]),
                        "status": status, "trust": trust, "packed": True}
                if ids is not None:
                    body["id"] = ids
                got = wire.pack_packed_block(*a[:6], level, a[6], status, trust, ids)
                assert got == msgpack.packb(body), (k, case)
                # twice: the second takes the kept encoding of the status list
                assert wire.pack_packed_block(*a[:6], level, a[6], status, trust, ids) == got
    # a level that is not a float (msgpack writes an int as an int) takes the map
    a = [np.arange(3.0)] * 7
    body = {"t": f(a[0]), "mean": f(a[1]), "std": f(a[2]), "var": f(a[3]), "lo": f(a[4]),
            "hi": f(a[5]), "level": 1, "dof": f(a[6]), "status": ["stale"] * 3,
            "trust": "normal", "packed": True}
    assert wire.pack_packed_block(*a[:6], 1, a[6], ["stale"] * 3, "normal") == \
        msgpack.packb(body)


def test_unpack_limits_containers_by_the_payload_length():
    # an array header claiming more items than the payload has bytes is refused outright
    # (msgpack spec: array 32 is 0xdd and a 32-bit big-endian count)
    with pytest.raises(WireError) as err:
        wire.unpack(b"\xdd\x00\x10\x00\x00" + b"\xc0" * 10, LIMIT)
    assert err.value.reason == "msgpack"
    with pytest.raises(WireError) as err:
        wire.unpack(b"\xdb\x00\x00\x01\x00abc", LIMIT)  # str 32 of 256 bytes, 3 given
    assert err.value.reason == "msgpack"


def test_unpack_is_the_inverse_of_msgpack_packb():
    obj = {"t": [1.0, 2.5], "x": [[1, 2], [3, 4]], "y": [None, 7.25], "id": ["a", 3]}
    assert wire.unpack(msgpack.packb(obj), LIMIT) == obj


# ---------------------------------------------------------------------------------- feeds
def test_single_message_with_list_x():
    msg = decode({"t": 100.0, "x": ROW, "id": "S-1", "seq": 7})
    assert (msg.model, msg.t, msg.y, msg.ids, msg.seq, msg.block) == (
        MODEL, [100.0], [None], ["S-1"], 7, False)
    assert rows(msg) == [ROW]


@pytest.mark.parametrize("extra", [{}, {"seq": 7}, {"seq": 8, "src": "dcs-a"}])
def test_the_common_message_is_the_feed_the_named_tuple_makes(extra):
    # the single-sample message is built without the named tuple's keywords: every field,
    # defaults included, must be what the keyword form gives
    msg = decode({"t": 100.0, "x": ROW, **extra})
    want = wire.Feed(MODEL, [100.0], [ROW], [None], [None], extra.get("seq"), False,
                     has_y=False, has_id=False, src=extra.get("src"))
    assert type(msg) is wire.Feed
    assert msg._asdict() == want._asdict()


def test_x_as_a_map_is_put_in_input_order():
    by_tag = dict(zip(TAGS, ROW, strict=True))
    msg = decode({"t": 5, "x": dict(reversed(list(by_tag.items())))})
    assert rows(msg) == [ROW] and msg.t == [5.0]


def test_integers_are_numbers():
    msg = decode({"t": 1767571200, "x": [110, 14, 1, 5], "y": 170})
    assert msg.t == [1767571200.0] and rows(msg) == [[110.0, 14.0, 1.0, 5.0]]
    assert msg.y == [170.0]


def test_lab_result_by_time_and_by_id():
    by_t = decode({"t": 50.0, "y": 123.0})
    assert (by_t.t, by_t.x, by_t.y, by_t.ids) == ([50.0], [None], [123.0], [None])
    by_id = decode({"id": 42, "y": 1.0})
    assert math.isnan(by_id.t[0]) and by_id.ids == [42] and by_id.x == [None]
    both = decode({"t": 1.0, "x": ROW, "y": 9.5})
    assert rows(both) == [ROW] and both.y == [9.5] and not both.block


def test_block_with_nil_lab_values_and_ids():
    msg = decode({"t": [1, 2, 3], "x": [ROW, ROW, ROW], "y": [None, 4.0, None],
                  "id": ["a", None, 7], "seq": 3})
    assert msg.block and msg.seq == 3
    assert msg.t == [1.0, 2.0, 3.0] and rows(msg) == [ROW] * 3
    assert msg.y == [None, 4.0, None] and msg.ids == ["a", None, 7]


def test_lab_only_block():
    msg = decode({"t": [10.0, 20.0], "y": [1.0, 2.0]})
    assert rows(msg) == [None, None] and msg.y == [1.0, 2.0] and msg.ids == [None, None]


def test_id_lengths_at_the_limit():
    assert decode({"t": 1.0, "x": ROW, "id": "s" * MAX_ID_LEN}).ids == ["s" * MAX_ID_LEN]
    assert reason_of(frames({"t": 1.0, "x": ROW, "id": "s" * (MAX_ID_LEN + 1)})) == "bad_id"


def test_size_limit_is_inclusive():
    body = {"t": 1.0, "x": ROW, "pad": ""}
    base = len(msgpack.packb(body))
    body["pad"] = "p" * (LIMIT - base)
    body["pad"] = body["pad"][: LIMIT - base - (len(msgpack.packb(body)) - LIMIT)]
    payload = msgpack.packb(body)
    assert len(payload) == LIMIT
    assert rows(decode_feed([MODEL.encode(), payload], SPECS, LIMIT)) == [ROW]
    assert reason_of([MODEL.encode(), payload + b"\xc0"]) == "too_large"


BAD_FEEDS = {
    "one frame": ([MODEL.encode()], "frames"),
    "three frames": (frames({"t": 1.0, "x": ROW}) + [b""], "frames"),
    "no frames": ([], "frames"),
    "topic not utf-8": ([b"\xff\xfe", msgpack.packb({"t": 1.0, "x": ROW})], "unknown_model"),
    "unknown model": (frames({"t": 1.0, "x": ROW}, "c301.other"), "unknown_model"),
    "prefix of a model": (frames({"t": 1.0, "x": ROW}, MODEL + "_x"), "unknown_model"),
    "never-used byte 0xc1": ([MODEL.encode(), b"\xc1"], "msgpack"),
    "truncated array": ([MODEL.encode(), b"\x93\x01\x02"], "msgpack"),
    "trailing bytes": ([MODEL.encode(), msgpack.packb({"t": 1.0}) + b"\x01"], "msgpack"),
    "empty payload": ([MODEL.encode(), b""], "msgpack"),
    "ext type": (frames({"t": 1.0, "x": ROW, "e": msgpack.ExtType(7, b"xy")}), "msgpack"),
    "empty ext type": (frames({"t": 1.0, "x": ROW, "e": msgpack.ExtType(7, b"")}), "msgpack"),
    "timestamp ext -1": (frames({"t": msgpack.Timestamp(1767571200, 0), "x": ROW}),
                         "msgpack"),
    "unhashable map key": ([MODEL.encode(), b"\x81\x91\x01\x02"], "msgpack"),
    "nesting too deep": ([MODEL.encode(), b"\x91" * 3000 + b"\xc0"], "msgpack"),
    "too large": (frames({"t": 1.0, "x": ROW, "pad": "p" * LIMIT}), "too_large"),
    "array payload": (frames([1.0, ROW]), "not_a_map"),
    "string payload": (frames("t=1"), "not_a_map"),
    "nil payload": (frames(None), "not_a_map"),
    "missing t": (frames({"x": ROW}), "bad_time"),
    "nan t": (frames({"t": math.nan, "x": ROW}), "bad_time"),
    "inf t": (frames({"t": math.inf, "x": ROW}), "bad_time"),
    "string t": (frames({"t": "12:00", "x": ROW}), "bad_time"),
    "bool t": (frames({"t": True, "x": ROW}), "bad_time"),
    "lab with neither t nor id": (frames({"y": 1.0}), "bad_time"),
    "id but features without t": (frames({"id": "S-1", "x": ROW}), "bad_time"),
    "nan t in a block": (frames({"t": [1.0, math.nan], "x": [ROW, ROW]}), "bad_time"),
    "string t in a block": (frames({"t": ["1767571200", 2.0], "x": [ROW, ROW]}), "bad_time"),
    "nil t in a block": (frames({"t": [None, 2.0], "x": [ROW, ROW]}), "bad_time"),
    "neither x nor y": (frames({"t": 1.0}), "bad_x"),
    "x too short": (frames({"t": 1.0, "x": ROW[:3]}), "bad_x"),
    "x too long": (frames({"t": 1.0, "x": ROW + [1.0]}), "bad_x"),
    "unknown tag": (frames({"t": 1.0, "x": {**dict(zip(TAGS, ROW, strict=True)),
                                            "TI-999": 1.0}}), "bad_x"),
    "missing tag": (frames({"t": 1.0, "x": dict(zip(TAGS[:3], ROW, strict=False))}),
                    "bad_x"),
    "nan x": (frames({"t": 1.0, "x": [math.nan, 14.0, 1.2, 5.0]}), "bad_x"),
    "inf x": (frames({"t": 1.0, "x": [110.0, -math.inf, 1.2, 5.0]}), "bad_x"),
    "nan x in a map": (frames({"t": 1.0, "x": {**dict(zip(TAGS, ROW, strict=True)),
                                               "PI-110": math.nan}}), "bad_x"),
    "string in x": (frames({"t": 1.0, "x": [110.0, "14", 1.2, 5.0]}), "bad_x"),
    "bool in x": (frames({"t": 1.0, "x": [110.0, True, 1.2, 5.0]}), "bad_x"),
    "x a number": (frames({"t": 1.0, "x": 110.0}), "bad_x"),
    "nan y": (frames({"t": 1.0, "y": math.nan}), "bad_y"),
    "inf y": (frames({"t": 1.0, "y": math.inf}), "bad_y"),
    "string y": (frames({"t": 1.0, "y": "170 ppm"}), "bad_y"),
    "nan y in a block": (frames({"t": [1.0, 2.0], "y": [None, math.nan]}), "bad_y"),
    "float id": (frames({"t": 1.0, "x": ROW, "id": 1.5}), "bad_id"),
    "bool id": (frames({"t": 1.0, "x": ROW, "id": True}), "bad_id"),
    "empty id": (frames({"t": 1.0, "x": ROW, "id": ""}), "bad_id"),
    "list id": (frames({"t": 1.0, "x": ROW, "id": [1]}), "bad_id"),
    "bytes id": (frames({"t": 1.0, "x": ROW, "id": b"S-1"}), "bad_id"),
    "float seq": (frames({"t": 1.0, "x": ROW, "seq": 2.0}), "bad_id"),
    "empty block": (frames({"t": [], "x": []}), "bad_block"),
    "block x shorter than t": (frames({"t": [1.0, 2.0], "x": [ROW]}), "bad_block"),
    "block y longer than t": (frames({"t": [1.0, 2.0], "y": [1.0, 2.0, 3.0]}), "bad_block"),
    "block id shorter than t": (frames({"t": [1.0, 2.0], "x": [ROW, ROW], "id": ["a"]}),
                                "bad_block"),
    "block x not a list": (frames({"t": [1.0], "x": {"TI-104": 1.0}}), "bad_block"),
    "block with neither x nor y": (frames({"t": [1.0, 2.0]}), "bad_block"),
    "bad row in a block": (frames({"t": [1.0, 2.0], "x": [ROW, ROW[:2]]}), "bad_x"),
    "string in a block row": (frames({"t": [1.0, 2.0], "x": [ROW, ["110", 14.0, 1.2, 5.0]]}),
                              "bad_x"),
    "inf in a block row": (frames({"t": [1.0, 2.0], "x": [ROW, [110.0, 14.0, math.inf, 5.0]]}),
                           "bad_x"),
    "nil row in a block": (frames({"t": [1.0, 2.0], "x": [ROW, None]}), "bad_x"),
}


@pytest.mark.parametrize("case", list(BAD_FEEDS))
def test_bad_feed_message_is_rejected_with_its_reason(case):
    frame_list, reason = BAD_FEEDS[case]
    assert reason_of(frame_list) == reason


def test_block_longer_than_the_limit():
    n = MAX_BLOCK + 1
    payload = msgpack.packb({"t": [1.0] * n, "y": [1.0] * n})
    with pytest.raises(WireError) as info:
        decode_feed([MODEL.encode(), payload], SPECS, len(payload))
    assert info.value.reason == "bad_block"


def test_errors_are_value_errors_that_show_the_bad_value():
    with pytest.raises(ValueError, match=r"bad_x: unknown tag 'TI-999'"):
        decode({"t": 1.0, "x": {"TI-999": 1.0}})
    with pytest.raises(ValueError, match=r"bad_time: .*'noon'"):
        decode({"t": "noon", "x": ROW})
    with pytest.raises(ValueError, match=r"too_large: 5000 bytes > 4096"):
        wire.unpack(b"\x00" * 5000, LIMIT)
    with pytest.raises(ValueError, match=r"x has 3 values, expected 4"):
        decode({"t": 1.0, "x": ROW[:3]})
    with pytest.raises(ValueError, match=r"extension type 7 refused"):
        decode({"t": 1.0, "x": ROW, "e": msgpack.ExtType(7, b"")})


def test_reasons_are_a_bounded_set_of_label_values():
    assert len(set(REASONS)) == len(REASONS)
    assert all(r.isidentifier() and r.islower() for r in REASONS)


# ---------------------------------------------------------------------------------- control
def test_control_commands_decode():
    assert decode_control(msgpack.packb({"cmd": "status"}), 65536) == {"cmd": "status"}
    msg = decode_control(msgpack.packb({"cmd": "freeze", "model": MODEL}), 65536)
    assert msg == {"cmd": "freeze", "model": MODEL}


@pytest.mark.parametrize("payload, reason", [
    (b"\xc1", "msgpack"),
    (msgpack.packb(["status"]), "not_a_map"),
    (msgpack.packb({"command": "status"}), "not_a_map"),
    (msgpack.packb({"cmd": 3}), "not_a_map"),
    (msgpack.packb({"cmd": "x", "pad": "p" * 70000}), "too_large"),
])
def test_bad_control_payload(payload, reason):
    with pytest.raises(WireError) as info:
        decode_control(payload, 65536)
    assert info.value.reason == reason


# ---------------------------------------------------------------------------------- packed blocks
def f8(values) -> bytes:
    """Values as a packed field: little-endian IEEE 754 float64, row-major."""
    return np.asarray(values, dtype="<f8").tobytes()


BLOCK_T = [1767571200.0, 1767571260.0, 1767571320.5]
BLOCK_X = [ROW, [111.0, 13.5, 1.25, 4.0], [109.5, 14.25, 1.0, 6.5]]
BLOCK_Y = [None, 171.5, None]
BLOCK_IDS = ["a", None, 7]


def test_packed_field_bytes_are_little_endian_float64_row_major():
    # IEEE 754 binary64 of 1.0 is 0x3ff0000000000000; little-endian puts the low byte first
    assert f8([1.0]) == b"\x00" * 6 + b"\xf0\x3f" == struct.pack("<d", 1.0)
    assert f8([[1.0, 2.0], [3.0, 4.0]]) == struct.pack("<4d", 1.0, 2.0, 3.0, 4.0)
    assert wire.packed_floats(np.array([1.0, math.nan])) == struct.pack("<2d", 1.0, math.nan)
    # a bin travels as msgpack bin 8 (0xc4, one length byte)
    assert wire.pack(f8([1.0])) == b"\xc4\x08" + struct.pack("<d", 1.0)


def _same_feed(got, want, packed: bool) -> None:
    assert (got.model, got.t, got.y, got.ids, got.seq, got.block) == (
        want.model, want.t, want.y, want.ids, want.seq, want.block)
    assert (got.has_y, got.has_id, got.increasing) == (want.has_y, want.has_id,
                                                       want.increasing)
    assert all(type(t) is float for t in got.t)
    assert got.packed is packed and want.packed is False
    if want.x[0] is None:
        assert got.x == want.x
    else:
        assert isinstance(got.x, np.ndarray) and got.x.dtype == np.float64
        assert got.x.shape == (len(got.t), len(TAGS))
        np.testing.assert_array_equal(got.x, want.x)


@pytest.mark.parametrize("pack_t", [False, True])
@pytest.mark.parametrize("pack_x", [False, True])
@pytest.mark.parametrize("pack_y", [False, True])
def test_packed_block_decodes_as_the_list_form(pack_t, pack_x, pack_y):
    body = {"t": BLOCK_T, "x": BLOCK_X, "y": BLOCK_Y, "id": BLOCK_IDS, "seq": 4}
    want = decode(body)
    packed = dict(body)
    if pack_t:
        packed["t"] = f8(BLOCK_T)
    if pack_x:
        packed["x"] = f8(BLOCK_X)
    if pack_y:
        packed["y"] = f8([math.nan if v is None else v for v in BLOCK_Y])
    _same_feed(decode(packed), want, pack_x)


@pytest.mark.parametrize("body", [
    {"t": BLOCK_T, "x": BLOCK_X},
    {"t": [5.0], "x": [ROW]},
    {"t": [3.0, 2.0, 2.0], "x": BLOCK_X},            # not increasing: the careful path
    {"t": BLOCK_T, "y": [1.0, 2.0, 3.0]},             # lab values only
], ids=["features", "one row", "not increasing", "lab only"])
def test_packed_block_variants_decode_as_the_list_form(body):
    want = decode(body)
    packed = {k: f8(v) for k, v in body.items()}
    got = decode(packed)
    _same_feed(got, want, "x" in body)
    assert not got.has_id and got.has_y == ("y" in body)


def test_packed_x_is_a_read_only_native_array_of_the_message():
    msg = decode({"t": f8(BLOCK_T), "x": f8(BLOCK_X)})
    assert msg.x.dtype.isnative and msg.x.flags.c_contiguous
    # a view of an immutable bytes object: nothing downstream can write into it
    assert not msg.x.flags.writeable
    with pytest.raises(ValueError):
        msg.x[0, 0] = 0.0


def test_packed_y_nan_means_no_lab_value():
    msg = decode({"t": f8(BLOCK_T), "y": f8([math.nan, 4.0, -math.nan])})
    assert msg.y == [None, 4.0, None] and msg.x == [None] * 3 and msg.has_y


# name -> (body, reason, pattern the message must match)
BAD_PACKED = {
    "x bytes not a multiple of 8": (
        {"t": BLOCK_T, "x": f8(BLOCK_X)[:-3]}, "bad_block",
        r"packed x must hold 3 x 4 float64 = 96 bytes, got 93 bytes"),
    "x one row short": (
        {"t": BLOCK_T, "x": f8(BLOCK_X[:2])}, "bad_block", r"96 bytes, got 64 bytes"),
    "x one row long": (
        {"t": f8(BLOCK_T[:2]), "x": f8(BLOCK_X)}, "bad_block",
        r"2 x 4 float64 = 64 bytes, got 96 bytes"),
    "x with a column too many": (
        {"t": BLOCK_T, "x": f8([r + [0.0] for r in BLOCK_X])}, "bad_block",
        r"96 bytes, got 120 bytes"),
    "x as float32": (
        {"t": BLOCK_T, "x": np.asarray(BLOCK_X, "<f4").tobytes()}, "bad_block",
        r"96 bytes, got 48 bytes"),
    "empty x": ({"t": BLOCK_T, "x": b""}, "bad_block", r"got 0 bytes"),
    "nan in x": (
        {"t": BLOCK_T, "x": f8([ROW, ROW, [110.0, 14.0, math.nan, 5.0]])}, "bad_x",
        rf"packed x row 2: value for {TAGS[2]} is nan"),
    "inf in x": (
        {"t": f8(BLOCK_T), "x": f8([ROW, [110.0, -math.inf, 1.2, 5.0], ROW])}, "bad_x",
        rf"packed x row 1: value for {TAGS[1]} is -inf"),
    "first of two bad values": (
        {"t": BLOCK_T, "x": f8([ROW, [math.inf, 14.0, 1.2, 5.0], [math.nan] * 4])}, "bad_x",
        rf"packed x row 1: value for {TAGS[0]} is inf"),
    "t bytes not a multiple of 8": (
        {"t": f8(BLOCK_T)[:-1], "x": f8(BLOCK_X)}, "bad_block",
        r"packed t must hold a multiple of 8 bytes .*got 23 bytes"),
    "empty t": ({"t": b"", "x": b""}, "bad_block", r"1\.\.65536 rows, got 0"),
    "nan in t": (
        {"t": f8([1.0, math.nan, 3.0]), "x": f8(BLOCK_X)}, "bad_time", r"packed t\[1\] is nan"),
    "inf in t": (
        {"t": f8([math.inf, 2.0, 3.0]), "x": BLOCK_X}, "bad_time", r"packed t\[0\] is inf"),
    "y of the wrong length": (
        {"t": f8(BLOCK_T), "x": f8(BLOCK_X), "y": f8([1.0, 2.0])}, "bad_block",
        r"packed y must hold 3 float64 = 24 bytes, got 16 bytes"),
    "inf in y": (
        {"t": BLOCK_T, "y": f8([1.0, math.inf, 2.0])}, "bad_y", r"packed y\[1\] is inf"),
    "id shorter than a packed t": (
        {"t": f8(BLOCK_T), "x": f8(BLOCK_X), "id": ["a"]}, "bad_block",
        r"id must be a list of 3 values"),
    "packed x without t": ({"x": f8(ROW)}, "bad_time", r"t is required"),
    "packed x in a single message": ({"t": 1.0, "x": f8(ROW)}, "bad_x",
                                     r"x must be a list or a map, got bytes"),
}


@pytest.mark.parametrize("case", list(BAD_PACKED))
def test_bad_packed_block_is_rejected_with_its_reason(case):
    body, reason, pattern = BAD_PACKED[case]
    with pytest.raises(WireError, match=pattern) as info:
        decode_feed(frames(body), SPECS, LIMIT)
    assert info.value.reason == reason


def test_packed_block_longer_than_the_limit():
    n = MAX_BLOCK + 1
    payload = msgpack.packb({"t": f8(np.arange(n, dtype=float)), "y": f8(np.ones(n))},
                            use_bin_type=True)
    with pytest.raises(WireError, match=rf"1\.\.{MAX_BLOCK} rows, got {n}") as info:
        decode_feed([MODEL.encode(), payload], SPECS, len(payload))
    assert info.value.reason == "bad_block"
    ok = msgpack.packb({"t": f8(np.arange(MAX_BLOCK, dtype=float)),
                        "x": f8(np.ones((MAX_BLOCK, len(TAGS))))}, use_bin_type=True)
    msg = decode_feed([MODEL.encode(), ok], SPECS, len(ok))
    assert len(msg.t) == MAX_BLOCK and msg.x.shape == (MAX_BLOCK, len(TAGS)) and msg.packed


def test_packed_bins_are_bounded_by_the_size_limit():
    payload = msgpack.packb({"t": f8(np.arange(600, dtype=float)), "y": f8(np.ones(600))},
                            use_bin_type=True)
    assert len(payload) > LIMIT
    assert reason_of([MODEL.encode(), payload]) == "too_large"
