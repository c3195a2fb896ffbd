#!/usr/bin/env python3
"""The daemon against a bare relay, measured in the same run; with --scaling, how it scales.

Every case starts subprocesses (the relay and ``posteriord run``) on free loopback ports; this
process is the driver: it publishes pre-encoded feed messages with a plain
``send_multipart`` (as a real publisher does) and receives what comes back. The same driver
feeds the floor and the daemon, and their runs are interleaved (floor, daemon, floor, ...), so
that each ratio compares two figures taken moments apart on this shared machine.

The floor is a bare pyzmq SUB -> msgpack decode -> msgpack encode -> PUB relay. Besides
throughput, each case reports the CPU time per message of the target's loop thread (the main
thread of the daemon and of the relay, read from /proc/<pid>/task/<pid>/stat before and after
the case; ZeroMQ's I/O threads are not in it) and of the whole process (all its threads).

Every daemon model is taught from lab results before timing (an unidentified model answers
with a cheap nan) and the feed times stay close to those results, so nothing learned is
forgotten. The daemon runs with its default settings except where a case says otherwise.

The case table (default): 1 model vs the floor, 200 and 10 000 models interleaved, CPU per
message paced at 5 000 msg/s, packed blocks of 256, memory per model with full feature
buffers, the loop pause of a checkpoint, restart after WAL records, latency p99.
``--scaling`` adds 1 / 100 / 1 000 / 10 000 models (throughput, CPU, memory, start and restart
times), 3 / 9 / 45 / 561 terms, and WAL fsync group vs always; ``--detectors`` 1 model with the
drift detectors on and off. Each prints markdown rows ready to paste into the README.

    OPENBLAS_NUM_THREADS=1 .venv/bin/python tools/bench_daemon.py [--quick] [--scaling] \
        [--only-scaling] [--detectors] [--repeats N] [--only CASE ...]
"""

from __future__ import annotations

import argparse
import atexit
import math
import os
import platform
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from math import comb

import msgpack
import numpy as np
import zmq

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

from daemon.workbench.demo import free_port  # noqa: E402

RELAY = r"""
import sys, zmq, msgpack
ctx = zmq.Context()
sub = ctx.socket(zmq.SUB); sub.setsockopt(zmq.RCVHWM, 0); sub.setsockopt(zmq.SUBSCRIBE, b"")
sub.connect(sys.argv[1])
pub = ctx.socket(zmq.PUB); pub.setsockopt(zmq.SNDHWM, 0); pub.bind(sys.argv[2])
rep = ctx.socket(zmq.REP); rep.bind(sys.argv[3])
poller = zmq.Poller(); poller.register(sub, zmq.POLLIN); poller.register(rep, zmq.POLLIN)
while True:
    socks = dict(poller.poll())
    if rep in socks:
        msg = msgpack.unpackb(rep.recv())
        rep.send(msgpack.packb({"ok": True}))
        if msg.get("cmd") == "stop":
            break
    if sub in socks:
        while True:
            try:
                topic, payload = sub.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                break
            body = msgpack.unpackb(payload)
            pub.send_multipart([b"pred/" + topic, msgpack.packb(body)])
"""

CLK_TCK = os.sysconf("SC_CLK_TCK")
T0 = time.monotonic()
DT = 0.05  # seconds between a model's feature samples: every run stays within hours


class Skip(Exception):
    """A case the daemon refuses to run (the reason is reported in the table)."""


# ---------------------------------------------------------------------------- /proc readings
def _stat_cpu(path: str) -> float:
    with open(path) as fh:
        fields = fh.read().rsplit(")", 1)[1].split()
    # fields[0] is field 3 (state); utime and stime are fields 14 and 15
    return (int(fields[11]) + int(fields[12])) / CLK_TCK


def loop_cpu(pid: int) -> float:
    """CPU seconds of the process's main thread (the daemon's and the relay's loop)."""
    return _stat_cpu(f"/proc/{pid}/task/{pid}/stat")


def process_cpu(pid: int) -> float:
    """CPU seconds of the whole process, every thread (ZeroMQ I/O threads included)."""
    return _stat_cpu(f"/proc/{pid}/stat")


def rss_bytes(pid: int) -> int:
    with open(f"/proc/{pid}/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    return 0


# the bytecode of every daemon this run starts (the first start compiles, as an install does)
_PYCACHE = tempfile.mkdtemp(prefix="posteriord-bench-pycache-")
atexit.register(shutil.rmtree, _PYCACHE, True)


def name_of(m: int) -> bytes:
    return f"m{m:05d}".encode()


# ---------------------------------------------------------------------------- targets
def model_toml(name, n_inputs, degree=1, keep_count=None, detectors=None):
    inputs = ", ".join(f'{{ tag = "X{i}", lo = -3, hi = 3 }}' for i in range(n_inputs))
    text = (f'[[model]]\nname = "{name}"\ninputs = [{inputs}]\n'
            f'[model.basis]\nkind = "polynomial"\ndegree = {degree}\n'
            f'[model.prior]\nalpha = 1.0\n[model.noise]\nguess = 0.5\nstrength = 2.0\n')
    # the feed clock here jumps far past the last lab result (runs start 1000 s after the one
    # before, teaching times are negative): the status derived from the lab interval would
    # read stale, and the probes wait for "learning"; staleness costs nothing to measure
    text += '[model.lab]\nstale_after = "3650d"\n'
    if keep_count is not None:
        text += f"keep_count = {keep_count}\n"
    if detectors is not None:
        text += f"[model.alerts]\nenabled = {'true' if detectors else 'false'}\n"
    return text


class Target:
    """A subprocess (the relay or a daemon) with the driver's sockets.

    ``state_dir`` reuses a state folder (a restart); ``daemon`` adds ``[daemon]`` settings;
    ``train`` lab results per model are sent before timing (0 when restarting with state).
    ``ready_s`` is the time from starting the process to its first answer on the control
    socket (the daemon binds it after loading its state and writing the start-up checkpoint).
    """

    def __init__(self, kind, n_models=1, n_inputs=8, degree=1, keep_count=None, daemon=None,
                 state_dir=None, train=40, t0=None, detectors=None):
        self.feed = f"tcp://127.0.0.1:{free_port()}"
        self.out = f"tcp://127.0.0.1:{free_port()}"
        self.ctl = f"tcp://127.0.0.1:{free_port()}"
        self.kind = kind
        self.n_models, self.n_inputs = n_models, n_inputs
        self.tmp = tempfile.mkdtemp(prefix="posteriord-bench-")
        self.state_dir = state_dir or os.path.join(self.tmp, "state")
        # feed clock: a fresh daemon is probed at -1e6 + k, taught at -1000 + k, probed again
        # at -100 + k and fed from 10 on; a restarted one (t0: later than anything it has
        # seen) is probed and fed from t0 on
        self.fresh = t0 is None
        self.clock = -1e6 if t0 is None else t0
        self.t_next = 10.0 if t0 is None else t0 + 1000.0
        self.lab_t = -1000.0
        err = open(os.path.join(self.tmp, "stderr"), "w+")
        self.err = err
        if kind == "relay":
            cmd = [sys.executable, "-c", RELAY, self.feed, self.out, self.ctl]
        else:
            cfg = os.path.join(self.tmp, "bench.toml")
            extra = "".join(f"{k} = {v}\n" for k, v in (daemon or {}).items())
            with open(cfg, "w") as fh:
                fh.write(f'[daemon]\nfeeds = ["{self.feed}"]\npublish = "{self.out}"\n'
                         f'control = "{self.ctl}"\nmetrics = ""\nhwm = 0\n'
                         f'log_level = "error"\n{extra}'
                         f'state_dir = "{self.state_dir}"\n\n')
                for m in range(n_models):
                    fh.write(model_toml(name_of(m).decode(), n_inputs, degree, keep_count,
                                        detectors) + "\n")
            cmd = [sys.executable, "-m", "daemon.cli", "run", "--config", cfg]
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1", PYTHONPYCACHEPREFIX=_PYCACHE)
        # an installed daemon starts from compiled modules; compiling the project's own
        # (PYTHONDONTWRITEBYTECODE, set in some shells) would add ~0.2 s to every start
        env.pop("PYTHONDONTWRITEBYTECODE", None)
        self.ctx = zmq.Context()
        self.pub = self.ctx.socket(zmq.XPUB)
        self.pub.setsockopt(zmq.SNDHWM, 0)
        self.pub.setsockopt(zmq.LINGER, 0)
        self.pub.bind(self.feed)
        self.sub = self.ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.RCVHWM, 0)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.SUBSCRIBE, b"pred/")
        self.sub.connect(self.out)
        t_start = time.perf_counter()
        self.proc = subprocess.Popen(cmd, env=env, stderr=err)
        self.pid = self.proc.pid
        try:
            self.ping(timeout=120)
            self.ready_s = time.perf_counter() - t_start
            need = n_models if kind == "daemon" else 1
            deadline = time.monotonic() + 60
            got = 0
            while got < need:
                if not self.pub.poll(max(1, int((deadline - time.monotonic()) * 1000))):
                    raise RuntimeError(f"{kind} did not subscribe ({got} of {need})")
                self.pub.recv()
                got += 1
            self.warm_up(train)
        except BaseException:
            self.close(clean=False)
            self.remove()
            raise

    def _died(self):
        if self.proc.poll() is None:
            return
        self.err.seek(0)
        text = self.err.read().strip().splitlines()
        reason = text[-1] if text else f"exit code {self.proc.returncode}"
        if self.proc.returncode == 3:
            raise Skip(reason.replace("posteriord: ", ""))
        raise RuntimeError(f"{self.kind} exited with code {self.proc.returncode}: {reason}")

    def request(self, msg, timeout=30.0):
        """One control request; returns the reply (the relay only knows ping and stop)."""
        req = self.ctx.socket(zmq.REQ)
        req.setsockopt(zmq.LINGER, 0)
        req.setsockopt(zmq.RECONNECT_IVL, 10)
        req.connect(self.ctl)
        try:
            req.send(msgpack.packb(msg))
            deadline = time.monotonic() + timeout
            while not req.poll(50):
                self._died()
                if time.monotonic() > deadline:
                    raise RuntimeError(f"{self.kind} did not answer {msg}")
            return msgpack.unpackb(req.recv())
        finally:
            req.close()

    def ping(self, timeout=30.0):
        return self.request({"cmd": "ping"}, timeout)

    def warm_up(self, train):
        """Wait until the target answers, then teach every model from lab results.

        A model that has seen no lab result has no identified weights (the constant term
        has a flat prior) and answers with a cheap "unidentified" nan: measuring that would
        flatter the daemon. Until a probe comes back our SUB may not be connected to the
        publisher yet. The lab results are one block per model (processed as if sent one by
        one); all their times are negative, so the measured feed (from t = 10) stays in order,
        and close to it, so that what was learned is not forgotten.
        """
        first, last = name_of(0), name_of(self.n_models - 1)
        self._probe(first, lambda status: True)
        if self.kind == "relay":
            return
        if train:
            self.teach(train)
        if self.fresh:
            self.clock = -100.0
        self._probe(first, lambda status: status == "learning")
        self._probe(last, lambda status: status == "learning")

    def teach(self, count, seed=1):
        rng = np.random.default_rng(seed)
        w = rng.normal(size=self.n_inputs)
        t = self.lab_t + np.arange(count, dtype=float)
        self.lab_t += count
        for m in range(self.n_models):
            x = rng.normal(size=(count, self.n_inputs))
            y = x @ w + 0.1 * rng.normal(size=count)
            self.pub.send_multipart([name_of(m), msgpack.packb(
                {"t": t.tolist(), "x": x.tolist(), "y": y.tolist()})])

    def _probe(self, name, ready):
        deadline = time.monotonic() + 600
        topic_want = b"pred/" + name
        while time.monotonic() < deadline:
            self._died()
            self.clock += 1e-3
            self.pub.send_multipart([name, msgpack.packb({"t": self.clock,
                                                          "x": [0.0] * self.n_inputs})])
            while self.sub.poll(200):
                topic, payload = self.sub.recv_multipart()
                if topic != topic_want:
                    continue
                if ready(msgpack.unpackb(payload).get("status")):
                    while self.sub.poll(50):
                        self.sub.recv_multipart()
                    return
        raise RuntimeError(f"{self.kind} did not answer as expected")

    def times(self, per_model, step=DT):
        """Feed times for ``per_model`` samples of every model, later than all before."""
        t = self.t_next + step * np.arange(per_model)
        self.t_next = float(t[-1]) + 10.0 if per_model else self.t_next
        return t

    def cpu(self):
        return loop_cpu(self.pid), process_cpu(self.pid)

    def throughput(self, msgs, expect):
        """Send every message, wait for ``expect`` answers; returns a Run."""
        recv = self.sub.recv_multipart
        send = self.pub.send_multipart
        while self.sub.poll(0):  # a late answer of an earlier run is not this run's
            recv()
        got = 0
        c0 = self.cpu()
        t0 = time.perf_counter()
        for m in msgs:
            send(m)
        while got < expect:
            # a long silence is allowed: a periodic checkpoint (checkpoint_every, default
            # 5 min) of thousands of models can hold the loop for many seconds
            if not self.sub.poll(120000):
                break
            recv()
            got += 1
        wall = time.perf_counter() - t0
        c1 = self.cpu()
        return Run(wall, len(msgs), c1[0] - c0[0], c1[1] - c0[1], expect - got)

    def paced(self, msgs, rate, during=None):
        """Send at a steady ``rate``; returns (latencies in s, Run).

        ``during(i)`` is called before each send (the checkpoint case uses it). The driver
        sleeps rather than spins: on a 2-core machine a spinning driver starves the ZeroMQ
        I/O threads of both processes and measures its own scheduling delays.
        """
        lat = []
        period = 1.0 / rate
        recv = self.sub.recv_multipart
        unpack = msgpack.unpackb
        sent = {}
        keys = [unpack(m[1])["t"] for m in msgs]
        c0 = self.cpu()
        start = time.perf_counter()
        for i, m in enumerate(msgs):
            due = start + i * period
            while True:
                while self.sub.poll(0):
                    _topic, payload = recv()
                    lat.append(time.perf_counter() - sent.pop(unpack(payload)["t"]))
                left = due - time.perf_counter()
                if left <= 0:
                    break
                time.sleep(min(left, 5e-5))
            if during is not None:
                during(i)
            sent[keys[i]] = time.perf_counter()
            self.pub.send_multipart(m)
        while sent and self.sub.poll(5000):
            _topic, payload = recv()
            lat.append(time.perf_counter() - sent.pop(unpack(payload)["t"]))
        wall = time.perf_counter() - start
        c1 = self.cpu()
        return np.array(lat), Run(wall, len(msgs), c1[0] - c0[0], c1[1] - c0[1], len(sent))

    def close(self, clean=True):
        """Stop the target: a clean stop (SIGTERM, final checkpoint) or SIGKILL."""
        if self.proc.poll() is None:
            if self.kind == "relay":
                try:
                    self.request({"cmd": "stop"}, timeout=5)
                except RuntimeError:
                    pass  # a relay that does not answer is killed below
            elif clean:
                self.proc.terminate()
            else:
                self.proc.send_signal(signal.SIGKILL)
        try:
            self.proc.wait(60)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        self.pub.close()
        self.sub.close()
        self.ctx.term()
        self.err.close()

    def remove(self):
        shutil.rmtree(self.tmp, ignore_errors=True)


class Run:
    """One timed run: wall time, messages, CPU seconds of the loop thread and process."""

    def __init__(self, wall, n, loop, proc, lost=0):
        self.wall, self.n, self.loop, self.proc, self.lost = wall, n, loop, proc, lost

    @property
    def rate(self):
        return self.n / self.wall

    @property
    def loop_us(self):
        return self.loop / self.n * 1e6

    @property
    def proc_us(self):
        return self.proc / self.n * 1e6


# ---------------------------------------------------------------------------- messages
def single_msgs(target, per_model, rng, n_models=None, n_inputs=None, step=DT):
    """``per_model`` single samples of every model, interleaved m0, m1, ..., m0, m1, ..."""
    n_models = n_models or target.n_models
    n_inputs = n_inputs or target.n_inputs
    t = target.times(per_model, step).tolist()
    X = rng.normal(size=(per_model * n_models, n_inputs)).tolist()
    names = [name_of(m) for m in range(n_models)]
    packb = msgpack.packb
    out = []
    for i in range(per_model):
        for m in range(n_models):
            out.append([names[m], packb({"t": t[i], "x": X[i * n_models + m]})])
    return out


def block_msgs(target, n_blocks, rng, size=256, packed=True, models=None, step=DT):
    """Blocks of ``size`` rows for each of ``models`` (default: m0 only)."""
    models = models or [0]
    out = []
    for _b in range(n_blocks):
        t = target.t_next + step * np.arange(size)
        target.t_next = float(t[-1]) + step
        for m in models:
            X = rng.normal(size=(size, target.n_inputs))
            if packed:
                body = {"t": t.astype("<f8").tobytes(), "x": X.astype("<f8").tobytes()}
            else:
                body = {"t": t.tolist(), "x": X.tolist()}
            out.append([name_of(m), msgpack.packb(body)])
    target.t_next += 10.0
    return out


def lab_msgs(target, n, rng, model=0, block=None):
    """``n`` feature rows with their lab value (one WAL record each), singly or in blocks."""
    w = np.linspace(-1, 1, target.n_inputs)
    t = target.times(n)
    X = rng.normal(size=(n, target.n_inputs))
    y = X @ w + 0.1 * rng.normal(size=n)
    name = name_of(model)
    if block is None:
        return [[name, msgpack.packb({"t": float(t[i]), "x": X[i].tolist(), "y": float(y[i])})]
                for i in range(n)]
    return [[name, msgpack.packb({"t": t[i:i + block].tolist(), "x": X[i:i + block].tolist(),
                                  "y": y[i:i + block].tolist()})]
            for i in range(0, n, block)]


# ---------------------------------------------------------------------------- statistics
def med(values):
    return float(np.median(values))


def spread(values, fmt="{:.2f}"):
    return f"{fmt.format(min(values))}-{fmt.format(max(values))}"


class Table:
    """Rows of: case | result | baseline | ratio | spread of the ratio | bar."""

    HEAD = ("case", "result (median)", "baseline (median)", "ratio", "ratio spread (runs)",
            "bar")

    def __init__(self, title):
        self.title = title
        self.rows = []

    def add(self, case, result, baseline="", ratios=None, bar="", inverse=False):
        finite = [r for r in ratios or () if math.isfinite(r)]
        if finite:
            ratio = f"{med(finite):.2f}"
            sp = f"{spread(finite)} ({len(finite)})"
        elif ratios:
            ratio, sp = "n/a", "too short to measure"
        else:
            ratio = sp = ""
        self.rows.append((case, result, baseline, ratio, sp, bar))
        print(f"  [{time.monotonic() - T0:5.0f} s] {case}: {result} | {baseline} | {ratio} {sp}",
              flush=True)

    def skip(self, case, reason, bar=""):
        self.rows.append((case, f"skipped: {reason}", "", "", "", bar))
        print(f"  {case}: skipped: {reason}", flush=True)

    def markdown(self):
        lines = [f"**{self.title}**", "", "| " + " | ".join(self.HEAD) + " |",
                 "|" + "---|" * len(self.HEAD)]
        lines += ["| " + " | ".join(r) + " |" for r in self.rows]
        return "\n".join(lines)


def ratio(a, b):
    """a / b; nan when b is 0 (CPU time is read in clock ticks of 10 ms: a short --quick run
    can spend less than one)."""
    return a / b if b else math.nan


def fmt_rate(x, unit="msg/s"):
    return f"{x:,.0f} {unit}"


# ---------------------------------------------------------------------------- cases
class Bench:
    def __init__(self, args):
        self.args = args
        self.quick = args.quick
        self.repeats = args.repeats or (2 if args.quick else 3)
        self.n = 3000 if args.quick else 100000  # messages per throughput run
        self.rng = np.random.default_rng(0)
        self.floor = None

    def train(self, n_models):
        """Lab results taught to each model before timing (fewer where there are many)."""
        return 40 if n_models <= 200 and not self.quick else 12

    def start_floor(self):
        self.floor = Target("relay")

    def pairs(self, target, make, expect, floor_make=None):
        """Interleaved floor and target runs; returns (floor runs, target runs)."""
        fr, tr = [], []
        for _ in range(self.repeats):
            fmsgs = (floor_make or make)(self.floor)
            fr.append(self.floor.throughput(fmsgs, expect))
            msgs = make(target)
            tr.append(target.throughput(msgs, expect))
            lost = tr[-1].lost + fr[-1].lost
            if lost:
                print(f"  warning: {lost} answers lost", flush=True)
        self.lost = sum(r.lost for r in fr + tr)
        return fr, tr

    def throughput_case(self, table, label, target, per_model, bar, cpu_rows=True):
        make = lambda tg: single_msgs(tg, per_model, self.rng, target.n_models,  # noqa: E731
                                      target.n_inputs)
        expect = per_model * target.n_models
        fr, tr = self.pairs(target, make, expect)
        lost = f" ({self.lost:,} answers lost)" if self.lost else ""
        table.add(f"{label}: throughput", fmt_rate(med([r.rate for r in tr])) + lost,
                  f"floor {fmt_rate(med([r.rate for r in fr]))}",
                  [ratio(t.rate, f.rate) for f, t in zip(fr, tr, strict=True)], bar)
        if cpu_rows:
            table.add(f"{label}: loop-thread CPU per message",
                      f"{med([r.loop_us for r in tr]):.1f} us "
                      f"(process {med([r.proc_us for r in tr]):.1f})",
                      f"floor {med([r.loop_us for r in fr]):.1f} us "
                      f"(process {med([r.proc_us for r in fr]):.1f})",
                      [ratio(t.loop_us, f.loop_us) for f, t in zip(fr, tr, strict=True)])
        return fr, tr

    def paced_case(self, table, target, label_cpu, label_lat, rate=5000):
        seconds = 0.5 if self.quick else 4.0
        k = int(rate * seconds)
        fl, tl, fr, tr = [], [], [], []
        for _ in range(self.repeats):
            lat, run = self.floor.paced(single_msgs(self.floor, k, self.rng, 1, 8), rate)
            fl.append(lat)
            fr.append(run)
            lat, run = target.paced(single_msgs(target, k, self.rng, 1), rate)
            tl.append(lat)
            tr.append(run)
        table.add(label_cpu, f"{med([r.loop_us for r in tr]):.1f} us "
                             f"(process {med([r.proc_us for r in tr]):.1f})",
                  f"floor {med([r.loop_us for r in fr]):.1f} us "
                  f"(process {med([r.proc_us for r in fr]):.1f})",
                  [ratio(t.loop_us, f.loop_us) for f, t in zip(fr, tr, strict=True)], "<= 40 us")
        p99 = [np.percentile(x, 99) * 1e3 for x in tl]
        f99 = [np.percentile(x, 99) * 1e3 for x in fl]
        p50 = med([np.percentile(x, 50) * 1e3 for x in tl])
        table.add(label_lat, f"p99 {med(p99):.2f} ms (p50 {p50:.2f}; runs "
                             f"{spread(p99)})",
                  f"floor p99 {med(f99):.2f} ms (runs {spread(f99)})",
                  [ratio(a, b) for a, b in zip(p99, f99, strict=True)], "<= floor p99 + 0.5 ms")

    def blocks_case(self, table, target):
        nb = 20 if self.quick else max(20, self.n // 256)
        for packed in (True, False):
            make = lambda tg, p=packed: block_msgs(tg, nb, self.rng, packed=p)  # noqa: E731
            fr, tr = self.pairs(target, make, nb)
            form = "packed" if packed else "lists"
            table.add(f"1 model, blocks of 256 ({form}): samples/s",
                      fmt_rate(med([r.rate * 256 for r in tr]), "samples/s"),
                      f"floor {fmt_rate(med([r.rate * 256 for r in fr]), 'samples/s')}",
                      [ratio(t.rate, f.rate) for f, t in zip(fr, tr, strict=True)],
                      ">= 1.5 M samples/s" if packed else "")

    def memory_case(self, table):
        """RSS growth of a daemon whose models fill their buffers: 4 inputs, 12 h at 1 s.

        The rows come as single samples, one message a second per model, as a plant sends
        them (rows of a block are held differently).
        """
        n_models = 2 if self.quick else 5
        rows = 2000 if self.quick else 43200
        target = Target("daemon", n_models=n_models, n_inputs=4, keep_count=rows)
        try:
            per = []
            for _rep in range(1 if self.quick else 2):
                before = rss_bytes(target.pid)
                msgs = single_msgs(target, rows, self.rng, step=1.0)
                run = target.throughput(msgs, len(msgs))
                del msgs
                if run.lost:
                    raise RuntimeError("memory case lost answers")
                # the second pass replaces every row: growth should then be near zero
                per.append((rss_bytes(target.pid) - before) / n_models)
            # what the buffers hold, as the daemon accounts for its arrays (RSS also holds
            # the heap's high water from the messages in flight)
            models = target.request({"cmd": "status"})["models"]
            held = [m["buffer_bytes"] for m in models.values()]
        finally:
            target.close()
            target.remove()
        bound = 8 * 4 * rows
        label = f"memory per model, full buffers (4 inputs, {rows} rows at 1 s)"
        table.add(label, f"buffer {med(held) / 1e6:.2f} MB ({med(held) / rows:.0f} B per row); "
                  f"RSS growth {per[0] / 1e6:.2f} MB ({per[0] / rows:.0f} B per row)"
                  + (f", after another 12 h of rows {(per[0] + per[1]) / 1e6:.2f} MB"
                     if len(per) > 1 else ""),
                  f"8 B x inputs x rows = {bound / 1e6:.2f} MB",
                  [h / bound for h in held], "<= 1.10")

    def checkpoint_case(self, table):
        """Loop pause of a ``checkpoint`` command: 100 models of 8 inputs, 5 000 rows each."""
        n_models = 5 if self.quick else 100
        rows = 500 if self.quick else 5000
        target = Target("daemon", n_models=n_models, daemon={"checkpoint_every": '"1d"'})
        try:
            # the buffers filled by single samples, as a plant sends them
            msgs = single_msgs(target, rows, self.rng)
            target.throughput(msgs, len(msgs))
            del msgs
            rate, k = 1000, (500 if self.quick else 3000)
            base, pause, reply, size = [], [], [], []
            for _ in range(self.repeats):
                lat, _run = target.paced(single_msgs(target, k, self.rng, 1), rate)
                base.append(lat.max() * 1e3)
                box = {}
                req = target.ctx.socket(zmq.REQ)
                req.setsockopt(zmq.LINGER, 0)
                req.connect(target.ctl)

                def during(i, req=req, box=box):
                    if i == k // 3:
                        box["t0"] = time.perf_counter()
                        req.send(msgpack.packb({"cmd": "checkpoint"}))
                    if "t0" in box and "t1" not in box and req.poll(0):
                        req.recv()
                        box["t1"] = time.perf_counter()
                lat, _run = target.paced(single_msgs(target, k, self.rng, 1), rate, during)
                if "t1" not in box and req.poll(30000):
                    req.recv()
                    box["t1"] = time.perf_counter()
                req.close()
                pause.append(lat.max() * 1e3)
                reply.append((box["t1"] - box["t0"]) * 1e3)
                ck = [os.path.getsize(os.path.join(target.state_dir, f))
                      for f in os.listdir(target.state_dir) if f.startswith("checkpoint")]
                size.append(max(ck) / 1e6)
        finally:
            target.close()
            target.remove()
        table.add(f"checkpoint command of {n_models} models x {rows} rows (written on the "
                  f"loop; the periodic ones fork: tools/bench_state.py): longest answer during it",
                  f"{med(pause):.0f} ms (runs {spread(pause, '{:.0f}')}; command reply "
                  f"{med(reply):.0f} ms; {med(size):.0f} MB)",
                  f"longest answer without checkpoint {med(base):.1f} ms",
                  [ratio(p, b) for p, b in zip(pause, base, strict=True)], "<= 20 ms")

    def restart_case(self, table):
        """Start to ready after a SIGKILL with ``n`` WAL records to replay, vs a clean stop."""
        n = 1000 if self.quick else 100000
        target = Target("daemon", n_models=1, daemon={"checkpoint_every": '"1d"'})
        state = target.state_dir
        keep = target.tmp
        try:
            msgs = lab_msgs(target, n, self.rng, block=256)
            run = target.throughput(msgs, len(msgs))
            target.ping()  # the loop has logged every record of the batch it answered
            feed_rate = n / run.wall
            t0 = target.t_next + 1000.0
        finally:
            target.close(clean=False)  # a crash: the records are in the log only
        killed, clean = [], []
        try:
            for rep in range(self.repeats):
                # the first restart after the kill replays the log; a clean stop of that
                # daemon writes a checkpoint, so the next start replays nothing
                if rep == 0:
                    t = Target("daemon", n_models=1, state_dir=state, train=0, t0=t0)
                    killed.append(t.ready_s)
                    # the checkpoints by log size leave only the log since the newest one
                    replayed = t.request({"cmd": "status"})["state"]["replayed"]
                    t.close(clean=True)
                    t.remove()
                    t0 = t.clock + 1000.0
                t = Target("daemon", n_models=1, state_dir=state, train=0, t0=t0)
                clean.append(t.ready_s)
                t.close(clean=True)
                t.remove()
                t0 = t.clock + 1000.0
        finally:
            shutil.rmtree(keep, ignore_errors=True)
        replay = killed[0] - med(clean)
        table.add(f"restart after {n:,} WAL records (SIGKILL): start to ready",
                  f"{killed[0]:.2f} s ({replayed:,} records replayed, about "
                  f"{replayed / max(replay, 1e-3):,.0f}/s; learned live at {feed_rate:,.0f}/s)",
                  f"start after a clean stop {med(clean):.2f} s (runs {spread(clean)})",
                  [killed[0] / c for c in clean], "<= 2 s")

    # ------------------------------------------------------------------ the two tables
    CASES = ("single", "paced", "blocks", "200", "10000", "memory", "checkpoint", "restart")

    def want(self, case):
        return not self.args.only or case in self.args.only

    def cases(self):
        t = Table("posteriord daemon benchmark, case table of issue 13")
        n = self.n
        if any(self.want(c) for c in ("single", "paced", "blocks")):
            one = Target("daemon")
            try:
                if self.want("single"):
                    self.throughput_case(t, "1 model x 8 inputs", one, n, ">= 0.85")
                if self.want("paced"):
                    self.paced_case(t, one, "1 model: CPU per message at 5 000 msg/s paced",
                                    "1 model: latency at 5 000 msg/s")
                if self.want("blocks"):
                    self.blocks_case(t, one)
            finally:
                one.close()
                one.remove()
        sizes = ((50, ">= 0.75", "200"), (200, ">= 0.50", "10000")) if self.quick else \
            ((200, ">= 0.75", "200"), (10000, ">= 0.50", "10000"))
        for n_models, bar, case in sizes:
            if not self.want(case):
                continue
            tg = Target("daemon", n_models=n_models, train=self.train(n_models))
            try:
                self.throughput_case(t, f"{n_models:,} models interleaved", tg,
                                     max(2, n // n_models), bar)
            finally:
                tg.close()
                tg.remove()
        if self.want("memory"):
            self.memory_case(t)
        if self.want("checkpoint"):
            self.checkpoint_case(t)
        if self.want("restart"):
            self.restart_case(t)
        return t

    def detectors(self):
        """1 model with the drift detectors off and on, runs interleaved."""
        t = Table("posteriord drift detectors, 1 model x 8 inputs")
        off = Target("daemon", detectors=False)
        on = Target("daemon", detectors=True)
        try:
            runs = {False: [], True: []}
            for _ in range(self.repeats):
                for flag, tg in ((False, off), (True, on)):
                    runs[flag].append(tg.throughput(single_msgs(tg, self.n, self.rng),
                                                    self.n))
        finally:
            for tg in (off, on):
                tg.close()
                tg.remove()
        a, b = runs[True], runs[False]
        t.add("detectors on vs off: throughput", fmt_rate(med([r.rate for r in a])),
              f"off {fmt_rate(med([r.rate for r in b]))}",
              [ratio(x.rate, y.rate) for x, y in zip(a, b, strict=True)], ">= 0.90")
        t.add("detectors on vs off: loop-thread CPU per message",
              f"{med([r.loop_us for r in a]):.1f} us", f"off {med([r.loop_us for r in b]):.1f} us",
              [ratio(x.loop_us, y.loop_us) for x, y in zip(a, b, strict=True)])
        return t

    def scaling(self):
        t = Table("posteriord scaling (1 model = 8 inputs, degree 1, 9 terms, unless stated)")
        counts = (1, 50) if self.quick else (1, 100, 1000, 10000)
        rss1 = None
        for n_models in counts:
            train = self.train(n_models)
            tg = Target("daemon", n_models=n_models, train=train)
            state = tg.state_dir
            models = f"{n_models:,} model{'s' if n_models > 1 else ''}"
            try:
                fresh = tg.ready_s
                rss = rss_bytes(tg.pid)
                per_model = max(2, self.n // n_models)
                self.throughput_case(t, models, tg, per_model, "")
                rss_after = rss_bytes(tg.pid)
            finally:
                tg.close(clean=True)
            try:
                again = Target("daemon", n_models=n_models, state_dir=state, train=0,
                               t0=tg.t_next + 1000.0)
                again.close(clean=True)
                again.remove()
            finally:
                tg.remove()
            rows = min(per_model * self.repeats + train, 5000)  # lab.keep_count
            mem = (f"RSS {rss / 1e6:.0f} MB after training; {rss_after / 1e6:.0f} MB after "
                   f"the timed runs (about {rows:,} rows per model buffered; heap high water)")
            if rss1 is None:
                rss1 = rss
            else:
                mem += f"; {(rss - rss1) / (n_models - 1) / 1e3:.0f} kB per trained model"
            t.add(f"{models}: memory ({train} lab results each)", mem)
            t.add(f"{models}: start to ready, with their state",
                  f"{again.ready_s:.2f} s", f"first start (no state) {fresh:.2f} s",
                  [ratio(again.ready_s, fresh)])
        for n_inputs, degree in ((2, 1), (8, 1), (8, 2), (32, 2)):
            terms = comb(n_inputs + degree, degree)
            label = f"1 model, {terms} terms ({n_inputs} inputs, degree {degree})"
            # enough lab results to identify every term; --quick only checks that the case
            # runs (at 561 terms each lab result costs ~0.1 s of the daemon's time)
            train = 40 if self.quick else max(40, terms + 10)
            try:
                tg = Target("daemon", n_inputs=n_inputs, degree=degree, train=train)
            except Skip as exc:
                # the loader's message without the temporary file's name
                reason = str(exc).split(" key ", 1)[-1]
                t.skip(label, f"the config is refused: {reason}")
                continue
            try:
                self.throughput_case(t, label, tg, self.n // (1 if terms < 100 else 10), "")
            finally:
                tg.close()
                tg.remove()
        n_lab = 100 if self.quick else 1000
        res = {}
        for mode in ("group", "always"):
            tg = Target("daemon", daemon={"fsync": f'"{mode}"'})
            try:
                res[mode] = [tg.throughput(lab_msgs(tg, n_lab, self.rng), n_lab)
                             for _ in range(self.repeats)]
            finally:
                tg.close()
                tg.remove()
        g, a = res["group"], res["always"]
        t.add("lab results (one WAL record each), fsync always vs group",
              f"always {fmt_rate(med([r.rate for r in a]), 'results/s')}",
              f"group {fmt_rate(med([r.rate for r in g]), 'results/s')}",
              [ratio(x.rate, y.rate) for x, y in zip(a, g, strict=True)])
        return t


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true",
                    help="a smoke test: few messages, small cases (figures not meaningful)")
    ap.add_argument("--scaling", action="store_true", help="also the scaling table")
    ap.add_argument("--only-scaling", action="store_true", help="only the scaling table")
    ap.add_argument("--detectors", action="store_true",
                    help="also 1 model with the drift detectors on and off")
    ap.add_argument("--repeats", type=int, default=0, help="runs per case (default 3, quick 2)")
    ap.add_argument("--only", action="append", choices=Bench.CASES, default=[],
                    help="run only this case of the case table (repeatable)")
    args = ap.parse_args()
    bench = Bench(args)
    started = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    bench.start_floor()
    tables = []
    try:
        if not args.only_scaling:
            tables.append(bench.cases())
        if args.scaling or args.only_scaling:
            tables.append(bench.scaling())
        if args.detectors:
            tables.append(bench.detectors())
    finally:
        bench.floor.close()
        bench.floor.remove()
    print()
    print(f"Measured {started} on {platform.node()}: {os.cpu_count()} cores, "
          f"{platform.processor() or platform.machine()}, Python {platform.python_version()}, "
          f"{bench.repeats} runs per case{' (--quick: not meaningful)' if args.quick else ''}; "
          "ratios are target / baseline in the same run, floor and daemon runs interleaved.")
    for t in tables:
        print()
        print(t.markdown())


if __name__ == "__main__":
    main()
