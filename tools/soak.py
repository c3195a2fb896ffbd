#!/usr/bin/env python3
"""Soak run: a steady feed with bad input mixed in, random SIGKILLs and restarts.

Two ``posteriord run`` subprocesses get the same recorded plant stream (simulated data,
:mod:`daemon.workbench.plant`) at a steady rate: the *victim* is killed with SIGKILL at random times
and restarted on its state folder, then fed again from the first message it may not have
processed (the one after the last feature sample it holds, by its ``status`` reply); the
*reference* runs without interruption. At the end both are stopped with SIGTERM, each
model's state is exported from both folders (``posteriord state export``) and compared bit
for bit: the posterior, and the detector state learned from lab results. Exit status 1 when
they differ (or a daemon failed), 0 otherwise.

    OPENBLAS_NUM_THREADS=1 .venv/bin/python tools/soak.py [--seconds 60] [--rate 300]

Reported: messages sent (first sends and re-sends), predictions received from the victim,
lab results learned, rejections by reason, restarts, and the resident memory (VmRSS of
/proc/<pid>/status) of both daemons shortly after start and at the end.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import signal
import subprocess
import sys
import tempfile
import time

import msgpack
import numpy as np
import zmq

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

from daemon.runtime.state_commands import read_export  # noqa: E402
from daemon.workbench import plant  # noqa: E402

SINGLE = "soak.single"   # one message per feature sample, ids on them, some results by id
BLOCKS = "soak.blocks"   # blocks of 12 feature samples, identity basis
BLOCK = 12
START_TIMEOUT = 60.0
# the detector state that follows the lab results alone (trust follows predictions too)
LAB_DRIVEN = ("cusum", "spread", "calibration", "std", "region", "drift", "labs_since_shift",
              "labs_since_spread", "lab_active")


def _pack(body: dict) -> bytes:
    return msgpack.packb(body, use_bin_type=True)


def _inputs() -> str:
    return ", ".join(f'{{ tag = "{tag}", lo = {lo}, hi = {hi} }}'
                     for tag, (lo, hi) in plant.RANGES.items())


def config_text(feed: str, folder: str, name: str, checkpoint_every: str) -> str:
    """The daemon config of one side (ipc endpoints in ``folder``)."""
    return f"""[daemon]
feeds = ["{feed}"]
publish = "ipc://{folder}/{name}.pub"
control = "ipc://{folder}/{name}.ctl"
metrics = ""
state_dir = "{folder}/{name}.state"
log_level = "info"
checkpoint_every = "{checkpoint_every}"

[[model]]
name = "{SINGLE}"
inputs = [ {_inputs()} ]
[model.basis]
degree = 2
[model.prior]
alpha = 1e-4
[model.noise]
guess = 10.0
[model.forgetting]
half_life = "2d"

[[model]]
name = "{BLOCKS}"
inputs = [ {_inputs()} ]
[model.basis]
kind = "identity"
[model.prior]
alpha = 1e-6
[model.noise]
guess = 10.0
[model.forgetting]
half_life = "2d"
[model.lab]
tolerance = "5m"
"""


def build_stream(n_messages: int, seed: int, bad_share: float) -> list[tuple]:
    """``(kind, model, t, frames)`` messages: kind "x" (features), "y" (lab) or "bad"."""
    period = 60.0
    days = max(1.0, n_messages * period / 86400.0 / 1.05)
    run = plant.simulate(plant.Scenario(seed=seed, days=days, sample_period_s=period,
                                        lab_period_h=1.0, lab_delay_h=(0.5, 1.5),
                                        blunders=max(1, int(days)), fouling_ppm_per_day=1.0))
    rng = np.random.default_rng(seed)
    t_to_k = {t: k for k, t in enumerate(run.t.tolist())}
    msgs: list[tuple] = []
    block: list = []
    last_t = None
    for ev in plant.events(run):
        if ev[0] == "x":
            _, t, row = ev
            k = t_to_k[t]
            msgs.append(("x", SINGLE, t, [SINGLE.encode(),
                                          _pack({"t": t, "x": list(row), "id": k})]))
            last_t = t
            block.append((t, list(row)))
            if len(block) == BLOCK:
                msgs.append(("x", BLOCKS, t, [BLOCKS.encode(), _pack(
                    {"t": [b[0] for b in block], "x": [b[1] for b in block]})]))
                block = []
        else:
            _, t, y, _ = ev
            k = t_to_k[t]
            body = {"id": k, "y": y} if k % 3 == 0 else {"t": t, "y": y}
            msgs.append(("y", SINGLE, t, [SINGLE.encode(), _pack(body)]))
            msgs.append(("y", BLOCKS, t, [BLOCKS.encode(), _pack({"t": t, "y": y})]))
        if last_t is not None and rng.random() < bad_share:
            bad = [[b"nobody", _pack({"t": 1.0, "x": [1.0]})],
                   [SINGLE.encode(), b"\xc1\xc1"],
                   [SINGLE.encode(), _pack({"t": math.nan, "x": [1.0, 2.0, 3.0, 4.0]})],
                   [SINGLE.encode(), _pack({"t": last_t, "x": [110.0, 14.0, 1.2, 5.0]})],
                   [SINGLE.encode(), _pack({"t": last_t - 3600.0, "x": [1.0, 2, 3, 4]})],
                   [SINGLE.encode(), _pack({"t": last_t, "x": [1e308, 1e308, 1e308, 1e308]})],
                   [BLOCKS.encode(), _pack({"t": [1.0, 2.0], "x": [[1.0]]})],
                   [SINGLE.encode(), _pack({"t": last_t, "y": "high"})],
                   [SINGLE.encode(), _pack({"id": -1, "y": 150.0})],
                   [SINGLE.encode(), b"\x93\x01\x02\x03"],
                   [b"", b""], [SINGLE.encode()]]
            msgs.append(("bad", None, None, bad[int(rng.integers(len(bad)))]))
        if len(msgs) >= n_messages:
            break
    t_end = (last_t or 0.0) + period
    msgs.append(("x", SINGLE, t_end, [SINGLE.encode(),
                                      _pack({"t": t_end, "x": [110.0, 14.0, 1.2, 5.0]})]))
    msgs.append(("x", BLOCKS, t_end, [BLOCKS.encode(),
                                      _pack({"t": [t_end], "x": [[110.0, 14.0, 1.2, 5.0]]})]))
    return msgs


def resume_index(msgs: list[tuple], last: dict) -> int:
    """The message after the last feature sample the daemon holds (see the module doc)."""
    done = -1
    for i, (kind, model, t, _) in enumerate(msgs):
        if kind == "x" and last.get(model) is not None and t <= last[model]:
            done = i
    return done + 1


def rss_kib(pid: int) -> int | None:
    try:
        with open(f"/proc/{pid}/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except OSError:
        return None
    return None


class Daemon:
    """One ``posteriord run`` subprocess with a fresh XPUB feed and a control client."""

    def __init__(self, ctx: zmq.Context, folder: str, name: str, checkpoint_every: str,
                 log, env: dict):
        self.ctx, self.folder, self.name = ctx, folder, name
        self.feed = ctx.socket(zmq.XPUB)
        self.feed.setsockopt(zmq.LINGER, 0)
        self.feed.setsockopt(zmq.SNDHWM, 0)
        port = self.feed.bind_to_random_port("tcp://127.0.0.1")
        path = os.path.join(folder, f"{name}.toml")
        with open(path, "w") as f:
            f.write(config_text(f"tcp://127.0.0.1:{port}", folder, name, checkpoint_every))
        self.proc = subprocess.Popen([sys.executable, "-m", "daemon.cli", "run", "--config",
                                      path], stdin=subprocess.DEVNULL, stdout=log, stderr=log,
                                     env=env, cwd=os.path.dirname(HERE))
        self.ctl = ctx.socket(zmq.REQ)
        self.ctl.setsockopt(zmq.LINGER, 0)
        self.ctl.setsockopt(zmq.RCVTIMEO, int(START_TIMEOUT * 1000))
        self.ctl.connect(f"ipc://{folder}/{name}.ctl")
        wanted = {SINGLE, BLOCKS}
        seen: set[str] = set()
        deadline = time.monotonic() + START_TIMEOUT
        while not wanted <= seen:
            if self.proc.poll() is not None:
                raise RuntimeError(f"{name} exited with {self.proc.returncode} at start")
            if time.monotonic() > deadline:
                raise RuntimeError(f"{name} did not subscribe within {START_TIMEOUT} s")
            if self.feed.poll(100):
                raw = self.feed.recv()
                if raw[:1] == b"\x01":
                    seen.add(raw[1:].decode())

    def command(self, cmd: str, **fields) -> dict:
        self.ctl.send(_pack({"cmd": cmd, **fields}))
        return msgpack.unpackb(self.ctl.recv(), raw=False)

    def last_sample_t(self) -> dict:
        reply = self.command("status")
        return {m: s["last_sample_t"] for m, s in reply["models"].items()}

    def send(self, frames) -> None:
        self.feed.send_multipart(frames)

    def close_sockets(self) -> None:
        self.ctl.close(linger=0)
        self.feed.close(linger=0)


def wait_processed(d: Daemon, want: dict, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while d.last_sample_t() != want:
        if time.monotonic() > deadline:
            raise RuntimeError(f"{d.name} did not process the whole stream within {timeout} s")
        time.sleep(0.05)


def export(folder: str, name: str, model: str) -> dict:
    out = os.path.join(folder, f"{name}.{model}.export")
    done = subprocess.run([sys.executable, "-m", "daemon.cli", "state", "export",
                           os.path.join(folder, f"{name}.state"), model, out],
                          capture_output=True, text=True, cwd=os.path.dirname(HERE))
    if done.returncode != 0:
        raise RuntimeError(f"state export of {model} from {name} failed: {done.stderr}")
    return read_export(out)["state"]


def soak(args) -> dict:
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    n = int(args.rate * args.seconds)
    msgs = build_stream(n, args.seed, args.bad)
    rng = np.random.default_rng(args.seed + 1)
    ctx = zmq.Context()
    folder = tempfile.mkdtemp(prefix="pd-soak-")
    logs = {name: open(os.path.join(folder, f"{name}.log"), "ab") for name in ("victim", "ref")}
    report: dict = {"folder": folder, "messages_in_stream": len(msgs), "rate": args.rate,
                    "seconds": args.seconds}
    try:
        ref = Daemon(ctx, folder, "ref", "5m", logs["ref"], env)
        victim = Daemon(ctx, folder, "victim", args.checkpoint_every, logs["victim"], env)
        preds = ctx.socket(zmq.SUB)
        preds.setsockopt(zmq.RCVHWM, 0)
        preds.setsockopt(zmq.SUBSCRIBE, b"pred/")
        preds.connect(f"ipc://{folder}/victim.pub")
        time.sleep(0.3)  # the prediction subscriber joins (its count is a report, not a check)
        rss = {"ref_start": rss_kib(ref.proc.pid), "victim_start": rss_kib(victim.proc.pid)}
        t0 = time.monotonic()
        next_kill = t0 + float(rng.exponential(args.kill_every))
        sent_first = resent = restarts = predictions = 0
        pos = 0  # next message of the stream, for both daemons
        while pos < len(msgs):
            now = time.monotonic()
            due = min(len(msgs), int((now - t0) * args.rate) + 1)
            for m in msgs[pos:due]:
                ref.send(m[3])
                victim.send(m[3])
            sent_first += due - pos
            pos = due
            if "ref_warm" not in rss and pos >= len(msgs) // 5:
                # after warm-up: buffers filled to their bounds, caches built
                rss["ref_warm"] = rss_kib(ref.proc.pid)
            while preds.poll(0):
                topic, body = preds.recv_multipart()
                msg = msgpack.unpackb(body, raw=False)
                predictions += len(msg["t"]) if isinstance(msg["t"], list) else 1
            if now >= next_kill and pos < len(msgs) - 1:
                victim.proc.send_signal(signal.SIGKILL)
                victim.proc.wait(10)
                victim.close_sockets()
                restarts += 1
                victim = Daemon(ctx, folder, "victim", args.checkpoint_every, logs["victim"],
                                env)
                i0 = resume_index(msgs, victim.last_sample_t())
                if i0 > pos:
                    raise RuntimeError(f"the victim holds message {i0}, only {pos} were sent")
                for m in msgs[i0:pos]:
                    victim.send(m[3])
                resent += pos - i0
                next_kill = time.monotonic() + float(rng.exponential(args.kill_every))
            time.sleep(0.002)
        want = {SINGLE: msgs[-2][2], BLOCKS: msgs[-1][2]}
        for d in (ref, victim):
            wait_processed(d, want, 120.0)
        while preds.poll(200):
            topic, body = preds.recv_multipart()
            msg = msgpack.unpackb(body, raw=False)
            predictions += len(msg["t"]) if isinstance(msg["t"], list) else 1
        rss["ref_end"], rss["victim_end"] = rss_kib(ref.proc.pid), rss_kib(victim.proc.pid)
        status = {d.name: d.command("status")["models"] for d in (ref, victim)}
        exits = {}
        for d in (ref, victim):
            d.proc.send_signal(signal.SIGTERM)
            exits[d.name] = d.proc.wait(30)
            d.close_sockets()
        preds.close(linger=0)
        report.update(wall_seconds=round(time.monotonic() - t0, 1), sent=sent_first,
                      resent=resent, restarts=restarts, predictions_received=predictions,
                      rss_kib=rss, exit_codes=exits)
        report["learned"] = {name: {m: s["learned"] for m, s in st.items()}
                             for name, st in status.items()}
        report["rejected"] = {name: {m: s["rejected"] for m, s in st.items()}
                              for name, st in status.items()}
        report["equal"] = {}
        for model in (SINGLE, BLOCKS):
            a, b = export(folder, "victim", model), export(folder, "ref", model)
            same = _pack(a["posterior"]) == _pack(b["posterior"]) and \
                _pack({k: a["monitor"][k] for k in LAB_DRIVEN}) == \
                _pack({k: b["monitor"][k] for k in LAB_DRIVEN}) and \
                a["counters"]["n_learned"] == b["counters"]["n_learned"]
            report["equal"][model] = same
        report["ok"] = all(report["equal"].values()) and set(exits.values()) == {0}
    finally:
        for f in logs.values():
            f.close()
        ctx.term()
    return report


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seconds", type=float, default=60.0, help="length of the feed at --rate")
    p.add_argument("--rate", type=float, default=300.0, help="messages per second")
    p.add_argument("--kill-every", type=float, default=6.0,
                   help="mean seconds between SIGKILLs (exponential)")
    p.add_argument("--checkpoint-every", default="2s", help="the victim's checkpoint interval")
    p.add_argument("--bad", type=float, default=0.02, help="share of bad messages")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    args = p.parse_args(argv)
    try:
        report = soak(args)
    except RuntimeError as exc:
        print(f"soak: {exc}", file=sys.stderr)
        return 1
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        print(f"soak {report['seconds']:g} s at {report['rate']:g} msg/s "
              f"(wall {report['wall_seconds']} s), logs and folders in {report['folder']}")
        print(f"  messages sent        {report['sent']} (+ {report['resent']} re-sent after "
              f"restarts)")
        print(f"  restarts (SIGKILL)   {report['restarts']}")
        print(f"  predictions received {report['predictions_received']} (from the victim)")
        for name in ("victim", "ref"):
            print(f"  {name:<6} learned      {report['learned'][name]}")
            print(f"  {name:<6} rejected     {report['rejected'][name]}")
        r = report["rss_kib"]
        print(f"  VmRSS kiB            victim {r['victim_start']} -> {r['victim_end']} "
              f"(since its last restart), reference {r['ref_start']} -> {r['ref_end']}")
        if r.get("ref_warm") and r.get("ref_end"):
            growth = 100.0 * (r["ref_end"] - r["ref_warm"]) / r["ref_warm"]
            print(f"  reference after warm-up (first 20% of the feed): {r['ref_warm']} -> "
                  f"{r['ref_end']} kiB ({growth:+.1f}%)")
        print(f"  exit codes           {report['exit_codes']}")
        print(f"  final state equal    {report['equal']}")
        print("OK" if report["ok"] else "DIVERGED")
    return 0 if report["ok"] else 1


if __name__ == "__main__":
    sys.exit(main())
