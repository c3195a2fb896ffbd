"""CURVE security over real sockets: listed keys work, unlisted and plain clients get nothing."""

from __future__ import annotations

import os
import stat
import time

import pytest
import zmq
import zmq.auth

from daemon.runtime.security import (
    DOMAIN_CONTROL,
    DOMAIN_PUBLISH,
    CurveKeys,
    Security,
    SecurityError,
    check_binds,
    new_keys,
)


@pytest.fixture
def keyring(tmp_path):
    """Server, a subscriber, an admin and a stranger; clients/ and admins/ folders."""
    keys = tmp_path / "keys"
    clients, admins = tmp_path / "clients", tmp_path / "admins"
    clients.mkdir()
    admins.mkdir()
    out = {}
    for name in ("server", "dashboard", "operator", "stranger", "feed"):
        out[name] = new_keys(str(keys), name)
    # the dashboard may subscribe; the operator may subscribe and command
    for folder, names in ((clients, ("dashboard", "operator")), (admins, ("operator",))):
        for n in names:
            (folder / f"{n}.key").write_bytes(open(out[n][0], "rb").read())
    out["clients"], out["admins"] = str(clients), str(admins)
    return out


def _client(ctx, kind, keyring, name, server="server"):
    s = ctx.socket(kind)
    s.setsockopt(zmq.LINGER, 0)
    if name is not None:
        s.curve_publickey, s.curve_secretkey = zmq.auth.load_certificate(keyring[name][1])
        s.curve_serverkey, _ = zmq.auth.load_certificate(keyring[server][0])
    return s


def test_new_keys_writes_a_pair_with_a_private_secret(tmp_path):
    pub, sec = new_keys(str(tmp_path / "k"), "daemon1")
    assert stat.S_IMODE(os.stat(sec).st_mode) == 0o600
    public, secret = zmq.auth.load_certificate(sec)
    assert len(public) == 40 and len(secret) == 40  # Z85 of 32-byte keys (ZeroMQ RFC 32)
    assert zmq.auth.load_certificate(pub) == (public, None)
    with pytest.raises(SecurityError, match="exists already"):
        new_keys(str(tmp_path / "k"), "daemon1")
    with pytest.raises(SecurityError, match="plain file name"):
        new_keys(str(tmp_path / "k"), "../x")


def test_secret_readable_by_others_is_refused(keyring):
    os.chmod(keyring["server"][1], 0o644)
    with pytest.raises(SecurityError, match="readable by others"):
        Security(zmq.Context.instance(), CurveKeys(keyring["server"][1], keyring["clients"],
                                                   keyring["admins"]))


def test_non_loopback_bind_needs_curve(keyring):
    with pytest.raises(SecurityError, match="without CURVE"):
        check_binds({"publish": "tcp://0.0.0.0:5556", "control": "tcp://127.0.0.1:5557"},
                    CurveKeys())
    with pytest.raises(SecurityError, match="send commands"):
        check_binds({"control": "tcp://*:5557"}, CurveKeys())
    check_binds({"publish": "tcp://127.0.0.1:5556", "control": "ipc:///tmp/x"}, CurveKeys())
    check_binds({"publish": "tcp://0.0.0.0:5556"},
                CurveKeys(keyring["server"][1], keyring["clients"], keyring["admins"]))


def test_publish_and_control_admit_only_listed_keys(keyring):
    ctx = zmq.Context()
    sec = Security(ctx, CurveKeys(keyring["server"][1], keyring["clients"], keyring["admins"]))
    sec.start()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    sec.server(pub, DOMAIN_PUBLISH)
    port = pub.bind_to_random_port("tcp://127.0.0.1")
    rep = ctx.socket(zmq.REP)
    rep.setsockopt(zmq.LINGER, 0)
    sec.server(rep, DOMAIN_CONTROL)
    cport = rep.bind_to_random_port("tcp://127.0.0.1")
    cctx = zmq.Context()  # the clients live elsewhere: their own context
    try:
        subs = {}
        for name in ("dashboard", "stranger", None):
            s = _client(cctx, zmq.SUB, keyring, name)
            s.setsockopt(zmq.SUBSCRIBE, b"")
            s.connect(f"tcp://127.0.0.1:{port}")
            subs[name] = s
        # publish until the listed client has seen 20 messages: the others had the same chance
        got, deadline = 0, time.monotonic() + 10
        while got < 20 and time.monotonic() < deadline:
            pub.send_multipart([b"pred/m", b"x"])
            if subs["dashboard"].poll(20):
                subs["dashboard"].recv_multipart()
                got += 1
        assert got == 20
        for name in ("stranger", None):
            assert subs[name].poll(200) == 0, f"{name} received predictions"

        def ask(name):
            req = _client(cctx, zmq.REQ, keyring, name)
            req.connect(f"tcp://127.0.0.1:{cport}")
            req.send(b"ping")
            if rep.poll(1500):
                rep.send(b"pong " + rep.recv())
            answered = req.poll(1500) != 0
            req.close()
            return answered

        assert ask("operator")
        assert not ask("dashboard")  # may subscribe, may not command
        assert not ask("stranger")
        assert not ask(None)  # no CURVE at all

        # a key added to the folder works after a reload (as on SIGHUP)
        with open(os.path.join(keyring["admins"], "dashboard.key"), "wb") as fh:
            fh.write(open(keyring["dashboard"][0], "rb").read())
        sec.reload()
        assert ask("dashboard")
    finally:
        for s in subs.values():
            s.close()
        cctx.term()
        pub.close()
        rep.close()
        sec.stop()
        ctx.term()


def test_feed_socket_is_a_curve_client_of_the_publisher(keyring, tmp_path):
    # the plant's publisher is a CURVE server that admits the daemon's key
    pctx = zmq.Context()
    allowed = tmp_path / "publisher-allows"
    allowed.mkdir()
    (allowed / "server.key").write_bytes(open(keyring["server"][0], "rb").read())
    psec = Security(pctx, CurveKeys(keyring["feed"][1], str(allowed), str(allowed)))
    psec.start()
    feed = pctx.socket(zmq.PUB)
    feed.setsockopt(zmq.LINGER, 0)
    psec.server(feed, DOMAIN_PUBLISH)
    port = feed.bind_to_random_port("tcp://127.0.0.1")
    dctx = zmq.Context()
    dsec = Security(dctx, CurveKeys(keyring["server"][1], keyring["clients"], keyring["admins"],
                                    feed_server=keyring["feed"][0]))
    sub = dctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    dsec.client(sub)
    sub.connect(f"tcp://127.0.0.1:{port}")
    try:
        deadline = time.monotonic() + 10
        received = False
        while not received and time.monotonic() < deadline:
            feed.send_multipart([b"c301", b"{}"])
            received = sub.poll(20) != 0
        assert received
    finally:
        sub.close()
        feed.close()
        psec.stop()
        dctx.term()
        pctx.term()


def test_daemon_with_curve_serves_only_listed_keys(keyring, tmp_path):
    """The real Service: CURVE on publish and control, admins only on control."""
    import threading

    import msgpack
    from conftest import free_port

    from daemon.config import loads
    from daemon.runtime.service import Service

    feed_ep = f"ipc://{tmp_path}/feed"
    text = (f'[daemon]\nfeeds = ["{feed_ep}"]\npublish = "tcp://127.0.0.1:{free_port()}"\n'
            f'control = "tcp://127.0.0.1:{free_port()}"\nmetrics = ""\n'
            f'state_dir = "{tmp_path}/state"\n'
            f'log_level = "warning"\ncurve_secret_key = "{keyring["server"][1]}"\n'
            f'curve_clients = "{keyring["clients"]}"\ncurve_admins = "{keyring["admins"]}"\n'
            '[[model]]\nname = "m"\ninputs = [{ tag = "A", lo = 0, hi = 1 }]\n')
    ctx = zmq.Context()
    feed = ctx.socket(zmq.XPUB)
    feed.setsockopt(zmq.LINGER, 0)
    feed.bind(feed_ep)
    svc = Service(loads(text, "<test>"))
    svc.open()
    pub_ep, ctl_ep = svc.publish_endpoint, svc.control_endpoint
    th = threading.Thread(target=svc.run, daemon=True)
    th.start()
    cctx = zmq.Context()
    try:
        assert feed.poll(5000) and feed.recv() == b"\x01m"
        subs = {}
        for name in ("dashboard", "stranger", None):
            s = _client(cctx, zmq.SUB, keyring, name)
            s.setsockopt(zmq.SUBSCRIBE, b"pred/")
            s.connect(pub_ep)
            subs[name] = s
        got, t, deadline = 0, 0.0, time.monotonic() + 10
        while got < 5 and time.monotonic() < deadline:
            t += 1
            feed.send_multipart([b"m", msgpack.packb({"t": t, "x": [0.5]})])
            if subs["dashboard"].poll(20):
                subs["dashboard"].recv_multipart()
                got += 1
        assert got == 5
        assert subs["stranger"].poll(200) == 0 and subs[None].poll(10) == 0

        def command(name):
            req = _client(cctx, zmq.REQ, keyring, name)
            req.connect(ctl_ep)
            req.send(msgpack.packb({"cmd": "ping"}))
            reply = msgpack.unpackb(req.recv()) if req.poll(1500) else None
            req.close()
            return reply

        assert command("operator") == {"ok": True}
        assert command("dashboard") is None
        assert command(None) is None
    finally:
        for s in subs.values():
            s.close()
        cctx.term()
        svc.post_event("stop")
        th.join(10)
        feed.close()
        ctx.term()
    assert svc.closed_order[-2:] == ["auth", "context"]
