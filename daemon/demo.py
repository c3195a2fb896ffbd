"""The demo: the fictitious C-301 column on an accelerated feed, the daemon learning from it.

Runs the simulator in :mod:`daemon.plant`, starts ``posteriord run`` as a subprocess on the
built-in demo model with free loopback ports and a temporary state folder, publishes the
simulated feed (one feature sample a minute of simulated time, lab results arriving hours
after the sample was drawn) compressed into about a minute of wall time, prints a line per
lab result as the daemon reports it, and a summary at the end. All data are simulated.
"""

from __future__ import annotations

import argparse
import math
import os
import re
import signal
import socket
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime
from importlib import resources

import numpy as np
import zmq

from daemon import plant, wire

MODEL = "c301.bottoms_solvent"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def demo_toml(feed: str, publish: str, control: str, metrics: str, state_dir: str) -> str:
    """The packaged demo config with the daemon's endpoints replaced."""
    text = resources.files("daemon").joinpath("demo.toml").read_text()
    subs = {"feeds": f'["{feed}"]', "publish": f'"{publish}"', "control": f'"{control}"',
            "metrics": f'"{metrics}"', "state_dir": f'"{state_dir}"', "log_level": '"warning"'}
    for key, value in subs.items():
        text, n = re.subn(rf"(?m)^{key}\s*=.*$", f"{key} = {value}", text)
        if n != 1:
            raise RuntimeError(f"demo.toml has no single '{key}' line")
    return text


def _stamp(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M")


class Tally:
    """What the demo saw come back from the daemon."""

    def __init__(self, run: plant.Run):
        self.run = run
        self.blunder_t = set(run.lab_t[run.lab_blunder].tolist())
        self.fits: list[dict] = []
        self.pred_t: list[float] = []
        self.pred_mean: list[float] = []
        self.pred_std: list[float] = []
        self.status: dict[str, int] = {}

    def take(self, topic: bytes, body: dict, quiet: bool) -> None:
        if topic.startswith(b"pred/"):
            self.pred_t.append(body["t"])
            self.pred_mean.append(body["mean"])
            self.pred_std.append(body["std"])
            self.status[body["status"]] = self.status.get(body["status"], 0) + 1
        elif topic.startswith(b"fit/"):
            self.fits.append(body)
            if not quiet:
                print(self.line(body), flush=True)

    def line(self, f: dict) -> str:
        mark = " (blunder injected)" if f["t"] in self.blunder_t else ""
        if f["accepted"]:
            what = "learned" if f["reason"] != "gate_open" else "learned (gate opened)"
        else:
            what = f"REJECTED by the gate{mark}"
            mark = ""
        pm, ps, z = f["pred_mean"], f["pred_std"], f["z"]
        pred = ("no prediction yet" if pm is None or not math.isfinite(pm)
                else f"pred {pm:6.1f} ± {ps:5.1f}" if math.isfinite(ps)
                else f"pred {pm:6.1f} ± inf ")
        zs = f"z {z:+5.2f}" if z is not None and math.isfinite(z) else "z   -  "
        return (f"{_stamp(f['t'])}  lab {f['y']:6.1f} ppm  {pred}  {zs}  {what}{mark}"
                f"  n={f['n']}")

    def summary(self) -> str:
        fits = [f for f in self.fits if f["pred_mean"] is not None
                and math.isfinite(f["pred_mean"]) and math.isfinite(f["pred_std"])]
        clean = [f for f in fits if f["t"] not in self.blunder_t]
        err = np.array([f["y"] - f["pred_mean"] for f in clean])
        z = np.array([f["z"] for f in clean])
        rejected = [f for f in self.fits if not f["accepted"]]
        caught = sum(1 for f in rejected if f["t"] in self.blunder_t)
        tt = np.array(self.pred_t)
        mean = np.array(self.pred_mean, dtype=float)
        idx = np.searchsorted(self.run.t, tt)
        ok = (idx < len(self.run.t)) & np.isfinite(mean)
        truth_err = mean[ok] - self.run.truth_y[idx[ok]]
        lines = [
            "",
            "Summary (simulated data from a fictitious unit, not plant data)",
            f"  feature samples sent      {len(self.run.t):8d}",
            f"  predictions received      {len(self.pred_t):8d}   by status: "
            + ", ".join(f"{k} {v}" for k, v in sorted(self.status.items())),
            f"  lab results reported      {len(self.fits):8d}   learned "
            f"{sum(1 for f in self.fits if f['accepted'])}, rejected by the gate "
            f"{len(rejected)} ({caught} of {len(self.blunder_t)} injected blunders)",
        ]
        if len(err):
            cover = np.mean(np.abs(z) <= 1.959964)
            lines += [
                f"  one-step-ahead RMSE vs lab {math.sqrt(np.mean(err ** 2)):7.2f} ppm "
                f"(MAE {np.mean(np.abs(err)):.2f}; blunders excluded; simulated lab noise sd "
                f"{self.run.scenario.lab_noise_ppm:g})",
                f"  95% interval coverage     {100 * cover:7.1f} % of {len(z)} lab results",
            ]
        if len(truth_err):
            std = np.array(self.pred_std, float)[ok]
            std = std[np.isfinite(std)]
            lines.append(f"  prediction RMSE vs truth  {math.sqrt(np.mean(truth_err ** 2)):7.2f}"
                         f" ppm over {len(truth_err)} samples; median predictive std "
                         f"{np.median(std):.2f} ppm")
        return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="demo", description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=50.0,
                    help="wall-clock duration of the feed (default 50)")
    ap.add_argument("--seed", type=int, default=0, help="simulator seed")
    ap.add_argument("--days", type=float, default=None, help="simulated days (default: preset)")
    ap.add_argument("--quiet", action="store_true", help="no line per lab result")
    args = ap.parse_args(argv)

    scenario = plant.Scenario.demo(seed=args.seed)
    if args.days is not None:
        from dataclasses import replace
        scenario = replace(scenario, days=args.days)
    run = plant.simulate(scenario)
    events = list(plant.events(run))
    print(f"Simulating {scenario.days:g} days of the fictitious C-301 column: "
          f"{len(run.t)} feature samples, {len(run.lab_t)} lab results "
          f"(simulated data, not plant data)")

    tmp = tempfile.mkdtemp(prefix="posteriord-demo-")
    ports = [free_port() for _ in range(4)]
    feed_ep, pub_ep, ctl_ep = (f"tcp://127.0.0.1:{p}" for p in ports[:3])
    cfg_path = os.path.join(tmp, "demo.toml")
    with open(cfg_path, "w") as fh:
        fh.write(demo_toml(feed_ep, pub_ep, ctl_ep, f"127.0.0.1:{ports[3]}",
                           os.path.join(tmp, "state")))
    ctx = zmq.Context()
    feed = ctx.socket(zmq.XPUB)
    feed.setsockopt(zmq.LINGER, 1000)
    feed.setsockopt(zmq.SNDHWM, 0)
    feed.bind(feed_ep)
    daemon = subprocess.Popen([sys.executable, "-m", "daemon.cli", "run", "--config", cfg_path])
    out = ctx.socket(zmq.SUB)
    out.setsockopt(zmq.LINGER, 0)
    out.setsockopt(zmq.RCVHWM, 0)
    for prefix in (b"pred/", b"fit/", b"alert/"):
        out.setsockopt(zmq.SUBSCRIBE, prefix)
    out.connect(pub_ep)
    tally = Tally(run)
    code = 1
    try:
        if not feed.poll(20000):
            print("demo: the daemon did not subscribe within 20 s", file=sys.stderr)
            return 1
        feed.recv()  # the daemon's subscription
        print(f"daemon up (pid {daemon.pid}); feed {feed_ep}, predictions {pub_ep}, "
              f"metrics http://127.0.0.1:{ports[3]}/metrics")
        _wait_output_connected(ctx, ctl_ep, out)
        span = events[-1][-1 if events[-1][0] == "y" else 1] - run.t[0]
        speed = span / args.seconds
        print(f"replaying at {speed:,.0f}x real time\n")
        t_sim0, t_wall0 = float(run.t[0]), time.monotonic()
        send = feed.send_multipart
        topic = MODEL.encode()
        for seq, ev in enumerate(events):
            if ev[0] == "x":
                arrival = ev[1]
                body = {"t": ev[1], "x": list(ev[2]), "seq": seq}
            else:
                arrival = ev[3]
                body = {"t": ev[1], "y": ev[2], "seq": seq}
            due = t_wall0 + (arrival - t_sim0) / speed
            lag = due - time.monotonic()
            if lag > 0:
                _drain(out, tally, args.quiet, lag)
            send([topic, wire.packb(body)])
        _drain(out, tally, args.quiet, 1.0, until_quiet=True)
        print(tally.summary())
        code = 0
    finally:
        daemon.send_signal(signal.SIGTERM)
        try:
            rc = daemon.wait(15)
        except subprocess.TimeoutExpired:
            daemon.kill()
            rc = daemon.wait()
        print(f"daemon stopped (exit code {rc})")
        feed.close()
        out.close()
        ctx.term()
    return code if rc == 0 else 1


def _wait_output_connected(ctx, ctl_ep: str, out) -> None:
    """Make sure our subscription reached the daemon's publisher before the feed starts."""
    req = ctx.socket(zmq.REQ)
    req.setsockopt(zmq.LINGER, 0)
    req.connect(ctl_ep)
    try:
        req.send(wire.pack({"cmd": "ping"}))
        if not req.poll(10000):
            raise RuntimeError("the daemon does not answer on its control socket")
        req.recv()
    finally:
        req.close()
    # a SUB connects asynchronously; give the handshake a bounded moment to complete
    deadline = time.monotonic() + 0.5
    while time.monotonic() < deadline:
        if out.poll(50):
            break


def _drain(sock, tally: Tally, quiet: bool, wait: float, until_quiet: bool = False) -> None:
    deadline = time.monotonic() + wait
    while True:
        left = deadline - time.monotonic()
        if left <= 0 and not until_quiet:
            return
        if not sock.poll(max(0, int(left * 1000)) if left > 0 else 1000):
            if until_quiet or left <= 0:
                return
            continue
        while True:
            try:
                topic, payload = sock.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                break
            tally.take(topic, wire.unpack(payload, 1 << 24), quiet)


if __name__ == "__main__":
    sys.exit(main())
