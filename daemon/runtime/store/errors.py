"""The exceptions of the state folder; every one is a :class:`StoreError`."""

from __future__ import annotations


class StoreError(Exception):
    """Something is wrong with the state folder."""


class LockedError(StoreError):
    """Another open file description holds the folder's lock."""

    def __init__(self, path: str, holder_pid: int | None):
        who = f"process {holder_pid}" if holder_pid is not None else "another process (pid unknown)"
        super().__init__(f"state folder {path} is locked by {who}")
        self.path = path
        self.holder_pid = holder_pid


class CorruptionError(StoreError):
    """A bad record with good ones after it (or missing records) in a WAL segment."""

    def __init__(self, message: str, segment: str, offset: int | None,
                 moved_to: str | None = None):
        super().__init__(message)
        self.segment = segment
        self.offset = offset
        self.moved_to = moved_to


class DurabilityError(StoreError):
    """A write or fsync failed; the caller must stop (the folder refuses further writes)."""
