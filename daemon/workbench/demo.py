"""The demo: commissioning and running a soft sensor on the fictitious C-301 column.

The whole story on simulated data (all of it from :mod:`daemon.workbench.plant`, none from a plant):

1. a historian CSV export of three months of the column (the ``Scenario.demo()`` preset: slow
   fouling, a feed-grade step, a lab outage, a few lab blunders);
2. tuning the built-in demo model on the first four weeks of that export (`daemon.workbench.tune`);
3. a backtest of the tuned model over the whole export, beside the static batch model and the
   model without forgetting (`daemon.workbench.backtest`);
4. the daemon itself (``posteriord run`` as a subprocess, tuned model, free loopback ports, a
   temporary state folder) on the simulated feed compressed into about a minute of wall time
   (one feature sample a minute of simulated time, lab results arriving hours after the
   sample was drawn), with the watch view and a line per lab result, the stream recorded;
5. the report picture of the recorded stream (`daemon.workbench.report`).
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

from daemon.runtime import wire
from daemon.workbench import backtest, historian, live, plant, report, tune

MODEL = "c301.bottoms_solvent"
LAB_LINES_NOTE = ("one line per lab result, printed when it arrives: 'drawn' is when the "
                  "sample was taken,\n'in +2.1h' how long after that it reached the daemon; "
                  "slow results arrive after later ones,\nso the drawn times are not in order. "
                  "pred: the prediction for the drawn time; z: the lab value\nin units of the "
                  "prediction's spread ('-' while the model cannot tell its spread yet)")


def what_next(out_dir: str, picture: str, csv_path: str, block_path: str) -> str:
    """The last words of the demo: where its files are and how to try one's own data."""
    cli = "posteriord"
    return "\n".join([
        "",
        "What next",
        f"  open the report:        {picture}",
        f"  the demo's files:       {out_dir} (export, tuned [[model]] block, predictions)",
        "  your own data: export the inputs and the lab column from your historian as a CSV",
        f"  (the layout of {os.path.basename(csv_path)}; README.md \"Your own data in five "
        "minutes\"), then",
        f"    {cli} tune     export.csv --target LAB_TAG --until 28d --out model.toml",
        f"    {cli} backtest export.csv --target LAB_TAG --config model.toml --train 28d "
        "--out pred.csv",
        f"    {cli} report   pred.csv --out report.png",
        f"    {cli} run      --config plant.toml   # a [daemon] table + the [[model]] of "
        "model.toml",
        f"  (the demo's own tuned block for comparison: {block_path};",
        f"  `{cli} <command> --help` for every option)",
    ])


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def demo_toml(feed: str, publish: str, control: str, metrics: str, state_dir: str) -> str:
    """The packaged demo config with the daemon's endpoints replaced."""
    text = resources.files("daemon.config").joinpath("demo.toml").read_text()
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
                print(self.line(body, self.newest), flush=True)

    @property
    def newest(self) -> float | None:
        """The newest prediction time seen: the feed's time when a lab result arrives."""
        if not self.pred_t:
            return None
        t = self.pred_t[-1]
        return float(t[-1] if isinstance(t, list) else t)

    def line(self, f: dict, arrived: float | None = None) -> str:
        """One lab result: its drawn time, when it arrived (the newest feed time then; lab
        results arrive hours after their sample is drawn, so drawn times are printed out of
        order), the value, the prediction for its drawn time and what the model did."""
        mark = " (blunder injected)" if f["t"] in self.blunder_t else ""
        if f["accepted"]:
            what = "learned" if f["reason"] != "gate_open" else "learned (gate opened)"
        else:
            what = f"REJECTED by the gate{mark}"
            mark = ""
        pm, ps, z = f["pred_mean"], f["pred_std"], f["z"]
        finite_std = ps is not None and math.isfinite(ps)
        pred = ("no prediction yet" if pm is None or not math.isfinite(pm)
                else f"pred {pm:6.1f} ± {ps:5.1f}" if finite_std
                else f"pred {pm:6.1f} ± inf ")
        # with an infinite std (too few results to know the noise) z says nothing
        zs = f"z {z:+5.2f}" if z is not None and math.isfinite(z) and finite_std \
            else "z   -  "
        when = f"drawn {_stamp(f['t'])}"
        if arrived is not None and arrived >= f["t"]:
            when += f" in {'+%.1fh' % ((arrived - f['t']) / 3600.0):>6}"
        return (f"{when}  lab {f['y']:6.1f} ppm  {pred}  {zs}  {what}{mark}"
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


def _rule(title: str) -> None:
    print(f"\n== {title} " + "=" * max(0, 86 - len(title)), flush=True)


def _daemon_part(text: str) -> str:
    """The ``[daemon]`` part of a config text: everything before its first ``[[model]]``."""
    i = text.find("[[model]]")
    return text if i < 0 else text[:i].rstrip() + "\n"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="demo", description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=50.0,
                    help="wall-clock duration of the live feed (default 50)")
    ap.add_argument("--seed", type=int, default=0, help="simulator seed")
    ap.add_argument("--days", type=float, default=None, help="simulated days (default: preset)")
    ap.add_argument("--tune-days", type=float, default=28.0,
                    help="days at the start of the export used for tuning (default 28)")
    ap.add_argument("--out", help="folder for the files (default: a new temporary folder)")
    ap.add_argument("--picture", help="where to write the report picture (default: in --out)")
    ap.add_argument("--skip-live", action="store_true",
                    help="stop after the backtest and draw the report from it")
    ap.add_argument("--quiet", action="store_true", help="no line per lab result")
    args = ap.parse_args(argv)

    scenario = plant.Scenario.demo(seed=args.seed)
    if args.days is not None:
        scenario = _shortened(scenario, args.days)
    out_dir = args.out or tempfile.mkdtemp(prefix="posteriord-demo-out-")
    os.makedirs(out_dir, exist_ok=True)
    run = plant.simulate(scenario)

    _rule("1/5  historian export")
    csv_path = os.path.join(out_dir, "c301-history.csv")
    historian.write_csv(csv_path, run)
    events = [f"fouling {scenario.fouling_ppm_per_day:g} ppm/day"]
    if scenario.step_day is not None:
        events.append(f"feed-grade step on day {scenario.step_day:g}")
    if scenario.outage_days is not None:
        events.append(f"lab outage days {scenario.outage_days[0]:g}-{scenario.outage_days[1]:g}")
    if scenario.blunders:
        events.append(f"{scenario.blunders} lab blunders")
    print(f"Simulated {scenario.days:g} days of the fictitious C-301 column ({', '.join(events)})"
          f": {len(run.t)} feature samples, {len(run.lab_t)} lab results -> {csv_path}")
    print("(simulated data from a fictitious unit, not plant data)")

    _rule(f"2/5  commissioning: tune the demo model on the first {args.tune_days:g} days")
    start = demo_config_model()
    history = backtest.load_history(csv_path, [i.tag for i in start.inputs])
    tuned = tune.tune(history, start, until=float(history.t[0]) + args.tune_days * 86400.0)
    print(tune.table_text(tuned, top=6, unit="ppm", source=os.path.basename(csv_path)))
    block = tune.model_toml(tuned.model, tune.header_comments(tuned, csv_path))
    block_path = os.path.join(out_dir, "c301-tuned-model.toml")
    with open(block_path, "w") as fh:
        fh.write(block)
    print(f"[[model]] block for the config: {block_path}")

    _rule("3/5  backtest over the whole export, against the static model")
    bt = backtest.backtest(history, tuned.model, train=args.tune_days * 86400.0, unit="ppm")
    print(backtest.summary_text(bt, "ppm"))
    pred_path = os.path.join(out_dir, "c301-backtest.csv")
    backtest.write_predictions(pred_path, bt)
    print(f"predictions: {pred_path}")
    if args.skip_live:
        track = bt.track
        code = 0
    else:
        _rule("4/5  the daemon live on an accelerated feed")
        rec_path = os.path.join(out_dir, "c301-live.rec")
        code = _live(run, tuned.model, block, rec_path, args)
        print(f"stream recorded: {rec_path}")
        track = report.load_track(rec_path, MODEL)
        track.meta.update(target=plant.TARGET, unit="ppm")

    _rule("5/5  report")
    picture = args.picture or os.path.join(out_dir, "c301-report.png")
    m = tuned.model
    paths = report.report(track, picture, unit="ppm", note=plant.DISCLAIMER,
                          cusum_k=m.cusum_k, cusum_h=m.cusum_h, stale_after=m.stale_after,
                          title=f"{MODEL}: " + ("the daemon live on the simulated feed"
                                                if not args.skip_live else "backtest"))
    for p in paths:
        print(f"report picture: {p}")
    print(report.summary_text(track))
    print(what_next(out_dir, paths[0] if paths else picture, csv_path, block_path))
    return code


def _shortened(scenario: plant.Scenario, days: float) -> plant.Scenario:
    """The preset over ``days``, its step and outage moved in proportion."""
    from dataclasses import replace

    f = days / scenario.days
    step = None if scenario.step_day is None else scenario.step_day * f
    outage = None if scenario.outage_days is None else tuple(d * f for d in scenario.outage_days)
    return replace(scenario, days=days, step_day=step, outage_days=outage)


def demo_config_model():
    """The model of the built-in demo config (the starting point of the tuning)."""
    from daemon.config import demo_config

    return next(m for m in demo_config().models if m.name == MODEL)


def _live(run: plant.Run, model, block: str, rec_path: str, args) -> int:
    """Step 4: the daemon on the simulated feed, watched and recorded; returns the exit code."""
    events = list(plant.events(run))
    tmp = tempfile.mkdtemp(prefix="posteriord-demo-")
    ports = [free_port() for _ in range(4)]
    feed_ep, pub_ep, ctl_ep = (f"tcp://127.0.0.1:{p}" for p in ports[:3])
    cfg_path = os.path.join(tmp, "demo.toml")
    with open(cfg_path, "w") as fh:
        fh.write(_daemon_part(demo_toml(feed_ep, pub_ep, ctl_ep, f"127.0.0.1:{ports[3]}",
                                        os.path.join(tmp, "state"))))
        fh.write("\n" + block)
    ctx = zmq.Context()
    feed = ctx.socket(zmq.XPUB)
    feed.setsockopt(zmq.LINGER, 1000)
    feed.setsockopt(zmq.SNDHWM, 0)
    feed.bind(feed_ep)
    # the daemon's log goes to a file: its lines would tear the watch view apart, and the
    # trust changes it logs are printed above the view anyway
    log_path = os.path.join(os.path.dirname(rec_path), "c301-daemon.log")
    log_file = open(log_path, "w")
    daemon = subprocess.Popen([sys.executable, "-m", "daemon.cli", "run", "--config", cfg_path],
                              stdout=log_file, stderr=subprocess.STDOUT)
    out = ctx.socket(zmq.SUB)
    out.setsockopt(zmq.LINGER, 0)
    out.setsockopt(zmq.RCVHWM, 0)
    for prefix in (b"pred/", b"fit/", b"alert/"):
        out.setsockopt(zmq.SUBSCRIBE, prefix)
    out.connect(pub_ep)
    view = View(Tally(run), live.watch_state(pub_ep, "ppm"), live.Screen(),
                live.RecordWriter(rec_path, endpoint=pub_ep), args.quiet)
    code = 1
    rc = None
    try:
        if not feed.poll(20000):
            print("demo: the daemon did not subscribe within 20 s", file=sys.stderr)
            return 1
        feed.recv()  # the daemon's subscription
        print(f"daemon up (pid {daemon.pid}) with the tuned model; feed {feed_ep}, "
              f"predictions {pub_ep}, metrics http://127.0.0.1:{ports[3]}/metrics")
        _wait_output_connected(ctx, ctl_ep, out)
        span = events[-1][-1 if events[-1][0] == "y" else 1] - run.t[0]
        speed = span / args.seconds
        print(f"replaying at {speed:,.0f}x real time (the same simulated run, now with its "
              f"real lab delays); the watch view stays at the bottom")
        if not args.quiet:
            print(LAB_LINES_NOTE + "\n")
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
                _drain(out, view, lag)
            send([topic, wire.packb(body)])
        _drain(out, view, 1.0, until_quiet=True)
        view.draw(force=True)
        view.screen.final()
        print(view.tally.summary())
        code = 0
    finally:
        view.recorder.close()
        daemon.send_signal(signal.SIGTERM)
        try:
            rc = daemon.wait(15)
        except subprocess.TimeoutExpired:
            daemon.kill()
            rc = daemon.wait()
        log_file.close()
        print(f"daemon stopped (exit code {rc}); its log: {log_path}")
        feed.close()
        out.close()
        ctx.term()
    return code if rc == 0 else 1


class View:
    """The live part's outputs: the tally, the watch view, the recording."""

    def __init__(self, tally: Tally, state: dict, screen, recorder, quiet: bool):
        self.tally = tally
        self.state = state
        self.screen = screen
        self.recorder = recorder
        self.quiet = quiet
        self._drawn = 0.0

    def take(self, topic: bytes, payload: bytes) -> None:
        now = time.time()
        self.recorder.write(now, topic, payload)
        body = wire.unpack(payload, 1 << 24)
        live.watch_update(self.state, topic.decode(), body, now)
        self.tally.take(topic, body, True)
        if self.quiet:
            return
        if topic.startswith(b"fit/"):
            self.screen.above(self.tally.line(body, self.tally.newest))
        elif topic.startswith(b"alert/") and body.get("kind") == "state":
            why = ", ".join(r["name"] for r in body.get("reasons", [])) or (
                "commissioning over, no reasons" if body.get("old") == "commissioning"
                else "no reasons left")
            self.screen.above(f"{_stamp(body['t'])}  trust {body['old']} -> {body['new']} "
                              f"({why})")

    def draw(self, force: bool = False) -> None:
        if force or time.monotonic() - self._drawn > 0.25:
            self.state["now"] = time.time()
            import shutil

            width = shutil.get_terminal_size().columns if self.screen.tty else None
            self.screen.show(live.render(self.state, width=width, color=self.screen.tty))
            self._drawn = time.monotonic()


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


def _drain(sock, view: View, wait: float, until_quiet: bool = False) -> None:
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
            view.take(topic, payload)
        view.draw()


if __name__ == "__main__":
    sys.exit(main())
