"""The service manager's notifications: a datagram socket stands in for $NOTIFY_SOCKET."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import TIMEOUT, c301_model, wait_until

from daemon.runtime.notify import Notifier

ROOT = Path(__file__).resolve().parent.parent


def _listener(folder: Path) -> tuple[socket.socket, str]:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    path = str(folder / "notify")
    sock.bind(path)
    sock.settimeout(TIMEOUT)
    return sock, path


def _take(sock) -> list[str]:
    out = []
    sock.setblocking(False)
    try:
        while True:
            out.append(sock.recv(4096).decode())
    except BlockingIOError:
        pass
    finally:
        sock.settimeout(TIMEOUT)
    return out


def test_ready_watchdog_stopping_in_order(sock_dir, start_service, monkeypatch):
    sock, path = _listener(sock_dir)
    # 200 ms watchdog: pings every 100 ms (half the period, as sd_notify(3) advises)
    monkeypatch.setenv("NOTIFY_SOCKET", path)
    monkeypatch.setenv("WATCHDOG_USEC", "200000")
    monkeypatch.delenv("WATCHDOG_PID", raising=False)
    svc = start_service([c301_model()])
    first = sock.recv(4096).decode().splitlines()
    # READY=1 comes once the state is replayed and the sockets are bound: the harness has
    # already seen a prediction by now
    assert first[0] == "READY=1"
    got = []
    wait_until(lambda: got.extend(_take(sock)) or "WATCHDOG=1" in got, what="watchdog pings")
    svc.stop()
    got += _take(sock)
    assert got[-1] == "STOPPING=1"
    assert set(got[:-1]) == {"WATCHDOG=1"}
    sock.close()


def test_no_socket_no_messages_and_foreign_watchdog(tmp_path):
    n = Notifier.from_environment({})
    n.ready()
    n.tick()
    n.stopping()
    assert n.sent == [] and n.poll_ms is None
    # WATCHDOG_PID names another process: the watchdog is not ours
    other = Notifier.from_environment({"NOTIFY_SOCKET": str(tmp_path / "x"),
                                       "WATCHDOG_USEC": "1000000", "WATCHDOG_PID": "1"})
    assert other.poll_ms is None or os.getpid() == 1
    bad = Notifier.from_environment({"NOTIFY_SOCKET": str(tmp_path / "x"),
                                     "WATCHDOG_USEC": "soon"})
    assert bad.poll_ms is None
    # nobody listens at that path: the send fails, is logged, and nothing raises
    assert bad.send("READY=1") is False


def test_abstract_socket_address():
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    name = f"posteriord-test-{os.getpid()}"
    listener.bind("\0" + name)
    listener.settimeout(TIMEOUT)
    n = Notifier.from_environment({"NOTIFY_SOCKET": "@" + name, "WATCHDOG_USEC": "4000000"})
    assert n.poll_ms == 2000
    n.ready()
    assert listener.recv(4096) == b"READY=1"
    assert listener.recv(4096) == b"WATCHDOG=1"
    n.close()
    listener.close()


UNITS = sorted((ROOT / "tools" / "systemd").glob("*.service"))


def test_units_are_hardened():
    names = {u.name for u in UNITS}
    assert {"posteriord.service", "posteriord@.service"} <= names
    for unit in UNITS:
        text = unit.read_text()
        for line in ("NoNewPrivileges=yes", "ProtectSystem=strict", "User=posteriord"):
            assert line in text, (unit.name, line)
        if unit.name in ("posteriord.service", "posteriord@.service"):
            assert "Type=notify" in text and "StateDirectory=" in text, unit.name


@pytest.mark.skipif(shutil.which("systemd-analyze") is None,
                    reason="systemd-analyze is not installed")
def test_systemd_analyze_verify(tmp_path):
    for unit in UNITS:
        # a template is verified through an instance of it; the command points at an
        # executable that exists here (the units name the install path /opt/posteriord)
        name = unit.name.replace("@.", "@0.")
        text = unit.read_text().replace("/opt/posteriord/bin/posteriord", sys.executable)
        (tmp_path / name).write_text(text)
        r = subprocess.run(["systemd-analyze", "verify", str(tmp_path / name)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 0 and name not in r.stdout + r.stderr, (name, r.stdout + r.stderr)
