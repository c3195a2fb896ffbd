"""Shards: which models a daemon with ``shard = "i/n"`` runs.

A model belongs to shard ``crc32(name) % n``: stable across hosts, Python versions and restarts.
"""

from __future__ import annotations

import re
import zlib

_SHARD_RE = re.compile(r"^\s*(\d+)\s*/\s*(\d+)\s*$")


def parse_shard(text: str) -> tuple[int, int]:
    """``"i/n"`` -> ``(i, n)`` with ``0 <= i < n``."""
    m = _SHARD_RE.match(text) if isinstance(text, str) else None
    if m is None:
        raise ValueError(f'shard must look like "i/n" (e.g. "0/2"), got {text!r}')
    i, n = int(m.group(1)), int(m.group(2))
    if n < 1 or not 0 <= i < n:
        raise ValueError(f"shard i/n needs n >= 1 and 0 <= i < n, got {text!r}")
    return i, n


def shard_of(name: str, n: int) -> int:
    """The shard a model belongs to: CRC-32 of its name modulo ``n`` (stable everywhere)."""
    return zlib.crc32(name.encode("utf-8")) % n


def select(models, shard: tuple[int, int] | None):
    """The models a daemon with ``shard = (i, n)`` runs (all of them for None)."""
    if shard is None:
        return tuple(models)
    i, n = shard
    return tuple(m for m in models if shard_of(m.name, n) == i)
