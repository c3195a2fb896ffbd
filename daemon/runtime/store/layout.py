"""File names inside a state folder: segments, checkpoints, temporary and moved-aside files."""

from __future__ import annotations

import re

_SEG_RE = re.compile(r"wal-(\d{16})\.log")
_CKPT_RE = re.compile(r"checkpoint-(\d{16})\.ckpt")
_TMP_RE = re.compile(r"checkpoint-(\d{16})\.ckpt\.tmp")
_ASIDE_RE = re.compile(r"(?P<base>.+)\.(?P<kind>corrupt|dropped)-(?P<n>\d+)(?P<acc>\.accepted)?")
LOCK_NAME = "LOCK"


def _seg_name(first_seq: int) -> str:
    return f"wal-{first_seq:016d}.log"


def _ckpt_name(seq: int) -> str:
    return f"checkpoint-{seq:016d}.ckpt"


def _numbered(names, pattern: re.Pattern) -> list[int]:
    out = []
    for name in names:
        m = pattern.fullmatch(name)
        if m:
            out.append(int(m.group(1)))
    return sorted(out)


def _is_pending(name: str) -> bool:
    m = _ASIDE_RE.fullmatch(name)
    return bool(m and m["kind"] == "corrupt" and not m["acc"] and _SEG_RE.fullmatch(m["base"]))
