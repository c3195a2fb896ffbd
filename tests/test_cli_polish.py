"""The command line as an engineer meets it (issue 14, items 5 and 7 to 12).

Real daemons on real sockets: in-process services (conftest.ServiceHarness) for ctl, watch and
record, subprocesses where a process must die (a crash keeps a freeze reason) or a pipe must
close (``| head``). The data are invented and seeded.
"""

from __future__ import annotations

import io
import json
import logging
import os
import re
import subprocess
import sys
import threading
import tomllib
from pathlib import Path

import numpy as np
import pytest
import zmq
from conftest import (
    MODEL,
    PROBE,
    PROBE_MODEL,
    TIMEOUT,
    Control,
    blas_env,
    c301_model,
    ipc,
    recv_until,
    toml_config,
    wait_until,
)
from numpy.polynomial import legendre

from daemon.cli import main
from daemon.config import load
from daemon.exitcodes import EXIT_OK, EXIT_RUNTIME, EXIT_USAGE
from daemon.workbench import live, report
from recursive.basis import Input, Polynomial

ROOT = Path(__file__).resolve().parents[1]
ISO = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ")
T0 = 1767571200.0  # 2026-01-05 00:00 UTC


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "daemon.cli", *args]


def _config_file(folder: Path, h, models) -> Path:
    """A config file naming the harness's endpoints, for ``--config``."""
    d = h.config.daemon
    path = folder / "plant.toml"
    path.write_text(toml_config({"feeds": list(d.feeds), "publish": d.publish,
                                 "control": d.control, "metrics": ""}, [*models, PROBE_MODEL]))
    return path


def _teach(h, n: int = 30, seed: int = 0):
    """Features every 10 min and a lab result on every sixth, from a known quadratic plant."""
    rng = np.random.default_rng(seed)
    lo = np.array([95.0, 8.0, 0.9, 3.0])
    hi = np.array([125.0, 20.0, 1.5, 7.0])
    for k in range(6 * n):
        t = T0 + 600.0 * k
        x = lo + (hi - lo) * rng.uniform(size=4)
        h.feed.send(MODEL, {"t": t, "x": x.tolist()})
        if k % 6 == 5:
            y = 180 + 3.0 * (x[0] - 110) - 0.05 * (x[0] - 110) ** 2 + 2.0 * x[1] \
                + rng.normal(0, 2.0)
            h.feed.send(MODEL, {"t": t, "y": float(y)})
    h.barrier()


def _with_unit(**kw):
    m = c301_model(**kw)
    m["target"] = "AX-350"
    m["unit"] = "ppm"
    return m


# ---------------------------------------------------------------------------------- item 5
def _export(path: Path, days: float = 6.0, seed: int = 1) -> None:
    """A historian export whose lab column is not the default one, with a units row."""
    rng = np.random.default_rng(seed)
    n = int(days * 144)
    lines = ["time,TI-104,FI-201,Moisture", ",degC,t/h,%"]
    for k in range(n):
        t = T0 + 600.0 * k
        ti, fi = 110 + 8 * rng.standard_normal(), 14 + 3 * rng.standard_normal()
        lab = ""
        if k % 24 == 12:
            lab = f"{3.4 + 0.02 * (ti - 110) - 0.03 * (fi - 14) + rng.normal(0, 0.05):.3f}"
        stamp = np.datetime64(int(t), "s").astype(str)
        lines.append(f"{stamp}Z,{ti:.2f},{fi:.2f},{lab}")
    path.write_text("\n".join(lines) + "\n")


def test_tune_writes_target_and_unit_and_later_commands_need_no_target(tmp_path, capsys):
    data = tmp_path / "export.csv"
    _export(data)
    block = tmp_path / "model.toml"
    assert main(["tune", str(data), "--target", "Moisture", "--until", "4d", "--burn-in", "5",
                 "--out", str(block)]) == EXIT_OK
    capsys.readouterr()
    model = load(block).models[0]
    assert (model.target, model.unit) == ("Moisture", "%")  # the unit from the units row
    # backtest and tune again without --target: the config names the lab column
    assert main(["backtest", str(data), "--config", str(block), "--train", "3d"]) == EXIT_OK
    out = capsys.readouterr()
    assert "target Moisture (from the config; --target overrides)" in out.err
    assert "lab column Moisture" in out.err and "%" in out.out
    assert main(["tune", str(data), "--config", str(block), "--until", "4d", "--burn-in", "5",
                 "--top", "2"]) == EXIT_OK
    assert 'target = "Moisture"' in capsys.readouterr().out
    # --target still overrides: a column that is not there is an error naming it
    assert main(["backtest", str(data), "--config", str(block), "--target", "AX-9"]) == \
        EXIT_USAGE
    assert "AX-9" in capsys.readouterr().err


def test_two_models_with_different_targets_ask_for_one(tmp_path, capsys):
    data = tmp_path / "export.csv"
    _export(data, days=2.0)
    a, b = c301_model("a"), c301_model("b")
    a["target"], b["target"] = "Moisture", "AX-350"
    cfg = tmp_path / "two.toml"
    cfg.write_text(toml_config({}, [a, b]))
    assert main(["replay", str(data), "--config", str(cfg), "--wait", "0"]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert "different targets" in err and "--model" in err


def test_model_state_from_before_target_and_unit_still_loads():
    cfg = load_text(toml_config({}, [_with_unit()])).models[0]
    state = cfg.to_state()
    assert (state["target"], state["unit"]) == ("AX-350", "ppm")
    old = {k: v for k, v in state.items() if k not in ("target", "unit")}
    again = type(cfg).from_state(old)
    assert again.target is None and again.fingerprint() == cfg.fingerprint()


def load_text(text: str):
    from daemon.config import loads

    return loads(text, "<test>")


# ---------------------------------------------------------------------------------- item 7
def test_bare_posteriord_lists_the_commands_and_version_answers():
    bare = subprocess.run(cli(), capture_output=True, text=True, env=blas_env(), cwd=ROOT,
                          timeout=120)
    assert bare.returncode == EXIT_USAGE
    assert "required" not in bare.stderr
    for cmd in ("run", "ctl", "tune", "backtest", "report", "watch", "record"):
        assert re.search(rf"^\s+{cmd}\b", bare.stdout, re.M), cmd
    assert "Your own data in five minutes" in bare.stdout
    version = subprocess.run(cli("--version"), capture_output=True, text=True, env=blas_env(),
                             cwd=ROOT, timeout=120)
    assert version.returncode == EXIT_OK
    # the version pyproject.toml declares (the installed metadata comes from it)
    declared = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]
    assert version.stdout.strip() == f"posteriord {declared}"


def test_readme_says_how_to_get_posteriord_on_the_path():
    text = (ROOT / "README.md").read_text()
    quick = text[text.index("## Quick start"):text.index("## The numerical core")]
    assert ".venv/bin" in quick and "PATH" in quick


# ---------------------------------------------------------------------------------- item 8
def test_ctl_takes_the_endpoint_from_config_and_prints_a_table(start_service, tmp_path,
                                                              capsys):
    model = _with_unit()
    h = start_service([model])
    _teach(h)
    cfg = _config_file(tmp_path, h, [model])
    assert main(["ctl", "status", "--config", str(cfg)]) == EXIT_OK
    out = capsys.readouterr().out
    line = next(ln for ln in out.splitlines() if ln.startswith(MODEL))
    assert "learning" in line and " ppm" in line
    assert len(ISO.findall(line)) == 2                  # last sample, last lab: ISO, not epochs
    assert not re.search(r"\d{10}\.\d", out)            # no epoch float anywhere
    assert not re.search(r"\d\.\d{7,}", out)            # no 17-digit numbers
    assert "target AX-350" in out
    # --json: the reply itself, for scripts
    assert main(["ctl", "status", "--config", str(cfg), "--json"]) == EXIT_OK
    reply = json.loads(capsys.readouterr().out)
    assert reply["ok"] and reply["models"][MODEL]["unit"] == "ppm"
    assert reply["models"][MODEL]["last_sample_t"] == T0 + 600.0 * 179


def test_ctl_errors_say_what_to_add(start_service, tmp_path, capsys):
    h = start_service([c301_model()])
    cfg = _config_file(tmp_path, h, [c301_model()])
    assert main(["ctl", "posterior", "--config", str(cfg)]) == EXIT_RUNTIME
    err = capsys.readouterr().err
    assert f"add --model {MODEL}" in err and "got None" not in err
    assert main(["ctl", "posterior", "--config", str(cfg), "--model", "nope"]) == EXIT_RUNTIME
    assert "no model 'nope'" in capsys.readouterr().err
    # an unknown command is a usage error listing the commands, before anything is sent
    with pytest.raises(SystemExit) as exc:
        main(["ctl", "stauts", "--config", str(cfg)])
    assert exc.value.code == EXIT_USAGE
    assert "status" in capsys.readouterr().err


def _closed_pipe_run(args, cwd) -> subprocess.CompletedProcess:
    """Run with stdout a pipe whose reader is gone before the command writes anything."""
    r, w = os.pipe()
    os.close(r)
    try:
        return subprocess.run(cli(*args), stdout=w, stderr=subprocess.PIPE, text=True,
                              env=blas_env(), cwd=cwd, timeout=120)
    finally:
        os.close(w)


def test_every_command_piped_to_a_closed_reader_ends_quietly(start_service, tmp_path):
    h = start_service([c301_model()])
    cfg = _config_file(tmp_path, h, [c301_model()])
    for args in (["--help"], ["tune", "--help"], ["check-config"],
                 ["ctl", "status", "--config", str(cfg)],
                 ["ctl", "status", "--config", str(cfg), "--json"]):
        done = _closed_pipe_run(args, tmp_path)
        assert "Traceback" not in done.stderr and "BrokenPipe" not in done.stderr, \
            (args, done.stderr)
        assert done.returncode == EXIT_OK, (args, done.returncode, done.stderr)


# ---------------------------------------------------------------------------------- item 9
def test_watch_against_a_daemon_shows_events_below_and_counts_configured_models(
        start_service, tmp_path, capsys):
    model = _with_unit()
    h = start_service([model])
    cfg = _config_file(tmp_path, h, [model])
    # before any message the configured model is counted and listed
    assert main(["watch", "--config", str(cfg), "--model", MODEL, "--count", "0"]) == EXIT_OK
    frame = capsys.readouterr().out
    assert "1 model" in frame.splitlines()[0] and "no messages yet" in frame
    stream = io.StringIO()
    stop = threading.Event()
    th = threading.Thread(target=live.watch, args=(h.config.daemon.publish,),
                          kwargs={"stream": stream, "stop": stop, "known": [MODEL],
                                  "units": {MODEL: "ppm"}})
    th.start()
    try:
        def seen() -> bool:
            # the watch's subscription reaches the daemon some time after it connects: a
            # probe lab result each time, until its event line comes through
            h._probe_t += 1.0
            h.feed.send(PROBE, {"t": h._probe_t, "x": [0.5]})
            h.feed.send(PROBE, {"t": h._probe_t, "y": 0.5})
            h.barrier()
            return f"  {PROBE}  lab " in stream.getvalue()

        wait_until(seen, what="the watch sees the daemon")
        _teach(h)
        assert main(["ctl", "freeze", "--config", str(cfg), "--model", MODEL, "--reason",
                     "lab AX-350 recalibration", "--by", "tester"]) == EXIT_OK
        wait_until(lambda: "learning frozen by tester" in stream.getvalue(),
                   what="the freeze event line")
    finally:
        stop.set()
        th.join(TIMEOUT)
    text = stream.getvalue()
    events = [ln for ln in text.splitlines() if re.match(r"\d{4}-\d\d-\d\d \d\d:\d\d  ", ln)]
    labs = [ln for ln in events if f"  {MODEL}  lab " in ln]
    assert len(labs) == 30 and all(" ppm " in ln for ln in labs)
    assert events[-1].endswith("learning frozen by tester: lab AX-350 recalibration")
    table = text.splitlines()[len(events):]
    assert table[0].startswith("posteriord watch") and "2 models" in table[0]
    assert max(len(ln) for ln in table) <= 80, "\n".join(table)
    row = next(ln for ln in table if ln.startswith(MODEL))
    assert "frozen" in row and " ppm" in row


# ---------------------------------------------------------------------------------- item 10
def test_record_counts_to_stderr_and_keeps_target_and_unit_in_its_header(
        start_service, tmp_path, capsys):
    model = _with_unit()
    h = start_service([model])
    cfg = _config_file(tmp_path, h, [model])
    rec = tmp_path / "live.rec"
    rc = []
    th = threading.Thread(target=lambda: rc.append(main(
        ["record", str(rec), "--config", str(cfg), "--model", MODEL, "--count", "40"])))
    th.start()
    probe_t = [T0 - 86400.0]

    def recorded() -> bool:
        probe_t[0] += 1.0
        h.feed.send(MODEL, {"t": probe_t[0], "x": [110.0, 14.0, 1.2, 5.0]})
        h.barrier()
        try:
            return any(True for _ in live.RecordReader(rec))
        except (OSError, ValueError):
            return False  # not created yet, or its header line not written yet

    wait_until(recorded, what="the recorder sees the daemon")
    _teach(h, n=10)
    th.join(TIMEOUT)
    assert rc == [EXIT_OK]
    err = capsys.readouterr().err
    assert re.search(r"record: 40 messages \(\d+ pred, \d+ fit, \d+ alert\) in .*appended to",
                     err), err
    reader = live.RecordReader(rec)
    assert reader.models[MODEL]["target"] == "AX-350" and reader.models[MODEL]["unit"] == "ppm"
    assert len(list(reader)) == 40                     # the counter went to stderr only
    track = report.load_track(rec, MODEL)
    assert (track.meta["target"], track.meta["unit"]) == ("AX-350", "ppm")


def test_ready_line_names_every_endpoint_and_log_lines_the_sample_time(start_service, caplog):
    caplog.set_level(logging.INFO, logger="posteriord")
    h = start_service([c301_model()])
    ready = next(r.getMessage() for r in caplog.records if r.getMessage().startswith("ready:"))
    host, port = h.metrics_address
    assert f"feed from {h.feed.endpoint}" in ready
    assert f"publishing on {h.config.daemon.publish}" in ready
    assert f"control on {h.config.daemon.control}" in ready
    assert f"metrics on http://{host}:{port}/metrics" in ready
    h.feed.send(MODEL, {"t": T0 + 60.0, "x": [110.0, 14.0, 1.2, 5.0]})
    h.feed.send(MODEL, {"t": T0, "x": [110.0, 14.0, 1.2, 5.0]})  # out of order
    h.barrier()
    line = next(r.getMessage() for r in caplog.records if "out_of_order" in r.getMessage())
    # datetime.fromisoformat is the outside reading of the ISO stamps
    from datetime import datetime

    stamps = [datetime.fromisoformat(s) for s in ISO.findall(line)]
    assert [s.timestamp() for s in stamps] == [T0, T0 + 60.0]


# ---------------------------------------------------------------------------------- item 11
@pytest.mark.parametrize("family", ["legendre", "chebyshev", "monomial"])
def test_basis_jacobian_matches_numpy_polynomial_derivatives(family):
    # reference: numpy.polynomial's own derivative of each 1-D family (legder, chebder,
    # polyder), times du/dx = 2 / (hi - lo), by the product rule over the factors
    from numpy.polynomial import chebyshev, polynomial

    val, der = {"legendre": (legendre.legval, legendre.legder),
                "chebyshev": (chebyshev.chebval, chebyshev.chebder),
                "monomial": (polynomial.polyval, polynomial.polyder)}[family]
    ins = [Input("a", 0.0, 10.0), Input("b", -5.0, 5.0), Input("c", 100.0, 200.0)]
    b = Polynomial(ins, 3, family=family)
    x = np.array([3.3, 1.2, 150.7])
    u = (2 * x - [0.0, -5.0, 100.0] - [10.0, 5.0, 200.0]) / [10.0, 10.0, 100.0]
    du = 2.0 / np.array([10.0, 10.0, 100.0])

    def p(n, v, derive=False):
        c = np.zeros(n + 1)
        c[n] = 1.0
        return val(v, der(c) if derive else c)

    J = b.jacobian(x)
    for k, e in enumerate(b.exponents):
        for i in range(3):
            ref = du[i] * np.prod([p(e[j], u[j], derive=(j == i)) for j in range(3)])
            assert J[k, i] == pytest.approx(ref, rel=1e-12, abs=1e-12)


def test_ctl_sensitivities_in_engineering_units_at_the_operating_point(start_service,
                                                                         tmp_path, capsys):
    model = _with_unit()
    h = start_service([model])
    _teach(h, n=60)
    cfg = _config_file(tmp_path, h, [model])
    at = {"TI-104": 112.0, "FI-201": 13.0, "PI-110": 1.2, "AI-305": 5.0}
    args = ["--config", str(cfg), "--model", MODEL, *[f"--at={k}={v}" for k, v in at.items()]]
    assert main(["ctl", "sensitivities", *args, "--json"]) == EXIT_OK
    sens = json.loads(capsys.readouterr().out)
    assert sens["at"] == {"source": "given", "t": None, "x": list(at.values())}
    post = Control(h.ctx, h.config.daemon.control)("posterior", model=MODEL)
    w = np.array(post["mean"])
    cfg_model = h.model_config()
    basis = cfg_model.build_basis()
    lo = np.array([i.lo for i in cfg_model.inputs])
    hi = np.array([i.hi for i in cfg_model.inputs])

    def y(x):
        # the posterior mean model evaluated with numpy.polynomial.legendre, not our basis
        u = (2 * np.asarray(x) - lo - hi) / (hi - lo)
        return sum(wk * np.prod([legendre.legval(u[i], np.eye(3)[e[i]]) for i in range(4)])
                   for wk, e in zip(w, basis.exponents, strict=True))

    x0 = np.array(list(at.values()))
    for i, tag in enumerate(sens["inputs"]):
        step = 1e-4 * (hi[i] - lo[i])
        e = np.eye(4)[i] * step
        fd = (y(x0 + e) - y(x0 - e)) / (2 * step)        # central difference
        assert sens["sensitivity"][i] == pytest.approx(fd, rel=1e-6, abs=1e-9), tag
    # the simulated slope dy/dTI = 3 - 0.1 (TI - 110) = 2.8 at 112 and dy/dFI = 2 are found
    assert sens["sensitivity"][0] == pytest.approx(2.8, abs=4 * sens["std"][0] + 0.2)
    assert sens["sensitivity"][1] == pytest.approx(2.0, abs=4 * sens["std"][1] + 0.2)
    # the table: engineering units, the default point is the last sample
    assert main(["ctl", "posterior", "--config", str(cfg), "--model", MODEL]) == EXIT_OK
    out = capsys.readouterr().out
    assert "at the last sample" in out and "ppm per unit of TI-104" in out


# ---------------------------------------------------------------------------------- item 12
def test_freeze_reason_in_status_and_alert_stream(start_service, tmp_path, capsys):
    model = _with_unit()
    h = start_service([model])
    cfg = _config_file(tmp_path, h, [model])
    alerts = h.ctx.socket(zmq.SUB)
    alerts.setsockopt(zmq.LINGER, 0)
    alerts.setsockopt(zmq.SUBSCRIBE, f"alert/{MODEL}".encode())
    alerts.connect(h.config.daemon.publish)
    try:
        # a freeze without a reason is refused by ctl, with what to add
        assert main(["ctl", "freeze", "--config", str(cfg), "--model", MODEL]) == EXIT_USAGE
        assert 'add --reason "WHY"' in capsys.readouterr().err

        def subscribed() -> bool:
            # resume (no effect on a model that learns) until its alert reaches us
            main(["ctl", "resume", "--config", str(cfg), "--model", MODEL, "--reason", "probe"])
            return alerts.poll(200) != 0
        wait_until(subscribed, what="the alert subscription")
        while alerts.poll(100):
            alerts.recv_multipart()
        assert main(["ctl", "freeze", "--config", str(cfg), "--model", MODEL, "--reason",
                     "column upset, analyzer flushed", "--by", "alice"]) == EXIT_OK
        assert "frozen by alice" in capsys.readouterr().out
        got = recv_until(alerts, lambda m: m[1].get("action") == "freeze")
        body = got[-1][1]
        assert body == {"model": MODEL, "t": None, "kind": "action", "action": "freeze",
                        "reason": "column upset, analyzer flushed", "by": "alice"}
    finally:
        alerts.close()
    status = Control(h.ctx, h.config.daemon.control)("status")["models"][MODEL]
    assert status["frozen"] is True
    assert status["learning_note"]["reason"] == "column upset, analyzer flushed"
    assert status["learning_note"]["by"] == "alice"
    main(["ctl", "status", "--config", str(cfg)])
    assert "frozen by alice at" in capsys.readouterr().out


def _start(cfg: Path, cwd: Path) -> subprocess.Popen:
    log = open(cwd / "daemon.log", "ab")
    try:
        return subprocess.Popen(cli("run", "--config", str(cfg)), stdin=subprocess.DEVNULL,
                                stdout=log, stderr=log, cwd=cwd, env=blas_env())
    finally:
        log.close()


def _ping(cfg: Path) -> None:
    assert main(["ctl", "ping", "--config", str(cfg), "--timeout", "60"]) == EXIT_OK


def test_freeze_reason_survives_a_crash_in_the_log_and_in_checkpoints(sock_dir, capsys):
    cfg = sock_dir / "plant.toml"
    cfg.write_text(toml_config({"feeds": [ipc(sock_dir, "feed")],
                                "publish": ipc(sock_dir, "pub"),
                                "control": ipc(sock_dir, "ctl"), "metrics": "",
                                "state_dir": str(sock_dir / "state")}, [c301_model()]))
    proc = _start(cfg, sock_dir)
    try:
        _ping(cfg)
        assert main(["ctl", "freeze", "--config", str(cfg), "--model", MODEL, "--reason",
                     "turnaround", "--by", "bob"]) == EXIT_OK
        proc.kill()                                     # a crash: no shutdown checkpoint
        proc.wait(TIMEOUT)
        proc = _start(cfg, sock_dir)
        _ping(cfg)
        capsys.readouterr()
        assert main(["ctl", "status", "--config", str(cfg), "--json"]) == EXIT_OK
        reply = json.loads(capsys.readouterr().out)
        assert reply["state"]["replayed"] >= 1          # the reason came back from the log
        note = reply["models"][MODEL]["learning_note"]
        assert (note["action"], note["reason"], note["by"]) == ("freeze", "turnaround", "bob")
        assert main(["ctl", "checkpoint", "--config", str(cfg)]) == EXIT_OK
        proc.kill()
        proc.wait(TIMEOUT)
        proc = _start(cfg, sock_dir)
        _ping(cfg)
        capsys.readouterr()
        assert main(["ctl", "status", "--config", str(cfg), "--json"]) == EXIT_OK
        reply = json.loads(capsys.readouterr().out)
        assert reply["state"]["replayed"] == 0          # from the checkpoint this time
        assert reply["models"][MODEL]["learning_note"]["reason"] == "turnaround"
        assert reply["models"][MODEL]["frozen"] is True
    finally:
        if proc.poll() is None:
            proc.terminate()
            proc.wait(TIMEOUT)
    assert main(["state", "inspect", str(sock_dir / "state")]) == EXIT_OK
