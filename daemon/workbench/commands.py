"""The engineer's workflow commands of ``posteriord``: backtest, tune, report, replay, record,
watch. `add_work_commands` registers them on the main command's subparsers."""

from __future__ import annotations

import argparse
import dataclasses
import os
import signal
import sys
import threading

from daemon.runtime.security import (
    CurveServer,
    HandshakeError,
    SecurityError,
    add_client_key_options,
    client_keys,
)

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


def _target(args, models) -> str | None:
    """--target, else the models' configured ``target`` (one for all of them)."""
    if args.target:
        return args.target
    targets = {m.target for m in models if m.target}
    if len(targets) > 1:
        raise _Fail(EXIT_USAGE, "the models have different targets ("
                                + ", ".join(f"{m.name}: {m.target}" for m in models
                                            if m.target)
                                + "); choose one with --model or give --target")
    return targets.pop() if targets else None


def _history(args, tags, target=None):
    """Read the CSV (all of it, before any long computation) and say what was read.

    ``target``: the lab column when --target is not given (a model's configured target).
    """
    from daemon.workbench.backtest import load_history
    from daemon.workbench.historian import reading_text

    target = args.target or target
    if target and not args.target:
        print(f"target {target} (from the config; --target overrides)", file=sys.stderr)
    try:
        history = load_history(args.data, tags, target=target, tz=args.tz,
                               time_format=args.time_format, progress=True,
                               time_column=args.time_column, delimiter=args.sep,
                               decimal=args.decimal)
    except OSError as exc:
        raise _Fail(EXIT_RUNTIME, f"{args.data}: {exc.strerror or exc}") from None
    except (ValueError, OverflowError) as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    for line in reading_text(history.summary):
        print(line, file=sys.stderr)
    return history


def _unit(args, history, model=None) -> str:
    """--unit, else the model's configured unit, else the target's unit from the file's units
    row or header."""
    if getattr(args, "unit", None):
        return args.unit
    if model is not None and model.unit:
        return model.unit
    return history.summary.get("units", {}).get(history.target, "") or ""


def _matching(history, model) -> tuple[int, int]:
    """Lab results read, and those with inputs within the model's tolerance (daemon rule)."""
    from daemon.workbench.backtest import lab_features

    _, _, _, ok = lab_features(history, model)
    return int(ok.size), int(ok.sum())


def _tolerance_hint(history, model) -> str:
    """A hint when the rows are further apart than the model's matching tolerance."""
    import numpy as np

    from daemon.config import format_duration

    if history.t.size < 2:
        return ""
    step = float(np.median(np.diff(history.t)))
    if step <= model.tolerance:
        return ""
    return (f" (the rows are {format_duration(step)} apart: lab.tolerance = "
            f"\"{format_duration(step)}\" would match a result to the row before)")


def lab_account(res) -> list[str]:
    """Where every lab result read went in a backtest: lines for people."""
    from daemon.config import format_duration

    h, m = res.history, res.model
    read, with_inputs = _matching(h, m)
    fits = res.track.fits
    matched = len(fits)
    in_train = sum(1 for f in fits if f["t"] < res.train_end)
    gated_all = sum(1 for f in fits if f.get("reason") == "gated")
    after = matched - in_train
    other = after - res.n_scored
    refused = with_inputs - matched
    lines = [f"lab results: {h.summary.get('lab_cells', read)} in the file, {read} read "
             f"(the rest above); {matched} matched to inputs, {read - matched} unmatched"]
    if read - matched:
        parts = [f"{read - with_inputs} without inputs within tolerance "
                 f"{format_duration(m.tolerance)} of the drawn time"
                 + _tolerance_hint(h, m)]
        if refused > 0:
            parts.append(f"{refused} refused by the daemon (too old or out of order)")
        lines.append("  unmatched: " + "; ".join(parts))
    lines.append(f"  matched: {in_train} in the static model's training period (learned, not "
                 f"scored), {res.n_scored} scored after it, {res.n_gated} of them gated by the "
                 f"recursive model ({gated_all} gated in all; gated results are scored too)"
                 + (f", {other} not scored (no prediction from every model)" if other else ""))
    return lines


def _stamp(t: float) -> str:
    from datetime import UTC, datetime

    return datetime.fromtimestamp(float(t), UTC).strftime("%Y-%m-%d %H:%M")


def _run(func):
    def wrapped(args) -> int:
        try:
            return func(args)
        except _Fail as exc:
            print(f"posteriord {args.what}: {exc}", file=sys.stderr)
            return exc.code
        except (ValueError, OverflowError) as exc:
            # bad data found late (deep in a computation) is still one line, not a traceback
            print(f"posteriord {args.what}: {exc}", file=sys.stderr)
            return EXIT_USAGE
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
    history = _history(args, [i.tag for i in model.inputs], _target(args, [model]))
    unit = _unit(args, history, model)
    try:
        res = backtest.backtest(history, model, train=args.train, lab_delay=args.lab_delay,
                                block=args.block, unit=unit)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    for line in lab_account(res):
        print(line, file=sys.stderr)
    print(backtest.summary_text(res, unit))
    if args.out:
        n = backtest.write_predictions(args.out, res)
        print(f"\npredictions: {args.out} ({n} rows)")
    return EXIT_OK


def _window(history, until):
    """The rows (and lab results) before ``until``: the commissioning window."""
    from daemon.workbench.backtest import History

    if until is None:
        return history
    rows = history.t < until
    labs = history.lab_t < until
    return History(history.path, history.tags, history.target, history.t[rows],
                   history.X[rows], history.lab_t[labs], history.lab_y[labs], history.summary)


def cmd_tune(args) -> int:
    from daemon.workbench import tune

    if args.config or args.model:
        base = _one_model(_config(args.config), args.model)
        history = _history(args, [i.tag for i in base.inputs], _target(args, [base]))
        until = None if args.until is None else float(history.t[0]) + args.until
    else:
        history = _history(args, args.inputs or None)
        until = None if args.until is None else float(history.t[0]) + args.until
        window = _window(history, until)
        try:
            base = tune.base_model(window, name=args.name, dead_times=dict(args.dead_time),
                                   degree=args.degree)
        except ValueError as exc:
            raise _Fail(EXIT_USAGE, str(exc)) from None
        where = "the data" if until is None else "the data before --until"
        print("no config given: inputs " + ", ".join(
            f"{i.tag} {i.lo:g}..{i.hi:g}" for i in base.inputs) + f" (ranges from {where})")
    if until is None:
        print("tune: no --until, so every lab result is used to choose the settings and the "
              "scores below are in-sample (optimistic); give --until (e.g. the first 4 weeks) "
              "and check the later data with backtest", file=sys.stderr)
    else:
        n_rows = int((history.t < until).sum())
        print(f"tune: commissioning window {_stamp(history.t[0])} to {_stamp(until)} UTC "
              f"({n_rows} of {history.t.size} rows); later data is not used and is out of "
              f"sample for a backtest", file=sys.stderr)
    read, with_inputs = _matching(history, base)
    late = 0 if until is None else int((history.lab_t >= until).sum())
    print(f"lab results: {history.summary.get('lab_cells', read)} in the file, {read} read, "
          f"{with_inputs} matched to inputs, {read - with_inputs} unmatched"
          + (_tolerance_hint(history, base) if read > with_inputs else "")
          + (f"; {late} drawn after --until not used" if late else ""), file=sys.stderr)
    unit = _unit(args, history, base)
    try:
        res = tune.tune(history, base, until=until, burn_in=args.burn_in, policy=args.policy,
                        keep_outliers=args.keep_outliers, lab_delay=args.lab_delay)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    # the lab column and its unit go into the block, so later commands need no --target
    res = dataclasses.replace(res, model=dataclasses.replace(
        res.model, target=history.target, unit=unit or None))
    print(tune.table_text(res, top=args.top, unit=unit, source=os.path.basename(args.data)))
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
    unit = args.unit
    if args.config:
        cfg = _one_model(_config(args.config), args.model or track.model or None)
        k, h, stale = cfg.cusum_k, cfg.cusum_h, cfg.stale_after
        if cfg.target:
            track.meta["target"] = cfg.target
        unit = unit if unit is not None else cfg.unit
    try:
        paths = report.report(track, args.out, unit=unit, title=args.title,
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
    history = _history(args, tags, _target(args, models))
    try:
        messages = backtest.feed_messages(history, models, lab_delay=args.lab_delay,
                                          block=args.block)
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    feed = args.feed or (config.daemon.feeds[0] if args.config else _FEED)
    if args.curve_clients and not args.curve_key:
        raise _Fail(EXIT_USAGE, "--curve-clients needs --curve-key (this replay's "
                                "NAME.key_secret)")
    ctx = zmq.Context()
    server = None
    try:
        if args.curve_key:
            if not args.curve_clients:
                raise _Fail(EXIT_USAGE, "--curve-key needs --curve-clients: a folder holding "
                                        "the public key of each daemon allowed to subscribe")
            try:
                server = CurveServer(ctx, args.curve_key, args.curve_clients)
            except SecurityError as exc:
                raise _Fail(EXIT_USAGE, str(exc)) from None
        try:
            sock = live.open_feed(ctx, feed, curve=server)
        except zmq.ZMQError as exc:
            raise _Fail(EXIT_RUNTIME, f"cannot bind {feed}: {exc}") from None
        hs = live.feed_handshake(sock, curve=server is not None)
        try:
            names = [m.name for m in models]
            if args.wait > 0:
                print(f"replay: bound {feed}, waiting up to {args.wait:g} s for a subscriber "
                      f"of {', '.join(names)}", file=sys.stderr)
                missing = live.wait_subscribed(sock, names, args.wait, handshake=hs)
                hs.read()
                if missing:
                    why = "".join(f"; {text}" for text in
                                  dict.fromkeys(text for _, text in hs.failures))
                    raise _Fail(EXIT_RUNTIME, f"no subscriber for {', '.join(sorted(missing))}"
                                              f" on {feed} within {args.wait:g} s{why}")
            # nobody reads the monitor from here on: stop it before its queue fills
            hs.close()
            pace = "as fast as possible" if args.speed is None else f"at {args.speed:g}x"
            print(f"replay: {len(messages)} messages from {history.t.size} rows and "
                  f"{history.lab_t.size} lab results, {pace}", file=sys.stderr)
            for m in models:
                read, with_inputs = _matching(history, m)
                print(f"replay: {m.name}: {with_inputs} of {read} lab results have inputs "
                      f"within tolerance; the daemon's fit/ messages say what it learned",
                      file=sys.stderr)
            n = live.replay(sock, messages, speed=args.speed, progress=True)
            print(f"replay: sent {n} messages", file=sys.stderr)
        finally:
            hs.close()
            sock.close(linger=5000)
    finally:
        if server is not None:
            server.stop()
        ctx.term()
    return EXIT_OK


def cmd_record(args) -> int:
    from daemon.workbench import live

    config = _config(args.config) if args.config else None
    endpoint = args.endpoint or (config.daemon.publish if config else _PUBLISH)
    keys = _client_keys(args)
    described = None
    if config is not None:
        described = {m.name: describe_model(m) for m in _models(config, args.model)}
    stop = _stop_on_signals()
    counter = live.Counter(sys.stderr)
    print(f"record: subscribed to {endpoint}; Ctrl-C stops", file=sys.stderr)
    try:
        live.record(endpoint, args.out, models=args.model or (), stop=stop,
                    duration=args.duration, count=args.count, curve=keys,
                    described=described, counter=counter)
    except HandshakeError as exc:
        raise _Fail(EXIT_RUNTIME, f"{exc}; nothing recorded from it") from None
    except ValueError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None
    counter.done(args.out)
    return EXIT_OK


def describe_model(m) -> dict:
    """What a record file's header keeps of a model's config (for report and watch)."""
    out = {"target": m.target, "unit": m.unit, "level": m.level, "cusum_k": m.cusum_k,
           "cusum_h": m.cusum_h, "stale_after": m.stale_after}
    return {k: v for k, v in out.items() if v is not None}


def cmd_watch(args) -> int:
    from daemon.workbench import live

    config = _config(args.config) if args.config else None
    endpoint = args.endpoint or (config.daemon.publish if config else _PUBLISH)
    keys = _client_keys(args)
    known, units = (), {}
    if config is not None:
        watched = _models(config, args.model)
        known = [m.name for m in watched]
        units = {m.name: m.unit for m in watched if m.unit and not args.unit}
    stop = _stop_on_signals()
    try:
        live.watch(endpoint, models=args.model or (), unit=args.unit, duration=args.duration,
                   count=args.count, refresh=args.refresh, stop=stop, curve=keys,
                   known=known, units=units, events=args.events)
    except HandshakeError as exc:
        raise _Fail(EXIT_RUNTIME, str(exc)) from None
    return EXIT_OK


def _client_keys(args):
    try:
        return client_keys(args.curve_key, args.curve_server_key)
    except SecurityError as exc:
        raise _Fail(EXIT_USAGE, str(exc)) from None


# ---------------------------------------------------------------------------------- parsers
def _sep(text: str) -> str:
    sep = {"tab": "\t", "\\t": "\t", "semicolon": ";", "comma": ","}.get(text, text)
    if sep not in (",", ";", "\t"):
        raise argparse.ArgumentTypeError(f"expected ',', ';' or tab, got {text!r}")
    return sep


def _decimal(text: str) -> str:
    mark = {"comma": ",", "point": ".", "dot": "."}.get(text, text)
    if mark not in (".", ","):
        raise argparse.ArgumentTypeError(f"expected '.' or ',', got {text!r}")
    return mark


def _csv_options(p) -> None:
    p.add_argument("data", help="historian CSV export (see the README's CSV format)")
    p.add_argument("--target", help="lab column, header or tag (default AX-350 when present)")
    p.add_argument("--tz", help="IANA time zone of time stamps without an offset, e.g. "
                                "Europe/Berlin (daylight saving as the zone had it)")
    p.add_argument("--time-format", default="auto",
                   help="auto, iso, epoch (seconds), epoch_ms, epoch_us, epoch_ns or a strptime "
                        "format such as '%%d.%%m.%%Y %%H:%%M:%%S' (default auto: detected)")
    p.add_argument("--time-column", help="header of the time column (default: detected)")
    p.add_argument("--sep", type=_sep, help="separator: ',', ';' or tab (default: detected)")
    p.add_argument("--decimal", type=_decimal,
                   help="decimal mark: '.' or ',' (default: detected)")


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
    b.add_argument("--unit", default="", help="unit of the target, for the summary "
                                              "(default: from the file's units)")
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
    t.add_argument("--unit", default="", help="unit of the target, for the table "
                                              "(default: from the file's units)")
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
    p.add_argument("--curve-key", metavar="PATH",
                   help="make the feed a CURVE server with this key pair (a NAME.key_secret "
                        "from `posteriord keys new`); the daemon's curve_feed_server_key is "
                        "then its NAME.key, and the daemon needs curve_secret_key too")
    p.add_argument("--curve-clients", metavar="DIR",
                   help="with --curve-key: folder of the public keys (NAME.key) of the "
                        "daemons allowed to subscribe, e.g. the daemon's own public key")
    p.set_defaults(func=_run(cmd_replay))

    c = sub.add_parser("record", help="append a daemon's pred/, fit/ and alert/ messages to a "
                                      "file",
                       description="Subscribe to a daemon and append what it publishes. "
                                   "Against a CURVE daemon give --curve-key and "
                                   "--curve-server-key (this client's public key must be in "
                                   "its curve_clients folder); a refused handshake ends the "
                                   "command with exit code 4 and the reason.")
    c.add_argument("out", help="record file (appended; created with a header line)")
    c.add_argument("--endpoint", help=f"daemon publish endpoint (default: the config's, or "
                                      f"{_PUBLISH})")
    c.add_argument("--config", help="TOML config to take the publish endpoint from")
    c.add_argument("--model", action="append", help="only this model (repeatable)")
    c.add_argument("--duration", type=_duration, help="stop after this long")
    c.add_argument("--count", type=int, help="stop after this many messages")
    add_client_key_options(c)
    c.set_defaults(func=_run(cmd_record))

    w = sub.add_parser("watch", help="live terminal view of a running daemon, one line per "
                                     "model",
                       description="A live view of a daemon's predictions. Against a CURVE "
                                   "daemon give --curve-key and --curve-server-key (this "
                                   "client's public key must be in its curve_clients folder); "
                                   "a refused handshake ends it with exit code 4 and the "
                                   "reason.")
    w.add_argument("--endpoint", help=f"daemon publish endpoint (default: the config's, or "
                                      f"{_PUBLISH})")
    w.add_argument("--config", help="TOML config to take the publish endpoint from")
    w.add_argument("--model", action="append", help="only this model (repeatable)")
    w.add_argument("--unit", default="", help="unit of the targets, for the display "
                                              "(default: each model's configured unit)")
    w.add_argument("--events", type=int, default=8,
                   help="event lines (lab results, trust changes) shown below the table on "
                        "a terminal (default 8); elsewhere every event is printed")
    w.add_argument("--refresh", type=float, default=0.5, help="seconds between redraws")
    w.add_argument("--duration", type=_duration, help="stop after this long")
    w.add_argument("--count", type=int, help="stop after this many messages")
    add_client_key_options(w)
    w.set_defaults(func=_run(cmd_watch))
