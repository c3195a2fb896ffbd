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
DEFAULT_CONTROL = "tcp://127.0.0.1:5557"


# the control commands, and those that act on one model
CTL_COMMANDS = ("ping", "status", "posterior", "sensitivities", "detectors", "acknowledge",
                "freeze", "resume", "reset", "checkpoint", "reload")
CTL_MODEL_COMMANDS = ("posterior", "sensitivities", "detectors", "acknowledge", "freeze",
                      "resume", "reset")


def _ctl_request(args) -> tuple[dict | None, str | None]:
    msg = {"cmd": args.command}
    if args.model:
        msg["model"] = args.model
    if args.command == "posterior":
        msg["sensitivities"] = True
    if args.command in ("freeze", "resume"):
        if args.command == "freeze" and not args.reason:
            return None, ('freeze needs a reason: add --reason "WHY" (e.g. --reason "analyzer '
                          'maintenance"); it is kept in the state folder\'s log, shown by '
                          'status and published on alert/')
        msg["reason"] = args.reason or ""
        msg["by"] = args.by if args.by is not None else _user()
    elif args.reason or args.by:
        return None, f"--reason and --by go with freeze and resume, not {args.command}"
    if args.at:
        if args.command not in ("posterior", "sensitivities"):
            return None, f"--at goes with posterior and sensitivities, not {args.command}"
        at = {}
        for item in args.at:
            tag, sep, value = item.partition("=")
            try:
                at[tag] = float(value)
            except ValueError:
                sep = ""
            if not sep or not tag:
                return None, f"--at takes TAG=VALUE like TI-104=110, got {item!r}"
        msg["at"] = at
    return msg, None


def _user() -> str:
    import getpass

    try:
        return getpass.getuser()
    except (OSError, KeyError):
        return ""


def cmd_ctl(args) -> int:
    import zmq

    from daemon.runtime import wire
    from daemon.runtime.security import Handshake, SecurityError, apply_client, client_keys

    config = None
    if args.config:
        config, error = _load(args.config)
        if error:
            print(f"posteriord ctl: config error: {error}", file=sys.stderr)
            return EXIT_CONFIG
    endpoint = args.endpoint or (config.daemon.control if config else DEFAULT_CONTROL)
    args.endpoint = endpoint
    msg, error = _ctl_request(args)
    if error:
        print(f"posteriord ctl: {error}", file=sys.stderr)
        return EXIT_USAGE
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
    ok = isinstance(reply, dict) and bool(reply.get("ok"))
    if args.json:
        print(json.dumps(reply, indent=2, default=str))
        return EXIT_OK if ok else EXIT_RUNTIME
    if not ok:
        error = reply.get("error") if isinstance(reply, dict) else reply
        print(f"posteriord ctl: {args.command}: {error}", file=sys.stderr)
        if isinstance(reply, dict) and reply.get("needs") == "model":
            models = reply.get("models") or []
            example = models[0] if models else "NAME"
            print(f"posteriord ctl: add --model {example}"
                  + (f" (one of {', '.join(models)})" if len(models) > 1 else ""),
                  file=sys.stderr)
        return EXIT_RUNTIME
    from daemon.runtime.control_text import reply_text

    print(reply_text(args.command, reply, endpoint))
    return EXIT_OK


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


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("posteriord")
    except PackageNotFoundError:
        return "unknown (not installed; run from a checkout)"


START_HERE = """
Start here: ./tools/demo runs the whole story on a simulated unit; the README's
"Your own data in five minutes" takes a historian export through tune, backtest,
report and run. `posteriord COMMAND --help` tells more about each command."""


def main(argv=None) -> int:
    """The ``posteriord`` command. Output cut short by a closed pipe (``| head``) ends
    quietly, whatever the command."""
    try:
        try:
            code = _main(sys.argv[1:] if argv is None else argv)
        except SystemExit:
            sys.stdout.flush()  # --help, --version, usage errors: a closed pipe shows here
            raise
        sys.stdout.flush()
        return code
    except BrokenPipeError:
        # the reader went away: say nothing, and keep the interpreter's final flush of
        # stdout from failing again (Python docs, "Note on SIGPIPE")
        import os

        with contextlib.suppress(OSError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK


def _main(argv) -> int:
    from daemon.runtime.security import add_client_key_options

    p = argparse.ArgumentParser(prog="posteriord", description="Online Bayesian soft sensors.",
                                epilog=START_HERE,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"posteriord {_version()}")
    sub = p.add_subparsers(dest="what", metavar="COMMAND")
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
    k.add_argument("command", choices=CTL_COMMANDS, metavar="COMMAND",
                   help=", ".join(CTL_COMMANDS) + "; " + ", ".join(CTL_MODEL_COMMANDS)
                        + " need --model")
    k.add_argument("--model", help="model name, for the commands that take one")
    k.add_argument("--config", help="TOML config to take the control endpoint from")
    k.add_argument("--endpoint", help=f"control endpoint (default: the config's, or "
                                      f"{DEFAULT_CONTROL})")
    k.add_argument("--timeout", type=float, default=5.0, help="seconds to wait for the reply")
    k.add_argument("--json", action="store_true",
                   help="print the daemon's reply as JSON (for scripts) instead of a table")
    k.add_argument("--reason", help="freeze/resume: why (required for freeze); kept in the "
                                    "state folder's log, shown by status, published on alert/")
    k.add_argument("--by", help="freeze/resume: who (default: this user's name)")
    k.add_argument("--at", action="append", metavar="TAG=VALUE",
                   help="posterior/sensitivities: the operating point (every input; default "
                        "the last sample)")
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
    ksub = keys.add_subparsers(dest="keys_what", metavar="SUBCOMMAND")
    kn = ksub.add_parser("new", help="write NAME.key (public) and NAME.key_secret (0600)")
    kn.add_argument("name", help="key name, e.g. the host or the client")
    kn.add_argument("--dir", default="keys", help="folder for the key files (default keys/)")
    kn.set_defaults(func=cmd_keys_new)
    if not argv:
        p.print_help()
        return EXIT_USAGE
    args = p.parse_args(argv)
    if getattr(args, "func", None) is None:
        # a command group without its sub-command (state, keys, bridge): its own help
        p.parse_args([*argv, "--help"])
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
