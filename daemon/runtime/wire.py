"""The wire format: msgpack maps in two-frame ZeroMQ messages. The one place msgpack is used.

Nothing is ever unpickled; msgpack extension types (including timestamps) are refused, and
every container and string has a size limit so a hostile message cannot exhaust memory.
Blocks may carry their numbers packed: msgpack bins of little-endian float64, read with
``np.frombuffer`` and answered in kind (:func:`packed_floats`).
"""

from __future__ import annotations

import itertools
import math
import struct
from typing import NamedTuple

import msgpack
import numpy as np

# Rejection reasons: a bounded set, so they can be metric label values.
REASONS = (
    "frames",          # not exactly two frames
    "too_large",       # over the configured size
    "msgpack",         # not valid msgpack, or an extension type
    "not_a_map",       # payload is not a map
    "unknown_model",   # topic names no configured model
    "bad_time",        # t missing, not a number, or not finite
    "bad_x",           # x of the wrong type, wrong length, unknown tag or non-finite value
    "bad_y",           # y not a finite number
    "bad_id",          # id neither int nor short string
    "bad_block",       # block lists of mismatched lengths or too long
    "out_of_order",    # feature sample older than the last one of its model
    "duplicate",       # feature sample at the same time as the last one
    "lab_unmatched",   # lab result with no buffered features within the tolerance
    "lab_too_old",     # lab result older than the feature buffer
    "lab_out_of_order",  # lab result drawn before the last learned one
    "frozen",          # learning is frozen for this model
    "gated",           # robust gate rejected the lab result as an outlier
    "too_deep",        # containers nested deeper than any field of the protocol needs
    "internal_error",  # handling the message raised an unexpected error (logged, traceback)
)

MAX_ID_LEN = 128
MAX_SRC_LEN = 64
MAX_BLOCK = 65536
# No field of the protocol nests deeper than a block's x (map -> rows -> values); a little
# slack for a mistaken but harmless client.
MAX_DEPTH = 8


class WireError(ValueError):
    """A message that cannot be used; ``reason`` is one of :data:`REASONS`."""

    def __init__(self, reason: str, detail: str, seq: int | None = None):
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail
        # the message's sequence number when it could be read: a rejected message still
        # arrived, so it is not counted as lost by the bus
        self.seq = seq
        self.src: str | None = None


def show(v, limit: int = 60) -> str:
    """A short, bounded description of a value from the wire, safe for any input.

    Never formats a container's contents (a value nested a thousand levels deep would make
    ``repr`` recurse until it fails): containers are described by type and size.
    """
    if v is None or isinstance(v, bool | float):
        return repr(v)
    if isinstance(v, int):
        text = repr(v) if -10**30 < v < 10**30 else f"an integer of {len(str(v))} digits"
        return text
    if isinstance(v, str | bytes):
        text = repr(v[:limit])
        return text + (f"... ({len(v)} long)" if len(v) > limit else "")
    if isinstance(v, list | tuple):
        return f"a list of {len(v)} items"
    if isinstance(v, dict):
        return f"a map of {len(v)} keys"
    return f"a {type(v).__name__}"


_SCALARS = frozenset({float, int, str, bool, bytes, type(None)})


def check_depth(v, limit: int = MAX_DEPTH) -> None:
    """Raise :class:`WireError` ``too_deep`` if containers in ``v`` nest deeper than ``limit``.

    Iterative, so it cannot itself overflow the stack.
    """
    stack = [(v, 1)]
    pop, push = stack.pop, stack.append
    while stack:
        o, d = pop()
        if type(o) is dict:
            vals = o.values()
        elif type(o) is list:
            vals = o
        else:
            continue
        if d > limit:
            raise WireError("too_deep", f"containers nested more than {limit} levels deep")
        if _SCALARS.issuperset(map(type, vals)):
            continue
        for e in vals:
            push((e, d + 1))


def _refuse_ext(code, data):
    raise WireError("msgpack", f"extension type {code} refused")


def unpack(payload: bytes, max_bytes: int):
    """Decode one msgpack payload with limits; raises :class:`WireError`."""
    if len(payload) > max_bytes:
        raise WireError("too_large", f"{len(payload)} bytes > {max_bytes}")
    try:
        # the container and string limits default to the payload's length, which is below
        # max_bytes here (and no container of n items fits in fewer than n bytes); not
        # passing them saves a quarter of the call on a small message
        return msgpack.unpackb(payload, raw=False, strict_map_key=False,
                               ext_hook=_refuse_ext, max_ext_len=0)
    except WireError:
        raise
    except (ValueError, TypeError, msgpack.ExtraData, msgpack.FormatError,
            msgpack.StackError, RecursionError) as exc:
        raise WireError("msgpack", type(exc).__name__) from None


def pack(obj) -> bytes:
    """Encode plain data (dicts, lists, str, numbers, None, bool, bytes)."""
    return msgpack.packb(obj, use_bin_type=True)


_packer = msgpack.Packer(use_bin_type=True)
packb = _packer.pack


# ------------------------------------------------------------------ predictions
# A single-sample prediction's map, in its key order: eight floats, then status, trust and
# (when the sample had one) id. Its bytes are what `packb` makes of the dict; built from a
# precompiled struct, with no dict, they cost half as much.
_PRED_FLOATS = ("t", "mean", "std", "var", "lo", "hi", "level", "dof")
_PRED_HEAD = struct.Struct(">B" + "".join(f"{len(k) + 2}sd" for k in _PRED_FLOATS))
# each key as a fixstr, followed by the float 64 marker of its value
_PRED_KEYS = tuple(bytes([0xA0 | len(k)]) + k.encode() + b"\xcb" for k in _PRED_FLOATS)
_K_STATUS = b"\xa6status"
_K_TRUST = b"\xa5trust"
_K_ID = b"\xa2id"
_MAP10, _MAP11 = 0x8A, 0x8B
# the encodings of the few status and trust values there are (None included)
_TEXTS: dict = {}


def _text(v) -> bytes:
    b = _TEXTS.get(v)
    if b is None:
        b = packb(v)
        if (v is None or type(v) is str) and len(_TEXTS) < 64:
            _TEXTS[v] = b
    return b


def pack_prediction(t, mean, std, var, lo, hi, level, dof, status, trust, ident=None) -> bytes:
    """The payload of a single-sample prediction: the same bytes as ``packb`` of
    ``{"t": t, "mean": mean, ..., "dof": dof, "status": status, "trust": trust}`` (with
    ``"id": ident`` last unless ``ident`` is None).

    The eight numbers must be Python floats to take the precompiled path (anything else,
    an int say, which msgpack writes as an int, takes ``packb`` of the dict).
    """
    if not (type(t) is type(mean) is type(std) is type(var) is type(lo) is type(hi)
            is type(level) is type(dof) is float):
        body = {"t": t, "mean": mean, "std": std, "var": var, "lo": lo, "hi": hi,
                "level": level, "dof": dof, "status": status, "trust": trust}
        if ident is not None:
            body["id"] = ident
        return packb(body)
    k = _PRED_KEYS
    head = _PRED_HEAD.pack(_MAP10 if ident is None else _MAP11, k[0], t, k[1], mean, k[2],
                           std, k[3], var, k[4], lo, k[5], hi, k[6], level, k[7], dof)
    if ident is None:
        return b"".join((head, _K_STATUS, _text(status), _K_TRUST, _text(trust)))
    return b"".join((head, _K_STATUS, _text(status), _K_TRUST, _text(trust), _K_ID,
                     packb(ident)))


def pack_predictions(ts: list, mean: list, std: list, var: list, lo: list, hi: list,
                     level: float, dof: list, status: list, trust, ids: list | None = None
                     ) -> list[bytes]:
    """:func:`pack_prediction` of each row of a visit, the same bytes: ``trust`` one value
    for all rows or a list of one per row, ``ids`` None when no row has one.

    The rows' common tail (the status and trust, where those are the same for all) is
    encoded once.
    """
    k = len(ts)
    if k == 1:  # a paced feed's visit: nothing to share
        return [pack_prediction(ts[0], mean[0], std[0], var[0], lo[0], hi[0], level, dof[0],
                                status[0], trust[0] if type(trust) is list else trust,
                                None if ids is None else ids[0])]
    if type(trust) is list and k and trust.count(trust[0]) == k:
        trust = trust[0]
    uniform = k > 0 and type(trust) is not list and status.count(status[0]) == k
    if not (uniform and ids is None and type(level) is float and _FLOATS.issuperset(
            map(type, itertools.chain(ts, mean, std, var, lo, hi, dof)))):
        tr = trust if type(trust) is list else [trust] * k
        idl = [None] * k if ids is None else ids
        return [pack_prediction(ts[i], mean[i], std[i], var[i], lo[i], hi[i], level, dof[i],
                                status[i], tr[i], idl[i]) for i in range(k)]
    tail = b"".join((_K_STATUS, _text(status[0]), _K_TRUST, _text(trust)))
    head = _PRED_HEAD.pack
    k0, k1, k2, k3, k4, k5, k6, k7 = _PRED_KEYS
    join = b"".join
    return [join((head(_MAP10, k0, t, k1, m, k2, s, k3, v, k4, a, k5, b, k6, level, k7, d),
                  tail))
            for t, m, s, v, a, b, d in zip(ts, mean, std, var, lo, hi, dof, strict=True)]


# A packed block's answer, in its key order: seven bins of float64 (and the level between
# them), status, trust, packed and (when the block had ids) id.
_BLOCK_BINS = ("t", "mean", "std", "var", "lo", "hi")
_BLOCK_KEYS = tuple(bytes([0xA0 | len(k)]) + k.encode() for k in _BLOCK_BINS)
_K_LEVEL = b"\xa5level\xcb"
_K_DOF = b"\xa3dof"
_K_PACKED_TRUE = b"\xa6packed\xc3"
_LEVEL = struct.Struct(">d")
# the encodings of a list of k copies of one status (a block's usual status list)
_STATUS_LISTS: dict = {}


def _bin_head(n: int) -> bytes:
    if n < 0x100:
        return bytes((0xC4, n))
    if n < 0x10000:
        return b"\xc5" + n.to_bytes(2, "big")
    return b"\xc6" + n.to_bytes(4, "big")


def _status_list(status: list) -> bytes:
    k = len(status)
    first = status[0] if k else None
    if k and type(first) is str and status.count(first) == k:
        key = (first, k)
        b = _STATUS_LISTS.get(key)
        if b is None:
            b = packb(status)
            if len(_STATUS_LISTS) >= 256:
                _STATUS_LISTS.clear()  # pure functions of the key: dropping them is safe
            _STATUS_LISTS[key] = b
        return b
    return packb(status)


def pack_packed_block(t, mean, std, var, lo, hi, level, dof, status: list, trust,
                      ids: list | None = None) -> bytes:
    """The payload of a packed block's answer: the same bytes as ``packb`` of
    ``{"t": packed_floats(t), "mean": ..., "hi": ..., "level": level, "dof": ...,
    "status": status, "trust": trust, "packed": True}`` (with ``"id": ids`` last unless
    ``ids`` is None), built from its parts: a block's status list is usually one status
    repeated, whose encoding is kept."""
    if type(level) is not float:
        f = packed_floats
        body = {"t": f(t), "mean": f(mean), "std": f(std), "var": f(var), "lo": f(lo),
                "hi": f(hi), "level": level, "dof": f(dof), "status": status,
                "trust": trust, "packed": True}
        if ids is not None:
            body["id"] = ids
        return packb(body)
    parts = [b"\x8b" if ids is None else b"\x8c"]
    k = _BLOCK_KEYS
    for key, a in ((k[0], t), (k[1], mean), (k[2], std), (k[3], var), (k[4], lo),
                   (k[5], hi)):
        b = packed_floats(a)
        parts += (key, _bin_head(len(b)), b)
    b = packed_floats(dof)
    parts += (_K_LEVEL, _LEVEL.pack(level), _K_DOF, _bin_head(len(b)), b, _K_STATUS,
              _status_list(status), _K_TRUST, _text(trust), _K_PACKED_TRUE)
    if ids is not None:
        parts += (_K_ID, packb(ids))
    return b"".join(parts)


def packed_floats(a) -> bytes:
    """A 1-D float array as the bytes of a packed field: little-endian float64."""
    return np.asarray(a, dtype="<f8").tobytes()


# ------------------------------------------------------------------ feed messages
class Feed(NamedTuple):
    """One decoded feed message, normalized to blocks of rows (an immutable named tuple).

    ``x`` is a list of rows (each a list of floats in input order, or None where the row
    carries no features), or for a block with features a (k, n) float array; ``y`` is a
    list of floats or None; all as long as ``t``. In a block, booleans in ``x`` count as
    0 and 1 (they are numbers to the array conversion used there). ``packed`` is True for a
    block whose ``x`` came as a bin of little-endian float64 (see :func:`_packed_rows`); its
    predictions are then published packed too. Its ``x`` is then a read-only view of the
    message's (immutable) bytes.
    """

    model: str
    t: list
    x: list
    y: list
    ids: list
    seq: int | None
    block: bool
    has_y: bool = True
    has_id: bool = True
    increasing: bool = True
    packed: bool = False
    src: str | None = None
    t_array: np.ndarray | None = None


_tuple_new = tuple.__new__


def _single(name: str, t: float, row: list, seq, src) -> Feed:
    """``Feed(name, [t], [row], [None], [None], seq, False, has_y=False, has_id=False,
    src=src)``, the common message, built without the named tuple's keyword handling (a
    third of its cost, on every message)."""
    return _tuple_new(Feed, (name, [t], [row], [None], [None], seq, False, False, False, True,
                             False, src, None))


def _num(v) -> float | None:
    if isinstance(v, bool) or not isinstance(v, int | float):
        return None
    f = float(v)
    return f if math.isfinite(f) else None


def _time(v) -> float:
    f = _num(v)
    if f is None:
        raise WireError("bad_time", f"t must be a finite number, got {show(v)}")
    return f


def _id(v):
    if v is None:
        return None
    if isinstance(v, bool):
        raise WireError("bad_id", "id must be an int or a string")
    if isinstance(v, int):
        return v
    if isinstance(v, str) and 0 < len(v) <= MAX_ID_LEN:
        return v
    raise WireError("bad_id", f"id must be an int or a string of at most {MAX_ID_LEN} "
                              f"characters, got {show(v)}")


_FLOATS = {float}


def _row(v, tags: tuple[str, ...], index: dict[str, int]) -> list[float]:
    n = len(tags)
    # (a decoded row is a list: the exact type test first, and no union built per call)
    if type(v) is list or isinstance(v, tuple):
        if len(v) != n:
            raise WireError("bad_x", f"x has {len(v)} values, expected {n} ({', '.join(tags)})")
        if _FLOATS.issuperset(map(type, v)):
            # fast path: all floats; a finite sum means every value is finite
            total = sum(v)
            if total - total == 0.0:
                return v
        row = [_num(e) for e in v]
        if None in row:
            bad = tags[row.index(None)]
            raise WireError("bad_x", f"x value for {bad} is not a finite number")
        return row
    if isinstance(v, dict):
        row = [math.nan] * n
        for k, e in v.items():
            i = index.get(k)
            if i is None:
                raise WireError("bad_x", f"unknown tag {show(k)}")
            f = _num(e)
            if f is None:
                raise WireError("bad_x", f"x value for {k} is not a finite number")
            row[i] = f
        missing = [tags[i] for i, f in enumerate(row) if math.isnan(f)]
        if missing:
            raise WireError("bad_x", f"x lacks {', '.join(missing)}")
        return row
    raise WireError("bad_x", f"x must be a list or a map, got {type(v).__name__}")


def _y(v) -> float:
    f = _num(v)
    if f is None:
        raise WireError("bad_y", f"y must be a finite number, got {show(v)}")
    return f


def decode_feed(frames, models: dict, max_bytes: int) -> Feed:
    """Decode a feed message.

    Parameters
    ----------
    frames : list of bytes
        The ZeroMQ message parts.
    models : dict
        Model name -> ``(tags, tag_index)`` of the configured models.
    max_bytes : int
        Size limit of the payload.
    """
    if len(frames) != 2:
        raise WireError("frames", f"{len(frames)} frames, expected 2 (topic, payload)")
    try:
        name = bytes(frames[0]).decode("utf-8")
    except UnicodeDecodeError:
        raise WireError("unknown_model", "topic is not UTF-8") from None
    spec = models.get(name)
    if spec is None:
        raise WireError("unknown_model", f"no model named {show(name, 80)}")
    msg = unpack(bytes(frames[1]), max_bytes)
    tags, index = spec
    if type(msg) is dict and len(msg) == 2:
        t = msg.get("t")
        if type(t) is float and t - t == 0.0:
            x = msg.get("x")
            if x is not None:
                # the common message, {"t": a finite float, "x": a row} and nothing else:
                # what _decode_body makes of it, without looking for the keys it lacks
                return _single(name, t, _row(x, tags, index), None, None)
    if not isinstance(msg, dict):
        raise WireError("not_a_map", f"payload is a {type(msg).__name__}, expected a map")
    seq = msg.get("seq")
    if seq is not None and (isinstance(seq, bool) or not isinstance(seq, int)):
        raise WireError("bad_id", "seq must be an integer")
    src = msg.get("src")
    if src is not None and not (isinstance(src, str) and 0 < len(src) <= MAX_SRC_LEN):
        raise WireError("bad_id", f"src must be a string of 1 to {MAX_SRC_LEN} characters, "
                                  f"got {show(src)}", seq)
    try:
        return _decode_body(name, msg, tags, index, seq, src)
    except WireError as exc:
        exc.seq, exc.src = seq, src
        raise


def _decode_body(name, msg, tags, index, seq, src) -> Feed:
    t = msg.get("t")
    if isinstance(t, list | bytes):
        return _decode_block(name, msg, t, tags, index, seq, src)
    x = msg.get("x")
    y = msg.get("y")
    ident = msg.get("id")
    if y is None and ident is None and type(t) is float and t - t == 0.0 and x is not None:
        # the common message: a finite float time and a feature row
        return _single(name, t, _row(x, tags, index), seq, src)
    check_depth(msg)
    ident = _id(ident)
    if x is None and y is None:
        raise WireError("bad_x", "message has neither x nor y")
    if t is None:
        if x is not None or ident is None:
            raise WireError("bad_time", "t is required (a lab result may give id instead)")
        tt = math.nan  # matched by id
    else:
        tt = _time(t)
    row = None if x is None else _row(x, tags, index)
    yy = None if y is None else _y(y)
    return Feed(name, [tt], [row], [yy], [ident], seq, False, has_y=yy is not None,
                has_id=ident is not None, src=src)


def _float_array(v) -> np.ndarray | None:
    """``v`` as a float array if it holds only numbers, else None (the careful path).

    Not ``np.array(v, dtype=float)``: that parses strings such as "1767571200" as numbers.
    """
    try:
        arr = np.array(v)
    except (TypeError, ValueError):
        return None
    return arr.astype(float, copy=False) if arr.dtype.kind in "biuf" else None


def _all_finite(a: np.ndarray) -> bool:
    """Whether every value of the float array ``a`` is finite.

    A finite sum settles it in one pass (a nan or an infinity makes the sum nan or
    infinite); only a sum that overflowed needs the values looked at one by one.
    """
    return math.isfinite(float(np.add.reduce(a, axis=None))) or bool(np.isfinite(a).all())


def _packed(v: bytes, what: str, count: int | None, per: int = 1) -> np.ndarray:
    """A bin of little-endian float64 as a 1-D float array (a read-only view of ``v``).

    ``count`` rows of ``per`` values are expected (any whole number of rows if None).
    """
    size = len(v)
    if count is None:
        if size % (8 * per):
            raise WireError("bad_block", f"packed {what} must hold a multiple of {8 * per} "
                                         f"bytes (float64 little-endian), got {size} bytes")
    elif size != 8 * count * per:
        shape = f"{count} x {per}" if per > 1 else f"{count}"
        raise WireError("bad_block", f"packed {what} must hold {shape} float64 = "
                                     f"{8 * count * per} bytes, got {size} bytes")
    # "<f8" is the native float on little-endian machines: astype is then a no-op
    return np.frombuffer(v, dtype="<f8").astype(float, copy=False)


def _block_times(t) -> tuple[list, np.ndarray]:
    """The times of a block as a list of floats and as an array."""
    if isinstance(t, bytes):
        tarr = _packed(t, "t", None)
        k = len(tarr)
        if k == 0 or k > MAX_BLOCK:
            raise WireError("bad_block", f"a block has 1..{MAX_BLOCK} rows, got {k} "
                                         f"(packed t of {len(t)} bytes)")
        if not _all_finite(tarr):
            i = int(np.argmin(np.isfinite(tarr)))
            raise WireError("bad_time", f"packed t[{i}] is {float(tarr[i])!r}, expected a "
                                        "finite number")
        return tarr.tolist(), tarr
    k = len(t)
    if k == 0 or k > MAX_BLOCK:
        raise WireError("bad_block", f"a block has 1..{MAX_BLOCK} rows, got {k}")
    tarr = _float_array(t)
    if tarr is not None and tarr.shape == (k,) and _all_finite(tarr):
        return tarr.tolist(), tarr
    check_depth(t)
    ts = [_time(v) for v in t]
    return ts, np.array(ts)


def _decode_block(name, msg, t, tags, index, seq, src) -> Feed:
    ts, tarr = _block_times(t)
    k = len(ts)
    x = msg.get("x")
    y = msg.get("y")
    ids = msg.get("id")
    packed = isinstance(x, bytes)
    if x is not None and not packed and (not isinstance(x, list) or len(x) != k):
        raise WireError("bad_block", f"x must be a list of {k} rows or a bin of {k} x "
                                     f"{len(tags)} float64")
    if y is not None and not isinstance(y, bytes) and (not isinstance(y, list) or len(y) != k):
        raise WireError("bad_block", f"y must be a list of {k} values (nil for none) or a bin "
                                     f"of {k} float64 (nan for none)")
    if ids is not None and (not isinstance(ids, list) or len(ids) != k):
        raise WireError("bad_block", f"id must be a list of {k} values")
    if x is None and y is None:
        raise WireError("bad_block", "a block needs x, y or both")
    if x is None:
        rows = [None] * k
    elif packed:
        rows = _packed_rows(x, k, tags)
    else:
        rows = _block_rows(x, k, tags, index)
    if y is None:
        ys = [None] * k
    elif isinstance(y, bytes):
        ys = _packed_y(y, k)
    else:
        ys = [None if v is None else _y(v) for v in y]
    idl = [None] * k if ids is None else [_id(v) for v in ids]
    increasing = k == 1 or bool(np.all(tarr[1:] > tarr[:-1]))
    return Feed(name, ts, rows, ys, idl, seq, True, has_y=y is not None,
                has_id=ids is not None, increasing=increasing, packed=packed, src=src,
                t_array=tarr)


def _packed_rows(x: bytes, k: int, tags) -> np.ndarray:
    """A packed x: k rows of len(tags) little-endian float64, row-major, all finite."""
    n = len(tags)
    arr = _packed(x, "x", k, n).reshape(k, n)
    if not _all_finite(arr):
        i, j = divmod(int(np.argmin(np.isfinite(arr))), n)
        raise WireError("bad_x", f"packed x row {i}: value for {tags[j]} is "
                                 f"{float(arr[i, j])!r}, expected a finite number")
    return arr


def _packed_y(y: bytes, k: int) -> list:
    """A packed y: k little-endian float64, nan where the row has no lab value."""
    arr = _packed(y, "y", k)
    if np.isinf(arr).any():
        i = int(np.argmax(np.isinf(arr)))
        raise WireError("bad_y", f"packed y[{i}] is {float(arr[i])!r}, expected a finite "
                                 "number or nan (none)")
    return [None if v != v else v for v in arr.tolist()]


def _block_rows(x: list, k: int, tags, index):
    """Rows of a block as a (k, n) float array, or a list of rows on the careful path."""
    n = len(tags)
    arr = _float_array(x)
    if arr is not None and arr.shape == (k, n) and _all_finite(arr):
        return arr
    # ragged, dict rows, non-numbers or non-finite values: find and name the culprit
    check_depth(x)
    rows = [_row(r, tags, index) for r in x]
    return np.array(rows, dtype=float)


# ------------------------------------------------------------------ control
def decode_control(payload: bytes, max_bytes: int) -> dict:
    msg = unpack(payload, max_bytes)
    if not isinstance(msg, dict) or not isinstance(msg.get("cmd"), str):
        raise WireError("not_a_map", 'a command is a map with a string "cmd"')
    check_depth(msg)
    return msg
