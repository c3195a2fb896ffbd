"""Checkpoints written off the loop (a forked child) and checkpoints by WAL size; fast replay.

A background checkpoint is a ``fork()`` of the service at one WAL position (see
:meth:`daemon.runtime.store.StateDir.begin_checkpoint`). The checks: a daemon process killed
with SIGKILL while its child is writing, or after a background checkpoint became durable,
recovers to the state of an uninterrupted run, bit for bit (equal msgpack bytes of the
plain-data state, as in ``test_durability``); the child dies with the daemon (Linux
``prctl(PR_SET_PDEATHSIG)``, checked with ``os.kill(pid, 0)``); a failed write in the child
stops the folder as a failed write on the loop does; the WAL-size trigger fires once the
log holds that many bytes (counted from the record framing of the format description, read
back with ``struct``), not before; and the replay that skips rewind snapshots gives the same
bytes as the per-record replay that takes every one.
"""

from __future__ import annotations

import os
import signal
import struct
import subprocess
import sys
from pathlib import Path

import msgpack
import numpy as np
import pytest
from conftest import TIMEOUT, blas_env, wait_until
from test_durability import (
    LAB_DRIVEN,
    A,
    B,
    NoSyncFs,
    bench,
    config_text,
    crash_copy,
    frames,
    kill_stream,
    learned_state,
    model_a,
    model_b,
    reference_run,
    resume_index,
    shuffled_labs,
)

from daemon.config import loads
from daemon.runtime.service import Service, _ReplayTerms, _snapshots_needed
from daemon.runtime.store import DurabilityError, OsFs, StateDir
from daemon.workbench import plant

ROOT = Path(__file__).resolve().parent.parent

# The daemon process of the kill tests: a Service on a state folder (real files, real fsyncs)
# fed the recorded stream from a file; it starts one background checkpoint after message
# `at`, whose child sleeps in its fsync when `slow`, then feeds up to `stop` and reports.
DAEMON = r"""
import os, sys, time, msgpack
sys.path.insert(0, sys.argv[1])
from daemon.config import loads
from daemon.runtime.service import Service
from daemon.runtime.store import OsFs

class SlowFs(OsFs):
    def fsync(self, fd):
        if os.getpid() != PARENT:  # only the checkpoint's child sleeps
            time.sleep(600)
        os.fsync(fd)

class Null:
    def send_multipart(self, parts): pass
    def close(self, linger=None): pass

PARENT = os.getpid()
text, msgs_path, at, stop = sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5])
slow = sys.argv[6] == "1"
if len(sys.argv) > 7:  # the service's kind of handler: it only queues, the loop decides
    import signal
    signal.signal(signal.SIGTERM, lambda *_: None)
msgs = msgpack.unpackb(open(msgs_path, "rb").read())
svc = Service(loads(open(text).read(), "<kill>"), fs=SlowFs() if slow else None)
svc.open_state()
svc.pub = Null()
if svc.store.checkpoint_running:
    svc._checkpoint_polled(svc.store.wait_checkpoint())
for i in range(0, at, 64):
    svc.process(msgs[i:min(i + 64, at)])
svc.store.sync()
svc._dirty, svc._last_checkpoint = True, -1e9
svc._housekeeping()
child = svc.store._bg.pid
if not slow:
    while svc.store.checkpoint_running:
        time.sleep(0.01)
        svc._housekeeping()
for i in range(at, stop, 64):
    svc.process(msgs[i:min(i + 64, stop)])
svc.store.sync()
print(child, svc.checkpoint_seq, svc.wal_records, flush=True)
time.sleep(600)
"""


def _kill_during_or_after(tmp_path: Path, slow: bool) -> None:
    msgs = shuffled_labs(kill_stream()[0], seed=31, size=3)
    frames = [m[3] for m in msgs]
    ref = reference_run(tmp_path, msgs)
    state = tmp_path / "state"
    cfg = tmp_path / "kill.toml"
    cfg.write_text(config_text(state, [model_a(), model_b()], checkpoint_every="1h"))
    feed = tmp_path / "msgs.msgpack"
    feed.write_bytes(msgpack.packb(frames))
    at, stop = len(frames) // 3, 2 * len(frames) // 3
    proc = subprocess.Popen([sys.executable, "-c", DAEMON, str(ROOT), str(cfg), str(feed),
                             str(at), str(stop), "1" if slow else "0"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=blas_env())
    try:
        line = proc.stdout.readline().decode()
        assert line, proc.stderr.read().decode()[-3000:]
        child, ckpt_seq, records = (int(v) if v != "None" else None for v in line.split())
        if slow:
            # the child is alive, asleep in the fsync of its temporary file
            os.kill(child, 0)
            wait_until(lambda: any(p.name.endswith(".ckpt.tmp") for p in state.iterdir()),
                       TIMEOUT, "the child's temporary checkpoint file")
        else:
            assert ckpt_seq is not None and ckpt_seq < records
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(TIMEOUT)
        proc.stdout.close()
        proc.stderr.close()

    def gone():
        try:
            os.kill(child, 0)
        except ProcessLookupError:
            return True
        return False

    if slow:  # it dies with the daemon (and is reaped by init, not by us)
        wait_until(gone, TIMEOUT, "the checkpoint child killed with its daemon")
    back = bench(state, [model_a(), model_b()])
    rec = back.recovery
    if slow:
        assert rec.checkpoint_seq == 0  # the unfinished one is dropped ...
        assert any("unfinished checkpoint" in n for n in rec.notes)
    else:
        assert rec.checkpoint_seq == ckpt_seq > 0  # ... the durable one is used
    assert rec.checkpoint_seq + len(rec.records) == records
    # the feature buffers are in the checkpoints only: re-send from the first message the
    # recovered state has not seen
    i0 = resume_index(msgs, {m: back.runners[m].last_x_t for m in (A, B)})
    assert i0 == (0 if slow else at)
    for i in range(i0, len(frames), 64):
        back.process(frames[i:i + 64])
    for m in (A, B):
        assert learned_state(back.runners[m]) == learned_state(ref.runners[m]), m
    back.close()


def test_sigkill_while_the_child_writes_a_checkpoint_recovers_the_same_bits(tmp_path):
    _kill_during_or_after(tmp_path, slow=True)


def test_sigkill_after_a_background_checkpoint_recovers_the_same_bits(tmp_path):
    _kill_during_or_after(tmp_path, slow=False)


class FailingWrites(OsFs):
    """Every write fails with ENOSPC in a process other than the one that made it."""

    def __init__(self):
        self.owner = os.getpid()

    def write(self, fd, data):
        if os.getpid() != self.owner:
            raise OSError(28, "No space left on device")
        return os.write(fd, data)


def test_failed_write_in_the_child_refuses_further_writes(tmp_path):
    store = StateDir(tmp_path / "s", fs=FailingWrites())
    store.open()
    store.recover()
    store.append({"k": "x"})
    assert store.begin_checkpoint(lambda: {"a": 1}) == 1
    with pytest.raises(DurabilityError, match="No space left"):
        store.wait_checkpoint()
    assert store.failed is not None
    with pytest.raises(DurabilityError):
        store.append({"k": "y"})
    store.close()
    assert not any(p.name.startswith("checkpoint-0000000000000001") for p in
                   (tmp_path / "s").iterdir())


def test_a_child_that_fails_otherwise_leaves_the_folder_usable(tmp_path):
    store = StateDir(tmp_path / "s")
    store.open()
    store.recover()
    store.append({"k": "x"})

    def broken():
        raise RuntimeError("no body")

    store.begin_checkpoint(broken)
    assert store.wait_checkpoint() is None
    assert store.failed is None and "RuntimeError: no body" in store.notes[-1]
    store.begin_checkpoint(lambda: {"a": 2})
    assert store.wait_checkpoint() == 1
    store.close()
    back = StateDir(tmp_path / "s")
    back.open()
    rec = back.recover()
    assert rec.checkpoint == {"a": 2} and rec.checkpoint_seq == 1 and rec.records == []
    back.close()


def wal_frame_bytes(folder: Path) -> int:
    """Bytes of every record in the folder's segments: u32 length + u32 CRC + payload."""
    total = 0
    for seg in sorted(folder.glob("wal-*.log")):
        data = seg.read_bytes()
        pos = 0
        while pos < len(data):
            (length,) = struct.unpack_from("<I", data, pos)
            pos += 8 + length
            total += 8 + length
    return total


@pytest.mark.parametrize("limit", [0, 3000])
def test_checkpoint_by_wal_size(tmp_path, limit):
    msgs = kill_stream()[0]
    svc = bench(tmp_path / "state", [model_a(), model_b()], fs=NoSyncFs(),
                checkpoint_every="1h", checkpoint_wal_bytes=limit)
    assert svc.checkpoint_seq == 0
    started = []
    folder = tmp_path / "state"
    for m in msgs:
        before, last = svc.store.wal_bytes, svc.store.last_seq
        svc.process([m[3]])
        if not svc.store.checkpoint_running:
            svc._housekeeping()  # nor between wake-ups: neither size nor time is due
            assert not svc.store.checkpoint_running
            assert limit == 0 or svc.store.wal_bytes < limit
            continue
        # started in this turn, by size alone, right after the record that crossed the limit
        assert before < limit and svc.store._bg.seq == svc.store.last_seq == last + 1
        if not started:  # the count is that of the framing on disk
            assert before < limit <= wal_frame_bytes(folder)
        started.append(svc.store._bg.seq)
        svc._checkpoint_polled(svc.store.wait_checkpoint())
        assert svc.checkpoint_seq == started[-1] == svc.store.last_seq
        assert svc.store.wal_bytes == 0
    if limit == 0:
        assert started == [] and svc.checkpoint_seq == 0
    else:
        n = svc.store.last_seq
        assert 3 <= len(started) and started == sorted(started)
        # what a restart replays is the log after the newest one, less than the limit
        copy = crash_copy(svc, tmp_path / "copy")
        assert wal_frame_bytes(copy) < 3 * limit  # older segments pruned
        back = bench(copy, [model_a(), model_b()], fs=NoSyncFs())
        assert back.recovery.checkpoint_seq == started[-1]
        assert back.replayed == n - started[-1] and svc.store.wal_bytes < limit
        for m in (A, B):
            assert learned_state(back.runners[m]) == learned_state(svc.runners[m])
        back.close()
    svc.close()


def test_checkpoint_by_wal_size_inside_one_batch(tmp_path):
    # a backlog taken in one wake-up: the housekeeping between wake-ups never runs, yet the
    # log is checkpointed as it crosses the limit, and what is published does not change
    msgs = [m[3] for m in kill_stream()[0]]
    runs = {}
    for limit in (0, 3000):
        svc = bench(tmp_path / f"state{limit}", [model_a(), model_b()], fs=NoSyncFs(),
                    checkpoint_every="1h", checkpoint_wal_bytes=limit)
        first = svc.checkpoints
        svc.process(msgs)
        if svc.store.checkpoint_running:
            svc._checkpoint_polled(svc.store.wait_checkpoint())
        runs[limit] = svc
        if limit == 0:
            assert svc.checkpoints == first and svc.checkpoint_seq == 0
            continue
        n = svc.store.last_seq
        assert svc.checkpoints - first >= 2 and 0 < svc.checkpoint_seq < n
        copy = crash_copy(svc, tmp_path / "copy")
        back = bench(copy, [model_a(), model_b()], fs=NoSyncFs())
        assert back.recovery.checkpoint_seq == svc.checkpoint_seq
        assert back.replayed == n - svc.checkpoint_seq
        for m in (A, B):
            assert learned_state(back.runners[m]) == learned_state(svc.runners[m])
        back.close()
    sent = {k: [(topic, msgpack.packb(body)) for topic, body in svc.pub.sent]
            for k, svc in runs.items()}  # bytes: nan is not equal to itself
    assert sent[0] == sent[3000]
    assert runs[0].store.last_seq == runs[3000].store.last_seq
    for m in (A, B):
        assert learned_state(runs[0].runners[m]) == learned_state(runs[3000].runners[m])
    for svc in runs.values():
        svc.close()


def test_replay_that_skips_snapshots_gives_the_bytes_of_the_per_record_replay(tmp_path):
    # lab results reported out of drawn order: replay rewinds, so snapshots are used; far
    # more than MAX_REWIND results per model, so most are not
    run = plant.simulate(plant.Scenario(seed=12, days=10.0, sample_period_s=300.0,
                                        lab_period_h=1.0, blunders=2))
    msgs = []
    for ev in plant.events(run):
        body = {"t": ev[1], "x": list(ev[2])} if ev[0] == "x" else {"t": ev[1], "y": ev[2]}
        kind = "x" if ev[0] == "x" else "y"
        msgs += [(kind, m, ev[1], frames(m, body if m == A or kind == "y" else
                                         {"t": [ev[1]], "x": [list(ev[2])]})) for m in (A, B)]
    msgs = shuffled_labs(msgs, seed=29, size=3)
    svc = bench(tmp_path / "state", [model_a(), model_b()], fs=NoSyncFs(),
                checkpoint_every="1h", checkpoint_wal_bytes=0)
    for i in range(0, len(msgs), 64):
        svc.process([m[3] for m in msgs[i:i + 64]])
    copy = crash_copy(svc, tmp_path / "copy")
    svc.close()
    text = config_text(copy, [model_a(), model_b()])
    store = StateDir(copy, fs=NoSyncFs())
    store.open()
    rec = store.recover()
    store.close()
    flags = _snapshots_needed(rec.records)
    assert flags.count(False) > 100 and flags.count(True) > 100
    fast = Service(loads(text, "<fast>"))
    fast.restore(rec)
    slow = Service(loads(text, "<slow>"))
    slow.load_body(rec.checkpoint, rec.checkpoint_seq)
    for record in rec.records:  # the per-record replay: every snapshot taken
        slow.apply_record(record)
    assert slow.runners[A].n_late > 10
    for m in (A, B):
        got, want = fast.runners[m].to_state(), slow.runners[m].to_state()
        assert msgpack.packb(got) == msgpack.packb(want), m
        assert {k: got["monitor"][k] for k in LAB_DRIVEN} == \
            {k: want["monitor"][k] for k in LAB_DRIVEN}


def test_replay_with_the_basis_of_a_block_gives_the_bytes_of_the_per_record_replay(
        tmp_path, monkeypatch):
    # the replay evaluates the basis of a block of one model's lab records in one call; a
    # reload halfway replaces model A by one of another basis, where its blocks must end.
    # Late results before the reload rewind to snapshots of A's first life, which the
    # replay must still take (it once skipped them all and refused to start)
    monkeypatch.setattr(_ReplayTerms, "BLOCK", 8)  # many blocks, some cut by the reload
    msgs = shuffled_labs(kill_stream()[0], seed=37, size=3)
    half = len(msgs) // 2
    svc = bench(tmp_path / "state", [model_a(), model_b()], fs=NoSyncFs(),
                checkpoint_every="1h", checkpoint_wal_bytes=0)
    for i in range(0, half, 64):
        svc.process([m[3] for m in msgs[i:min(i + 64, half)]])
    changed = model_a(basis={"kind": "polynomial", "degree": 3, "family": "chebyshev"})
    new = loads(config_text(tmp_path / "state", [changed, model_b()]), "<reload>").models
    assert svc.adopt(new) == [B]
    for i in range(half, len(msgs), 64):
        svc.process([m[3] for m in msgs[i:i + 64]])
    copy = crash_copy(svc, tmp_path / "copy")
    svc.close()
    store = StateDir(copy, fs=NoSyncFs())
    store.open()
    rec = store.recover()
    store.close()
    kinds = [r["k"] for r in rec.records]
    assert kinds.count("model") == 1 and kinds.count("lab") > 8 * _ReplayTerms.BLOCK
    text = config_text(copy, [model_a(), model_b()])
    slow = Service(loads(text, "<slow>"))
    slow.load_body(rec.checkpoint, rec.checkpoint_seq)
    terms = _ReplayTerms(slow.runners, rec.records)
    widths = set()
    for i, record in enumerate(rec.records):  # record by record, each basis of its own
        if record["k"] == "lab":
            basis = slow.runners[record["m"]].basis
            got = terms.get(i)
            want = basis(np.asarray(record["x"], dtype=float))
            assert got.shape == want.shape and got.tobytes() == want.tobytes(), i
            widths.add((record["m"], len(got)))
        slow.apply_record(record)
    assert len({w for m, w in widths if m == A}) == 2  # both bases of A were used
    fast = Service(loads(text, "<fast>"))
    fast.restore(rec)
    assert fast.replayed == len(rec.records)
    for m in (A, B):
        got, want = fast.runners[m].to_state(), slow.runners[m].to_state()
        assert msgpack.packb(got) == msgpack.packb(want), m


def test_startup_checkpoint_runs_in_the_background_only_when_the_config_changed_nothing(
        tmp_path):
    msgs = kill_stream()[0][:800]
    svc = bench(tmp_path / "state", [model_a(), model_b()], fs=NoSyncFs())
    for i in range(0, len(msgs), 64):
        svc.process([m[3] for m in msgs[i:i + 64]])
    first = crash_copy(svc, tmp_path / "a")
    second = crash_copy(svc, tmp_path / "b")
    svc.close()
    same = bench(first, [model_a(), model_b()], fs=NoSyncFs())
    assert same.store.checkpoint_running and same.replayed > 0
    last = same.store.last_seq
    same.close()  # waits for it, then writes the shutdown one (same seq, same name)
    assert (first / f"checkpoint-{last:016d}.ckpt").exists()
    changed = bench(second, [model_a()], fs=NoSyncFs())  # B dropped: written at once
    assert not changed.store.checkpoint_running
    assert changed.checkpoint_seq == changed.store.last_seq == last
    changed.close()


@pytest.mark.parametrize("seq", [0, 1, 127, 128, 255, 256, 65535, 65536, 2**32 - 1, 2**32])
def test_fallback_checkpoint_seq_read_without_decoding_the_body(seq):
    # reference: the file layout of the store's format description around msgpack's own
    # encoding of the payload map, with zlib.crc32
    import zlib

    from daemon.runtime.store.records import CHECKPOINT_MAGIC, checkpoint_seq

    payload = msgpack.packb({"seq": seq, "body": {"x": [1.5] * 100}}, use_bin_type=True)
    data = CHECKPOINT_MAGIC + struct.pack("<II", len(payload), zlib.crc32(payload)) + payload
    assert checkpoint_seq(data) == seq
    bad = bytearray(data)
    bad[-3] ^= 1
    with pytest.raises(Exception, match="CRC"):
        checkpoint_seq(bytes(bad))


def test_a_stop_signal_ends_the_checkpoint_child_not_only_the_daemon(tmp_path):
    """systemd's default stop signals the whole group: the child must not take the parent's
    queueing handler and write on."""
    frames = [m[3] for m in shuffled_labs(kill_stream()[0], seed=31, size=3)]
    state = tmp_path / "state"
    cfg = tmp_path / "term.toml"
    cfg.write_text(config_text(state, [model_a(), model_b()], checkpoint_every="1h"))
    feed = tmp_path / "msgs.msgpack"
    feed.write_bytes(msgpack.packb(frames))
    n = len(frames) // 3
    proc = subprocess.Popen([sys.executable, "-c", DAEMON, str(ROOT), str(cfg), str(feed),
                             str(n), str(n), "1", "term"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=blas_env())
    try:
        line = proc.stdout.readline().decode()
        assert line, proc.stderr.read().decode()[-3000:]
        child = int(line.split()[0])
        os.kill(child, 0)  # asleep in the fsync of its temporary file
        os.kill(child, signal.SIGTERM)

        def reaped():  # the daemon's zombie child, or gone
            try:
                with open(f"/proc/{child}/stat") as fh:
                    return fh.read().split(")")[-1].split()[0] == "Z"
            except FileNotFoundError:
                return True

        wait_until(reaped, TIMEOUT, "the checkpoint child ended by SIGTERM")
        assert proc.poll() is None  # the daemon itself ignores it (its handler queues)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(TIMEOUT)
        proc.stdout.close()
        proc.stderr.close()
