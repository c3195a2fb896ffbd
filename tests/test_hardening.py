"""No message or config can stop the daemon, block a model, or be miscounted.

Regression tests of defects found by black-box runs: nesting bombs in every field, an error
raised while handling one message, times in the wrong unit, ``seq`` counting, models too
large for the kernel, and the loop's wake-up pipe.
"""

from __future__ import annotations

import logging
import math
import os
import select
from pathlib import Path

import msgpack
import numpy as np
import pytest
from conftest import MODEL, Recorder, c301_model, toml_config, wait_until
from prometheus_client import CollectorRegistry

from daemon.config import ConfigError, loads
from daemon.runtime import wire
from daemon.runtime.service import Service
from daemon.workbench import plant

SPECS = {"m": (("a", "b"), {"a": 0, "b": 1})}
NOW = plant.DEFAULT_START + 30 * 86400.0  # the tests' host clock: a month into the run


def nested(depth: int, leaf=1.0):
    v = leaf
    for _ in range(depth):
        v = [v]
    return v


def service(*models, clock=lambda: NOW, **daemon) -> Service:
    svc = Service(loads(toml_config({"metrics": "", **daemon}, list(models or [c301_model()])),
                        "<test>"), registry=CollectorRegistry(), wall_clock=clock)
    svc.pub = Recorder()
    return svc


def frames(body, topic: str = MODEL) -> list[bytes]:
    return [topic.encode(), msgpack.packb(body, use_bin_type=True)]


X = [100.0, 15.0, 1.2, 5.0]  # inside the C-301 instrument ranges


# ------------------------------------------------------------------------------ nesting bombs
BOMBS = {
    "t": {"t": nested(1000)},
    "x": {"t": 1.0, "x": nested(1000)},
    "y": {"t": 1.0, "y": nested(1000)},
    "id": {"y": 1.0, "id": nested(1000)},
    "block t element": {"t": [1.0, nested(1000)], "x": [[1.0, 2.0], [1.0, 2.0]]},
    "block x row": {"t": [1.0, 2.0], "x": [[1.0, 2.0], nested(1000)]},
    "block y element": {"t": [1.0, 2.0], "y": [1.0, nested(1000)]},
    "block id element": {"t": [1.0, 2.0], "y": [1.0, 2.0], "id": ["a", nested(1000)]},
    "src": {"t": 1.0, "x": [1.0, 2.0], "src": nested(1000)},
    "an unknown key": {"t": 1.0, "y": 2.0, "pad": nested(1000)},
}


@pytest.mark.parametrize("field", sorted(BOMBS))
def test_nesting_bombs_are_rejected_with_a_short_message(field):
    body = BOMBS[field]
    payload = msgpack.packb(body, use_bin_type=True)
    assert len(payload) < 3000  # a 3 KB message once killed the daemon
    with pytest.raises(wire.WireError) as info:
        wire.decode_feed([b"m", payload], SPECS, 1 << 20)
    assert info.value.reason in wire.REASONS
    assert len(str(info.value)) < 300


def test_nesting_bomb_in_a_control_request_is_refused():
    with pytest.raises(wire.WireError) as info:
        wire.decode_control(msgpack.packb({"cmd": "status", "model": nested(1000)}), 65536)
    assert info.value.reason == "too_deep"


def test_show_never_formats_container_contents():
    assert wire.show(nested(5000)) == "a list of 1 items"
    assert wire.show({"k": nested(5000)}) == "a map of 1 keys"
    assert wire.show("x" * 500).endswith("... (500 long)")
    assert wire.show(10**4000) == "an integer of 4001 digits"


def test_bombs_in_a_batch_lose_nothing_else():
    svc = service()
    t0 = plant.DEFAULT_START
    batch = [frames({"t": t0, "x": X})]
    batch += [frames(b) for b in BOMBS.values()]
    batch.append(frames({"t": t0 + 60.0, "x": X}))
    svc.process(batch)
    preds = svc.pub.bodies("pred/")
    assert [p["t"] for p in preds] == [t0, t0 + 60.0]
    rejected = svc.runners[MODEL].rejected
    assert sum(rejected.values()) == len(BOMBS)


def test_control_bomb_over_the_socket_gets_an_error_and_the_daemon_carries_on(start_service):
    h = start_service([c301_model()])
    reply = h.ctl.raw([msgpack.packb({"cmd": "posterior", "model": nested(1000)})])
    assert reply["ok"] is False and "too_deep" in reply["error"]
    assert len(reply["error"]) < 300
    assert h.ctl("ping") == {"ok": True}
    assert h.alive()


# ------------------------------------------------------------------ an error in one message
class _Broken(Exception):
    pass


def test_an_error_while_handling_one_message_is_counted_and_the_rest_is_handled(caplog):
    other = c301_model("c301.other")
    svc = service(c301_model(), other)
    runner = svc.runners[MODEL]
    calls = []
    real = runner.predict

    def fails_once(*args, **kw):
        # a fault injected into the real runner: the first prediction raises
        calls.append(1)
        if len(calls) == 1:
            raise _Broken("injected")
        return real(*args, **kw)
    runner.predict = fails_once
    t0 = plant.DEFAULT_START
    with caplog.at_level(logging.ERROR, logger="posteriord"):
        svc.process([frames({"t": t0, "x": X}), frames({"t": t0, "x": X}, "c301.other")])
        svc.process([frames({"t": t0 + 60.0, "x": X})])
        runner.predict = lambda *a, **k: (_ for _ in ()).throw(_Broken("again"))
        svc.process([frames({"t": t0 + 120.0, "x": X})])
    assert runner.rejected["internal_error"] == 2
    topics = [t for t, _ in svc.pub.out]
    assert topics.count("pred/c301.other") == 1 and topics.count(f"pred/{MODEL}") == 1
    tracebacks = [r for r in caplog.records if r.exc_info]
    assert len(tracebacks) == 1  # the first of its kind with its traceback; the rest counted


# ---------------------------------------------------------------------------- wrong times
def test_a_time_in_milliseconds_is_refused_with_a_hint_and_blocks_nothing(caplog):
    svc = service()
    t0 = plant.DEFAULT_START
    with caplog.at_level(logging.WARNING, logger="posteriord"):
        svc.process([frames({"t": t0, "x": X})])
        svc.process([frames({"t": (t0 + 60.0) * 1000.0, "x": X})])  # Date.now() style
        svc.process([frames({"t": t0 + 120.0, "x": X})])
    runner = svc.runners[MODEL]
    assert runner.rejected["bad_time"] == 1 and runner.rejected["out_of_order"] == 0
    assert [p["t"] for p in svc.pub.bodies("pred/")] == [t0, t0 + 120.0]
    assert any("milliseconds" in r.getMessage() for r in caplog.records)


def test_a_byte_swapped_packed_time_is_refused():
    svc = service()
    t0 = plant.DEFAULT_START
    # sample times with fractions of a second; read with the bytes in the wrong order, the
    # first of them whose swapped value lies far in the future (others land near zero, which
    # is merely out of order)
    for k in range(1, 1000):
        good = np.array([t0 + 0.001 * k, t0 + 60.0 + 0.001 * k], dtype="<f8")
        swapped = good.astype(">f8").tobytes()  # the right bytes read in the wrong order
        if np.frombuffer(swapped, "<f8")[0] > NOW * 1e3:
            break
    assert np.frombuffer(swapped, "<f8")[0] > NOW * 1e3
    x = np.array([X, X], dtype="<f8").tobytes()
    svc.process([frames({"t": swapped, "x": x}), frames({"t": good.tobytes(), "x": x})])
    runner = svc.runners[MODEL]
    assert runner.rejected["bad_time"] == 1 and runner.rejected["out_of_order"] == 0
    assert len(svc.pub.bodies("pred/")) == 1


def test_a_block_with_a_time_in_the_future_anywhere_is_refused():
    # in order, the last time is the latest; out of order, any row may be
    t0 = plant.DEFAULT_START
    for ts in ([t0, t0 + 60.0, NOW * 1e3], [t0, NOW * 1e3, t0 + 60.0]):
        svc = service()
        svc.process([frames({"t": ts, "x": [X] * 3})])
        assert svc.runners[MODEL].rejected["bad_time"] == 1, ts
        assert svc.pub.bodies("pred/") == []


def test_future_tolerance_zero_turns_the_check_off_and_reset_clears_the_feed_clock():
    svc = service(future_tolerance="0s")
    t0 = plant.DEFAULT_START
    svc.process([frames({"t": t0 * 1000.0, "x": X})])  # admitted: the check is off
    svc.process([frames({"t": t0, "x": X})])
    runner = svc.runners[MODEL]
    assert runner.rejected["out_of_order"] == 1
    assert svc.command({"cmd": "reset", "model": MODEL})["ok"]
    svc.process([frames({"t": t0 + 60.0, "x": X})])
    assert runner.rejected["out_of_order"] == 1
    assert svc.pub.bodies("pred/")[-1]["t"] == t0 + 60.0


def test_the_backtest_admits_any_time():
    svc = service(clock=None)
    svc.process([frames({"t": NOW * 10.0, "x": X})])
    assert svc.runners[MODEL].rejected["bad_time"] == 0


# ------------------------------------------------------------------------------------ seq
def test_a_rejected_message_with_seq_is_no_gap():
    svc = service()
    t0 = plant.DEFAULT_START
    svc.process([frames({"t": t0, "x": X, "seq": 1}),
                 frames({"t": t0 + 60.0, "x": [1.0], "seq": 2}),  # bad_x, but it arrived
                 frames({"t": t0 + 120.0, "x": X, "seq": 3})])
    runner = svc.runners[MODEL]
    assert runner.rejected["bad_x"] == 1
    assert (runner.n_gaps, runner.n_lost) == (0, 0)


def test_seq_counts_per_publisher_and_topic():
    svc = service()
    t0 = plant.DEFAULT_START
    batch = []
    for k in range(1, 6):  # two publishers on one topic, each numbering its own messages
        batch.append(frames({"t": t0 + 120.0 * k, "x": X, "seq": k, "src": "a"}))
        batch.append(frames({"t": t0 + 120.0 * k + 60.0, "x": X, "seq": k, "src": "b"}))
    batch.append(frames({"t": t0 + 2000.0, "x": X, "seq": 9, "src": "a"}))  # 6..8 lost
    svc.process(batch)
    runner = svc.runners[MODEL]
    assert (runner.n_gaps, runner.n_lost) == (1, 3)
    back = type(runner).from_state(msgpack.unpackb(msgpack.packb(runner.to_state())))
    assert back.last_seq == runner.last_seq == {"a": 9, "b": 5}


# ------------------------------------------------------------------------ models too large
def _inputs(n: int) -> list[dict]:
    return [{"tag": f"T{i}", "lo": 0, "hi": 1} for i in range(n)]


def test_a_model_over_the_kernel_limit_is_refused_at_config_time():
    # 44 inputs at degree 2 with interactions: 1 + 44 + 44 * 45 / 2 = 1035 terms
    model = {"name": "big", "inputs": _inputs(44), "basis": {"degree": 2}}
    with pytest.raises(ConfigError) as info:
        loads(toml_config({}, [model]), "plant.toml")
    e = info.value
    assert e.key == "model[0].basis.degree" and "1035 terms" in e.got
    assert "at most 1024" in e.expected
    # 32 inputs: 1 + 32 + 528 = 561 terms (above the kernel's former stack workspaces of
    # 256), within the limit, and it runs
    ok = {"name": "ok", "inputs": _inputs(32), "basis": {"degree": 2},
          "prior": {"alpha": 1.0}, "noise": {"std": 0.1}}
    svc = service(ok)
    t0 = plant.DEFAULT_START
    x = [0.5] * 32
    svc.process([frames({"t": t0, "x": x}, "ok"), frames({"t": t0, "y": 1.0}, "ok"),
                 frames({"t": t0 + 60.0, "x": x}, "ok")])
    assert svc.pub.bodies("fit/")[0]["accepted"]
    assert math.isfinite(svc.pub.bodies("pred/")[-1]["mean"])


def test_a_reload_to_a_model_too_large_keeps_the_running_config(start_service, tmp_path):
    h = start_service([c301_model()])
    path = tmp_path / "plant.toml"
    big = {"name": MODEL, "inputs": _inputs(44), "basis": {"degree": 2}}
    path.write_text(toml_config({}, [big]))
    h.svc.config_path = str(path)  # as if started from that file
    h.svc.post_event("reload")
    wait_until(lambda: h.svc.reloads["error"] == 1, what="the failed reload")
    assert h.alive() and h.ctl("ping") == {"ok": True}
    assert len(h.svc.runners[MODEL].tags) == 4


# ------------------------------------------------------------------------------ the loop
def test_the_wake_up_pipe_is_drained_after_an_event(start_service):
    """An event left unread in the pipe would wake the loop at once forever (a busy loop)."""
    h = start_service([c301_model()])
    before = h.svc.reloads["unavailable"]
    h.svc.post_event("reload")  # no config file: answered "unavailable", nothing else
    wait_until(lambda: h.svc.reloads["unavailable"] == before + 1, what="the reload event")
    readable, _, _ = select.select([h.svc._wake_r], [], [], 0)
    assert readable == []


# ------------------------------------------------------------------- CURVE at config time
def _curve_config(tmp_path, **over) -> Path:
    from daemon.runtime.security import new_keys

    keys = tmp_path / "keys"
    secret = str(keys / "daemon1.key_secret")
    clients, admins = tmp_path / "clients", tmp_path / "admins"
    if not keys.exists():
        keys.mkdir()
        new_keys(str(keys), "daemon1")
        clients.mkdir()
        admins.mkdir()
        new_keys(str(clients), "board")
    settings = {"publish": "tcp://127.0.0.1:15556", "control": "tcp://127.0.0.1:15557",
                "metrics": "", "state_dir": str(tmp_path / "state"),
                "curve_secret_key": secret, "curve_clients": str(clients),
                "curve_admins": str(admins), **over}
    path = tmp_path / "plant.toml"
    path.write_text(toml_config(settings, [c301_model()]))
    return path


def test_check_config_prints_the_curve_settings(tmp_path, capsys):
    from daemon.cli import main

    assert main(["check-config", str(_curve_config(tmp_path))]) == 0
    out = capsys.readouterr().out
    assert "curve: on" in out and "(1 public key)" in out and "nobody is admitted" in out


def test_check_config_and_run_refuse_unsafe_curve_settings_before_locking(tmp_path, capsys):
    from daemon.cli import main

    path = _curve_config(tmp_path)
    os.chmod(tmp_path / "keys" / "daemon1.key_secret", 0o644)
    assert main(["check-config", str(path)]) == 3
    assert "readable by others" in capsys.readouterr().err
    assert main(["run", "--config", str(path)]) == 3
    assert not (tmp_path / "state").exists()  # refused before the state folder was touched
    os.chmod(tmp_path / "keys" / "daemon1.key_secret", 0o600)
    path = _curve_config(tmp_path, curve_clients=str(tmp_path / "missing"))
    assert main(["check-config", str(path)]) == 3
    assert "curve_clients" in capsys.readouterr().err
