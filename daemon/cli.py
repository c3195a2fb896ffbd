"""The ``posteriord`` command."""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import sys
import time

from daemon.exitcodes import (
    EXIT_CONFIG,
    EXIT_OK,
    EXIT_RUNTIME,
    EXIT_USAGE,
)
from daemon.logsetup import setup_logging  # noqa: E402


def _load(path):
    from daemon.config import ConfigError, demo_config, load

    try:
        return (load(path) if path else demo_config()), None
    except ConfigError as exc:
        return None, str(exc)
    except OSError as exc:
        return None, f"{path}: cannot read config: {exc.strerror or exc}"
    except ValueError as exc:
        return None, str(exc)


def _preflight(config) -> str | None:
    """What ``run`` would refuse in the CURVE settings, checked before anything is locked."""
    from daemon.runtime.security import SecurityError, preflight

    try:
        preflight(config.daemon)
    except SecurityError as exc:
        return str(exc)
    return None


def cmd_run(args) -> int:
    from daemon.runtime.service import Service

    config, error = _load(args.config)
    if error:
        print(f"posteriord: config error: {error}", file=sys.stderr)
        return EXIT_CONFIG
    error = _preflight(config)
    if error:
        print(f"posteriord: config error: {error}", file=sys.stderr)
        return EXIT_CONFIG
    setup_logging(args.log_level or config.daemon.log_level, config.daemon.log_format)
    svc = Service(config, config_path=args.config)
    try:
        svc.open()
    except Exception as exc:  # noqa: BLE001 - any bind/listen failure ends start-up cleanly
        from daemon.runtime.state_commands import start_failure

        code, text = start_failure(exc)
        logging.getLogger("posteriord").error("cannot start: %s", text)
        svc.close()
        return code
    svc.install_signal_handlers()
    return svc.run()


def cmd_check(args) -> int:
    from daemon.config import describe

    config, error = _load(args.file)
    if error:
        print(f"posteriord: config error: {error}", file=sys.stderr)
        return EXIT_CONFIG
    error = _preflight(config)
    if error:
        print(f"posteriord: config error: {error}", file=sys.stderr)
        return EXIT_CONFIG
    print(describe(config))
    from daemon.runtime.alignment import buffer_memory

    print("\n" + "\n".join(buffer_memory(config.models)))
    from daemon.runtime.security import preflight

    print("\n".join(preflight(config.daemon)))
    return EXIT_OK


# the daemon's control socket sets ZMQ_MAXMSGSIZE to this: libzmq drops the connection of a
# client whose request is bigger, before the daemon could answer it
CONTROL_MAX_BYTES = 65536


def cmd_ctl(args) -> int:
    import zmq

    from daemon.runtime import wire
    from daemon.runtime.security import Handshake, SecurityError, apply_client, client_keys

    msg = {"cmd": args.command}
    if args.model:
        msg["model"] = args.model
    request = wire.pack(msg)
    if len(request) > CONTROL_MAX_BYTES:
        print(f"posteriord ctl: the request is {len(request)} bytes packed; the daemon takes "
              f"at most {CONTROL_MAX_BYTES} (it would drop the connection unanswered)",
              file=sys.stderr)
        return EXIT_USAGE
    if not (args.timeout > 0):
        print(f"posteriord ctl: --timeout must be > 0, got {args.timeout!r}", file=sys.stderr)
        return EXIT_USAGE
    try:
        keys = client_keys(args.curve_key, args.curve_server_key)
    except SecurityError as exc:
        print(f"posteriord ctl: {exc}", file=sys.stderr)
        return EXIT_USAGE
    ctx = zmq.Context()
    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    apply_client(sock, keys)
    hs = Handshake(sock, curve=keys is not None, admit="curve_admins")
    poller = zmq.Poller()
    # a REQ blocks in send while no connection has completed its handshake (a refused one
    # never does): wait for POLLOUT under the same deadline as the reply
    poller.register(sock, zmq.POLLOUT)
    poller.register(hs.monitor, zmq.POLLIN)
    reply = None
    sent = False
    try:
        sock.connect(args.endpoint)
        deadline = time.monotonic() + args.timeout
        while reply is None:
            left = deadline - time.monotonic()
            if left <= 0:
                break
            ready = dict(poller.poll(max(1, int(left * 1000))))
            if hs.monitor in ready:
                failures = hs.read()
                if failures:
                    print(f"posteriord ctl: {args.endpoint}: {failures[0][1]}", file=sys.stderr)
                    return EXIT_RUNTIME
            if not sent and ready.get(sock, 0) & zmq.POLLOUT:
                with contextlib.suppress(zmq.Again):
                    sock.send(request, zmq.NOBLOCK)
                    sent = True
                    poller.modify(sock, zmq.POLLIN)
            elif sent and ready.get(sock, 0) & zmq.POLLIN:
                reply = wire.unpack(sock.recv(), 1 << 26)
        if reply is None:
            hs.read()
            if hs.dropped:
                why = ("the daemon closed the connection without replying (it drops a "
                       f"request over {CONTROL_MAX_BYTES} bytes)")
            elif not hs.connected:
                why = "no connection (is a daemon listening there?)"
            elif not sent:
                why = "connected, but the request could not be sent"
            else:
                why = "connected, but no reply"
            print(f"posteriord ctl: no reply from {args.endpoint} within {args.timeout} s: "
                  f"{why}", file=sys.stderr)
            return EXIT_RUNTIME
    finally:
        hs.close()
        sock.close()
        ctx.term()
    print(json.dumps(reply, indent=2, default=str))
    return EXIT_OK if isinstance(reply, dict) and reply.get("ok") else EXIT_RUNTIME


def cmd_keys_new(args) -> int:
    from daemon.runtime.security import SecurityError, new_keys

    try:
        public, secret = new_keys(args.dir, args.name)
    except (SecurityError, OSError) as exc:
        print(f"posteriord: {exc}", file=sys.stderr)
        return EXIT_RUNTIME
    print(f"public key {public} (hand it out: clients/ or admins/ folders of the peers)")
    print(f"secret key {secret} (mode 0600; keep it on this host: a daemon's curve_secret_key, "
          f"or the --curve-key of ctl, record, watch, replay or relay)")
    return EXIT_OK


def main(argv=None) -> int:
    from daemon.runtime.security import add_client_key_options

    p = argparse.ArgumentParser(prog="posteriord", description="Online Bayesian soft sensors.")
    sub = p.add_subparsers(dest="what", required=True)
    r = sub.add_parser("run", help="run the daemon (the built-in demo config without --config)")
    r.add_argument("--config", help="TOML config file")
    r.add_argument("--log-level", help="override the configured log level")
    r.set_defaults(func=cmd_run)
    c = sub.add_parser("check-config", help="validate a config and describe its models")
    c.add_argument("file", nargs="?", help="TOML config file (default: the built-in demo)")
    c.set_defaults(func=cmd_check)
    k = sub.add_parser(
        "ctl", help="send a control command to a running daemon",
        description="Send one control command and print the reply. A request is at most "
                    f"{CONTROL_MAX_BYTES} bytes packed (the daemon's limit; ctl refuses a "
                    "bigger one before sending). Against a CURVE daemon give --curve-key and "
                    "--curve-server-key; this client's public key must be in the daemon's "
                    "curve_admins folder. A refused handshake is reported at once.")
    k.add_argument("command", help="ping, status, posterior, detectors, acknowledge, freeze, "
                                   "resume, reset, checkpoint, reload")
    k.add_argument("--model", help="model name, for the commands that take one")
    k.add_argument("--endpoint", default="tcp://127.0.0.1:5557", help="control endpoint")
    k.add_argument("--timeout", type=float, default=5.0, help="seconds to wait for the reply")
    add_client_key_options(k)
    k.set_defaults(func=cmd_ctl)
    # imported here: these modules import the service, which imports this module's exit codes
    from daemon.bridges.commands import add_bridge_commands
    from daemon.runtime.relay import add_relay_command
    from daemon.runtime.state_commands import add_state_commands
    from daemon.workbench.commands import add_work_commands

    add_work_commands(sub)
    add_state_commands(sub)
    add_relay_command(sub)
    add_bridge_commands(sub)
    keys = sub.add_parser("keys", help="CURVE key pairs")
    ksub = keys.add_subparsers(dest="keys_what", required=True)
    kn = ksub.add_parser("new", help="write NAME.key (public) and NAME.key_secret (0600)")
    kn.add_argument("name", help="key name, e.g. the host or the client")
    kn.add_argument("--dir", default="keys", help="folder for the key files (default keys/)")
    kn.set_defaults(func=cmd_keys_new)
    args = p.parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
