"""Kill the opcua-in bridge, then the daemon (SIGKILL, real subprocesses of ``posteriord``),
while a real OPC UA server plays the plant: nothing is learned twice, the gaps are counted,
and everything resumes.

Both processes read one configuration file (the daemon ignores the ``[opcua_in]`` table). The
plant's server runs on an event loop of the test's own (bridge_support.PlantThread).
"""

from __future__ import annotations

import signal
import subprocess
import sys

import pytest

pytest.importorskip("asyncua", reason="the opcua extra (asyncua) is not installed")

from bridge_support import T0, TWO, PlantThread, stamp  # noqa: E402
from conftest import (  # noqa: E402
    PROBE_MODEL,
    TIMEOUT,
    FeedPublisher,
    Link,
    blas_env,
    free_port,
    ipc,
    metric,
    recv_until,
    scrape,
    toml_config,
    wait_until,
)

START_TIMEOUT = 60.0  # a cold start imports numpy and scipy


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "daemon.cli", *args]


class Proc:
    """One ``posteriord`` subprocess with its log file."""

    def __init__(self, args: list[str], log_path, cwd):
        self.log_path = log_path
        with open(log_path, "ab") as log:
            self.proc = subprocess.Popen(args, stdin=subprocess.DEVNULL, stdout=log, stderr=log,
                                         cwd=cwd, env=blas_env())

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")

    def kill(self) -> None:
        self.proc.send_signal(signal.SIGKILL)
        assert self.proc.wait(TIMEOUT) == -signal.SIGKILL

    def finish(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(TIMEOUT)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(TIMEOUT)


class Daemon(Link):
    """``posteriord run`` on the shared config, restartable on the same state folder."""

    def __init__(self, ctx, feed: FeedPublisher, folder, path, metrics_port: int, settings):
        super().__init__(ctx, feed)
        self.folder, self.path, self.settings = folder, path, settings
        self.metrics_address = ("127.0.0.1", metrics_port)
        self.proc: Proc | None = None

    def start(self) -> None:
        self.proc = Proc(cli("run", "--config", str(self.path)), self.folder / "daemon.log",
                         self.folder)
        try:
            self.connect(self.settings["publish"], self.settings["control"], ["two"],
                         timeout=START_TIMEOUT)
        except AssertionError as exc:
            raise AssertionError(f"{exc}; log:\n{self.proc.log()}") from None

    def kill(self) -> None:
        self.proc.kill()
        for s in (self.out, self.ctl.sock):
            s.close(linger=0)
        self.out = self.ctl = None
        # the daemon's subscriptions went with it
        self.feed.wait_event("unsub", "two")

    def model(self) -> dict:
        reply = self.ctl("status")
        assert reply["ok"], reply
        return reply["models"]["two"]

    def scrape(self) -> dict:
        return scrape(self.metrics_address)


def test_kill_the_bridge_then_the_daemon(sock_dir):
    plant = PlantThread(free_port(), ["A", "B", "Q", "Qdrawn"])
    plant.start()
    bridge_feed = ipc(sock_dir, "opcua-in")
    bridge_metrics = ("127.0.0.1", free_port())
    ctx = __import__("zmq").Context()
    feed = FeedPublisher(ctx)
    settings = {"feeds": [feed.endpoint, bridge_feed], "publish": ipc(sock_dir, "pub"),
                "control": ipc(sock_dir, "ctl"), "state_dir": str(sock_dir / "state"),
                "log_level": "info"}
    daemon_metrics = free_port()
    settings["metrics"] = f"127.0.0.1:{daemon_metrics}"
    path = sock_dir / "posteriord.toml"
    path.write_text(toml_config(settings, [TWO, PROBE_MODEL]) + f"""
[opcua_in]
server = "{plant.url}"
feed = "{bridge_feed}"
sampling_interval = "20ms"
publishing_interval = "20ms"
reconnect_ivl = "100ms"
reconnect_ivl_max = "200ms"
timeout = "1s"
metrics = "{bridge_metrics[0]}:{bridge_metrics[1]}"
anonymous = true
[[opcua_in.node]]
model = "two"
tag = "A"
node = "ns=2;s=A"
[[opcua_in.node]]
model = "two"
tag = "B"
node = "ns=2;s=B"
[[opcua_in.lab]]
model = "two"
value = "ns=2;s=Q"
drawn = "ns=2;s=Qdrawn"
""")
    daemon = Daemon(ctx, feed, sock_dir, path, daemon_metrics, settings)
    bridge = None

    def start_bridge() -> Proc:
        b = Proc(cli("bridge", "opcua-in", "--config", str(path)), sock_dir / "bridge.log",
                 sock_dir)

        def up():
            try:
                s = scrape(bridge_metrics)
            except OSError:
                return False
            return metric(s, "posteriord_bridge_connected", bridge="opcua-in") == 1 and \
                metric(s, "posteriord_bridge_daemon_subscribed", bridge="opcua-in",
                       model="two") == 1

        wait_until(up, START_TIMEOUT, what=f"the bridge connected; log:\n{b.log()}")
        return b

    def row(t: float, a: float, b: float) -> None:
        plant.write_together({"A": a, "B": b}, t)

    def lab(t: float, y: float) -> None:
        # the value and its drawn time together (the bridge sends the pair on the time)
        plant.write_together({"Q": y, "Qdrawn": stamp(t)}, t + 1.0)

    def seen(kind: str, t: float) -> None:
        recv_until(daemon.out, lambda m: m[0] == f"{kind}/two" and m[1]["t"] == t)

    def y_of(a: float, b: float) -> float:
        return 0.5 + a + 0.5 * b  # a made-up linear plant, exactly representable

    def gaps() -> float:
        return metric(daemon.scrape(), "posteriord_feed_gaps_total", model="two")

    try:
        daemon.start()
        bridge = start_bridge()
        # ---- both up: two rows with their lab results are learned
        for k, (a, b) in enumerate([(1.0, 2.0), (3.0, 1.0), (2.0, 4.0)], start=1):
            t = T0 + 10.0 * k
            row(t, a, b)
            seen("pred", t)
            if k < 3:
                lab(t, y_of(a, b))
                seen("fit", t)
        first = daemon.model()
        assert first["learned"] == 2 and first["lab_results"] == 2
        assert gaps() == 0

        # ---- SIGKILL the bridge; the plant moves on meanwhile
        bridge.kill()
        row(T0 + 40, 5.0, 5.0)  # never seen by anyone: the plant's value until the next one
        row(T0 + 50, 4.0, 1.0)
        bridge = start_bridge()
        # the new bridge's subscription starts with the current values: the row of T0 + 50
        # and the lab pair of T0 + 20, sent again; the daemon takes the row and refuses the
        # repeated result
        seen("pred", T0 + 50)
        wait_until(lambda: daemon.model()["rejected"].get("lab_out_of_order", 0) == 1,
                   what="the repeated lab result refused")
        again = daemon.model()
        assert again["learned"] == 2 and again["lab_results"] == 3
        # the bridge's sequence numbers began again: one gap (its size unknown)
        assert gaps() == 1
        lab(T0 + 50, y_of(4.0, 1.0))
        seen("fit", T0 + 50)
        assert daemon.model()["learned"] == 3

        # ---- SIGKILL the daemon; the bridge holds what comes meanwhile
        assert daemon.ctl("checkpoint")["ok"]
        row(T0 + 60, 1.0, 1.0)
        seen("pred", T0 + 60)
        daemon.kill()
        wait_until(lambda: metric(scrape(bridge_metrics), "posteriord_bridge_daemon_subscribed",
                                  bridge="opcua-in", model="two") == 0,
                   what="the bridge saw the daemon go")
        row(T0 + 70, 2.0, 3.0)
        lab(T0 + 70, y_of(2.0, 3.0))
        row(T0 + 80, 3.0, 3.0)
        daemon.start()
        # replayed: the three results learned before the kill, once each, and the one held
        # by the bridge
        # the bridge reconnects with back-off and the restarted daemon replays first: on a
        # loaded machine that takes longer than the default wait
        try:
            wait_until(lambda: daemon.model()["learned"] == 4, timeout=START_TIMEOUT,
                       what="the held lab result learned")
        except AssertionError as e:
            raise AssertionError(f"{e}; the model: {daemon.model()}; bridge log:\n"
                                 f"{bridge.log()}") from None
        back = daemon.model()
        assert back["lab_results"] == 5 and back["rejected"].get("lab_out_of_order", 0) == 1
        # the row of T0 + 60 came after the checkpoint: the restarted daemon, whose sequence
        # numbers are the checkpoint's, counts it as lost
        assert gaps() == 2
        assert metric(daemon.scrape(), "posteriord_feed_lost_messages_total", model="two") >= 1
        bs = scrape(bridge_metrics)
        assert metric(bs, "posteriord_bridge_dropped_total", bridge="opcua-in", model="two",
                      reason="no_subscriber") == 0

        # ---- everything resumes
        row(T0 + 90, 1.0, 3.0)
        seen("pred", T0 + 90)
        lab(T0 + 90, y_of(1.0, 3.0))
        seen("fit", T0 + 90)
        assert daemon.model()["learned"] == 5
    finally:
        for p in (bridge, daemon.proc):
            if p is not None:
                p.finish()
        if daemon.out is not None:
            daemon.close()
        else:
            feed.sock.close(linger=0)
        ctx.term()
        plant.close()
