"""``posteriord state ...``: look into a state folder, move one model's state between folders.

``state inspect DIR`` only reads (no lock, no change), so it works while a daemon runs.
``state export`` and ``state import`` work on the folder of a stopped daemon: they take the
folder's lock, and a folder held by a running daemon is refused with exit code 5.

An export file holds one model's whole run-time state (its settings, posterior, detectors and
trust, feature buffer, sample ids, counters) in the framing of a checkpoint file (magic,
length, CRC-32, msgpack). Importing appends an ``import`` record to the target folder's
write-ahead log, applies it as a restarted daemon would replay it, and writes a checkpoint.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import sys
from datetime import UTC, datetime

from daemon.exitcodes import (
    EXIT_CONFIG,
    EXIT_CORRUPT,
    EXIT_DURABILITY,
    EXIT_LOCKED,
    EXIT_OK,
    EXIT_RUNTIME,
)
from daemon.runtime import store as st

EXPORT_SCHEMA = "posteriord.model-export/1"


def start_failure(exc: BaseException) -> tuple[int, str]:
    """The exit code and message of a daemon that could not start because of ``exc``."""
    from daemon.runtime.service import StateError

    if isinstance(exc, st.LockedError):
        return EXIT_LOCKED, f"{exc}; one daemon per state folder"
    if isinstance(exc, st.DurabilityError):
        return EXIT_DURABILITY, str(exc)
    if isinstance(exc, st.CorruptionError | StateError):
        return EXIT_CORRUPT, (f"{exc}. To start without the damaged records set [daemon] "
                              f'on_corruption = "checkpoint"; "posteriord state inspect '
                              f'DIR" shows what the folder holds')
    return EXIT_RUNTIME, str(exc)


def add_state_commands(sub) -> None:
    """Add ``state inspect|export|import`` to the ``posteriord`` sub-command parsers."""
    p = sub.add_parser("state", help="inspect a state folder; export or import a model")
    ss = p.add_subparsers(dest="state_what", metavar="SUBCOMMAND")
    i = ss.add_parser("inspect", help="what a state folder holds (read-only, works while a "
                                      "daemon runs)")
    i.add_argument("dir", help="the state folder (daemon.state_dir)")
    i.add_argument("--json", action="store_true", help="print the description as JSON")
    i.set_defaults(func=cmd_inspect)
    e = ss.add_parser("export", help="write one model's learned state to a file (stopped "
                                     "daemon)")
    e.add_argument("dir", help="the state folder")
    e.add_argument("model", help="model name")
    e.add_argument("file", help="the file to write")
    e.set_defaults(func=cmd_export)
    m = ss.add_parser("import", help="add a model's learned state from an export file to a "
                                     "state folder (stopped daemon)")
    m.add_argument("dir", help="the state folder (created if missing)")
    m.add_argument("file", help="an export file")
    m.add_argument("--as", dest="name", help="import under this model name")
    m.add_argument("--replace", action="store_true",
                   help="replace a model of that name the folder holds already")
    m.add_argument("--config", help="check that this config file has the model with the "
                                    "same learning settings")
    m.set_defaults(func=cmd_import)


def _err(text: str) -> None:
    print(f"posteriord: {text}", file=sys.stderr)


# ---------------------------------------------------------------------------------- inspect
def describe_folder(path) -> dict:
    """:func:`daemon.runtime.store.inspect` plus the models of the newest valid checkpoint and a
    summary of the log records after it. Reads only."""
    info = st.inspect(path)
    info["models"] = []
    info["after_checkpoint"] = {"records": 0, "kinds": {}}
    if not info["exists"]:
        return info
    seq = info["newest_valid_checkpoint"]
    body = None
    if seq is not None:
        name = f"checkpoint-{seq:016d}.ckpt"
        try:
            with open(os.path.join(info["path"], name), "rb") as f:
                _, body = st.decode_checkpoint(f.read())
        except (OSError, st.StoreError) as exc:  # replaced or removed since it was listed
            info["checkpoint_error"] = f"{name}: {exc}"
    models: dict[str, dict] = {}
    try:
        if body is not None:
            for m in body.get("models", []):
                models[m["config"]["name"]] = _checkpoint_entry(m)
        _summarize_records(info, (seq or 0) + 1, models)
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        # intact framing around content this version does not read (start-up would refuse)
        info["content_error"] = f"{type(exc).__name__}: {exc}"
    info["models"] = list(models.values())
    return info


def _summarize_records(info: dict, first_after: int, models: dict) -> None:
    after = info["after_checkpoint"]
    for seg in info["segments"]:
        if seg["last_seq"] is None or seg["last_seq"] < first_after:
            continue
        try:
            with open(os.path.join(info["path"], seg["file"]), "rb") as f:
                scan = st.scan_segment(f.read(), seg["first_seq"])
        except OSError:
            continue  # removed by a checkpoint meanwhile; inspect again for a fresh view
        for rec in scan.records:
            if rec["seq"] < first_after:
                continue
            after["records"] += 1
            kind = str(rec.get("k"))
            after["kinds"][kind] = after["kinds"].get(kind, 0) + 1
            if kind in ("model", "import"):
                models.pop(rec.get("m"), None)  # a new model (or gone): as of this record
                if rec.get("op") != "drop":
                    models[rec["m"]] = _new_entry(rec)
            m = models.get(rec.get("m"))
            if m is None:
                continue
            if kind == "lab":
                m["lab_records_after"] += 1
                m["last_lab_record_t"] = rec.get("t")
            elif kind == "ctl":
                note = rec.get("note") or {}
                why = " ".join(part for part in (
                    f"by {note['by']}" if note.get("by") else "",
                    f"({note['reason']})" if note.get("reason") else "") if part)
                m["actions_after"].append(f"{rec.get('cmd')} {why}".strip())


def _new_entry(rec: dict) -> dict:
    """The inspect entry of a model that a record adds (a reload's new model, an import)."""
    from daemon.config import ModelConfig

    if rec["k"] == "import":
        state = rec["state"]
        entry = _checkpoint_entry(state)
        entry["name"] = rec["m"]
        entry["actions_after"] = ["imported"]
        return entry
    cfg = ModelConfig.from_state(rec["config"])
    return {"name": cfg.name, "fingerprint": cfg.fingerprint(), "updates": 0,
            "t_last_update": None, "last_lab_t": None, "last_sample_t": None,
            "frozen": False, "buffered_rows": 0, "learned": 0, "features": 0, "trust": None,
            "lab_records_after": 0, "last_lab_record_t": None,
            "actions_after": ["new (from its prior)"]}


def _checkpoint_entry(m: dict) -> dict:
    post, counters = m["posterior"], m["counters"]
    mon = m.get("monitor")
    return {
        "name": m["config"]["name"], "fingerprint": m["fingerprint"],
        "updates": post["n_updates"], "t_last_update": post["t_last"],
        "last_lab_t": m["last_lab_t"], "last_sample_t": m["last_x_t"],
        "frozen": m["frozen"], "buffered_rows": len(m["aligner"]["t"]),
        "learned": counters["n_learned"], "features": counters["n_features"],
        "trust": None if mon is None else mon["trust"].get("state"),
        "lab_records_after": 0, "last_lab_record_t": None, "actions_after": [],
    }


def _when(t) -> str:
    if t is None or not isinstance(t, int | float) or not math.isfinite(t):
        return "-"
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def format_folder(info: dict) -> str:
    """The text ``state inspect`` prints."""
    lines = [f"state folder {info['path']}"]
    if not info["exists"]:
        lines.append("  does not exist")
        return "\n".join(lines)
    lock = info["lock"]
    if lock is None:
        held = "no lock file (never opened by a daemon)"
    elif lock["held"]:
        held = f"locked by process {lock['pid']} (a daemon is running)"
    elif lock["held"] is None:
        held = f"lock state unknown (/proc/locks unavailable), pid in file {lock['pid_in_file']}"
    else:
        held = "not locked (no daemon running)"
    lines.append(f"  mode {info['mode']}, {held}")
    lines.append("  checkpoints:")
    for c in info["checkpoints"]:
        health = "valid" if c["valid"] else f"DAMAGED: {c['error']}"
        lines.append(f"    {c['file']}  seq {c['seq']}  {c['bytes']} bytes  {health}")
    if not info["checkpoints"]:
        lines.append("    none")
    lines.append("  write-ahead log:")
    for s in info["segments"]:
        span = "empty" if s["last_seq"] is None else f"seq {s['first_seq']}..{s['last_seq']}"
        health = s["status"]
        if s["status"] != "ok":
            health = f"{s['status'].upper()} at byte {s['bad_offset']}: {s['reason']}"
            if s["status"] == "torn" and lock and lock["held"]:
                health += " (the last record may be being written)"
        lines.append(f"    {s['file']}  {span}  {s['bytes']} bytes  {health}")
    if not info["segments"]:
        lines.append("    none")
    for m in info["moved_aside"]:
        note = "waiting for a decision (start refuses)" if m["pending"] else "loss accepted"
        lines.append(f"  moved aside: {m['file']}  {m['bytes']} bytes  {note}")
    for name in info["temporary"]:
        lines.append(f"  unfinished checkpoint: {name} (removed at the next start)")
    if info.get("checkpoint_error"):
        lines.append(f"  checkpoint could not be read now: {info['checkpoint_error']}")
    if info.get("content_error"):
        lines.append(f"  CONTENT NOT UNDERSTOOD (a daemon would refuse it): "
                     f"{info['content_error']}")
    after = info["after_checkpoint"]
    kinds = ", ".join(f"{n} {k}" for k, n in sorted(after["kinds"].items())) or "none"
    lines.append(f"  records after the newest valid checkpoint: {after['records']} ({kinds})")
    lines.append(f"  models (as of checkpoint {info['newest_valid_checkpoint']}, plus the "
                 f"records after it):")
    for m in info["models"]:
        last_lab = m["last_lab_record_t"] if m["last_lab_record_t"] is not None \
            else m["last_lab_t"]
        trust = f", trust {m['trust']}" if m["trust"] else ""
        lines.append(f"    {m['name']}  (fingerprint {m['fingerprint']})")
        lines.append(f"      updates {m['updates']} + {m['lab_records_after']} lab record(s) "
                     f"after the checkpoint; learned {m['learned']}"
                     f"{', FROZEN' if m['frozen'] else ''}{trust}")
        lines.append(f"      last lab sample {_when(last_lab)}, last feature sample "
                     f"{_when(m['last_sample_t'])}, {m['buffered_rows']} buffered row(s)")
        if m["actions_after"]:
            lines.append(f"      actions after the checkpoint: {', '.join(m['actions_after'])}")
    if not info["models"]:
        lines.append("    none")
    return "\n".join(lines)


def cmd_inspect(args) -> int:
    try:
        info = describe_folder(args.dir)
    except (OSError, ValueError) as exc:
        _err(f"cannot inspect {args.dir}: {exc}")
        return EXIT_RUNTIME
    if args.json:
        print(json.dumps(info, indent=2, default=str))
    else:
        print(format_folder(info))
    return EXIT_OK


# ---------------------------------------------------------------------------------- export
def _open_stopped(path: str, *, create: bool):
    """A recovered StateDir and a Service holding its state, or (None, exit code)."""
    from daemon.config import Config, DaemonConfig
    from daemon.runtime.service import Service, StateError

    if not create and not os.path.isdir(path):
        _err(f"no state folder at {path}")
        return None, EXIT_RUNTIME
    store = st.StateDir(path)
    try:
        store.open()
    except st.LockedError as exc:
        _err(f"{exc}: stop that daemon first (export and import work on a stopped daemon's "
             f"folder)")
        return None, EXIT_LOCKED
    except st.StoreError as exc:
        _err(str(exc))
        return None, EXIT_RUNTIME
    svc = Service(Config(daemon=DaemonConfig(state_dir=path), models=()))
    try:
        rec = store.recover("refuse")
        svc.restore(rec)
    except (st.CorruptionError, StateError) as exc:
        store.close()
        _err(f"{exc}")
        return None, EXIT_CORRUPT
    except st.DurabilityError as exc:
        store.close()
        _err(f"{exc}")
        return None, EXIT_DURABILITY
    except BaseException:
        store.close()
        raise
    return (store, svc), EXIT_OK


def _write_file(path: str, data: bytes) -> None:
    tmp = f"{path}.tmp-{os.getpid()}"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):  # the temporary file may not exist yet
            os.unlink(tmp)
        raise


def cmd_export(args) -> int:
    opened, code = _open_stopped(args.dir, create=False)
    if opened is None:
        return code
    store, svc = opened
    try:
        runner = svc.runners.get(args.model)
        if runner is None:
            _err(f"the state in {args.dir} holds no model {args.model!r}; it holds "
                 f"{', '.join(sorted(svc.runners)) or 'none'}")
            return EXIT_RUNTIME
        body = {"schema": EXPORT_SCHEMA, "model": runner.name, "source": store.path,
                "state": runner.to_state()}
        data = st.encode_checkpoint(store.last_seq, body)
    finally:
        store.close()
    try:
        _write_file(args.file, data)
    except OSError as exc:
        _err(f"cannot write {args.file}: {exc}")
        return EXIT_RUNTIME
    post = runner.post
    print(f"exported {runner.name} ({post.n_updates} updates, fingerprint "
          f"{runner.cfg.fingerprint()}) as of record {store.last_seq} to {args.file}")
    return EXIT_OK


def read_export(path: str) -> dict:
    """The body of an export file; raises ValueError when it is not one."""
    try:
        with open(path, "rb") as f:
            _, body = st.decode_checkpoint(f.read())
    except st.StoreError as exc:
        raise ValueError(f"{path} is not an intact export file: {exc}") from None
    if body.get("schema") != EXPORT_SCHEMA:
        raise ValueError(f"{path} has schema {body.get('schema')!r}, expected "
                         f"{EXPORT_SCHEMA!r}")
    return body


def cmd_import(args) -> int:
    from daemon.runtime.runner import ModelRunner

    try:
        body = read_export(args.file)
        probe = ModelRunner.from_state(body["state"], args.name)
    except OSError as exc:
        _err(f"cannot read {args.file}: {exc}")
        return EXIT_RUNTIME
    except ValueError as exc:
        _err(str(exc))
        return EXIT_RUNTIME
    name, fp = probe.name, probe.cfg.fingerprint()
    if args.config:
        from daemon.config import load

        try:
            config = load(args.config)
        except (OSError, ValueError) as exc:
            _err(f"config error: {exc}")
            return EXIT_CONFIG
        target = next((m for m in config.models if m.name == name), None)
        if target is None:
            _err(f"{args.config} has no model {name!r}: the daemon would drop the import")
            return EXIT_CONFIG
        if target.fingerprint() != fp:
            _err(f"{args.config} gives {name} other learning settings (fingerprint "
                 f"{target.fingerprint()}, the export {fp}): the daemon would start it "
                 f"from its prior")
            return EXIT_CONFIG
    opened, code = _open_stopped(args.dir, create=True)
    if opened is None:
        return code
    store, svc = opened
    try:
        if name in svc.runners and not args.replace:
            _err(f"the state in {args.dir} holds a model {name!r} already; pass --replace to "
                 f"overwrite it, or --as to import under another name")
            return EXIT_RUNTIME
        record = {"k": "import", "m": name, "state": body["state"]}
        try:
            store.append(record)
            svc.apply_record(record)  # as a restarted daemon replays it
            seq = store.checkpoint(svc.state_body())
        except st.DurabilityError as exc:
            _err(str(exc))
            return EXIT_DURABILITY
    finally:
        store.close()
    print(f"imported {name} ({probe.post.n_updates} updates, fingerprint {fp}) into "
          f"{store.path}; checkpoint {seq}")
    return EXIT_OK
