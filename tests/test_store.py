"""Tests of the state folder (daemon/runtime/store/): WAL, checkpoints, recovery, locking, faults.

References used: the CRC-32 (IEEE 802.3) check value from the CRC catalogue, Python's
``binascii.crc32`` and ``struct`` for an independent reading of the documented byte layouts,
and hand-assembled MessagePack bytes from the MessagePack format specification.
"""

import binascii
import errno
import os
import random
import shutil
import stat
import struct
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, rule

from daemon.runtime import wire
from daemon.runtime.store import (
    CHECKPOINT_MAGIC,
    CorruptionError,
    DurabilityError,
    LockedError,
    OsFs,
    StateDir,
    StoreError,
    decode_checkpoint,
    encode_checkpoint,
    encode_record,
    inspect,
    scan_segment,
)

ROOT = Path(__file__).resolve().parents[1]


# ------------------------------------------------------------------ helpers
def make_records(n, start=0):
    return [{"i": i, "x": [i * 0.25, -1.5 * i], "tag": f"r{i}", "b": bytes([i % 256])}
            for i in range(start, start + n)]


def plain(records):
    return [{k: v for k, v in r.items() if k != "seq"} for r in records]


def seqs(records):
    return [r["seq"] for r in records]


def opened(path, **kw):
    sd = StateDir(path, **kw)
    sd.open()
    return sd


def recover(path, policy="refuse", **kw):
    """Open, recover and close; returns the Recovery."""
    sd = opened(path, **kw)
    try:
        return sd.recover(policy)
    finally:
        sd.close()


def build(path, batches, **kw):
    """Write ``batches``: a list of ("append", n) / ("checkpoint", body); returns appended."""
    sd = opened(path, **kw)
    sd.recover()
    done = []
    for op, arg in batches:
        if op == "append":
            for r in make_records(arg, start=len(done)):
                sd.append(r)
                done.append(r)
        else:
            sd.checkpoint(arg)
    sd.close()
    return done


def segments(path):
    return sorted(p for p in Path(path).iterdir() if p.name.startswith("wal-")
                  and p.name.endswith(".log"))


def frame_spans(data):
    """(start, end) of each record, read with struct alone from the documented layout."""
    spans, pos = [], 0
    while pos + 8 <= len(data):
        (length,) = struct.unpack_from("<I", data, pos)
        end = pos + 8 + length
        if end > len(data):
            break
        spans.append((pos, end))
        pos = end
    return spans


# ------------------------------------------------------------------ formats against references
def test_crc32_is_the_standard_crc32():
    # CRC-32/ISO-HDLC check value for b"123456789" (CRC catalogue; from memory)
    assert binascii.crc32(b"123456789") == 0xCBF43926
    frame = encode_record(7, {"a": 1})
    length, crc = struct.unpack_from("<II", frame)
    assert crc == binascii.crc32(frame[8:]) and length == len(frame) - 8


def test_record_bytes_match_documented_layout(tmp_path):
    sd = opened(tmp_path / "s", fsync="always")
    sd.recover()
    assert sd.append({"a": 1}) == 1
    sd.close()
    data = (tmp_path / "s" / "wal-0000000000000001.log").read_bytes()
    # MessagePack format spec (from memory): fixmap of 2 = 0x82, fixstr "seq" = 0xa3 + bytes,
    # positive fixint 1 = 0x01, fixstr "a" = 0xa1 + byte
    payload = b"\x82\xa3seq\x01\xa1a\x01"
    assert data == struct.pack("<II", len(payload), binascii.crc32(payload)) + payload


def test_checkpoint_bytes_match_documented_layout(tmp_path):
    sd = opened(tmp_path / "s", fsync="always")
    sd.recover()
    sd.append({"a": 1})
    assert sd.checkpoint({"k": 2}) == 1
    sd.close()
    data = (tmp_path / "s" / "checkpoint-0000000000000001.ckpt").read_bytes()
    # MessagePack format spec (from memory): fixmap 2, "seq" -> 1, fixstr "body" (0xa4) -> fixmap
    # of 1 (0x81) {"k": 2}
    payload = b"\x82\xa3seq\x01\xa4body\x81\xa1k\x02"
    assert data == (b"PSDCKPT1" + struct.pack("<II", len(payload), binascii.crc32(payload))
                    + payload)
    assert CHECKPOINT_MAGIC == b"PSDCKPT1"
    assert decode_checkpoint(data) == (1, {"k": 2})


# ------------------------------------------------------------------ round trips
@pytest.mark.parametrize("mode", ["always", "group"])
def test_round_trip(tmp_path, mode):
    path = tmp_path / "s"
    sd = opened(path, fsync=mode, segment_bytes=400)
    rec = sd.recover()
    assert rec.checkpoint is None and rec.records == [] and not rec.torn_tail
    written = make_records(60)
    assert [sd.append(r) for r in written] == list(range(1, 61))
    sd.close()
    assert len(segments(path)) > 3  # rolled by size
    rec = recover(path)
    assert plain(rec.records) == written
    assert seqs(rec.records) == list(range(1, 61))
    assert rec.checkpoint is None and rec.checkpoint_seq == 0
    assert not rec.torn_tail and rec.truncated_bytes == 0 and rec.corrupt_segments == ()


def test_checkpoint_then_more_records(tmp_path):
    path = tmp_path / "s"
    sd = opened(path)
    sd.recover()
    for r in make_records(10):
        sd.append(r)
    body = {"posterior": {"schema": 1, "R": [[1.0, 2.0], [0.0, 3.0]], "z": [0.5, -0.5]}}
    assert sd.checkpoint(body) == 10
    later = make_records(5, start=10)
    assert [sd.append(r) for r in later] == [11, 12, 13, 14, 15]
    sd.close()
    rec = recover(path)
    assert rec.checkpoint == body and rec.checkpoint_seq == 10
    assert plain(rec.records) == later and seqs(rec.records) == [11, 12, 13, 14, 15]
    # a checkpoint rolls the WAL: the later records start a segment of their own
    assert [p.name for p in segments(path)][-1] == "wal-0000000000000011.log"


def test_sequence_continues_across_reopen(tmp_path):
    path = tmp_path / "s"
    expect = []
    for _ in range(3):
        sd = opened(path)
        rec = sd.recover()
        assert plain(rec.records) == expect
        for r in make_records(4, start=len(expect)):
            assert sd.append(r) == len(expect) + 1
            expect.append(r)
        sd.close()
    assert seqs(recover(path).records) == list(range(1, 13))


# ------------------------------------------------------------------ torn tail
def test_torn_tail_every_offset(tmp_path):
    src = tmp_path / "src"
    written = build(src, [("append", 4), ("checkpoint", {"c": 1}), ("append", 5)],
                    fsync="always")
    last = segments(src)[-1]
    data = last.read_bytes()
    spans = frame_spans(data)
    assert len(spans) == 5 and spans[-1][1] == len(data)
    boundaries = {0} | {end for _, end in spans}
    after_ckpt = written[4:]
    for cut in range(spans[-2][0], len(data) + 1):
        work = tmp_path / f"cut{cut}"
        shutil.copytree(src, work)
        (work / last.name).write_bytes(data[:cut])
        complete = [i for i, (_, end) in enumerate(spans) if end <= cut]
        good_end = max(end for end in boundaries if end <= cut)
        rec = recover(work)
        assert rec.checkpoint == {"c": 1}
        assert plain(rec.records) == after_ckpt[:len(complete)]
        assert rec.torn_tail == (cut not in boundaries)
        assert rec.truncated_bytes == cut - good_end
        assert (work / last.name).stat().st_size == good_end
        # a later append recovers cleanly
        sd = opened(work, fsync="always")
        sd.recover()
        assert sd.append({"after": cut}) == 5 + len(complete)
        sd.close()
        rec2 = recover(work)
        assert not rec2.torn_tail and rec2.corrupt_segments == ()
        assert plain(rec2.records) == after_ckpt[:len(complete)] + [{"after": cut}]
        shutil.rmtree(work)


def test_partial_header_in_last_segment_is_torn(tmp_path):
    path = tmp_path / "s"
    build(path, [("append", 3)])
    seg = segments(path)[-1]
    with open(seg, "ab") as f:
        f.write(b"\x05\x00\x00")  # 3 bytes of a length prefix
    rec = recover(path)
    assert rec.torn_tail and rec.truncated_bytes == 3 and len(rec.records) == 3


# ------------------------------------------------------------------ bit flips
def flip_bits(data, start, end, rng, k):
    buf = bytearray(data)
    for bit in rng.sample(range(start * 8, end * 8), k):
        buf[bit // 8] ^= 1 << (bit % 8)
    return bytes(buf)


@pytest.mark.parametrize("seed", range(8))
def test_bit_flips_in_middle_record(tmp_path, seed):
    rng = random.Random(seed)
    src = tmp_path / "src"
    written = build(src, [("append", 5), ("checkpoint", {"c": 5}), ("append", 6)])
    seg = segments(src)[-1]
    data = seg.read_bytes()
    spans = frame_spans(data)
    which = rng.randrange(0, len(spans) - 1)  # never the last record
    start, end = spans[which]
    bad = flip_bits(data, start, end, rng, rng.randint(1, 3))
    for policy in ("refuse", "checkpoint"):
        work = tmp_path / policy
        shutil.copytree(src, work)
        (work / seg.name).write_bytes(bad)
        if policy == "refuse":
            with pytest.raises(CorruptionError) as ei:
                recover(work, "refuse")
            assert ei.value.segment == seg.name and ei.value.offset == start
            assert not (work / seg.name).exists()
            assert (work / f"{seg.name}.corrupt-1").read_bytes() == bad
            # a restart with "refuse" keeps refusing instead of running on without the records
            with pytest.raises(CorruptionError) as again:
                recover(work, "refuse")
            assert again.value.offset is None and again.value.moved_to == f"{seg.name}.corrupt-1"
        rec = recover(work, "checkpoint")
        assert rec.checkpoint == {"c": 5} and rec.checkpoint_seq == 5
        assert rec.records == [] and rec.dropped_after_seq == 5
        assert rec.corrupt_segments == (f"{seg.name}.corrupt-1.accepted",)
        assert any("dropped" in n or "accepted" in n for n in rec.notes)
        assert not rec.torn_tail
        # the loss is accepted: the folder works again and "refuse" is satisfied
        sd = opened(work)
        sd.recover()
        assert sd.append({"new": 1}) == 6
        sd.close()
        rec = recover(work, "refuse")
        assert plain(rec.records) == [{"new": 1}] and rec.corrupt_segments == ()
    assert len(written) == 11


def test_corrupt_segment_keeps_earlier_segments_and_drops_later(tmp_path):
    path = tmp_path / "s"
    written = build(path, [("append", 2), ("checkpoint", {"c": 2}), ("append", 12)],
                    segment_bytes=120)
    segs = segments(path)
    assert len(segs) >= 4  # one before the checkpoint, several after it
    victim = segs[2]
    data = victim.read_bytes()
    spans = frame_spans(data)
    assert len(spans) >= 2
    victim.write_bytes(flip_bits(data, *spans[0], random.Random(3), 1))
    first_victim = int(victim.name[4:20])
    rec = recover(path, "checkpoint")
    assert rec.checkpoint == {"c": 2}
    assert seqs(rec.records) == list(range(3, first_victim))
    assert plain(rec.records) == written[2:first_victim - 1]
    assert rec.dropped_after_seq == first_victim - 1
    left = sorted(p.name for p in Path(path).iterdir())
    assert f"{victim.name}.corrupt-1.accepted" in left
    assert all(f"{p.name}.dropped-{i}" in left for i, p in enumerate(segs[3:], start=2))
    assert [p.name for p in segments(path)] == [p.name for p in segs[:2]]


@pytest.mark.parametrize("seed", range(4))
def test_bit_flip_in_last_record_is_torn_tail(tmp_path, seed):
    rng = random.Random(100 + seed)
    path = tmp_path / "s"
    written = build(path, [("append", 6)])
    seg = segments(path)[-1]
    data = seg.read_bytes()
    start, end = frame_spans(data)[-1]
    seg.write_bytes(flip_bits(data, start, end, rng, rng.randint(1, 3)))
    rec = recover(path, "refuse")
    assert rec.torn_tail and rec.truncated_bytes == end - start
    assert plain(rec.records) == written[:-1]
    assert seg.stat().st_size == start


# ------------------------------------------------------------------ checkpoints and retention
def ckpt_path(path, seq):
    return Path(path) / f"checkpoint-{seq:016d}.ckpt"


def three_checkpoints(path):
    return build(path, [("append", 5), ("checkpoint", {"n": 5}), ("append", 5),
                        ("checkpoint", {"n": 10}), ("append", 5), ("checkpoint", {"n": 15}),
                        ("append", 2)])


def test_retention_keeps_two_checkpoints_and_the_wal_of_the_previous(tmp_path):
    path = tmp_path / "s"
    three_checkpoints(path)
    names = sorted(p.name for p in Path(path).iterdir())
    assert [n for n in names if n.endswith(".ckpt")] == [ckpt_path(path, 10).name,
                                                         ckpt_path(path, 15).name]
    # records 11.. are needed if checkpoint 15 were unreadable; 1..10 are covered by 10
    assert [p.name for p in segments(path)] == ["wal-0000000000000011.log",
                                                "wal-0000000000000016.log"]


@pytest.mark.parametrize("damage", ["delete", "corrupt", "truncate"])
def test_newest_checkpoint_damaged_falls_back(tmp_path, damage):
    path = tmp_path / "s"
    written = three_checkpoints(path)
    newest = ckpt_path(path, 15)
    if damage == "delete":
        newest.unlink()
    elif damage == "corrupt":
        raw = bytearray(newest.read_bytes())
        raw[-1] ^= 0x10
        newest.write_bytes(bytes(raw))
    else:
        newest.write_bytes(newest.read_bytes()[:-3])
    rec = recover(path)
    # a deleted file leaves nothing to detect; the previous one is simply the newest now
    assert rec.fallback_checkpoint == (damage != "delete")
    assert rec.checkpoint == {"n": 10} and rec.checkpoint_seq == 10
    assert plain(rec.records) == written[10:] and seqs(rec.records) == list(range(11, 18))
    if damage != "delete":
        assert (Path(path) / f"{newest.name}.corrupt-1").exists()
    # the next checkpoint treats 10 as the previous one and leaves the WAL it needs
    sd = opened(path)
    sd.recover()
    assert sd.checkpoint({"n": 17}) == 17
    sd.close()
    ckpts = sorted(p.name for p in Path(path).glob("*.ckpt"))
    assert ckpts == [ckpt_path(path, 10).name, ckpt_path(path, 17).name]
    ckpt_path(path, 17).unlink()
    rec = recover(path)
    assert rec.checkpoint == {"n": 10} and seqs(rec.records) == list(range(11, 18))


def test_all_checkpoints_lost_with_pruned_wal_is_refused(tmp_path):
    path = tmp_path / "s"
    three_checkpoints(path)
    for p in Path(path).glob("*.ckpt"):
        p.unlink()
    with pytest.raises(CorruptionError, match="records 1..10 are missing") as ei:
        recover(path)
    assert ei.value.segment == "wal-0000000000000011.log" and ei.value.offset == 0


def test_single_checkpoint_keeps_whole_wal(tmp_path):
    path = tmp_path / "s"
    written = build(path, [("append", 5), ("checkpoint", {"n": 5}), ("append", 3)])
    assert len(segments(path)) == 2
    ckpt_path(path, 5).write_bytes(b"not a checkpoint")
    rec = recover(path)
    assert rec.checkpoint is None and rec.fallback_checkpoint
    assert plain(rec.records) == written


def test_repeated_checkpoint_same_seq_keeps_previous_fallback(tmp_path):
    path = tmp_path / "s"
    written = build(path, [("append", 5), ("checkpoint", {"v": "a"}), ("append", 5),
                           ("checkpoint", {"v": "b"}), ("checkpoint", {"v": "b2"})])
    rec = recover(path)
    assert rec.checkpoint == {"v": "b2"} and rec.checkpoint_seq == 10 and rec.records == []
    sd = opened(path)
    sd.recover()
    sd.checkpoint({"v": "b3"})  # after a reopen, 5 must still be known as the fallback
    sd.close()
    assert sorted(p.name for p in Path(path).glob("*.ckpt")) == [ckpt_path(path, 5).name,
                                                                 ckpt_path(path, 10).name]
    ckpt_path(path, 10).write_bytes(b"PSDCKPT1 garbage")
    rec = recover(path)
    assert rec.checkpoint == {"v": "a"} and plain(rec.records) == written[5:]


def test_unfinished_checkpoint_file_is_removed(tmp_path):
    path = tmp_path / "s"
    build(path, [("append", 2)])
    tmp = Path(path) / "checkpoint-0000000000000002.ckpt.tmp"
    tmp.write_bytes(b"PSDCKPT1\x00")
    assert inspect(path)["temporary"] == [tmp.name]
    rec = recover(path)
    assert not tmp.exists() and any(tmp.name in n for n in rec.notes)
    assert len(rec.records) == 2


def test_gap_between_segments_is_corruption(tmp_path):
    path = tmp_path / "s"
    build(path, [("append", 9)], segment_bytes=120)
    segs = segments(path)
    assert len(segs) >= 3
    segs[1].unlink()
    with pytest.raises(CorruptionError, match="missing") as ei:
        recover(path)
    assert ei.value.segment == segs[2].name and ei.value.offset == 0


# ------------------------------------------------------------------ locking
def _child_env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def test_second_open_in_same_process_is_locked(tmp_path):
    path = tmp_path / "s"
    first = opened(path)
    with pytest.raises(LockedError) as ei:
        StateDir(path).open()
    assert ei.value.holder_pid == os.getpid() and ei.value.path == str(path)
    assert str(os.getpid()) in str(ei.value)
    first.close()
    first.close()  # idempotent
    opened(path).close()


def test_open_from_another_process_is_locked(tmp_path):
    path = tmp_path / "s"
    holder = opened(path)
    code = ("import sys\nfrom daemon.runtime.store import StateDir, LockedError\n"
            "try:\n    StateDir(sys.argv[1]).open()\n    print('opened')\n"
            "except LockedError as e:\n    print('locked', e.holder_pid)\n")
    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                         text=True, cwd=ROOT, env=_child_env(), timeout=60, check=True)
    assert out.stdout.split() == ["locked", str(os.getpid())]
    holder.close()


def test_lock_held_by_another_process(tmp_path):
    path = tmp_path / "s"
    code = ("import sys\nfrom daemon.runtime.store import StateDir\nsd = StateDir(sys.argv[1])\n"
            "sd.open()\nsd.recover()\nsd.append({'from': 'child'})\nprint('ready', flush=True)\n"
            "sys.stdin.readline()\nsd.close()\n")
    proc = subprocess.Popen([sys.executable, "-c", code, str(path)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, cwd=ROOT, env=_child_env())
    try:
        assert proc.stdout.readline().strip() == "ready"
        with pytest.raises(LockedError) as ei:
            StateDir(path).open()
        assert ei.value.holder_pid == proc.pid
        info = inspect(path)
        assert info["lock"]["pid_in_file"] == proc.pid
        if info["lock"]["held"] is not None:  # /proc/locks readable
            assert info["lock"]["held"] and info["lock"]["pid"] == proc.pid
    finally:
        proc.stdin.write("\n")
        proc.stdin.flush()
        proc.wait(timeout=60)
    assert proc.returncode == 0
    assert inspect(path)["lock"]["held"] in (False, None)
    rec = recover(path)
    assert plain(rec.records) == [{"from": "child"}]


# ------------------------------------------------------------------ faults
class FaultFs(OsFs):
    """Real calls, with write and fsync failures armed by the test."""

    def __init__(self):
        self.writes = 0
        self.fsyncs = 0
        self.write_errno = None
        self.short_write = False  # write half of the data once before failing
        self.fsync_errno = None

    def write(self, fd, data):
        self.writes += 1
        if self.write_errno is not None:
            if self.short_write:
                self.short_write = False
                return os.write(fd, bytes(data[:len(data) // 2]))
            raise OSError(self.write_errno, os.strerror(self.write_errno))
        return os.write(fd, data)

    def fsync(self, fd):
        self.fsyncs += 1
        if self.fsync_errno is not None:
            raise OSError(self.fsync_errno, os.strerror(self.fsync_errno))
        os.fsync(fd)


def test_enospc_on_write_stops_the_folder(tmp_path):
    path = tmp_path / "s"
    fs = FaultFs()
    sd = opened(path, fs=fs, fsync="always")
    sd.recover()
    written = make_records(3)
    for r in written:
        sd.append(r)
    fs.write_errno, fs.short_write = errno.ENOSPC, True
    with pytest.raises(DurabilityError, match="No space left") as ei:
        sd.append({"lost": 1})
    assert isinstance(ei.value.__cause__, OSError) and ei.value.__cause__.errno == errno.ENOSPC
    assert sd.failed is not None
    fs.write_errno = None  # space is back, but the folder must not carry on
    writes = fs.writes
    with pytest.raises(DurabilityError, match="refuses"):
        sd.append({"lost": 2})
    with pytest.raises(DurabilityError):
        sd.checkpoint({"c": 1})
    with pytest.raises(DurabilityError):
        sd.sync()
    assert fs.writes == writes
    sd.close()
    rec = recover(path)
    assert rec.torn_tail and plain(rec.records) == written  # the short write is a torn tail


def test_eio_on_fsync_always(tmp_path):
    path = tmp_path / "s"
    fs = FaultFs()
    sd = opened(path, fs=fs, fsync="always")
    sd.recover()
    sd.append({"a": 1})
    fs.fsync_errno = errno.EIO
    with pytest.raises(DurabilityError, match="fsync of the WAL") as ei:
        sd.append({"a": 2})
    assert ei.value.__cause__.errno == errno.EIO
    fs.fsync_errno = None
    with pytest.raises(DurabilityError):
        sd.append({"a": 3})
    sd.close()
    assert plain(recover(path).records)[0] == {"a": 1}


def test_eio_on_group_fsync(tmp_path):
    path = tmp_path / "s"
    fs = FaultFs()
    sd = opened(path, fs=fs, fsync="group", group_ms=50)
    sd.recover()
    sd.append({"a": 1})
    fs.fsync_errno = errno.EIO
    with pytest.raises(DurabilityError):
        sd.maybe_sync(10.0)
    with pytest.raises(DurabilityError):
        sd.append({"a": 2})
    sd.close()  # no further fsync attempt, lock released
    opened(path).close()


@pytest.mark.parametrize("fault", ["write", "fsync"])
def test_failed_checkpoint_keeps_previous(tmp_path, fault):
    path = tmp_path / "s"
    fs = FaultFs()
    sd = opened(path, fs=fs, fsync="always")
    sd.recover()
    sd.append({"a": 1})
    sd.checkpoint({"good": 1})
    sd.append({"a": 2})
    if fault == "write":
        fs.write_errno = errno.ENOSPC
    else:
        fs.fsync_errno = errno.EIO
    with pytest.raises(DurabilityError, match="checkpoint"):
        sd.checkpoint({"never": 1})
    fs.write_errno = fs.fsync_errno = None
    with pytest.raises(DurabilityError):
        sd.append({"a": 3})
    sd.close()
    assert not list(Path(path).glob("*.tmp"))
    rec = recover(path)
    assert rec.checkpoint == {"good": 1} and plain(rec.records) == [{"a": 2}]


# ------------------------------------------------------------------ group commit logic
def test_group_sync_rate(tmp_path):
    fs = FaultFs()
    sd = opened(tmp_path / "s", fs=fs, fsync="group", group_ms=50)
    sd.recover()
    assert not sd.flush_due(0.0) and not sd.maybe_sync(0.0)  # nothing pending
    sd.append({"a": 1})
    sd.append({"a": 2})
    assert sd.pending == 2
    before = fs.fsyncs
    assert sd.maybe_sync(100.0) and sd.pending == 0 and fs.fsyncs == before + 1
    sd.append({"a": 3})
    assert not sd.flush_due(100.049) and not sd.maybe_sync(100.049) and sd.pending == 1
    assert sd.flush_due(100.051) and sd.maybe_sync(100.051) and sd.pending == 0
    sd.append({"a": 4})
    sd.sync()
    assert sd.pending == 0
    sd.close()


def test_always_mode_has_nothing_pending(tmp_path):
    sd = opened(tmp_path / "s", fsync="always")
    sd.recover()
    sd.append({"a": 1})
    assert sd.pending == 0 and not sd.maybe_sync(1e9)
    sd.close()


# ------------------------------------------------------------------ permissions and arguments
def test_new_folder_is_created_0700(tmp_path):
    path = tmp_path / "deep" / "s"
    sd = StateDir(path)
    notes = sd.open()
    assert any("created" in n for n in notes)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o700
    assert stat.S_IMODE(os.stat(path / "LOCK").st_mode) == 0o600
    sd.close()


def test_modes_of_folder_and_files(tmp_path):
    path = tmp_path / "s"
    build(path, [("append", 3), ("checkpoint", {"c": 1}), ("append", 1)])
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o700
    files = list(Path(path).iterdir())
    assert {p.name for p in files} >= {"LOCK", "checkpoint-0000000000000003.ckpt",
                                       "wal-0000000000000001.log", "wal-0000000000000004.log"}
    for p in files:
        assert stat.S_IMODE(p.stat().st_mode) == 0o600, p.name
    assert inspect(path)["mode"] == "0700"


def test_group_writable_folder_is_refused(tmp_path):
    path = tmp_path / "s"
    path.mkdir()
    path.chmod(0o770)
    with pytest.raises(StoreError, match="0770"):
        StateDir(path).open()
    path.chmod(0o750)
    sd = StateDir(path)
    notes = sd.open()
    assert any("0750" in n for n in notes)
    sd.close()


def test_bad_arguments(tmp_path):
    with pytest.raises(ValueError, match="'sometimes'"):
        StateDir(tmp_path, fsync="sometimes")
    with pytest.raises(ValueError, match="-1"):
        StateDir(tmp_path, group_ms=-1)
    with pytest.raises(ValueError, match="0"):
        StateDir(tmp_path, segment_bytes=0)
    sd = opened(tmp_path / "s")
    with pytest.raises(StoreError, match="recover"):
        sd.append({"a": 1})
    with pytest.raises(ValueError, match="'never'"):
        sd.recover("never")
    sd.recover()
    with pytest.raises(ValueError, match="list"):
        sd.append([1, 2])
    with pytest.raises(ValueError, match="'seq'"):
        sd.append({"seq": 3})
    with pytest.raises(ValueError, match="object"):
        sd.append({"x": object()})
    with pytest.raises(ValueError, match="str"):
        sd.checkpoint("body")
    assert sd.append({"ok": True}) == 1  # bad arguments do not stop the folder
    sd.close()
    with pytest.raises(StoreError, match="not open"):
        sd.append({"a": 1})


def test_path_that_is_a_file(tmp_path):
    f = tmp_path / "file"
    f.write_text("x")
    with pytest.raises(StoreError, match="not a directory"):
        StateDir(f).open()
    with pytest.raises(ValueError, match="not a directory"):
        inspect(f)


# ------------------------------------------------------------------ inspect
def snapshot(path):
    return sorted((p.name, p.stat().st_size, p.stat().st_mtime_ns) for p in Path(path).iterdir())


def test_inspect_describes_and_changes_nothing(tmp_path):
    path = tmp_path / "s"
    build(path, [("append", 4), ("checkpoint", {"c": 4}), ("append", 6)], segment_bytes=150)
    segs = segments(path)
    # a torn tail in the last segment and a corrupt middle record in the one before it
    with open(segs[-1], "ab") as f:
        f.write(b"\x40\x00\x00\x00\x00")
    data = segs[-2].read_bytes()
    spans = frame_spans(data)
    assert len(spans) >= 2
    segs[-2].write_bytes(flip_bits(data, *spans[0], random.Random(1), 1))
    (Path(path) / "notes.txt").write_text("operator")
    before = snapshot(path)
    info = inspect(path)
    assert snapshot(path) == before
    assert info["exists"] and info["lock"]["held"] in (False, None)
    assert info["checkpoints"] == [{"file": "checkpoint-0000000000000004.ckpt", "seq": 4,
                                    "bytes": ckpt_path(path, 4).stat().st_size, "valid": True,
                                    "error": None}]
    assert info["newest_valid_checkpoint"] == 4
    by_name = {s["file"]: s for s in info["segments"]}
    assert by_name[segs[-1].name]["status"] == "torn"
    assert by_name[segs[-1].name]["bytes"] - by_name[segs[-1].name]["good_bytes"] == 5
    assert by_name[segs[-2].name]["status"] == "corrupt"
    assert by_name[segs[-2].name]["bad_offset"] == 0
    assert by_name[segs[0].name]["status"] == "ok"
    assert by_name[segs[0].name]["records"] == len(frame_spans(segs[0].read_bytes()))
    assert info["other"] == ["notes.txt"]
    with pytest.raises(CorruptionError):
        recover(path)
    info = inspect(path)
    assert info["moved_aside"] == [{"file": f"{segs[-2].name}.corrupt-1",
                                    "bytes": len(data), "pending": True}]
    assert inspect(tmp_path / "absent")["exists"] is False


# ------------------------------------------------------------------ hypothesis: model check
plain_leaf = (st.none() | st.booleans() | st.integers(-2**63, 2**64 - 1)
              | st.floats(allow_nan=False) | st.text(max_size=6) | st.binary(max_size=6))
plain_value = st.recursive(plain_leaf, lambda c: st.lists(c, max_size=3)
                           | st.dictionaries(st.text(max_size=3), c, max_size=3), max_leaves=5)
record_st = st.dictionaries(st.text(max_size=4).filter(lambda k: k != "seq"), plain_value,
                            max_size=4)
body_st = st.dictionaries(st.text(max_size=4), plain_value, max_size=3)


class CrashFs(OsFs):
    """Real calls; while ``dead`` every write and fsync fails, as for a machine losing power."""

    dead = False

    def write(self, fd, data):
        if self.dead:
            raise OSError(errno.EIO, "power lost")
        return os.write(fd, data)

    def fsync(self, fd):
        if self.dead:
            raise OSError(errno.EIO, "power lost")
        os.fsync(fd)


class StoreModel(RuleBasedStateMachine):
    """Random appends, checkpoints, syncs, clean reopens and power losses against a model."""

    mode = "group"

    def __init__(self):
        super().__init__()
        self.tmp = tempfile.mkdtemp(prefix="store-model-")
        self.path = os.path.join(self.tmp, "state")
        self.fs = CrashFs()
        self.history: list = []  # record of seq n at index n - 1
        self.ckpt, self.ckpt_seq = None, 0
        self.clock = 0.0
        self.sd = None
        self.reopen(torn=False)

    def reopen(self, torn):
        self.sd = StateDir(self.path, fsync=self.mode, group_ms=20, segment_bytes=160,
                           fs=self.fs)
        self.sd.open()
        rec = self.sd.recover("refuse")
        assert rec.checkpoint == self.ckpt and rec.checkpoint_seq == self.ckpt_seq
        assert plain(rec.records) == self.history[self.ckpt_seq:]
        assert seqs(rec.records) == list(range(self.ckpt_seq + 1, len(self.history) + 1))
        assert rec.torn_tail == torn and rec.corrupt_segments == ()
        assert not rec.fallback_checkpoint

    @rule(record=record_st)
    def append(self, record):
        assert self.sd.append(record) == len(self.history) + 1
        self.history.append(record)

    @rule(body=body_st)
    def checkpoint(self, body):
        assert self.sd.checkpoint(body) == len(self.history)
        self.ckpt, self.ckpt_seq = body, len(self.history)
        assert self.sd.pending == 0

    @rule(dt=st.floats(0.0, 0.05))
    def tick(self, dt):
        self.clock += dt
        if self.sd.maybe_sync(self.clock):
            assert self.sd.pending == 0

    @rule()
    def clean_reopen(self):
        self.sd.close()
        self.reopen(torn=False)

    @rule(frac=st.floats(0.0, 1.0))
    def power_loss(self, frac):
        n, pending = len(self.history), self.sd.pending
        # sizes of the records not yet fsynced, from the documented frame layout
        sizes = [8 + len(wire.pack({"seq": s, **self.history[s - 1]}))
                 for s in range(n - pending + 1, n + 1)]
        self.fs.dead = True
        try:
            self.sd.close()
            assert pending == 0
        except DurabilityError:
            assert pending > 0
        self.fs.dead = False
        torn = False
        if pending:
            seg = segments(self.path)[-1]
            size = seg.stat().st_size
            durable = size - sum(sizes)
            assert durable >= 0
            cut = durable + round(frac * sum(sizes))
            os.truncate(seg, cut)  # the unsynced tail reached the disk only up to here
            ends = [durable + sum(sizes[:k + 1]) for k in range(len(sizes))]
            survivors = sum(1 for e in ends if e <= cut)
            torn = cut not in [durable] + ends
            del self.history[n - pending + survivors:]
        self.reopen(torn=torn)

    @invariant()
    def pending_counts_unsynced_records(self):
        assert 0 <= self.sd.pending <= len(self.history) - self.ckpt_seq

    def teardown(self):
        self.fs.dead = False
        if self.sd is not None:
            self.sd.close()
        shutil.rmtree(self.tmp, ignore_errors=True)


class StoreModelAlways(StoreModel):
    mode = "always"


_model_settings = settings(max_examples=30, stateful_step_count=30, deadline=None,
                           derandomize=True, suppress_health_check=[HealthCheck.too_slow])
StoreModel.TestCase.settings = _model_settings
StoreModelAlways.TestCase.settings = settings(_model_settings, max_examples=10)
TestStoreModel = StoreModel.TestCase
TestStoreModelAlways = StoreModelAlways.TestCase


# ------------------------------------------------------------------ hypothesis: reader fuzz
def frames_of(records, first):
    return b"".join(encode_record(first + i, r) for i, r in enumerate(records))


@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.binary(max_size=400), st.integers(0, 2**40))
def test_fuzz_scan_random_bytes(data, first):
    scan = scan_segment(data, first)
    assert scan.status in ("ok", "torn", "corrupt")
    assert 0 <= scan.good_bytes <= scan.size == len(data)
    assert seqs(scan.records) == list(range(first, first + len(scan.records)))
    assert (scan.status == "ok") == (scan.good_bytes == len(data))


@settings(max_examples=200, deadline=None, derandomize=True)
@given(st.lists(record_st, min_size=1, max_size=6), st.integers(1, 1000),
       st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)), min_size=1, max_size=4))
def test_fuzz_scan_mutated_segment(records, first, edits):
    data = bytearray(frames_of(records, first))
    spans = frame_spans(bytes(data))
    lowest = len(data)
    for pos, value in edits:
        pos %= len(data)
        lowest = min(lowest, pos)
        data[pos] = value
    scan = scan_segment(bytes(data), first)
    intact = sum(1 for _, end in spans if end <= lowest)
    assert len(scan.records) >= intact
    # every record returned is one that was written (the CRC guards the rest)
    assert plain(scan.records) == records[:len(scan.records)]
    assert scan.status in ("ok", "torn", "corrupt")


@settings(max_examples=100, deadline=None, derandomize=True)
@given(st.lists(record_st, min_size=1, max_size=5), st.data())
def test_fuzz_scan_truncated_segment(records, data):
    raw = frames_of(records, 1)
    ends = [end for _, end in frame_spans(raw)]
    cut = data.draw(st.integers(0, len(raw)))
    scan = scan_segment(raw[:cut], 1)
    complete = sum(1 for e in ends if e <= cut)
    assert plain(scan.records) == records[:complete]
    assert scan.status == ("ok" if cut in [0] + ends else "torn")


@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.binary(max_size=200))
def test_fuzz_checkpoint_random_bytes(data):
    for candidate in (data, CHECKPOINT_MAGIC + data):
        try:
            seq, body = decode_checkpoint(candidate)
        except StoreError:
            continue
        assert isinstance(seq, int) and seq >= 0 and isinstance(body, dict)


@settings(max_examples=200, deadline=None, derandomize=True)
@given(body_st, st.integers(0, 2**40), st.integers(0, 10**6), st.integers(1, 255),
       st.integers(0, 10**6))
def test_fuzz_checkpoint_mutated(body, seq, pos, xor, cut):
    good = encode_checkpoint(seq, body)
    assert decode_checkpoint(good) == (seq, body)
    bad = bytearray(good)
    bad[pos % len(bad)] ^= xor
    for candidate in (bytes(bad), good[:cut % len(good)]):
        with pytest.raises(StoreError):
            decode_checkpoint(candidate)


@settings(max_examples=60, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(max_size=300), st.sampled_from(["refuse", "checkpoint"]))
def test_fuzz_recover_random_segment(tmp_path, junk, policy):
    work = Path(tempfile.mkdtemp(dir=tmp_path))
    path = work / "s"
    build(path, [("append", 2)])
    with open(segments(path)[-1], "ab") as f:
        f.write(junk)
    try:
        rec = recover(path, policy)
    except CorruptionError:
        assert policy == "refuse"
    else:
        if rec.corrupt_segments:
            assert policy == "checkpoint" and rec.records == [] and rec.dropped_after_seq == 0
        else:
            assert plain(rec.records[:2]) == make_records(2)
    shutil.rmtree(work)
