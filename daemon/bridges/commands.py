"""``posteriord bridge ...``: run one bridge, or hash a password for the OPC UA users file."""

from __future__ import annotations

import getpass
import importlib
import logging
import sys

from daemon.exitcodes import EXIT_CONFIG, EXIT_OK, EXIT_RUNTIME

# sub-command -> (module, the extra its library comes from)
BRIDGES = {
    "opcua-in": ("daemon.bridges.opcua_in", "opcua"),
    "opcua-out": ("daemon.bridges.opcua_out", "opcua"),
    "mqtt": ("daemon.bridges.mqtt", "mqtt"),
    "lab-folder": ("daemon.bridges.labfolder", None),
}
_LIBRARY = {"opcua": "asyncua", "mqtt": "aiomqtt"}


def cmd_bridge(args) -> int:
    from daemon.config import ConfigError
    from daemon.logsetup import setup_logging

    module, extra = BRIDGES[args.bridge]
    if extra is not None:
        try:
            importlib.import_module(_LIBRARY[extra])
        except ImportError:
            print(f"posteriord: the {args.bridge} bridge needs {_LIBRARY[extra]}: "
                  f"pip install 'posteriord[{extra}]'", file=sys.stderr)
            return EXIT_RUNTIME
    setup_logging(args.log_level, "text")
    try:
        return importlib.import_module(module).main(args.config)
    except ConfigError as exc:
        print(f"posteriord: config error: {exc}", file=sys.stderr)
        return EXIT_CONFIG
    except OSError as exc:
        logging.getLogger("posteriord.bridge").error("cannot start: %s", exc)
        return EXIT_RUNTIME


def cmd_passwd(args) -> int:
    from daemon.bridges.opcua_out import hash_password

    password = getpass.getpass(f"password for {args.name}: ")
    if not password:
        print("posteriord: empty password refused", file=sys.stderr)
        return EXIT_RUNTIME
    print(f"{args.name}:{hash_password(password)}")
    return EXIT_OK


def add_bridge_commands(sub) -> None:
    b = sub.add_parser("bridge", help="run a bridge between the plant's buses and posteriord")
    bsub = b.add_subparsers(dest="bridge", required=True)
    for name in BRIDGES:
        p = bsub.add_parser(name, help=f"run the {name} bridge (its table of the config)")
        p.add_argument("--config", required=True, help="TOML config file")
        p.add_argument("--log-level", default="info", help="debug, info, warning, error")
        p.set_defaults(func=cmd_bridge)
    pw = bsub.add_parser("passwd", help="print a users-file line for [opcua_out] users")
    pw.add_argument("name", help="user name")
    pw.set_defaults(func=cmd_passwd)
