#!/usr/bin/env python3
"""Coverage-guided fuzzing (atheris) of the parsers that face the outside world.

Targets: ``wire`` (feed message decoder), ``control`` (control request decoder), ``config``
(TOML config loader), ``wal`` (write-ahead log segment reader), ``checkpoint`` (checkpoint
reader). Every input must decode or be rejected with the documented error; anything else is
a crash that atheris reports with the input that caused it.

    .venv/bin/pip install atheris
    .venv/bin/python tools/fuzz.py wire -- -max_total_time=60
"""

from __future__ import annotations

import sys

import atheris

with atheris.instrument_imports():
    from daemon.config import ConfigError, loads
    from daemon.runtime import store, wire

SPECS = {"c301": (("TI-104", "FI-201"), {"TI-104": 0, "FI-201": 1})}


_FIELDS = (b"t", b"x", b"y", b"id", b"seq", b"src", b"model")


def _bomb(fdp) -> bytes:
    """A map with one field whose value is nested ``depth`` arrays deep (msgpack fixarray
    of one element, 0x91) around fuzzed bytes, or a long flat array: depth and size bombs."""
    key = _FIELDS[fdp.ConsumeIntInRange(0, len(_FIELDS) - 1)]
    head = b"\x82\xa3cmd\xa6status" if fdp.ConsumeBool() else b"\x81"
    field = bytes([0xA0 | len(key)]) + key
    if fdp.ConsumeBool():
        value = b"\x91" * fdp.ConsumeIntInRange(0, 3000) + fdp.ConsumeBytes(16)
    else:
        n = fdp.ConsumeIntInRange(0, 70000)
        value = b"\xdd" + n.to_bytes(4, "big") + b"\x01" * n
    return head + field + value


def fuzz_wire(data: bytes) -> None:
    fdp = atheris.FuzzedDataProvider(data)
    if fdp.ConsumeBool():
        payload = _bomb(fdp)
    else:
        payload = fdp.ConsumeBytes(fdp.ConsumeIntInRange(0, 4096))
    frames = [b"c301", payload]
    if fdp.ConsumeBool():
        frames.append(fdp.ConsumeBytes(8))
    try:
        wire.decode_feed(frames, SPECS, 1 << 20)
    except wire.WireError as exc:
        assert len(str(exc)) < 400, "an error message must stay short"


def fuzz_control(data: bytes) -> None:
    fdp = atheris.FuzzedDataProvider(data)
    payload = _bomb(fdp) if fdp.ConsumeBool() else fdp.ConsumeBytes(4096)
    try:
        wire.decode_control(payload, 1 << 20)
    except wire.WireError as exc:
        assert len(str(exc)) < 400, "an error message must stay short"


def fuzz_config(data: bytes) -> None:
    text = data.decode("utf-8", "replace")
    try:
        cfg = loads(text, "fuzz.toml")
    except ConfigError:
        return
    for m in cfg.models:
        m.build_posterior()


def fuzz_wal(data: bytes) -> None:
    store.scan_segment(data, 1)


def fuzz_checkpoint(data: bytes) -> None:
    try:
        store.decode_checkpoint(data)
    except store.StoreError:
        pass


TARGETS = {"wire": fuzz_wire, "control": fuzz_control, "config": fuzz_config, "wal": fuzz_wal,
           "checkpoint": fuzz_checkpoint}


def main() -> None:
    if len(sys.argv) < 2 or sys.argv[1] not in TARGETS:
        sys.exit(f"usage: fuzz.py {{{','.join(TARGETS)}}} [-- libFuzzer options]")
    target = TARGETS[sys.argv[1]]
    args = [sys.argv[0]] + [a for a in sys.argv[2:] if a != "--"]
    atheris.Setup(args, target)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
