"""A read-only description of a state folder (``posteriord state inspect``)."""

from __future__ import annotations

import os
import stat

from daemon.runtime.store.errors import StoreError
from daemon.runtime.store.layout import (
    _ASIDE_RE,
    _CKPT_RE,
    _SEG_RE,
    _TMP_RE,
    LOCK_NAME,
    _ckpt_name,
    _is_pending,
    _numbered,
    _seg_name,
)
from daemon.runtime.store.records import decode_checkpoint, scan_segment


def _flock_holder(lock_path: str) -> tuple[bool | None, int | None]:
    """Whether a flock is held on ``lock_path`` and by which pid, from ``/proc/locks``.

    Read-only: taking the lock to test it would make a daemon starting at that moment fail.
    ``(None, None)`` where ``/proc/locks`` is not available.
    """
    try:
        st = os.stat(lock_path)
    except OSError:
        return False, None
    try:
        with open("/proc/locks") as f:
            lines = f.read().splitlines()
    except OSError:
        return None, None
    want = (os.major(st.st_dev), os.minor(st.st_dev), st.st_ino)
    for line in lines:
        parts = line.split()
        if "->" in parts or len(parts) < 6 or parts[1] != "FLOCK":
            continue  # waiters are listed with "->"; only granted flocks count
        dev = parts[5].split(":")
        try:
            key = (int(dev[0], 16), int(dev[1], 16), int(dev[2]))
            pid = int(parts[4])
        except (IndexError, ValueError):
            continue
        if key == want:
            return True, pid
    return False, None


def inspect(path) -> dict:
    """Describe a state folder without changing anything (no lock taken).

    Returns plain data: ``exists``, ``mode``, ``lock`` (``held``, ``pid``, ``pid_in_file``),
    ``checkpoints`` (``file``, ``seq``, ``bytes``, ``valid``, ``error``), ``segments``
    (``file``, ``first_seq``, ``last_seq``, ``records``, ``bytes``, ``good_bytes``, ``status``,
    ``bad_offset``, ``reason``), ``moved_aside`` (``file``, ``bytes``, ``pending``),
    ``temporary`` and ``other`` file names, and ``newest_valid_checkpoint``.
    """
    path = os.path.abspath(os.fspath(path))
    out: dict = {"path": path, "exists": False, "mode": None, "lock": None, "checkpoints": [],
                 "segments": [], "moved_aside": [], "temporary": [], "other": [],
                 "newest_valid_checkpoint": None}
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return out
    if not stat.S_ISDIR(st.st_mode):
        raise ValueError(f"{path} is not a directory")
    out["exists"] = True
    out["mode"] = f"{stat.S_IMODE(st.st_mode):04o}"
    names = sorted(os.listdir(path))
    lock_path = os.path.join(path, LOCK_NAME)
    if LOCK_NAME in names:
        held, pid = _flock_holder(lock_path)
        try:
            with open(lock_path, "rb") as f:
                text = f.read(64).decode("ascii", "replace").strip()
        except OSError:
            text = ""
        out["lock"] = {"held": held, "pid": pid,
                       "pid_in_file": int(text) if text.isdigit() else None}

    def size(name: str) -> int:
        try:
            return os.stat(os.path.join(path, name)).st_size
        except OSError:
            return -1

    for seq in _numbered(names, _CKPT_RE):
        name = _ckpt_name(seq)
        entry = {"file": name, "seq": seq, "bytes": size(name), "valid": False, "error": None}
        try:
            with open(os.path.join(path, name), "rb") as f:
                cseq, _ = decode_checkpoint(f.read())
            if cseq != seq:
                raise StoreError(f"holds seq {cseq} but its name says {seq}")
            entry["valid"] = True
            out["newest_valid_checkpoint"] = seq
        except (OSError, StoreError) as exc:
            entry["error"] = str(exc)
        out["checkpoints"].append(entry)
    segs = _numbered(names, _SEG_RE)
    for i, first in enumerate(segs):
        name = _seg_name(first)
        try:
            with open(os.path.join(path, name), "rb") as f:
                scan = scan_segment(f.read(), first)
        except OSError as exc:
            out["segments"].append({"file": name, "first_seq": first, "last_seq": None,
                                    "records": None, "bytes": size(name), "good_bytes": None,
                                    "status": "unreadable", "bad_offset": None,
                                    "reason": str(exc)})
            continue
        status = scan.status
        if status == "torn" and i < len(segs) - 1:
            status = "corrupt"  # only the last segment can have been cut by a crash
        n = len(scan.records)
        out["segments"].append({"file": name, "first_seq": first,
                                "last_seq": first + n - 1 if n else None, "records": n,
                                "bytes": scan.size, "good_bytes": scan.good_bytes,
                                "status": status, "bad_offset": scan.bad_offset,
                                "reason": scan.reason})
    known = {LOCK_NAME} | {_ckpt_name(s) for s in _numbered(names, _CKPT_RE)} \
        | {_seg_name(s) for s in segs}
    for name in names:
        if name in known:
            continue
        if _TMP_RE.fullmatch(name):
            out["temporary"].append(name)
        elif _ASIDE_RE.fullmatch(name):
            out["moved_aside"].append({"file": name, "bytes": size(name),
                                       "pending": _is_pending(name)})
        else:
            out["other"].append(name)
    return out
