"""Byte formats of WAL records and checkpoint files, and the scanner that reads a segment
and tells a torn tail from corruption (formats in the :mod:`daemon.runtime.store` docstring)."""

from __future__ import annotations

import struct
import zlib
from dataclasses import dataclass

from daemon.runtime import wire
from daemon.runtime.store.errors import StoreError

CHECKPOINT_MAGIC = b"PSDCKPT1"
MAX_RECORD_BYTES = 64 * 1024 * 1024

_HEADER = struct.Struct("<II")
_SEQ_KEY = b"\xa3seq"  # msgpack fixstr "seq", the first key of every record payload
# map header bytes that may precede it: fixmap (1 byte), map16 (3 bytes), map32 (5 bytes)
_MAP_HEADERS = ((1, range(0x80, 0x90)), (3, (0xDE,)), (5, (0xDF,)))


def _pack(obj, what: str) -> bytes:
    try:
        return wire.pack(obj)
    except (TypeError, ValueError, OverflowError) as exc:
        raise ValueError(f"{what} is not plain data: {exc}") from None


def encode_record(seq: int, record: dict) -> bytes:
    """The bytes of one framed WAL record."""
    if not isinstance(record, dict):
        raise ValueError(f"a record must be a dict, got {type(record).__name__}")
    if "seq" in record:
        raise ValueError(f"a record may not carry its own 'seq' (got {record['seq']!r:.60})")
    payload = _pack({"seq": seq, **record}, "record")
    if len(payload) > MAX_RECORD_BYTES:
        raise ValueError(f"record of {len(payload)} bytes is over the {MAX_RECORD_BYTES} limit")
    return _HEADER.pack(len(payload), zlib.crc32(payload)) + payload


def encode_checkpoint(seq: int, body: dict) -> bytes:
    """The bytes of one checkpoint file."""
    if not isinstance(body, dict):
        raise ValueError(f"a checkpoint body must be a dict, got {type(body).__name__}")
    payload = _pack({"seq": seq, "body": body}, "checkpoint body")
    if len(payload) > 0xFFFFFFFF:
        raise ValueError(f"checkpoint of {len(payload)} bytes does not fit a u32 length")
    return CHECKPOINT_MAGIC + _HEADER.pack(len(payload), zlib.crc32(payload)) + payload


def _checked_frame(data: bytes) -> int:
    """The offset of a checkpoint file's payload, once its magic, length and CRC check;
    raises :class:`StoreError`."""
    head = len(CHECKPOINT_MAGIC) + _HEADER.size
    if len(data) < head:
        raise StoreError(f"checkpoint too short: {len(data)} bytes")
    if data[:len(CHECKPOINT_MAGIC)] != CHECKPOINT_MAGIC:
        raise StoreError(f"checkpoint magic is {data[:8]!r}, expected {CHECKPOINT_MAGIC!r}")
    length, crc = _HEADER.unpack_from(data, len(CHECKPOINT_MAGIC))
    if len(data) != head + length:
        raise StoreError(f"checkpoint is {len(data)} bytes, its header says {head + length}")
    if zlib.crc32(memoryview(data)[head:]) != crc:
        raise StoreError("checkpoint CRC mismatch")
    return head


def checkpoint_seq(data: bytes) -> int:
    """The seq of a checkpoint file's bytes, checking the framing and the CRC of the whole
    payload but decoding only the ``"seq"`` at its start; raises :class:`StoreError`.

    For the fallback checkpoint, whose body recovery does not use: a checkpoint that passes
    this and yet does not decode would have been written by a broken encoder, not damaged.
    """
    data = bytes(data)
    head = _checked_frame(data)
    # the payload is the map {"seq": n, "body": ...} (fixmap of 2, fixstr "seq", then n as a
    # msgpack unsigned integer: positive fixint, or 0xcc..0xcf and 1, 2, 4, 8 big-endian bytes)
    key = b"\x82" + _SEQ_KEY
    seq = None
    if data[head:head + len(key)] == key:
        p = head + len(key)
        tag = data[p] if p < len(data) else None
        if tag is not None and tag < 0x80:
            seq = tag
        elif tag is not None and 0xCC <= tag <= 0xCF:
            width = 1 << (tag - 0xCC)
            if p + 1 + width <= len(data):
                seq = int.from_bytes(data[p + 1:p + 1 + width], "big")
    if type(seq) is not int or seq < 0:
        raise StoreError("checkpoint payload does not start with a non-negative 'seq'")
    return seq


def decode_checkpoint(data: bytes) -> tuple[int, dict]:
    """``(seq, body)`` of a checkpoint file's bytes; raises :class:`StoreError` if damaged."""
    data = bytes(data)
    head = _checked_frame(data)
    payload, length = data[head:], len(data) - head
    try:
        obj = wire.unpack(payload, max(length, 1))
    except wire.WireError as exc:
        raise StoreError(f"checkpoint payload does not decode: {exc}") from None
    if not isinstance(obj, dict) or set(obj) != {"seq", "body"}:
        raise StoreError("checkpoint payload is not a map of 'seq' and 'body'")
    seq, body = obj["seq"], obj["body"]
    if type(seq) is not int or seq < 0:
        raise StoreError(f"checkpoint seq must be a non-negative integer, got {seq!r:.60}")
    if not isinstance(body, dict):
        raise StoreError(f"checkpoint body must be a map, got {type(body).__name__}")
    return seq, body


@dataclass(frozen=True)
class SegmentScan:
    """What :func:`scan_segment` found in one segment's bytes.

    ``status`` is ``"ok"`` (every byte belongs to a good record), ``"torn"`` (a bad record with
    no good one after it) or ``"corrupt"`` (a bad record followed by a good one, or a good
    record with the wrong sequence number). ``good_bytes`` is the end of the last good record
    before the damage.
    """

    records: list
    good_bytes: int
    size: int
    status: str
    bad_offset: int | None
    reason: str | None


def _parse_at(data: bytes, pos: int):
    """``(record, end)`` of the record at ``pos``, or ``(None, reason)``."""
    n = len(data)
    if n - pos < _HEADER.size:
        return None, "incomplete record header"
    length, crc = _HEADER.unpack_from(data, pos)
    if length == 0 or length > MAX_RECORD_BYTES:
        return None, f"implausible record length {length}"
    end = pos + _HEADER.size + length
    if end > n:
        return None, f"incomplete payload ({n - pos - _HEADER.size} of {length} bytes)"
    payload = data[pos + _HEADER.size:end]
    if zlib.crc32(payload) != crc:
        return None, "CRC mismatch"
    try:
        obj = wire.unpack(payload, length)
    except wire.WireError as exc:
        return None, f"payload does not decode ({exc})"
    if not isinstance(obj, dict) or type(obj.get("seq")) is not int:
        return None, "payload is not a map with an integer 'seq'"
    return obj, end


def _good_record_after(data: bytes, start: int, min_seq: int) -> int | None:
    """Offset of the first good record at or after ``start`` with ``seq >= min_seq``."""
    # Candidates are found by the "seq" key every payload starts with, so the cost stays near
    # a byte search instead of one CRC per offset.
    q = data.find(_SEQ_KEY, start)
    while q != -1:
        for head_len, first_bytes in _MAP_HEADERS:
            p = q - head_len - _HEADER.size
            if p >= start and data[q - head_len] in first_bytes:
                rec, _ = _parse_at(data, p)
                if rec is not None and rec["seq"] >= min_seq:
                    return p
        q = data.find(_SEQ_KEY, q + 1)
    return None


def scan_segment(data: bytes, first_seq: int) -> SegmentScan:
    """Read the records of one segment whose first record should carry ``first_seq``.

    Never raises on any input; damage is described by the returned :class:`SegmentScan`.
    """
    data = bytes(data)
    n = len(data)
    pos, expected, records = 0, first_seq, []
    while pos < n:
        rec, end = _parse_at(data, pos)
        if rec is None:
            reason = end
            break
        if rec["seq"] != expected:
            # a well-formed record out of sequence is never a torn write
            return SegmentScan(records, pos, n, "corrupt", pos,
                               f"record has seq {rec['seq']}, expected {expected}")
        records.append(rec)
        pos = end
        expected += 1
    else:
        return SegmentScan(records, pos, n, "ok", None, None)
    later = _good_record_after(data, pos + 1, expected)
    if later is not None:
        return SegmentScan(records, pos, n, "corrupt", pos,
                           f"{reason}; a good record follows at byte {later}")
    return SegmentScan(records, pos, n, "torn", pos, reason)
