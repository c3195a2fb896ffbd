"""The ``posteriord`` command as a real subprocess: signals, reloads, config checking.

The daemon under test runs ``python -m daemon.cli run --config FILE`` (the console script
for check-config when it is installed) with ipc:// endpoints in a temporary folder, the
test's XPUB as its feed and a free loopback port for /metrics. Waits are on sockets or
polled conditions with deadlines (conftest.py).
"""

from __future__ import annotations

import re
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import zmq
from conftest import (
    MODEL,
    PROBE,
    PROBE_MODEL,
    TIMEOUT,
    FeedPublisher,
    Link,
    blas_env,
    c301_model,
    free_port,
    ipc,
    metric,
    recv_count,
    recv_until,
    scrape,
    toml_config,
    wait_until,
)
from scipy.special import comb

from daemon.config import load
from daemon.workbench import plant

ROW = [110.0, 14.0, 1.2, 5.0]
SECOND = "c301.tops_water"
START_TIMEOUT = 60.0  # a cold start imports numpy and scipy


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "daemon.cli", *args]


def console_script() -> list[str]:
    script = Path(sys.executable).with_name("posteriord")
    return [str(script)] if script.exists() else cli()


class DaemonProcess(Link):
    """``posteriord run --config FILE`` in a subprocess, with the test's sockets around it."""

    def __init__(self, folder: Path, models: list[dict]):
        ctx = zmq.Context()
        super().__init__(ctx, FeedPublisher(ctx))
        self.metrics_address = ("127.0.0.1", free_port())
        self.settings = {"feeds": [self.feed.endpoint], "publish": ipc(folder, "pub"),
                         "control": ipc(folder, "ctl"),
                         "metrics": f"127.0.0.1:{self.metrics_address[1]}",
                         "state_dir": str(folder / "state"), "log_level": "info"}
        self.path = folder / "posteriord.toml"
        self.write(models)
        self.log_path = folder / "daemon.log"
        with open(self.log_path, "wb") as log:
            self.proc = subprocess.Popen(cli("run", "--config", str(self.path)),
                                         stdin=subprocess.DEVNULL, stdout=log, stderr=log,
                                         cwd=folder, env=blas_env())
        try:
            self.connect(self.settings["publish"], self.settings["control"],
                         [m["name"] for m in models], timeout=START_TIMEOUT)
        except AssertionError as exc:
            raise AssertionError(f"{exc}; exit code {self.proc.poll()}; log:\n{self.log()}") \
                from None

    def write(self, models: list[dict]) -> None:
        self.path.write_text(toml_config(self.settings, [*models, PROBE_MODEL]))

    def log(self) -> str:
        return self.log_path.read_text(errors="replace")

    def scrape(self) -> dict:
        return scrape(self.metrics_address)

    def finish(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()  # only after a failed test: the tests stop it themselves
            self.proc.wait(TIMEOUT)
        self.close()
        self.ctx.term()


@pytest.fixture
def start_daemon(sock_dir):
    started: list[DaemonProcess] = []

    def start(models: list[dict]) -> DaemonProcess:
        folder = sock_dir / f"p{len(started)}"
        folder.mkdir()
        d = DaemonProcess(folder, models)
        started.append(d)
        return d

    yield start
    for d in started:
        d.finish()


def learn_a_day(d: DaemonProcess) -> float:
    """Replay the first day of a simulated run (features and late lab results)."""
    run = plant.simulate(plant.Scenario(seed=3, days=1.0, sample_period_s=300.0))
    for ev in plant.events(run):
        if ev[0] == "x":
            d.feed.send(MODEL, {"t": ev[1], "x": list(ev[2])})
        else:
            d.feed.send(MODEL, {"t": ev[1], "y": ev[2]})
    out = d.barrier()
    assert sum(topic == f"fit/{MODEL}" for topic, _ in out) == len(run.lab_t)
    assert d.posterior()["updates"] >= 4
    return float(run.t[-1])


def preds_of(out: list, model: str = MODEL) -> list[dict]:
    return [body for topic, body in out if topic == f"pred/{model}"]


# ---------------------------------------------------------------------------------- signals
def test_sigterm_exits_0_after_publishing_what_it_had(start_daemon):
    d = start_daemon([c301_model()])
    ts = [1000.0 + 60.0 * k for k in range(3000)]
    for t in ts:
        d.feed.send(MODEL, {"t": t, "x": ROW})
    # every prediction published (by the daemon's own count) before the signal; they are
    # read only after the process has gone, so they must have left before it exited
    wait_until(lambda: metric(d.scrape(), "posteriord_predictions_published_total",
                              model=MODEL) == len(ts), what="all predictions published")
    d.proc.send_signal(signal.SIGTERM)
    assert d.proc.wait(TIMEOUT) == 0
    got = recv_count(d.out, len(ts))
    assert [body["t"] for _, body in got] == ts
    assert {topic for topic, _ in got} == {f"pred/{MODEL}"}
    log = d.log()
    assert "stop requested" in log and re.search(r"INFO posteriord: stopped$", log, re.M)


def test_sigint_mid_burst_exits_0_and_what_was_published_is_a_prefix(start_daemon):
    d = start_daemon([c301_model()])
    ts = [1000.0 + 60.0 * k for k in range(2000)]
    for t in ts:
        d.feed.send(MODEL, {"t": t, "x": ROW})
    first = recv_until(d.out, lambda m: m[0] == f"pred/{MODEL}")
    d.proc.send_signal(signal.SIGINT)
    assert d.proc.wait(TIMEOUT) == 0
    got = preds_of(first)
    while d.out.poll(0):  # the process is gone: what arrived is all there will be
        topic, body = recv_count(d.out, 1)[0]
        if topic == f"pred/{MODEL}":
            got.append(body)
    # the batch in hand when the signal came was finished: no holes, nothing reordered
    assert [p["t"] for p in got] == ts[: len(got)]
    assert "stop requested" in d.log()


def test_sighup_with_a_changed_config_keeps_learned_state(start_daemon):
    d = start_daemon([c301_model()])
    t_end = learn_a_day(d)
    before = d.posterior()
    # a second model added; the first one only changes its interval level (not learning)
    d.write([c301_model(level=0.9), c301_model(SECOND)])
    d.proc.send_signal(signal.SIGHUP)
    d.feed.wait_subscribed({SECOND})
    assert d.posterior() == before
    assert set(d.ctl("status")["models"]) == {MODEL, SECOND, PROBE}
    m = d.scrape()
    assert metric(m, "posteriord_config_reloads_total", result="ok") == 1
    assert metric(m, "posteriord_models") == 3
    d.feed.send(MODEL, {"t": t_end + 300.0, "x": ROW})
    d.feed.send(SECOND, {"t": t_end + 300.0, "x": ROW})
    out = d.barrier()
    assert preds_of(out)[0]["level"] == 0.9 and preds_of(out)[0]["status"] == "learning"
    assert preds_of(out, SECOND)[0]["status"] == "unidentified"
    assert d.posterior(SECOND)["updates"] == 0
    assert re.search(rf"reloaded .*: 3 model\(s\), kept learned state of {re.escape(MODEL)}, "
                     rf"{PROBE}$", d.log(), re.M)
    d.proc.send_signal(signal.SIGTERM)
    assert d.proc.wait(TIMEOUT) == 0


def test_sighup_with_an_invalid_config_keeps_the_old_one(start_daemon):
    d = start_daemon([c301_model()])
    t_end = learn_a_day(d)
    before = d.posterior()
    d.write([c301_model(prior={"alpha": -1})])
    d.proc.send_signal(signal.SIGHUP)
    wait_until(lambda: metric(d.scrape(), "posteriord_config_reloads_total",
                              result="error") == 1, what="failed reload counted")
    log = wait_until(lambda: (lambda text: text if "reload failed" in text else "")(d.log()),
                     what="failed reload logged")
    assert re.search(r"ERROR posteriord: reload failed, keeping the current config: .*"
                     r"key prior\.alpha: expected a number >= 0, got -1", log)
    assert d.proc.poll() is None and d.ctl("ping") == {"ok": True}
    assert d.posterior() == before
    assert set(d.ctl("status")["models"]) == {MODEL, PROBE}
    assert metric(d.scrape(), "posteriord_config_reloads_total", result="ok") == 0
    d.feed.send(MODEL, {"t": t_end + 300.0, "x": ROW})
    assert len(preds_of(d.barrier())) == 1
    d.proc.send_signal(signal.SIGTERM)
    assert d.proc.wait(TIMEOUT) == 0


# ---------------------------------------------------------------------------------- config
def run_cli(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(args, cwd=cwd, env=blas_env(), capture_output=True, text=True,
                          timeout=START_TIMEOUT, stdin=subprocess.DEVNULL)


def test_check_config_prints_the_terms(tmp_path):
    path = tmp_path / "ok.toml"
    path.write_text(toml_config({"metrics": ""}, [c301_model()]))
    res = run_cli([*console_script(), "check-config", str(path)], tmp_path)
    assert res.returncode == 0, res.stderr
    names = load(path).models[0].build_basis().names
    # terms of total degree <= 2 in 4 inputs: C(4 + 2, 2) = 15 (monomial count formula)
    assert len(names) == comb(4 + 2, 2, exact=True) == 15
    assert f"{len(names)} terms:" in res.stdout
    listed = re.findall(r"^\s+(\d+)\s+(\S+)\s+(?:flat prior|prior mean)", res.stdout, re.M)
    assert [name for _, name in listed] == list(names)
    assert [int(i) for i, _ in listed] == list(range(len(names)))
    assert f"model {MODEL}" in res.stdout


@pytest.mark.parametrize("text, where", [
    (toml_config({}, [c301_model(prior={"alpha": -1})]),
     r'model\[0\] "c301\.bottoms_solvent" key prior\.alpha: expected a number >= 0, got -1'),
    (toml_config({"publish": "tcp://127.0.0.1:99999"}, [c301_model()]),
     r"key daemon\.publish: expected a ZeroMQ endpoint like .*, got \"tcp://127\.0\.0\.1:99999\""),
    ("[daemon\n", r"expected valid TOML, got "),
], ids=["bad value", "bad endpoint", "bad TOML"])
def test_check_config_reports_file_key_expected_got(tmp_path, text, where):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    res = run_cli([*console_script(), "check-config", str(path)], tmp_path)
    assert res.returncode == 3
    assert res.stdout == ""
    assert re.search(rf"^posteriord: config error: {re.escape(str(path))}: {where}",
                     res.stderr, re.M), res.stderr


def test_run_with_a_bad_config_exits_3(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(toml_config({}, [c301_model(lab={"keep": "forever"})]))
    res = run_cli(cli("run", "--config", str(bad)), tmp_path)
    assert res.returncode == 3
    assert re.search(r"config error: .*key lab\.keep: expected a duration", res.stderr)
    missing = run_cli(cli("run", "--config", str(tmp_path / "none.toml")), tmp_path)
    assert missing.returncode == 3 and "none.toml" in missing.stderr
