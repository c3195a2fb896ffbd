#!/usr/bin/env python3
"""Checkpoint pause and restart time of the state folder, against floors measured in the same run.

A service (in process, no sockets, the predictions thrown away) runs ``--models`` trained models
of 4 inputs (quadratic basis, 15 terms, alerts on) with full feature buffers (``keep_count``
rows each) and ``--labs`` lab results per model, all in the write-ahead log (WAL). Then:

1. checkpoint pause: the periodic checkpoint is started the way the loop starts it
   (``Service._housekeeping`` when it is due), the call is timed (the loop's pause), and the
   loop carries on with feature messages until the checkpoint is durable; the longest loop turn
   while it is written is reported next to the longest turn of a quiet stretch of the same
   length. Floor: the plain encode (``msgpack``) of the same state body, which any checkpoint
   written on the loop thread pays at least;
2. restart: a copy of the folder as a crash leaves it (every record after the start-up
   checkpoint only in the WAL), opened by a fresh service (recovery, replay, the start-up
   checkpoint). Floor: the raw msgpack decode of the same WAL payloads. With ``--trigger`` the
   training runs the loop's housekeeping after each batch, so the tree's checkpoint-by-size
   setting applies (the restart a daemon with the default settings sees after that many
   records);

and, with ``--base PATH`` (a checkout of another version, e.g. ``git worktree add /tmp/base
main``, with the C kernel copied in), the same measurements of that code in a subprocess, for
an old-versus-new table. ``--repeats`` gives the spread.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=$PWD .venv/bin/python tools/bench_state.py \\
        [--models 100 --labs 1000] [--base /tmp/store_base] [--quick]
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))


def toml(state: str, n_models: int, keep_count: int, **daemon) -> str:
    lines = ["[daemon]", f'state_dir = "{state}"', 'metrics = ""', 'log_level = "error"']
    lines += [f"{k} = {json.dumps(v)}" for k, v in daemon.items()]
    inputs = ", ".join(f'{{ tag = "{c}", lo = 0, hi = 10 }}' for c in "ABCD")
    for i in range(n_models):
        lines += ["", "[[model]]", f'name = "m{i:04d}"', f"inputs = [{inputs}]",
                  "[model.basis]", 'kind = "polynomial"', "degree = 2",
                  "[model.prior]", "alpha = 1e-4", "[model.noise]", "guess = 1.0",
                  "strength = 2.0", "[model.lab]", 'keep = "12h"',
                  f"keep_count = {keep_count}", 'tolerance = "2m"']
    return "\n".join(lines) + "\n"


class Null:
    def send_multipart(self, parts) -> None:
        pass

    def close(self, linger=None) -> None:
        pass


def feature_batch(rng, n_models: int, t0: float, rows: int):
    import msgpack

    out = []
    for i in range(n_models):
        ts = [t0 + j for j in range(rows)]
        X = rng.uniform(0.0, 10.0, size=(rows, 4))
        out.append((f"m{i:04d}".encode(), ts, X,
                    [f"m{i:04d}".encode(), msgpack.packb({"t": ts, "x": X.tolist()})]))
    return out


def worker(args) -> dict:
    """The measurements with whatever code is first on sys.path; a dict of figures."""
    import msgpack
    import numpy as np

    from daemon.config import loads
    from daemon.runtime import wire
    from daemon.runtime.service import Service

    logging.disable(logging.CRITICAL)
    has_trigger = _has_setting()
    tmp = tempfile.mkdtemp(prefix="pd-bench-state-")
    daemon = {"checkpoint_every": "100h"}
    if has_trigger and not args.trigger:
        daemon["checkpoint_wal_bytes"] = 0
    text = toml(os.path.join(tmp, "state"), args.models, args.keep, **daemon)
    svc = Service(loads(text, "<bench>"))
    svc.open_state()
    svc.pub = Null()
    rng = np.random.default_rng(1)
    coef = rng.normal(size=4)
    rows = max(1, args.keep // args.labs) if args.labs else args.keep
    t = 1.0
    t_train = time.perf_counter()
    for _ in range(max(args.labs, 1)):
        batch = []
        for name, ts, X, frames in feature_batch(rng, args.models, t, rows):
            batch.append(frames)
            if args.labs:
                y = float(X[-1] @ coef + rng.normal())
                batch.append([name, msgpack.packb({"t": ts[-1], "y": y})])
        svc.process(batch)
        if args.trigger:
            svc._housekeeping()
        t += rows
    # fill the buffers to keep_count rows
    while t < args.keep:
        svc.process([f for *_, f in feature_batch(rng, args.models, t, 500)])
        t += 500
    if svc.store.checkpoint_running if hasattr(svc.store, "checkpoint_running") else False:
        svc._checkpoint_polled(svc.store.wait_checkpoint())
    svc.store.sync()
    train_s = time.perf_counter() - t_train
    crash = os.path.join(tmp, "crash")
    shutil.copytree(svc.store.path, crash)
    out = {"records": svc.wal_records, "train_s": train_s,
           "after_checkpoint": svc.store.last_seq - (svc.checkpoint_seq or 0)}

    # ------------------------------------------------------------ checkpoint pause
    pauses, floors, during, quiet, done_s, sizes = [], [], [], [], [], []
    during_med, quiet_med = [], []
    small = [f for *_, f in feature_batch(rng, args.models, t, 1)]
    for _ in range(args.repeats):
        import gc
        gc.disable()
        t0 = time.perf_counter()
        body = svc.state_body()
        data = wire.pack(body)
        floors.append(time.perf_counter() - t0)
        sizes.append(len(data))
        del body, data
        gc.enable()
        # the loop's turn that starts the periodic checkpoint
        svc._dirty = True
        svc._last_checkpoint = -1e9
        t0 = time.perf_counter()
        svc._housekeeping()
        pauses.append(time.perf_counter() - t0)
        turns, t_start = [], t0
        while getattr(svc.store, "checkpoint_running", False):
            t += 1.0
            small = [f for *_, f in feature_batch(rng, args.models, t, 1)]
            a = time.perf_counter()
            svc.process(small)
            svc._housekeeping()
            turns.append(time.perf_counter() - a)
        done_s.append(time.perf_counter() - t_start)
        during.append(max(turns, default=0.0))
        during_med.append(statistics.median(turns) if turns else 0.0)
        # a quiet stretch as long, for the loop's own jitter
        turns, a0 = [], time.perf_counter()
        while time.perf_counter() - a0 < max(done_s[-1], 0.2):
            t += 1.0
            small = [f for *_, f in feature_batch(rng, args.models, t, 1)]
            a = time.perf_counter()
            svc.process(small)
            turns.append(time.perf_counter() - a)
        quiet.append(max(turns))
        quiet_med.append(statistics.median(turns))
    out.update(pause=pauses, encode_floor=floors, during=during, quiet=quiet,
               during_med=during_med, quiet_med=quiet_med,
               durable_after=done_s, checkpoint_bytes=sizes)
    svc.close()

    # ------------------------------------------------------------ restart
    restarts, decodes = [], []
    for _ in range(args.repeats):
        folder = os.path.join(tmp, "restart")
        shutil.rmtree(folder, ignore_errors=True)
        shutil.copytree(crash, folder)
        # floor: the raw decode of the WAL payloads (framing skipped, no CRC)
        t0 = time.perf_counter()
        n = 0
        for name in sorted(os.listdir(folder)):
            if name.startswith("wal-") and name.endswith(".log"):
                with open(os.path.join(folder, name), "rb") as f:
                    buf = f.read()
                pos = 0
                while pos < len(buf):
                    length = int.from_bytes(buf[pos:pos + 4], "little")
                    msgpack.unpackb(buf[pos + 8:pos + 8 + length])
                    pos += 8 + length
                    n += 1
        decodes.append(time.perf_counter() - t0)
        back = Service(loads(text.replace(os.path.join(tmp, "state"), folder), "<bench>"))
        t0 = time.perf_counter()
        back.open_state()
        restarts.append(time.perf_counter() - t0)
        out["replayed"] = back.replayed
        out["wal_records_read"] = n
        back.close()
    out.update(restart=restarts, decode_floor=decodes)
    shutil.rmtree(tmp, ignore_errors=True)
    return out


def _has_setting() -> bool:
    from daemon.config import settings

    return any(s.key == "checkpoint_wal_bytes" for s in settings.SETTINGS)


def spread(xs, scale=1.0, fmt="{:.1f}") -> str:
    xs = sorted(x * scale for x in xs)
    med = statistics.median(xs)
    return f"{fmt.format(med)} [{fmt.format(xs[0])}..{fmt.format(xs[-1])}]"


def report(label: str, r: dict) -> None:
    ratio_p = [p / f for p, f in zip(r["pause"], r["encode_floor"], strict=True)]
    ratio_r = [a / b for a, b in zip(r["restart"], r["decode_floor"], strict=True)]
    print(f"\n{label}: {r['records']} WAL records written, {r['after_checkpoint']} after the "
          f"last checkpoint, {r['replayed']} replayed on restart "
          f"(checkpoint {r['checkpoint_bytes'][0] / 1e6:.1f} MB)")
    print(f"  loop pause to start a checkpoint   {spread(r['pause'], 1e3)} ms")
    print(f"  plain encode of the state (floor)  {spread(r['encode_floor'], 1e3)} ms"
          f"   pause/floor {spread(ratio_p, 1.0, '{:.3f}')}")
    print(f"  loop turn while writing, longest   {spread(r['during'], 1e3)} ms "
          f"(quiet stretch {spread(r['quiet'], 1e3)} ms); median "
          f"{spread(r['during_med'], 1e3, '{:.2f}')} ms (quiet "
          f"{spread(r['quiet_med'], 1e3, '{:.2f}')} ms); durable after "
          f"{spread(r['durable_after'], 1.0, '{:.2f}')} s")
    print(f"  restart (recover, replay, ckpt)    {spread(r['restart'], 1.0, '{:.3f}')} s")
    print(f"  raw decode of the WAL (floor)      {spread(r['decode_floor'], 1.0, '{:.3f}')} s"
          f"   restart/floor {spread(ratio_r, 1.0, '{:.1f}')}")


def run_worker(args, path: str, trigger: bool) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", "--models", str(args.models),
           "--labs", str(args.labs), "--keep", str(args.keep), "--repeats", str(args.repeats)]
    if trigger:
        cmd.append("--trigger")
    env = dict(os.environ, PYTHONPATH=path, OPENBLAS_NUM_THREADS="1")
    res = subprocess.run(cmd, env=env, capture_output=True, text=True, check=False)
    if res.returncode != 0:
        raise SystemExit(f"worker on {path} failed:\n{res.stderr[-3000:]}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--models", type=int, default=100)
    ap.add_argument("--labs", type=int, default=1000, help="lab results per model")
    ap.add_argument("--keep", type=int, default=5000, help="feature rows per model")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--base", help="checkout of the version to compare with")
    ap.add_argument("--quick", action="store_true", help="20 models, 100 labs, 2 repeats")
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--trigger", action="store_true",
                    help="run the loop's housekeeping while training (checkpoint by size)")
    args = ap.parse_args()
    if args.quick:
        args.models, args.labs, args.repeats = 20, 100, 2
    if args.worker:
        print(json.dumps(worker(args)))
        return
    here = os.path.dirname(HERE)
    print(f"{args.models} models x {args.labs} lab results, {args.keep} feature rows each; "
          f"{args.repeats} repeats, median [min..max]")
    runs = [("this tree, all records in the WAL (no size trigger)", here, False),
            ("this tree, default settings (checkpoint by WAL size)", here, True)]
    if args.base:
        runs.append((f"base {args.base}", os.path.abspath(args.base), False))
    results = {}
    for label, path, trigger in runs:
        results[label] = r = run_worker(args, path, trigger)
        report(label, r)
    if args.base:
        new, old = results[runs[1][0]], results[runs[2][0]]
        med = statistics.median
        print(f"\nold/new: checkpoint pause {med(old['pause']) / med(new['pause']):.0f}x, "
              f"restart {med(old['restart']) / med(new['restart']):.1f}x (default settings)")


if __name__ == "__main__":
    main()
