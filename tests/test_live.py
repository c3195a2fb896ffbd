"""Replay, record and watch, over real sockets on 127.0.0.1 and ipc paths."""

from __future__ import annotations

import io
import struct
import threading
import time
from dataclasses import replace

import msgpack
import pytest
import zmq

from daemon.cli import main
from daemon.config import loads
from daemon.exitcodes import EXIT_OK
from daemon.runtime import wire
from daemon.runtime.service import Service
from daemon.workbench import backtest, historian, live, plant
from tests.conftest import (
    MODEL,
    PROBE,
    PROBE_MODEL,
    TIMEOUT,
    c301_model,
    free_port,
    ipc,
    toml_config,
    wait_until,
)


@pytest.fixture
def ctx():
    c = zmq.Context()
    yield c
    c.destroy(linger=0)


def _csv(tmp_path, days=2.0, seed=6, **kw):
    path = tmp_path / "h.csv"
    historian.write_csv(path, plant.simulate(replace(plant.Scenario.drifting(days=days,
                                                                              seed=seed), **kw)))
    return path


def _model():
    return loads(toml_config({}, [c301_model()])).models[0]


# ---------------------------------------------------------------------------------- files
def test_record_file_layout_round_trip_and_torn_tail(tmp_path):
    path = tmp_path / "s.rec"
    msgs = [(1.5, b"pred/m", wire.packb({"t": 1.0, "mean": 2.0})),
            (2.5, "fit/m", wire.packb({"t": 1.0, "y": 3.0, "accepted": True})),
            (3.25, b"alert/m", wire.packb({"kind": "state", "new": "caution"}))]
    with live.RecordWriter(path, endpoint="tcp://x:1") as w:
        for m in msgs[:2]:
            w.write(*m)
    with live.RecordWriter(path) as w:  # appending keeps the one header line
        w.write(*msgs[2])
    data = path.read_bytes()
    first, _, rest = data.partition(b"\n")
    assert first.startswith(b"posteriord-record/1 {")
    assert data.count(b"posteriord-record/1") == 1
    # the documented layout, decoded here with struct and msgpack directly
    frames = []
    while rest:
        (n,) = struct.unpack(">I", rest[:4])
        frames.append(msgpack.unpackb(rest[4:4 + n], raw=False))
        rest = rest[4 + n:]
    assert [(f[0], f[1], f[2]) for f in frames] == \
        [(r, t.decode() if isinstance(t, bytes) else t, p) for r, t, p in msgs]
    got = live.read_record(path)
    assert [g[1] for g in got] == ["pred/m", "fit/m", "alert/m"]
    assert got[1][2] == {"t": 1.0, "y": 3.0, "accepted": True}
    # a crash in the middle of the last write loses only that frame
    path.write_bytes(data[:-3])
    reader = live.RecordReader(path)
    assert [g[1] for g in reader] == ["pred/m", "fit/m"]
    assert reader.truncated and reader.n == 2
    (tmp_path / "bad.rec").write_bytes(b"something else\n")
    with pytest.raises(ValueError, match="not a posteriord-record/1 file"):
        live.read_record(tmp_path / "bad.rec")
    with pytest.raises(ValueError, match="not a posteriord-record/1 file"):
        live.RecordWriter(tmp_path / "bad.rec")


# ---------------------------------------------------------------------------------- commands
def _recv_n(sock, n, timeout=TIMEOUT):
    got = []
    deadline = time.monotonic() + timeout
    while len(got) < n:
        left = deadline - time.monotonic()
        assert left > 0, f"received {len(got)} of {n} messages"
        if sock.poll(int(left * 1000) + 1):
            got.append(sock.recv_multipart())
    return got


def test_replay_command_publishes_the_feed_exactly(tmp_path, ctx):
    path = _csv(tmp_path, days=1.0)
    expected = backtest.feed_messages(backtest.load_history(path), [_model()],
                                      lab_delay=3600.0, block=45)
    ep = f"tcp://127.0.0.1:{free_port()}"
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.RCVHWM, 0)
    sub.setsockopt(zmq.SUBSCRIBE, MODEL.encode())
    sub.connect(ep)
    rc = []
    # paced: one simulated day in about a fifth of a second
    th = threading.Thread(target=lambda: rc.append(main(
        ["replay", str(path), "--feed", ep, "--speed", "500000", "--block", "45",
         "--lab-delay", "1h", "--wait", str(TIMEOUT)])))
    th.start()
    got = _recv_n(sub, len(expected))
    th.join(TIMEOUT)
    assert rc == [EXIT_OK]
    assert not sub.poll(100)  # and nothing more
    for (topic, payload), (_, name, body) in zip(got, expected, strict=True):
        assert topic == name.encode()
        assert msgpack.unpackb(payload, raw=False) == body


def test_replay_command_gives_up_without_a_subscriber(tmp_path, capsys):
    path = _csv(tmp_path, days=0.5)
    ep = f"tcp://127.0.0.1:{free_port()}"
    assert main(["replay", str(path), "--feed", ep, "--wait", "0.2"]) == 4
    assert "no subscriber" in capsys.readouterr().err


def test_record_command_appends_what_it_receives(tmp_path, ctx):
    ep = f"tcp://127.0.0.1:{free_port()}"
    pub = live.open_feed(ctx, ep)
    out = tmp_path / "r.rec"
    rc = []
    th = threading.Thread(target=lambda: rc.append(main(
        ["record", str(out), "--endpoint", ep, "--count", "4"])))
    th.start()
    assert not live.wait_subscribed(pub, ["pred/m", "fit/m", "alert/m"], TIMEOUT)
    sent = [(b"pred/m", wire.packb({"t": [1.0, 2.0], "mean": [3.0, 4.0]})),
            (b"other/m", wire.packb({"ignored": True})),  # not subscribed
            (b"fit/m", wire.packb({"t": 1.0, "y": 5.0})),
            (b"alert/m", wire.packb({"kind": "ack"})),
            (b"pred/m", wire.packb({"t": 3.0, "mean": 6.0}))]
    for frames in sent:
        pub.send_multipart(list(frames))
    th.join(TIMEOUT)
    assert rc == [EXIT_OK]
    got = live.read_record(out, raw=True)
    assert [(t.encode(), p) for _, t, p in got] == [s for s in sent if s[0] != b"other/m"]
    assert all(isinstance(r, float) for r, _, _ in got)
    pub.close(linger=0)


# ---------------------------------------------------------------------------------- the chain
def test_replay_into_a_daemon_and_record_it_equals_the_backtest(tmp_path, sock_dir, ctx):
    # CSV -> replay (XPUB) -> a real daemon (Service on sockets) -> record file: the
    # recording holds byte for byte what the backtest of the same file published
    path = _csv(tmp_path, days=3.0, blunders=1)
    hist = backtest.load_history(path)
    model = _model()
    res = backtest.backtest(hist, model, train=86400.0, lab_delay=4000.0, block=20)
    feed_ep = f"tcp://127.0.0.1:{free_port()}"
    pub = live.open_feed(ctx, feed_ep)
    settings = {"feeds": [feed_ep], "publish": ipc(sock_dir, "pub"),
                "control": ipc(sock_dir, "ctl"), "metrics": "",
                "state_dir": str(tmp_path / "state"), "log_level": "warning"}
    svc = Service(loads(toml_config(settings, [c301_model(), PROBE_MODEL]), "<test>"))
    svc.open()
    publish = svc.publish_endpoint
    loop = threading.Thread(target=svc.run, daemon=True)
    loop.start()
    rec = tmp_path / "out.rec"
    stop = threading.Event()
    recorder = threading.Thread(target=live.record, args=(publish, rec),
                                kwargs={"stop": stop, "ctx": ctx})
    try:
        assert not live.wait_subscribed(pub, [MODEL, PROBE], TIMEOUT)
        recorder.start()
        probe_t = [0.0]

        def probe_recorded() -> bool:
            return rec.exists() and rec.stat().st_size > 0 and any(
                topic == f"pred/{PROBE}" and body["t"] == probe_t[0]
                for _, topic, body in live.RecordReader(rec))

        def probe() -> bool:
            # the recorder's subscription reaches the daemon some time after it connects:
            # probe samples are sent until one comes back through the file
            probe_t[0] += 1.0
            pub.send_multipart([PROBE.encode(), wire.packb({"t": probe_t[0], "x": [0.5]})])
            deadline = time.monotonic() + 0.2
            while time.monotonic() < deadline:
                if probe_recorded():
                    return True
                time.sleep(0.02)
            return False

        wait_until(probe, what="the recorder sees the daemon")
        messages = backtest.feed_messages(hist, [model], lab_delay=4000.0, block=20)
        assert live.replay(pub, messages) == len(messages)
        probe_t[0] += 1.0
        pub.send_multipart([PROBE.encode(), wire.packb({"t": probe_t[0], "x": [0.5]})])
        wait_until(probe_recorded, timeout=30.0, what="the last probe in the recording")
    finally:
        stop.set()
        if recorder.is_alive():
            recorder.join(TIMEOUT)
        svc.post_event("stop")
        loop.join(TIMEOUT)
        pub.close(linger=0)
    mine = [(t.decode(), p) for t, p in res.frames if t.decode().endswith("/" + MODEL)]
    recorded = [(t, p) for _, t, p in live.read_record(rec, raw=True)
                if t.endswith("/" + MODEL)]
    assert len(recorded) == len(mine) > 50
    assert recorded == mine
    assert any(t.startswith("alert/") for t, _ in mine)
    # and the data came through unchanged: prediction times are the CSV's, lab values too
    track = backtest.collect(((t, wire.unpack(p, 1 << 26)) for t, p in recorded), MODEL)
    assert track.t.tolist() == hist.t.tolist()
    assert [f["y"] for f in track.fits] == hist.lab_y.tolist()


# ---------------------------------------------------------------------------------- watch
def _state():
    s = live.watch_state("tcp://127.0.0.1:5556", "ppm")
    t0 = 1767571200.0
    live.watch_update(s, "pred/c301.a", {"t": [t0, t0 + 7200.0], "mean": [180.0, 187.25],
                                         "std": [6.0, 6.125], "lo": [170.0, 175.1],
                                         "hi": [190.0, 199.5], "status": ["learning"] * 2,
                                         "level": 0.95, "trust": "normal"}, 100.0)
    live.watch_update(s, "fit/c301.a", {"t": t0, "y": 185.0, "pred_mean": 187.3,
                                        "pred_std": 6.1, "resid": -2.3, "z": -0.377,
                                        "accepted": True, "reason": "ok", "trust": "normal"},
                      100.5)
    live.watch_update(s, "alert/c301.a", {"t": t0 + 7200.0, "kind": "state", "old": "normal",
                                          "new": "caution",
                                          "reasons": [{"name": "extrapolation"},
                                                      {"name": "stale"}]}, 101.0)
    live.watch_update(s, "fit/b.model", {"t": t0, "y": 1850.0, "pred_mean": 187.0,
                                         "pred_std": 6.0, "resid": 1663.0, "z": 12.0,
                                         "accepted": False, "reason": "gated"}, 99.0)
    s["now"] = 102.5
    return s


def test_render_fits_80_columns_with_two_lines_per_model_and_event_lines():
    text = live.render(_state(), events=8)
    lines = text.splitlines()
    assert lines[0].startswith("posteriord watch  tcp://127.0.0.1:5556")
    assert "feed 2026-01-05 02:00 UTC" in lines[0] and "2 models" in lines[0]
    assert lines[1].split()[:3] == ["model", "prediction", "interval"]
    assert "(95%)" in lines[1]
    i = next(k for k, line in enumerate(lines) if line.startswith("c301.a"))
    a, detail = lines[i], lines[i + 1]
    assert "187.2 ± 6.1 ppm" in a          # the last row of the block, std to 2 digits
    assert "[175.1, 199.5]" in a
    assert "learning" in a and "caution" in a
    assert "why: extrapolation+stale" in detail
    assert "lab 185.0 (-2.3, z -0.38)" in detail  # value (residual, z)
    assert "lab age 2h00m" in detail and detail.endswith("msg 1.5s")  # feed time, wall time
    b = next(k for k, line in enumerate(lines) if line.startswith("b.model"))
    # no prediction of b.model yet: its scale is the fit's std (6.0), one decimal
    assert "lab 1850.0 (+1663.0, z +12.00) REJECTED" in lines[b + 1]
    # the events below the table, in order of arrival: lab results and the trust change
    at = lines.index("events (lab results at their drawn time, as they arrive):")
    events = lines[at + 1:]
    assert events == [
        "  2026-01-05 00:00  c301.a  lab 185.0 ppm  pred 187.3 ± 6.1  z -0.38  learned",
        "  2026-01-05 02:00  c301.a  trust normal -> caution (extrapolation, stale)",
        "  2026-01-05 00:00  b.model  lab 1850.0 ppm  pred 187.0 ± 6.0  z +12.00  REJECTED "
        "(gated)"]
    assert max(len(line) for line in lines[:at]) <= 80
    assert "events" not in live.render(_state())  # only when asked for (the demo prints its own)
    narrow = live.render(_state(), width=60, color=True)
    assert "\x1b[33m" in narrow  # caution in yellow
    plain = [ln.replace("\x1b[33m", "").replace("\x1b[0m", "") for ln in narrow.splitlines()]
    assert max(len(ln) for ln in plain) == 60
    empty = live.watch_state()
    assert "(no messages yet)" in live.render(empty)


def test_watch_digits_follow_the_targets_scale_and_configured_models_count():
    # a target in % with a std of 0.1: two decimals (3.42 ± 0.10, not 3.4 ± 0.1); the std to
    # two significant digits is common practice for a value with its uncertainty
    s = live.watch_state("ep", models=["dryer.moisture", "other"],
                         units={"dryer.moisture": "%"})
    text = live.render(s)
    assert "2 models" in text.splitlines()[0] and text.count("no messages yet") == 2
    live.watch_update(s, "pred/dryer.moisture", {"t": 1767571200.0, "mean": 3.4213,
                                                 "std": 0.1012, "lo": 3.2229, "hi": 3.6197,
                                                 "level": 0.95, "status": "learning",
                                                 "trust": "normal"}, 1.0)
    s["now"] = 2.0
    line = next(ln for ln in live.render(s).splitlines() if ln.startswith("dryer.moisture"))
    assert "3.42 ± 0.10 %" in line and "[3.22, 3.62]" in line
    live.watch_update(s, "pred/dryer.moisture", {"t": 1767571260.0, "mean": 1870.4,
                                                 "std": 61.3, "lo": 1750.0, "hi": 1990.0,
                                                 "level": 0.95, "status": "learning"}, 3.0)
    line = next(ln for ln in live.render(s).splitlines() if ln.startswith("dryer.moisture"))
    assert "1870 ± 61 %" in line
    assert [live.decimals_for(v) for v in (0.1012, 6.1, 61.3, 0.0042, float("inf"))] == \
        [2, 1, 0, 4, 1]


def test_freeze_and_resume_alerts_are_event_lines():
    s = live.watch_state("ep")
    line = live.watch_update(s, "alert/m", {"model": "m", "t": 1767571200.0, "kind": "action",
                                            "action": "freeze", "reason": "analyzer down",
                                            "by": "alice"}, 1.0)
    assert line == "2026-01-05 00:00  m  learning frozen by alice: analyzer down"
    assert list(s["events"]) == [line]


class _Tty(io.StringIO):
    def isatty(self):
        return True


def test_screen_redraws_in_place_on_a_terminal():
    out = _Tty()
    screen = live.Screen(out)
    screen.show("a\nb")
    screen.show("c\nd")
    screen.above("line")
    assert out.getvalue() == "a\nb\n" "\x1b[2F\x1b[J" "c\nd\n" "\x1b[2F\x1b[J" "line\n" "c\nd\n"
    plain = io.StringIO()
    s2 = live.Screen(plain)
    s2.show("x")
    s2.above("y")
    s2.final()
    assert plain.getvalue() == "y\nx\n"


def test_watch_over_a_socket(ctx):
    ep = f"tcp://127.0.0.1:{free_port()}"
    pub = live.open_feed(ctx, ep)
    out = io.StringIO()
    result = []
    th = threading.Thread(target=lambda: result.append(live.watch(
        ep, count=2, stream=out, unit="ppm", ctx=ctx)))
    th.start()
    assert not live.wait_subscribed(pub, ["pred/x", "fit/x", "alert/x"], TIMEOUT)
    pub.send_multipart([b"pred/x", wire.packb({"t": 1767571200.0, "mean": 5.0, "std": 1.0,
                                               "lo": 3.0, "hi": 7.0, "status": "learning",
                                               "level": 0.9, "trust": "normal"})])
    pub.send_multipart([b"fit/x", wire.packb({"t": 1767571100.0, "y": 5.5, "resid": 0.5,
                                              "z": 0.5, "accepted": True})])
    th.join(TIMEOUT)
    pub.close(linger=0)
    state = result[0]
    assert state["models"]["x"]["n_pred"] == 1 and state["models"]["x"]["n_fit"] == 1
    frame = out.getvalue()
    assert "x " in frame and "5.0 ± 1.0 ppm" in frame and "[3.0, 7.0]" in frame
    assert "interval (90%)" in frame
    assert "5.5 (+0.5, z +0.50)" in frame
    # not a terminal: the lab result came as an event line before the final table
    assert frame.startswith("2026-01-04 23:58  x  lab 5.5 ppm  no prediction yet  z +0.50  "
                            "learned\n")


def test_watch_command_prints_the_last_frame(ctx, capsys):
    ep = f"tcp://127.0.0.1:{free_port()}"
    pub = live.open_feed(ctx, ep)
    rc = []
    th = threading.Thread(target=lambda: rc.append(main(
        ["watch", "--endpoint", ep, "--count", "1", "--unit", "ppm"])))
    th.start()
    assert not live.wait_subscribed(pub, ["pred/c301", "fit/c301", "alert/c301"], TIMEOUT)
    pub.send_multipart([b"pred/c301", wire.packb({"t": 1767571200.0, "mean": 180.5, "std": 6.0,
                                                  "lo": 168.0, "hi": 193.0,
                                                  "status": "stale", "level": 0.95,
                                                  "trust": "caution"})])
    th.join(TIMEOUT)
    pub.close(linger=0)
    assert rc == [EXIT_OK]
    line = next(ln for ln in capsys.readouterr().out.splitlines() if ln.startswith("c301"))
    assert "180.5 ± 6.0 ppm" in line and "stale" in line and "caution" in line
