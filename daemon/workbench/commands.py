"""The engineer's workflow commands of ``posteriord``: backtest, tune, report, replay, record,
watch. `add_work_commands` registers them on the main command's subparsers."""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading

# the exit codes of daemon.cli (documented in the README)
EXIT_OK = 0
EXIT_USAGE = 2
EXIT_CONFIG = 3
EXIT_RUNTIME = 4

_FEED = "tcp://127.0.0.1:5555"
_PUBLISH = "tcp://127.0.0.1:5556"


def _duration(text: str) -> float:
    from daemon.config import parse_duration

    try:
        return parse_duration(text if not text.replace(".", "", 1).isdigit() else float(text))
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _dead_time(text: str) -> tuple[str, float]:
    tag, sep, value = text.partition("=")
    if not sep or not tag:
        raise argparse.ArgumentTypeError(f"expected TAG=DURATION like TI-104=5m, got {text!r}")
    return tag, _duration(value)


def _speed(text: str) -> float | None:
    if text == "max":
        return None
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number or 'max', got {text!r}") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"speed must be > 0, got {text!r}")
    return v


class _Fail(Exception):
    def __init__(self, code: int, message: str):
        super().__init__(message)
        self.code = code


def _config(path):
    from daemon.config import ConfigError, demo_config, load

    try:
        return load(path) if path else demo_config()
    except ConfigError as exc:
        raise _Fail(EXIT_CONFIG, f"config error: {exc}") from None


def _models(config, names):
    if not names:
        return list(config.models)
    by = {m.name: m for m in config.models}
    missing = [n for n in names if n not in by]
    if missing:
        raise _Fail(EXIT_CONFIG, f"no model {', '.join(map(repr, missing))} in "
                                 f"{config.source} (models: {', '.join(by) or 'none'})")
    return [by[n] for n in names]


def _one_model(config, name):
    models = _models(config, [name] if name else [])
    if len(models) != 1:
        raise _Fail(EXIT_USAGE, f"{config.source} has {len(models)} models; choose one with "
                                f"--model ({', '.join(m.name for m in models)})")
    return models[0]


def _history(args, tags):
    from daemon.workbench.backtest import load_history

    try:
        return load_history(args.data, tags, target=args.target, tz=args.tz,
                            time_format=args.time_format, progress=True)
    except OSError as exc:
        raise _Fail(EXIT_RUNTIME, f"{args.data}: {exc.strerror or exc}") from None
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None


def _run(func):
    def wrapped(args) -> int:
        try:
            return func(args)
        except _Fail as exc:
            print(f"posteriord {args.what}: {exc}", file=sys.stderr)
            return exc.code
    return wrapped


def _stop_on_signals() -> threading.Event:
    stop = threading.Event()
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda *_: stop.set())
    return stop


# ---------------------------------------------------------------------------------- commands
def cmd_backtest(args) -> int:
    from daemon.workbench import backtest

    model = _one_model(_config(args.config), args.model)
    history = _history(args, [i.tag for i in model.inputs])
    try:
        res = backtest.backtest(history, model, train=args.train, lab_delay=args.lab_delay,
                                block=args.block, unit=args.unit)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    print(backtest.summary_text(res, args.unit))
    if args.out:
        n = backtest.write_predictions(args.out, res)
        print(f"\npredictions: {args.out} ({n} rows)")
    return EXIT_OK


def cmd_tune(args) -> int:
    from daemon.workbench import tune

    if args.config or args.model:
        base = _one_model(_config(args.config), args.model)
        history = _history(args, [i.tag for i in base.inputs])
    else:
        history = _history(args, args.inputs or None)
        try:
            base = tune.base_model(history, name=args.name, dead_times=dict(args.dead_time),
                                   degree=args.degree)
        except ValueError as exc:
            raise _Fail(EXIT_USAGE, str(exc)) from None
        print("no config given: inputs " + ", ".join(
            f"{i.tag} {i.lo:g}..{i.hi:g}" for i in base.inputs) + " (ranges from the data)")
    until = None if args.until is None else float(history.t[0]) + args.until
    try:
        res = tune.tune(history, base, until=until, burn_in=args.burn_in, policy=args.policy,
                        keep_outliers=args.keep_outliers, lab_delay=args.lab_delay)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    print(tune.table_text(res, top=args.top, unit=args.unit,
                          source=os.path.basename(args.data)))
    block = tune.model_toml(res.model, tune.header_comments(res, args.data))
    print()
    print(block, end="")
    if args.out:
        with open(args.out, "w", encoding="utf-8") as fh:
            fh.write(block)
        print(f"\n[[model]] block written to {args.out}")
    return EXIT_OK


def cmd_report(args) -> int:
    from daemon.workbench import report

    try:
        track = report.load_track(args.source, args.model)
    except OSError as exc:
        raise _Fail(EXIT_RUNTIME, f"{args.source}: {exc.strerror or exc}") from None
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    k = h = stale = None
    if args.config:
        cfg = _one_model(_config(args.config), args.model or track.model or None)
        k, h, stale = cfg.cusum_k, cfg.cusum_h, cfg.stale_after
    try:
        paths = report.report(track, args.out, unit=args.unit, title=args.title,
                              note=args.note, cusum_k=k, cusum_h=h, stale_after=stale)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    for p in paths:
        print(p)
    return EXIT_OK


def cmd_replay(args) -> int:
    import zmq

    from daemon.workbench import backtest, live

    config = _config(args.config)
    models = _models(config, args.model)
    tags = list(dict.fromkeys(i.tag for m in models for i in m.inputs))
    history = _history(args, tags)
    try:
        messages = backtest.feed_messages(history, models, lab_delay=args.lab_delay,
                                          block=args.block)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    feed = args.feed or (config.daemon.feeds[0] if args.config else _FEED)
    ctx = zmq.Context()
    try:
        try:
            sock = live.open_feed(ctx, feed)
        except zmq.ZMQError as exc:
            raise _Fail(EXIT_RUNTIME, f"cannot bind {feed}: {exc}") from None
        try:
            names = [m.name for m in models]
            if args.wait > 0:
                print(f"replay: bound {feed}, waiting up to {args.wait:g} s for a subscriber "
                      f"of {', '.join(names)}", file=sys.stderr)
                missing = live.wait_subscribed(sock, names, args.wait)
                if missing:
                    raise _Fail(EXIT_RUNTIME, f"no subscriber for {', '.join(sorted(missing))}"
                                              f" on {feed} within {args.wait:g} s")
            pace = "as fast as possible" if args.speed is None else f"at {args.speed:g}x"
            print(f"replay: {len(messages)} messages from {history.t.size} rows and "
                  f"{history.lab_t.size} lab results, {pace}", file=sys.stderr)
            n = live.replay(sock, messages, speed=args.speed, progress=True)
            print(f"replay: sent {n} messages", file=sys.stderr)
        finally:
            sock.close(linger=5000)
    finally:
        ctx.term()
    return EXIT_OK


def cmd_record(args) -> int:
    from daemon.workbench import live

    endpoint = args.endpoint or (_config(args.config).daemon.publish if args.config
                                 else _PUBLISH)
    stop = _stop_on_signals()
    try:
        n = live.record(endpoint, args.out, models=args.model or (), stop=stop,
                        duration=args.duration, count=args.count)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    print(f"record: {n} messages appended to {args.out}", file=sys.stderr)
    return EXIT_OK


def cmd_watch(args) -> int:
    from daemon.workbench import live

    endpoint = args.endpoint or (_config(args.config).daemon.publish if args.config
                                 else _PUBLISH)
    stop = _stop_on_signals()
    live.watch(endpoint, models=args.model or (), unit=args.unit, duration=args.duration,
               count=args.count, refresh=args.refresh, stop=stop)
    return EXIT_OK


# ---------------------------------------------------------------------------------- parsers
def _csv_options(p) -> None:
    p.add_argument("data", help="historian CSV export (see daemon/historian.py)")
    p.add_argument("--target", help="lab column (default AX-350 when present)")
    p.add_argument("--tz", help="IANA time zone of naive time stamps")
    p.add_argument("--time-format", default="auto",
                   help="auto, iso, epoch or a strptime format (default auto)")


def add_work_commands(sub) -> None:
    """Register backtest, tune, report, replay, record and watch on ``sub``."""
    b = sub.add_parser("backtest", help="run a model over a historian CSV as the daemon would, "
                                        "score it against a static model")
    _csv_options(b)
    b.add_argument("--config", help="TOML config (default: the built-in demo)")
    b.add_argument("--model", help="model name, when the config has several")
    b.add_argument("--out", help="write the predictions CSV here")
    b.add_argument("--train", type=_duration, default=14 * 86400.0,
                   help="training period of the static model from the start (default 14d)")
    b.add_argument("--lab-delay", type=_duration, default=7200.0,
                   help="time from drawing a lab sample to its result (default 2h)")
    b.add_argument("--block", type=int, default=60, help="feature rows per message (60)")
    b.add_argument("--unit", default="", help="unit of the target, for the summary")
    b.set_defaults(func=_run(cmd_backtest))

    t = sub.add_parser("tune", help="choose prior, noise prior and forgetting half-life by "
                                    "the prequential log predictive density")
    _csv_options(t)
    t.add_argument("--config", help="TOML config whose model is the starting point")
    t.add_argument("--model", help="model name, when the config has several")
    t.add_argument("--name", help="model name without a config (default: the target)")
    t.add_argument("--inputs", nargs="+", help="input columns without a config (default: all)")
    t.add_argument("--dead-time", type=_dead_time, action="append", default=[],
                   metavar="TAG=DURATION", help="dead time of an input without a config")
    t.add_argument("--degree", type=int, default=1, help="polynomial degree without a config")
    t.add_argument("--until", type=_duration, help="use the lab results drawn within this "
                                                   "long of the start (e.g. 28d)")
    t.add_argument("--burn-in", type=int, default=20,
                   help="lab results learned but not scored at the start (default 20)")
    t.add_argument("--policy", choices=("none", "stabilized", "exponential", "random_walk",
                                        "offset"),
                   help="compare only this forgetting policy (default: compare them all)")
    t.add_argument("--lab-delay", type=_duration, default=7200.0,
                   help="time from drawing a lab sample to its result; each result is "
                        "predicted from those known when its sample was drawn (default 2h)")
    t.add_argument("--keep-outliers", action="store_true",
                   help="score the lab results the gate rejects too")
    t.add_argument("--top", type=int, default=12, help="candidates listed (default 12)")
    t.add_argument("--unit", default="", help="unit of the target, for the table")
    t.add_argument("--out", help="write the [[model]] block to this file")
    t.set_defaults(func=_run(cmd_tune))

    r = sub.add_parser("report", help="draw predictions, residuals, detectors and calibration "
                                      "(PNG or SVG)")
    r.add_argument("source", help="predictions CSV (backtest --out) or record file")
    r.add_argument("--out", required=True, help="picture to write, e.g. report.png; the "
                                                "calibration page goes next to it")
    r.add_argument("--model", help="model, when the source holds several")
    r.add_argument("--config", help="config of the model (detector settings, stale_after)")
    r.add_argument("--unit", help="unit of the target")
    r.add_argument("--title", help="title of the first page")
    r.add_argument("--note", help="small print at the bottom")
    r.set_defaults(func=_run(cmd_report))

    p = sub.add_parser("replay", help="publish a historian CSV onto a daemon's feed (binds "
                                      "an XPUB at the feed endpoint)")
    _csv_options(p)
    p.add_argument("--config", help="TOML config: models and feed endpoint (default demo)")
    p.add_argument("--model", action="append", help="only this model (repeatable)")
    p.add_argument("--feed", help=f"endpoint to bind (default: the config's first feed, or "
                                  f"{_FEED})")
    p.add_argument("--speed", type=_speed, default=None,
                   help="recorded seconds per wall-clock second, or 'max' (default max)")
    p.add_argument("--block", type=int, default=60, help="feature rows per message (60)")
    p.add_argument("--lab-delay", type=_duration, default=7200.0,
                   help="time from drawing a lab sample to its result (default 2h)")
    p.add_argument("--wait", type=float, default=10.0,
                   help="seconds to wait for the daemon to subscribe (0: do not wait)")
    p.set_defaults(func=_run(cmd_replay))

    c = sub.add_parser("record", help="append a daemon's pred/, fit/ and alert/ messages to a "
                                      "file")
    c.add_argument("out", help="record file (appended; created with a header line)")
    c.add_argument("--endpoint", help=f"daemon publish endpoint (default: the config's, or "
                                      f"{_PUBLISH})")
    c.add_argument("--config", help="TOML config to take the publish endpoint from")
    c.add_argument("--model", action="append", help="only this model (repeatable)")
    c.add_argument("--duration", type=_duration, help="stop after this long")
    c.add_argument("--count", type=int, help="stop after this many messages")
    c.set_defaults(func=_run(cmd_record))

    w = sub.add_parser("watch", help="live terminal view of a running daemon, one line per "
                                     "model")
    w.add_argument("--endpoint", help=f"daemon publish endpoint (default: the config's, or "
                                      f"{_PUBLISH})")
    w.add_argument("--config", help="TOML config to take the publish endpoint from")
    w.add_argument("--model", action="append", help="only this model (repeatable)")
    w.add_argument("--unit", default="", help="unit of the targets, for the display")
    w.add_argument("--refresh", type=float, default=0.5, help="seconds between redraws")
    w.add_argument("--duration", type=_duration, help="stop after this long")
    w.add_argument("--count", type=int, help="stop after this many messages")
    w.set_defaults(func=_run(cmd_watch))
