"""The ``posteriord`` command."""

from __future__ import annotations

import argparse
import json
import logging
import sys

from daemon.exitcodes import (
    EXIT_CONFIG,
    EXIT_OK,
    EXIT_RUNTIME,
)


class _JsonFormatter(logging.Formatter):
    def format(self, record):
        out = {"ts": round(record.created, 3), "level": record.levelname.lower(),
               "logger": record.name, "msg": record.getMessage()}
        if record.exc_info:
            out["exc"] = self.formatException(record.exc_info)
        return json.dumps(out)


def setup_logging(level: str, fmt: str) -> None:
    handler = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        handler.setFormatter(_JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level.upper())


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


def cmd_run(args) -> int:
    from daemon.runtime.service import Service

    config, error = _load(args.config)
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
    print(describe(config))
    return EXIT_OK


def cmd_ctl(args) -> int:
    import zmq

    from daemon.runtime import wire

    msg = {"cmd": args.command}
    if args.model:
        msg["model"] = args.model
    ctx = zmq.Context()
    sock = ctx.socket(zmq.REQ)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVTIMEO, int(args.timeout * 1000))
    try:
        sock.connect(args.endpoint)
        sock.send(wire.pack(msg))
        reply = wire.unpack(sock.recv(), 1 << 26)
    except zmq.Again:
        print(f"posteriord: no reply from {args.endpoint} within {args.timeout} s",
              file=sys.stderr)
        return EXIT_RUNTIME
    finally:
        sock.close()
        ctx.term()
    print(json.dumps(reply, indent=2, default=str))
    return EXIT_OK if reply.get("ok") else EXIT_RUNTIME


def cmd_keys_new(args) -> int:
    from daemon.runtime.security import SecurityError, new_keys

    try:
        public, secret = new_keys(args.dir, args.name)
    except (SecurityError, OSError) as exc:
        print(f"posteriord: {exc}", file=sys.stderr)
        return EXIT_RUNTIME
    print(f"public key {public} (hand it out: clients/ or admins/ folders of the peers)")
    print(f"secret key {secret} (mode 0600; keep it on this host)")
    return EXIT_OK


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="posteriord", description="Online Bayesian soft sensors.")
    sub = p.add_subparsers(dest="what", required=True)
    r = sub.add_parser("run", help="run the daemon (the built-in demo config without --config)")
    r.add_argument("--config", help="TOML config file")
    r.add_argument("--log-level", help="override the configured log level")
    r.set_defaults(func=cmd_run)
    c = sub.add_parser("check-config", help="validate a config and describe its models")
    c.add_argument("file", nargs="?", help="TOML config file (default: the built-in demo)")
    c.set_defaults(func=cmd_check)
    k = sub.add_parser("ctl", help="send a control command to a running daemon")
    k.add_argument("command", help="ping, status, posterior, detectors, acknowledge, freeze, "
                                   "resume, reset, checkpoint, reload")
    k.add_argument("--model", help="model name, for the commands that take one")
    k.add_argument("--endpoint", default="tcp://127.0.0.1:5557", help="control endpoint")
    k.add_argument("--timeout", type=float, default=5.0, help="seconds to wait for the reply")
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
