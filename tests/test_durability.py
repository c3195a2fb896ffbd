"""Durability of the daemon's learned state: write-ahead log, checkpoints, replay, recovery.

The central check: a daemon subprocess fed a recorded plant stream is killed with SIGKILL at
seeded random points, restarted on the same state folder and fed again from a point it had
certainly processed; at the end every model's posterior (and the detector state learned from
lab results) equals, bit for bit, that of an uninterrupted run of the same stream. Bit for bit
means equal msgpack bytes of the plain-data state (floats as IEEE 754 doubles).

The other checks run an in-process :class:`daemon.runtime.service.Service` without sockets (its
publisher replaced by a recorder) on a state folder, and simulate a crash by copying the
folder while the service still holds it (what a crashed process leaves: every record written
so far, no shutdown checkpoint). External references: the record framing is read back with
``struct``, ``zlib.crc32`` and the ``msgpack`` library itself; file modes with ``stat``; the
lock with ``fcntl.flock``; the learned posterior against ``recursive.Posterior`` run directly
on the same samples.
"""

from __future__ import annotations

import errno
import fcntl
import json
import logging
import math
import os
import shutil
import signal
import stat
import struct
import subprocess
import sys
import threading
import time
import zlib
from pathlib import Path

import msgpack
import numpy as np
import pytest
import zmq
from conftest import (
    PROBE_MODEL,
    TIMEOUT,
    Control,
    FeedPublisher,
    Link,
    blas_env,
    c301_model,
    ipc,
    toml_config,
    wait_until,
)

from daemon import cli, exitcodes
from daemon.config import ModelConfig, load, loads
from daemon.runtime.alignment import Aligner
from daemon.runtime.service import Service, StateError
from daemon.runtime.state_commands import describe_folder, read_export
from daemon.runtime.store import CorruptionError, LockedError, OsFs
from daemon.workbench import plant

A = "c301.single"   # single messages, ids on the features, half its lab results by id
B = "c301.blocks"   # blocks of 12 feature rows, identity basis
START_TIMEOUT = 60.0  # a cold start imports numpy and scipy
LAB_DRIVEN = ("cusum", "spread", "calibration", "std", "region", "drift", "labs_since_shift",
              "labs_since_spread", "lab_active")


def model_a(**tables) -> dict:
    return c301_model(A, **tables)


def model_b() -> dict:
    return c301_model(B, basis={"kind": "identity"}, prior={"alpha": 1e-6},
                      lab={"keep": "12h", "keep_count": 5000, "tolerance": "5m",
                           "stale_after": "12h"})


def frames(model: str, body: dict) -> list[bytes]:
    return [model.encode(), msgpack.packb(body, use_bin_type=True)]


def sample_id(k: int) -> str:
    return f"S-{k:05d}"


# ---------------------------------------------------------------------------------- in process
class Recorder:
    """Stands in for the PUB socket of a socket-free Service and keeps what it is sent."""

    def __init__(self, events: list | None = None):
        self.sent: list[tuple[str, dict]] = []
        self.events = events

    def send_multipart(self, parts) -> None:
        topic = bytes(parts[0]).decode()
        self.sent.append((topic, msgpack.unpackb(bytes(parts[1]), raw=False)))
        if self.events is not None:
            self.events.append(("pub", topic))

    def close(self, linger=None) -> None:
        pass

    def fits(self, model: str) -> list[dict]:
        return [b for t, b in self.sent if t == f"fit/{model}"]


class NoSyncFs(OsFs):
    """Real writes without fsync: for tests that start hundreds of services on copies."""

    def fsync(self, fd) -> None:
        pass


def config_text(state_dir: Path, models: list[dict], **daemon) -> str:
    settings = {"state_dir": str(state_dir), "metrics": "", "log_level": "warning", **daemon}
    return toml_config(settings, models)


def bench(state_dir: Path, models: list[dict], *, fs=None, path: Path | None = None,
          events: list | None = None, **daemon) -> Service:
    """A Service on ``state_dir`` with its state opened and a recorder as publisher."""
    text = config_text(state_dir, models, **daemon)
    if path is not None:
        path.write_text(text)
        svc = Service(load(path), config_path=str(path), fs=fs)
    else:
        svc = Service(loads(text, "<test>"), fs=fs)
    svc.open_state()
    svc.pub = Recorder(events)
    return svc


def crash_copy(svc: Service, dst: Path) -> Path:
    """What a crash at this moment leaves: the folder's files as they are (no checkpoint)."""
    shutil.copytree(svc.store.path, dst)
    return dst


def learned_state(runner) -> bytes:
    """The part of a model's state the log makes exact, as msgpack bytes (bit for bit).

    The trust state and the prediction-driven views are left out: they follow the prediction
    batches, which are not logged and are recomputed from the re-sent feed.
    """
    st = runner.to_state()
    mon = st["monitor"]
    return msgpack.packb({
        "config": st["config"], "posterior": st["posterior"],
        "monitor": None if mon is None else {k: mon[k] for k in LAB_DRIVEN},
        "frozen": st["frozen"], "last_lab_t": st["last_lab_t"],
        "last_offered_t": st["last_offered_t"], "learned": st["counters"]["n_learned"],
        "gated": st["rejected"].get("gated", 0),
    }, use_bin_type=True)


def feed_events(svc: Service, run, model: str, events=None, after=None) -> None:
    """Feed a plant run's events one message at a time; ``after(svc)`` after each."""
    for ev in plant.events(run) if events is None else events:
        body = {"t": ev[1], "x": list(ev[2])} if ev[0] == "x" else {"t": ev[1], "y": ev[2]}
        svc.process([frames(model, body)])
        if after is not None:
            after(svc)


@pytest.fixture(scope="module")
def run():
    # lab results every 4 h, 1 to 3 h late: they arrive in the order they were drawn
    return plant.simulate(plant.Scenario(seed=10, days=3.0, sample_period_s=300.0, blunders=1))


# ---------------------------------------------------------------------------------- records
def read_wal(folder: Path) -> list[dict]:
    """Every record of the folder's WAL segments, parsed without daemon code.

    Framing as documented in daemon/runtime/store/: u32 little-endian length, u32 CRC-32 of the
    payload (zlib.crc32), payload = a msgpack map whose first key is "seq".
    """
    out = []
    for seg in sorted(folder.glob("wal-*.log")):
        data = seg.read_bytes()
        pos = 0
        while pos < len(data):
            length, crc = struct.unpack_from("<II", data, pos)
            payload = data[pos + 8:pos + 8 + length]
            assert zlib.crc32(payload) == crc
            rec = msgpack.unpackb(payload, raw=False, strict_map_key=False)
            assert next(iter(rec)) == "seq"
            out.append(rec)
            pos += 8 + length
    return out


def test_folder_modes_lock_and_record_contents(tmp_path, run):
    folder = tmp_path / "state"
    svc = bench(folder, [model_a()])
    feed_events(svc, run, A)
    # Reference for the modes: stat.S_IMODE; the folder 0700, every file in it 0600
    assert stat.S_IMODE(os.stat(folder).st_mode) == 0o700
    names = sorted(p.name for p in folder.iterdir())
    assert "LOCK" in names and any(n.startswith("wal-") for n in names)
    for p in folder.iterdir():
        assert stat.S_IMODE(p.stat().st_mode) == 0o600, p.name
    # the lock is a flock on LOCK: another open file description cannot take it
    fd = os.open(folder / "LOCK", os.O_RDWR)
    try:
        with pytest.raises(BlockingIOError):
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    finally:
        os.close(fd)
    with pytest.raises(LockedError, match=f"locked by process {os.getpid()}"):
        bench(tmp_path / "state", [model_a()])

    svc.command({"cmd": "freeze", "model": A})
    svc.command({"cmd": "resume", "model": A})
    svc.command({"cmd": "acknowledge", "model": A})
    svc.command({"cmd": "reset", "model": A})
    records = read_wal(folder)
    assert [r["seq"] for r in records] == list(range(1, len(records) + 1))
    labs = [r for r in records if r["k"] == "lab"]
    fits = svc.pub.fits(A)
    # one record per lab result offered to the posterior (learned or gated), each with the
    # features the aligner matched: the simulated inputs at the time the sample was drawn
    assert len(labs) == len(fits) == len(run.lab_t)
    assert sum(not f["accepted"] for f in fits) >= 1  # the blunder, gated
    for r, t, k, y in zip(labs, run.lab_t.tolist(), run.lab_index.tolist(),
                          run.lab_y.tolist(), strict=True):
        assert r["m"] == A and r["t"] == t and r["y"] == y and r["id"] is None
        assert r["x"] == run.X[k].tolist()
        assert r["c"] >= t  # the feed clock when it was learned
    assert [(r["k"], r["cmd"]) for r in records[len(labs):]] == [
        ("ctl", "freeze"), ("ctl", "resume"), ("ctl", "acknowledge"), ("ctl", "reset")]
    # control actions are fsynced before the reply, in group mode too
    assert svc.store.pending == 0
    reply = svc.command({"cmd": "checkpoint"})
    assert reply == {"ok": True, "seq": len(records)}
    assert (folder / f"checkpoint-{len(records):016d}.ckpt").is_file()
    svc.close()


def direct_posterior(cfg, run, n: int | None = None):
    """``recursive.Posterior`` updated directly with the run's first ``n`` lab results."""
    basis = cfg.build_basis()
    post = cfg.build_posterior(basis)
    for t, k, y in list(zip(run.lab_t.tolist(), run.lab_index.tolist(), run.lab_y.tolist(),
                            strict=True))[:n]:
        post.update(basis(run.X[k]), y, t)
    return post


def test_restart_replays_lab_results_control_actions_and_reloads(tmp_path, run):
    path = tmp_path / "posteriord.toml"
    live = bench(tmp_path / "state", [model_a(), model_b()], path=path)
    events = list(plant.events(run))
    labs = [i for i, ev in enumerate(events) if ev[0] == "y"]
    cut1, cut2, cut3 = labs[3], labs[6], labs[9]
    feed_events(live, run, A, events[:cut1])
    feed_events(live, run, B, events[:cut2])
    live.command({"cmd": "freeze", "model": A})
    feed_events(live, run, A, events[cut1:cut2])  # A's lab results here: rejected, frozen
    live.command({"cmd": "resume", "model": A})
    live.command({"cmd": "acknowledge", "model": A})
    # a reload that changes B's learning settings replaces it by a fresh model
    models = [model_a(), c301_model(B, basis={"kind": "identity"}, prior={"alpha": 1e-5})]
    path.write_text(config_text(tmp_path / "state", models))
    fits_before = len(live.pub.fits(B))
    assert live.command({"cmd": "reload"}) == {"ok": True}
    feed_events(live, run, A, events[cut2:cut3])
    feed_events(live, run, B, events[cut2:])
    live.command({"cmd": "reset", "model": A})
    feed_events(live, run, A, events[cut3:])
    assert live.runners[A].rejected["frozen"] == 3
    kinds = [(r["k"], r.get("cmd"), r.get("op")) for r in read_wal(tmp_path / "state")]
    assert ("model", None, "new") in kinds and ("ctl", "reset", None) in kinds

    info = describe_folder(tmp_path / "state")  # read-only, beside the running service
    b = next(m for m in info["models"] if m["name"] == B)
    assert b["actions_after"] == ["new (from its prior)"]
    assert b["lab_records_after"] == len(live.pub.fits(B)) - fits_before

    copy = crash_copy(live, tmp_path / "copy")
    back = bench(copy, models)
    assert back.recovery.checkpoint_seq == 0 and back.replayed == len(kinds)
    for name in (A, B):
        assert learned_state(back.runners[name]) == learned_state(live.runners[name]), name
    # B learned from its new prior the results matched after the reload (its buffer started
    # empty); reference: the posterior run directly on those results and simulated inputs
    cfg_b = back.runners[B].cfg
    assert cfg_b.alpha == 1e-5
    after = live.pub.fits(B)[fits_before:]
    assert len(after) >= 3
    ref = cfg_b.build_posterior()
    basis = cfg_b.build_basis()
    t_to_k = {t: k for k, t in enumerate(run.t.tolist())}
    for fit in after:
        ref.update(basis(run.X[t_to_k[fit["t"]]]), fit["y"], fit["t"])
    assert back.runners[B].post.to_state() == ref.to_state()
    back.close()
    live.close()


def test_late_lab_result_is_matched_after_a_restart(tmp_path, run):
    """The feature buffer is in the checkpoint: a lab result drawn before a restart and
    reported after it is matched and learned as without the restart. Features received after
    the last checkpoint are lost by a crash: a result for them finds no match."""
    events = list(plant.events(run))
    first_lab = next(i for i, ev in enumerate(events) if ev[0] == "y")
    _, t_lab, y_lab, _ = events[first_lab]

    ref = bench(tmp_path / "ref", [model_a()])
    feed_events(ref, run, A, events[:first_lab + 1])

    live = bench(tmp_path / "state", [model_a()])
    feed_events(live, run, A, events[:first_lab])
    live.close()  # a clean stop: the shutdown checkpoint holds the buffer
    back = bench(tmp_path / "state", [model_a()])
    assert back.runners[A].last_x_t == events[first_lab - 1][1]
    feed_events(back, run, A, events[first_lab:first_lab + 1])
    assert msgpack.packb(back.pub.fits(A)) == msgpack.packb(ref.pub.fits(A))  # nan too
    assert learned_state(back.runners[A]) == learned_state(ref.runners[A])

    crashed = bench(tmp_path / "crash", [model_a()])
    feed_events(crashed, run, A, events[:first_lab])
    copy = crash_copy(crashed, tmp_path / "crash-copy")
    again = bench(copy, [model_a()])
    assert again.runners[A].last_x_t is None  # only the start-up checkpoint, empty
    feed_events(again, run, A, events[first_lab:first_lab + 1])
    assert again.pub.fits(A) == [] and again.runners[A].rejected["lab_unmatched"] == 1
    for s in (ref, back, crashed, again):
        s.close()


def test_duplicate_lab_results_are_not_learned_twice(tmp_path, run):
    """A gated result changes the gate's count of same-sign rejections: offered twice it
    would count twice. A result drawn at or before the last one offered is not offered."""
    svc = bench(tmp_path / "state", [model_a()])
    events = list(plant.events(run))
    labs = [i for i, ev in enumerate(events) if ev[0] == "y"]
    gated = labs[int(np.flatnonzero(run.lab_blunder)[0])]
    feed_events(svc, run, A, events[:gated + 1])
    assert svc.pub.fits(A)[-1]["reason"] == "gated"
    before = learned_state(svc.runners[A])
    n_fits = len(svc.pub.fits(A))
    feed_events(svc, run, A, [events[gated], events[labs[labs.index(gated) - 1]]])
    assert learned_state(svc.runners[A]) == before and len(svc.pub.fits(A)) == n_fits
    assert svc.runners[A].rejected["lab_out_of_order"] == 2
    assert svc.runners[A].post.reject_run == 1
    svc.close()


def test_model_settings_and_feature_buffers_round_trip_as_plain_data():
    cfgs = loads(toml_config({}, [
        model_a(), model_b(),
        c301_model("rw", forgetting={"policy": "random_walk", "q": 1e-9},
                   noise={"std": 4.0}, prior={"alpha": 0.5, "mean": [1.0] + [0.0] * 14}),
        c301_model("plain", forgetting={"policy": "none"}, gate={"k": 0},
                   alerts={"enabled": False})])).models
    for cfg in cfgs:
        # through msgpack itself, as in a checkpoint
        back = ModelConfig.from_state(msgpack.unpackb(msgpack.packb(cfg.to_state())))
        assert back == cfg and back.fingerprint() == cfg.fingerprint()
    state = cfgs[0].to_state()
    with pytest.raises(ValueError, match="posteriord.model-config/0"):
        ModelConfig.from_state({**state, "schema": "posteriord.model-config/0"})
    with pytest.raises(ValueError, match="unknown \\['colour'\\]"):
        ModelConfig.from_state({**state, "colour": "red"})

    # the feature buffer's state holds exactly the rows remembered, whether pushed one at a
    # time (tuples), as lists of numpy views or as blocks (the oldest block partly
    # forgotten: max_rows is 50), nan blanks included; restoring it answers the same lookups
    al = Aligner(("a", "b"), (0.0, 60.0), 3600.0, tolerance_s=30.0, max_rows=50)
    pushed_t, pushed_x = [], []
    for k in range(30):
        row = (float(k), math.nan if k % 7 == 0 else -float(k))
        al.push_trusted(float(k), row)
        pushed_t.append(float(k))
        pushed_x.append(list(row))
    X = np.arange(80, dtype=float).reshape(40, 2)
    blocks = [([30.0 + k for k in range(40)], X, False),
              ([70.0 + k for k in range(15)], X[:15] + 0.5, True),
              ([85.0 + k for k in range(10)], X[:10] - 0.5, True)]
    for ts, rows, as_block in blocks:
        if as_block:
            al.push_block_trusted(ts, rows)
        else:
            al.push_many_trusted(ts, list(rows))
        pushed_t += ts
        pushed_x += rows.tolist()
    state = al.to_state()
    assert msgpack.packb(state) == msgpack.packb({
        "schema": Aligner.SCHEMA, "tags": ["a", "b"], "dead_times_s": [0.0, 60.0],
        "history_s": 3600.0, "tolerance_s": 30.0, "max_rows": 50,
        "t": pushed_t[-50:], "x": pushed_x[-50:]})
    back = Aligner.from_state(msgpack.unpackb(msgpack.packb(state)))
    assert msgpack.packb(back.to_state()) == msgpack.packb(state)
    assert len(state["x"]) == 50 and state["t"][0] == 45.0
    assert state["x"][25] == [0.5, 1.5] and state["x"][-1] == [17.5, 18.5]
    assert [back.lookup(t) for t in (45.5, 69.0, 100.0, 110.0, 120.0)] == \
        [al.lookup(t) for t in (45.5, 69.0, 100.0, 110.0, 120.0)]
    assert al.lookup(110.0) == (17.5, 41.0)
    with pytest.raises(ValueError, match="increasing"):
        Aligner.from_state({**state, "t": state["t"][::-1]})
    with pytest.raises(ValueError, match="rows of shape"):
        Aligner.from_state({**state, "x": state["x"][:-1]})


# ---------------------------------------------------------------------------------- damage
def snapshots_while_feeding(svc: Service, run, model: str) -> dict[int, bytes]:
    """The learned state of ``model`` after every WAL record, by sequence number."""
    snaps = {svc.store.last_seq: learned_state(svc.runners[model])}

    def after(s):
        snaps[s.store.last_seq] = learned_state(s.runners[model])

    feed_events(svc, run, model, after=after)
    return snaps


def record_offsets(segment: Path) -> list[int]:
    """Start offsets of the records in a segment, and its size last."""
    data = segment.read_bytes()
    out, pos = [], 0
    while pos < len(data):
        out.append(pos)
        pos += 8 + struct.unpack_from("<I", data, pos)[0]
    return [*out, pos]


def test_wal_cut_at_every_byte_of_its_last_records_loses_at_most_the_torn_one(tmp_path, run):
    live = bench(tmp_path / "state", [model_a()], fs=NoSyncFs())
    snaps = snapshots_while_feeding(live, run, A)
    last = live.store.last_seq
    assert last == len(run.lab_t) >= 8
    crashed = crash_copy(live, tmp_path / "crashed")
    segment = crashed / "wal-0000000000000001.log"
    offsets = record_offsets(segment)
    assert len(offsets) == last + 1
    data = segment.read_bytes()
    cuts = range(offsets[-3], offsets[-1] + 1)  # every byte offset of the last two records
    for cut in cuts:
        work = tmp_path / f"cut-{cut}"
        shutil.copytree(crashed, work)
        (work / segment.name).write_bytes(data[:cut])
        svc = bench(work, [model_a()], fs=NoSyncFs())
        complete = sum(1 for o in offsets[1:] if o <= cut)
        assert svc.recovery.torn_tail == (cut not in offsets), cut
        assert svc.replayed == complete, cut
        assert learned_state(svc.runners[A]) == snaps[complete], cut
        svc.close()
        shutil.rmtree(work)
    # and the complete log gives the live state
    assert snaps[last] == learned_state(live.runners[A])
    live.close()


def flip_bit(path: Path, offset: int) -> None:
    data = bytearray(path.read_bytes())
    data[offset] ^= 0x10
    path.write_bytes(bytes(data))


def two_checkpoint_folder(tmp_path: Path, run) -> tuple[Service, dict[int, bytes], int]:
    """A live service whose folder holds checkpoints 0 and c and log records after c."""
    live = bench(tmp_path / "state", [model_a()], fs=NoSyncFs())
    events = list(plant.events(run))
    half = [i for i, ev in enumerate(events) if ev[0] == "y"][len(run.lab_t) // 2]
    snaps = {0: learned_state(live.runners[A])}

    def after(s):
        snaps[s.store.last_seq] = learned_state(s.runners[A])

    feed_events(live, run, A, events[:half], after=after)
    c = live.command({"cmd": "checkpoint"})["seq"]
    feed_events(live, run, A, events[half:], after=after)
    assert 3 <= c <= live.store.last_seq - 3
    return live, snaps, c


@pytest.mark.parametrize("policy", ["refuse", "checkpoint"])
def test_bit_flip_in_the_log_follows_the_corruption_policy(tmp_path, run, policy, caplog):
    live, snaps, c = two_checkpoint_folder(tmp_path, run)
    crashed = crash_copy(live, tmp_path / "crashed")
    segment = crashed / f"wal-{c + 1:016d}.log"
    offsets = record_offsets(segment)
    flip_bit(segment, offsets[1] + 12)  # inside the second record after the checkpoint
    if policy == "refuse":
        with pytest.raises(CorruptionError, match="corrupt"):
            bench(crashed, [model_a()], on_corruption="refuse")
        with pytest.raises(CorruptionError):  # and again: no silent start on a restart
            bench(crashed, [model_a()], on_corruption="refuse")
        assert not segment.exists()  # moved aside, kept for a decision
    else:
        with caplog.at_level(logging.WARNING, logger="posteriord"):
            svc = bench(crashed, [model_a()], on_corruption="checkpoint")
        # every record of the damaged segment is dropped: the state is the checkpoint's
        assert svc.recovery.dropped_after_seq == c
        assert learned_state(svc.runners[A]) == snaps[c]
        assert f"every record after seq {c} is dropped" in caplog.text
        svc.close()
    live.close()


@pytest.mark.parametrize("damage", ["deleted", "bit_flip"])
def test_newest_checkpoint_lost_falls_back_to_the_previous_one(tmp_path, run, damage):
    live, snaps, c = two_checkpoint_folder(tmp_path, run)
    crashed = crash_copy(live, tmp_path / "crashed")
    newest = crashed / f"checkpoint-{c:016d}.ckpt"
    if damage == "deleted":
        newest.unlink()
    else:
        flip_bit(newest, 40)
    svc = bench(crashed, [model_a()])
    assert svc.recovery.checkpoint_seq == 0
    assert svc.recovery.fallback_checkpoint == (damage == "bit_flip")
    # the log since the previous checkpoint is kept for this: nothing learned is lost
    assert learned_state(svc.runners[A]) == snaps[live.store.last_seq]
    svc.close()
    live.close()


def test_unusable_checkpoint_content_refuses_to_start(tmp_path, run):
    svc = bench(tmp_path / "state", [model_a()])
    body = svc.state_body()
    body["schema"] = "posteriord.state/999"
    svc.store.checkpoint(body)
    svc.store.close()
    svc.store = None
    with pytest.raises(StateError, match="posteriord.state/999"):
        bench(tmp_path / "state", [model_a()])


# ---------------------------------------------------------------------------------- faults
class FaultFs(OsFs):
    """Real calls; ``fail_write`` / ``fail_fsync`` make the next ones fail with an errno.
    Every write and fsync is also noted in ``events`` (for the ordering check)."""

    def __init__(self, events: list | None = None):
        self.fail_write = None
        self.fail_fsync = None
        self.events = events if events is not None else []

    def write(self, fd, data):
        if self.fail_write is not None:
            raise OSError(self.fail_write, os.strerror(self.fail_write))
        self.events.append(("write", fd))
        return os.write(fd, data)

    def fsync(self, fd):
        if self.fail_fsync is not None:
            raise OSError(self.fail_fsync, os.strerror(self.fail_fsync))
        self.events.append(("fsync", fd))
        os.fsync(fd)


@pytest.mark.parametrize("mode", ["always", "group"])
def test_fit_messages_and_fsyncs(tmp_path, run, mode):
    """With fsync = "always" each fit/ message follows the fsync of its record; with
    "group" it is published first and the fsync comes within group_commit."""
    events: list = []
    svc = bench(tmp_path / "state", [model_a()], fs=FaultFs(events), events=events,
                fsync=mode, group_commit="1h")
    del events[:]
    feed_events(svc, run, A)
    fits = [i for i, e in enumerate(events) if e == ("pub", f"fit/{A}")]
    assert len(fits) == len(run.lab_t)
    for i in fits:
        before = [e[0] for e in events[:i] if e[0] in ("write", "fsync")]
        if mode == "always":
            assert before[-2:] == ["write", "fsync"]
        else:
            assert before[-1] == "write"
    if mode == "group":
        assert svc.store.pending == len(run.lab_t)  # nothing fsynced in the hour
    svc.close()


class Threaded(Link):
    """A Service with real sockets running in a thread (for run() and its exit code)."""

    def __init__(self, folder: Path, models: list[dict], fs=None, **daemon):
        ctx = zmq.Context()
        super().__init__(ctx, FeedPublisher(ctx))
        settings = {"feeds": [self.feed.endpoint], "publish": ipc(folder, "pub"),
                    "control": ipc(folder, "ctl"), "metrics": "",
                    "state_dir": str(folder / "state"), "log_level": "warning", **daemon}
        self.svc = Service(loads(toml_config(settings, [*models, PROBE_MODEL]), "<test>"),
                           fs=fs)
        self.svc.open()
        publish, control = self.svc.publish_endpoint, self.svc.control_endpoint
        self.rc = None
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()
        self.connect(publish, control, [m["name"] for m in models])

    def _run(self) -> None:
        self.rc = self.svc.run()

    def finish(self) -> None:
        if self.thread.is_alive():
            self.svc.post_event("stop")
        self.thread.join(TIMEOUT)
        self.close()
        self.ctx.term()


@pytest.mark.parametrize("fault", ["write_enospc", "fsync_eio_always", "fsync_eio_group"])
def test_disk_full_or_fsync_failure_stops_the_daemon(tmp_path, run, fault, caplog):
    fs = FaultFs()
    mode = "group" if fault == "fsync_eio_group" else "always"
    d = Threaded(tmp_path, [model_a()], fs=fs, fsync=mode, group_commit="10ms")
    try:
        events = list(plant.events(run))
        first, second = [i for i, ev in enumerate(events) if ev[0] == "y"][:2]
        for ev in events[:first + 1]:
            body = {"t": ev[1], "x": list(ev[2])} if ev[0] == "x" else {"t": ev[1], "y": ev[2]}
            d.feed.send(A, body)
        assert [m for m in d.barrier() if m[0] == f"fit/{A}"]
        wait_until(lambda: d.svc.store.pending == 0, what="the first record fsynced")
        if fault == "write_enospc":
            fs.fail_write = errno.ENOSPC
        else:
            fs.fail_fsync = errno.EIO
        with caplog.at_level(logging.CRITICAL, logger="posteriord"):
            for ev in events[first + 1:second + 1]:
                body = {"t": ev[1], "x": list(ev[2])} if ev[0] == "x" \
                    else {"t": ev[1], "y": ev[2]}
                d.feed.send(A, body)
            d.thread.join(TIMEOUT)
        assert not d.thread.is_alive() and d.rc == exitcodes.EXIT_DURABILITY == 7
        assert "state folder write failed, stopping" in caplog.text
        got = []
        while d.out.poll(200):
            got.append(msgpack.unpackb(d.out.recv_multipart()[1], raw=False))
        fit_ts = [b["t"] for b in got if "pred_mean" in b]
        if fault == "fsync_eio_group":
            assert fit_ts == [events[second][1]]  # published, then the group fsync failed
        else:
            assert fit_ts == []  # never published: its record did not reach the disk
        # the lock is released: another daemon may take the folder
        svc = bench(tmp_path / "state", [model_a()])
        svc.close()
    finally:
        d.finish()


# ---------------------------------------------------------------------------------- processes
def cli_cmd(*args: str) -> list[str]:
    return [sys.executable, "-m", "daemon.cli", *args]


def test_second_daemon_on_the_folder_exits_with_code_5(tmp_path):
    holder = bench(tmp_path / "state", [model_a()])
    path = tmp_path / "second.toml"
    path.write_text(toml_config({"feeds": ["tcp://127.0.0.1:1"], "publish": ipc(tmp_path, "p"),
                                 "control": ipc(tmp_path, "c"), "metrics": "",
                                 "state_dir": str(tmp_path / "state")}, [model_a()]))
    done = subprocess.run(cli_cmd("run", "--config", str(path)), capture_output=True,
                          text=True, env=blas_env(), timeout=START_TIMEOUT)
    assert done.returncode == exitcodes.EXIT_LOCKED == 5
    assert f"is locked by process {os.getpid()}" in done.stderr
    assert not (tmp_path / "p").exists()  # nothing bound
    holder.close()


def test_corrupt_log_exits_with_code_6_under_refuse(tmp_path, run):
    live, _, c = two_checkpoint_folder(tmp_path, run)
    crashed = crash_copy(live, tmp_path / "crashed")
    live.close()
    segment = crashed / f"wal-{c + 1:016d}.log"
    flip_bit(segment, record_offsets(segment)[1] + 12)
    path = tmp_path / "d.toml"
    path.write_text(toml_config({"feeds": ["tcp://127.0.0.1:1"], "publish": ipc(tmp_path, "p"),
                                 "control": ipc(tmp_path, "c"), "metrics": "",
                                 "state_dir": str(crashed)}, [model_a()]))
    done = subprocess.run(cli_cmd("run", "--config", str(path)), capture_output=True,
                          text=True, env=blas_env(), timeout=START_TIMEOUT)
    assert done.returncode == exitcodes.EXIT_CORRUPT == 6
    assert f"WAL segment {segment.name} is corrupt" in done.stderr
    assert 'on_corruption = "checkpoint"' in done.stderr  # how to go on, in config terms


def test_state_inspect_export_import(tmp_path, run, capsys):
    events = list(plant.events(run))
    labs = [i for i, ev in enumerate(events) if ev[0] == "y"]
    src = bench(tmp_path / "src", [model_a()])
    feed_events(src, run, A, events[:labs[-1]])  # all but the last lab result
    before = sorted((p.name, p.stat().st_size, p.stat().st_mtime_ns)
                    for p in (tmp_path / "src").iterdir())

    assert cli.main(["state", "inspect", str(tmp_path / "src")]) == 0
    text = capsys.readouterr().out
    assert f"locked by process {os.getpid()}" in text
    assert f"updates 0 + {len(labs) - 1} lab record(s) after the checkpoint" in text
    assert "wal-0000000000000001.log  seq 1.." in text and " ok" in text
    assert cli.main(["state", "inspect", "--json", str(tmp_path / "src")]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["models"][0]["name"] == A and info["lock"]["held"] is True
    after = sorted((p.name, p.stat().st_size, p.stat().st_mtime_ns)
                   for p in (tmp_path / "src").iterdir())
    assert after == before  # read-only

    exp = tmp_path / "a.export"
    code = cli.main(["state", "export", str(tmp_path / "src"), A, str(exp)])
    assert code == exitcodes.EXIT_LOCKED
    assert "stop that daemon first" in capsys.readouterr().err
    reference = learned_state(src.runners[A])
    src.close()
    assert cli.main(["state", "export", str(tmp_path / "src"), A, str(exp)]) == 0
    assert stat.S_IMODE(exp.stat().st_mode) == 0o600
    assert read_export(str(exp))["model"] == A

    # another daemon's folder, under the model name that daemon uses
    cfg = tmp_path / "dst.toml"
    cfg.write_text(config_text(tmp_path / "dst", [model_a(), c301_model("other")]))
    wrong = tmp_path / "wrong.toml"
    wrong.write_text(config_text(tmp_path / "dst", [model_a(prior={"alpha": 1.0})]))
    assert cli.main(["state", "import", str(tmp_path / "dst"), str(exp), "--config",
                     str(wrong)]) == exitcodes.EXIT_CONFIG
    assert "other learning settings" in capsys.readouterr().err
    assert cli.main(["state", "import", str(tmp_path / "dst"), str(exp), "--config",
                     str(cfg)]) == 0
    assert cli.main(["state", "import", str(tmp_path / "dst"), str(exp)]) == exitcodes.EXIT_RUNTIME
    assert "--replace" in capsys.readouterr().err
    dst = Service(load(cfg), config_path=str(cfg))
    dst.open_state()
    dst.pub = Recorder()
    assert learned_state(dst.runners[A]) == reference
    assert dst.runners["other"].post.n_updates == 0
    # the feature buffer came along: the last lab result is matched in the new home
    feed_events(dst, run, A, events[labs[-1]:labs[-1] + 1])
    assert len(dst.pub.fits(A)) == 1
    assert dst.runners[A].post.to_state() == direct_posterior(dst.runners[A].cfg,
                                                              run).to_state()
    dst.close()


# ---------------------------------------------------------------------------------- SIGKILL
def kill_stream(seed: int = 23) -> tuple[list[tuple], object]:
    """A recorded feed: (kind, model, t, frames) with kind "x" (features), "y" (a lab
    result) or "bad" (rejected input that must change nothing)."""
    run = plant.simulate(plant.Scenario(seed=seed, days=4.0, sample_period_s=120.0,
                                        lab_period_h=1.5, blunders=2))
    rng = np.random.default_rng(seed)
    t_to_k = {t: k for k, t in enumerate(run.t.tolist())}
    msgs: list[tuple] = []
    block: list = []
    for ev in plant.events(run):
        if ev[0] == "x":
            _, t, row = ev
            k = t_to_k[t]
            msgs.append(("x", A, t, frames(A, {"t": t, "x": list(row), "id": sample_id(k)})))
            block.append((t, list(row)))
            if len(block) == 12:
                msgs.append(("x", B, block[-1][0], frames(B, {"t": [b[0] for b in block],
                                                              "x": [b[1] for b in block]})))
                block = []
        else:
            _, t, y, _ = ev
            k = t_to_k[t]
            body = {"id": sample_id(k), "y": y} if k % 2 else {"t": t, "y": y}
            msgs.append(("y", A, t, frames(A, body)))
            msgs.append(("y", B, t, frames(B, {"t": t, "y": y})))
        if rng.random() < 0.02:
            last_a = next(m[2] for m in reversed(msgs) if m[0] == "x" and m[1] == A)
            bad = [[b"nope", b"\x80"], [A.encode(), b"\xc1"],
                   frames(A, {"t": math.nan, "x": [1.0, 2.0, 3.0, 4.0]}),
                   frames(A, {"t": last_a, "x": [110.0, 14.0, 1.2, 5.0]}),
                   frames(A, {"t": last_a - 600.0, "x": [110.0, 14.0, 1.2, 5.0]}),
                   frames(B, {"t": [1.0, 2.0], "x": [[1.0]]}),
                   frames(A, {"t": last_a, "y": "high"})]
            msgs.append(("bad", None, None, bad[int(rng.integers(len(bad)))]))
    # a last feature sample per model after every lab result: once it is processed, all is
    t_end = float(run.t[-1]) + 120.0
    msgs.append(("x", A, t_end, frames(A, {"t": t_end, "x": [110.0, 14.0, 1.2, 5.0]})))
    msgs.append(("x", B, t_end, frames(B, {"t": [t_end], "x": [[110.0, 14.0, 1.2, 5.0]]})))
    return msgs, run


class Killable:
    """``posteriord run`` in a subprocess on a given state folder, fed by a fresh XPUB."""

    def __init__(self, folder: Path, state_dir: Path, n: int, checkpoint_every: str):
        self.ctx = zmq.Context()
        self.feed = FeedPublisher(self.ctx)
        settings = {"feeds": [self.feed.endpoint], "publish": ipc(folder, "pub"),
                    "control": ipc(folder, "ctl"), "metrics": "", "state_dir": str(state_dir),
                    "log_level": "info", "checkpoint_every": checkpoint_every}
        path = folder / "posteriord.toml"
        path.write_text(toml_config(settings, [model_a(), model_b()]))
        self.log_path = folder / f"daemon-{n}.log"
        with open(self.log_path, "wb") as log:
            self.proc = subprocess.Popen(cli_cmd("run", "--config", str(path)),
                                         stdin=subprocess.DEVNULL, stdout=log, stderr=log,
                                         env=blas_env())
        self.ctl = Control(self.ctx, settings["control"], timeout=START_TIMEOUT)
        try:
            self.feed.wait_subscribed({A, B}, START_TIMEOUT)
        except AssertionError:
            raise AssertionError(f"daemon {n} did not subscribe; exit {self.proc.poll()}; "
                                 f"log:\n{self.log_path.read_text()}") from None

    def status(self) -> dict:
        reply = self.ctl("status")
        assert reply["ok"], reply
        return reply

    def last_sample_t(self) -> dict:
        return {m: s["last_sample_t"] for m, s in self.status()["models"].items()}

    def kill(self) -> None:
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(TIMEOUT)
        self.close()

    def close(self) -> None:
        self.ctl.sock.close(linger=0)
        self.feed.sock.close(linger=0)
        self.ctx.term()


def plain(obj):
    """nan as None, the way control replies carry it."""
    if isinstance(obj, float):
        return None if math.isnan(obj) else obj
    if isinstance(obj, dict):
        return {k: plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [plain(v) for v in obj]
    return obj


def resume_index(msgs: list[tuple], last: dict) -> int:
    """First message the daemon may not have processed: the one after the last feature
    sample it holds (features of a model arrive in time order; every message before a
    processed one was processed, the daemon handles them in order)."""
    done = -1
    for i, (kind, model, t, _) in enumerate(msgs):
        if kind == "x" and last.get(model) is not None and t <= last[model]:
            done = i
    return done + 1


def test_sigkill_at_random_points_then_resume_gives_the_uninterrupted_state(tmp_path):
    msgs, _ = kill_stream()
    assert len(msgs) > 3000
    ref = reference_run(tmp_path, msgs)
    assert ref.runners[A].rejected["gated"] >= 1 and ref.runners[A].n_learned > 50
    kill_and_resume(tmp_path, msgs, ref)


def shuffled_labs(msgs: list[tuple], seed: int, size: int = 4) -> list[tuple]:
    """The stream with its lab results reported in batches of ``size``, each batch in a
    random order once its last result is due (the models' features in between go first)."""
    rng = np.random.default_rng(seed)
    out: list[tuple] = []
    batch: list[list[tuple]] = []
    i = 0
    while i < len(msgs):
        m = msgs[i]
        if m[0] != "y":
            out.append(m)
            i += 1
            continue
        pair = [m]  # the same result for both models, one after the other
        while i + len(pair) < len(msgs) and msgs[i + len(pair)][0] == "y" and \
                msgs[i + len(pair)][2] == m[2]:
            pair.append(msgs[i + len(pair)])
        i += len(pair)
        batch.append(pair)
        if len(batch) == size:
            for k in rng.permutation(size):
                out += batch[k]
            batch = []
    for pair in batch:
        out += pair
    # the closing feature samples stay last
    tail = [m for m in out if m[0] == "x" and m[2] == msgs[-1][2]]
    return [m for m in out if m not in tail] + tail


def test_sigkill_amid_out_of_order_lab_results_resumes_to_the_same_bits(tmp_path):
    msgs = shuffled_labs(kill_stream()[0], seed=29, size=3)
    ref = reference_run(tmp_path, msgs)
    for m in (A, B):
        assert ref.runners[m].n_late > 10 and ref.runners[m].rejected["lab_out_of_order"] == 0
        assert ref.runners[m].rejected["lab_too_old"] == 0
    # kill points where both log-only runs see lab results
    kill_and_resume(tmp_path, msgs, ref, seed=9)


def reference_run(tmp_path: Path, msgs: list[tuple]) -> Service:
    """The uninterrupted reference: the stream through one in-process service."""
    ref = Service(loads(config_text(tmp_path / "unused", [model_a(), model_b()]), "<ref>"))
    ref.pub = Recorder()
    for i in range(0, len(msgs), 64):
        ref.process([m[3] for m in msgs[i:i + 64]])
    return ref


def kill_and_resume(tmp_path: Path, msgs: list[tuple], ref: Service, seed: int = 7) -> None:
    """Feed ``msgs`` to daemon subprocesses killed at random points, each resuming where
    the last left off; the final state must be the reference's, bit for bit."""

    rng = np.random.default_rng(seed)
    kills = np.sort(rng.choice(np.arange(300, len(msgs) - 100, 50), size=6, replace=False))
    # per run: checkpoint interval, and whether it works through its input before the kill;
    # runs 1 and 4 checkpoint only at start-up, so all they learn is in the log alone
    plan = [(str(rng.choice(["100ms", "300ms"])), bool(rng.random() < 0.5)) for _ in kills]
    plan[1] = plan[4] = ("1h", True)
    plan.append(("300ms", True))
    state = tmp_path / "state"
    sent = 0  # messages sent at least once
    resent = 0
    logged_only = {}  # run -> records it wrote after its only checkpoint
    for n, stop in enumerate([*kills.tolist(), len(msgs)]):
        every, settle = plan[n]
        d = Killable(tmp_path, state, n, every)
        status = d.status()
        if n - 1 in logged_only:
            # everything the previous run learned came back from the log, nothing else
            assert status["state"]["replayed"] == logged_only[n - 1] > 0, n
        i0 = resume_index(msgs, d.last_sample_t())
        assert i0 <= sent  # it cannot hold what was never sent
        resent += sent - i0
        for m in msgs[i0:stop]:
            d.feed.send_frames(m[3])
        sent = max(sent, stop)
        if stop == len(msgs):
            want = {A: msgs[-2][2], B: msgs[-1][2]}
            wait_until(lambda d=d, want=want: d.last_sample_t() == want, START_TIMEOUT,
                       "the whole stream processed")
            posterior = {m: d.ctl("posterior", model=m) for m in (A, B)}
            d.proc.send_signal(signal.SIGTERM)
            assert d.proc.wait(TIMEOUT) == 0
            d.close()
            break
        if settle:
            # let it work through what it has, and maybe checkpoint, before the kill
            last = next(m for m in reversed(msgs[:stop]) if m[0] == "x")
            wait_until(lambda d=d, last=last: (d.last_sample_t()[last[1]] or 0) >= last[2],
                       START_TIMEOUT, "processed")
            if every == "1h":
                logged_only[n] = d.status()["state"]["records"]
            time.sleep(float(rng.uniform(0.0, 0.5)))
        d.kill()

    assert len(logged_only) == 2
    assert resent > 0
    for m in (A, B):
        exp = tmp_path / f"{m}.export"
        assert cli.main(["state", "export", str(state), m, str(exp)]) == 0
        got = read_export(str(exp))["state"]
        want = ref.runners[m].to_state()
        pack = msgpack.packb
        assert pack(got["posterior"]) == pack(want["posterior"]), m
        assert pack({k: got["monitor"][k] for k in LAB_DRIVEN}) == \
            pack({k: want["monitor"][k] for k in LAB_DRIVEN}), m
        for key in ("last_lab_t", "last_offered_t", "frozen"):
            assert got[key] == want[key], (m, key)
        assert got["counters"]["n_learned"] == want["counters"]["n_learned"]
        assert got["rejected"].get("gated", 0) == want["rejected"].get("gated", 0)
        # the control socket's view too (nan shown as nil)
        view = plain(ref.runners[m].posterior())
        for key in ("mean", "cov", "noise_var", "dof", "updates", "t_last"):
            assert posterior[m][key] == view[key], (m, key)
