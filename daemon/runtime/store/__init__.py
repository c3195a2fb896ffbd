"""Durable state folder: a write-ahead log (WAL) of records plus periodic checkpoints.

No service logic lives here: records and checkpoint bodies are dicts of plain data handed in by
the caller and handed back, unchanged, by :meth:`StateDir.recover`. Encoding goes through
:mod:`daemon.runtime.wire` (``wire.pack`` / ``wire.unpack``). Not thread-safe: one loop owns a
:class:`StateDir`.

Folder layout
-------------
::

    LOCK                             flock()ed by the owning process, which writes its pid there
    wal-<first seq>.log              WAL segments (sequence numbers written with 16 digits)
    checkpoint-<seq>.ckpt            checkpoints: the newest and the previous one
    checkpoint-<seq>.ckpt.tmp        a checkpoint being written; removed by the next recovery
    <file>.corrupt-<n>               a file found corrupt and moved aside
    wal-<seq>.log.corrupt-<n>.accepted   a moved-aside segment whose loss was accepted
    wal-<seq>.log.dropped-<n>        a readable segment after a corrupt one, dropped with it

The folder is created with mode 0700 and every file with mode 0600. A folder that group or
others may write to is refused; one they may read is accepted with a note.

Formats (all integers little-endian u32)
----------------------------------------
Record: ``[length][crc32 of payload][payload]`` with
``payload = wire.pack({"seq": n, **record})``; ``"seq"`` is therefore the first key of the
payload map, a property the reader uses to find record starts after damage.

Checkpoint file: ``b"PSDCKPT1" [length][crc32 of payload][payload]`` with
``payload = wire.pack({"seq": n, "body": body})`` and nothing after it. The magic carries the
format version.

Sequence numbers start at 1 and are contiguous. A checkpoint with sequence number ``n``
covers records ``1..n`` (``n`` is the last record appended before it; 0 when there was none).

Durability
----------
``fsync="always"``: :meth:`StateDir.append` returns only after the record is fsynced.
``fsync="group"``: records are written to the file at once (a crash of the process loses
nothing) but fsynced by :meth:`StateDir.maybe_sync`, at most once per ``group_ms``; after a power
loss up to ``group_ms`` worth of records may be missing. A segment is fsynced before the next one
is created, the folder is fsynced after a file is created or renamed, and a checkpoint is made
durable by writing a temporary file, fsyncing it, renaming it over its final name and fsyncing
the folder. :meth:`StateDir.begin_checkpoint` does the same from a ``fork()`` of the caller
(the state at one WAL position, whatever the caller does next): the caller fsyncs the WAL and
starts a new segment, the child builds, encodes, writes, fsyncs and renames, and
:meth:`StateDir.poll_checkpoint` picks up the outcome; the retention rule is applied only then.
Any failed write or fsync raises :class:`DurabilityError` and the
:class:`StateDir` refuses every later write: after a failed fsync the state of the page cache is
unknown, so retrying and carrying on could silently lose records.

Torn tail versus corruption
---------------------------
A record is bad when its header is incomplete, its length is zero or too large, its payload is
incomplete, its CRC does not match, its payload does not decode to a map with an integer
``"seq"``, or its ``"seq"`` is not the next one. When a bad record is found the reader looks for
any later good record in the same segment (a position whose header, CRC and payload are valid
and whose ``"seq"`` is not below the expected one). None found, in the last segment: a torn
tail, as left by a crash in the middle of a write; it is reported and the file is truncated to
the end of the last good record. Otherwise (good records after it, or any bad record in a
segment that is not the last, or a sequence number missing between segments) the segment is
corrupt. With ``fsync="group"`` a power loss can in rare cases leave damage before records that
did reach the disk; that too reads as corruption.

Recovery policies
-----------------
``"refuse"``: a corrupt segment is moved aside (``.corrupt-<n>``) and :class:`CorruptionError`
is raised. As long as such a moved-aside segment is there, every later recovery with
``"refuse"`` raises again, so that a restart cannot silently run on without those records.

``"checkpoint"``: the corrupt segment is moved aside with the ``.accepted`` suffix, the
segments after it are moved aside as ``.dropped-<n>``, and the records from that segment onwards
are dropped: recovery continues from the checkpoint and the intact segments before the corrupt
one. Earlier moved-aside segments still waiting for a decision are accepted as well.
:attr:`Recovery.dropped_after_seq` and the notes say what happened. The records of the corrupt
segment that precede the damage are dropped too: the segment has been moved aside, so keeping
them would leave a hole in the WAL for the next recovery. The caller should write a checkpoint
soon after such a recovery.

Checkpoints: the newest one that reads back intact is used. A corrupt one is moved aside and
the previous one is used instead (:attr:`Recovery.fallback_checkpoint`); one that cannot be read
at all (an ``OSError``) is left in place and skipped.

Retention rule
--------------
After a new checkpoint is durable, every checkpoint file other than it and the previous one is
deleted. A WAL segment is deleted only when all its records are covered by the *previous*
checkpoint, the one recovery falls back to if the newest cannot be read: segment ``i`` is
deleted when a later segment exists and starts at or before ``previous_seq + 1``. With a single
checkpoint (no previous one) no segment is deleted. The last segment is never deleted. Deleting
is tidying only: a file that survives a crash or fails to unlink is removed at a later
checkpoint and is harmless meanwhile. A checkpoint written with no record appended since the
newest one replaces that file (same name); the previous one stays the fallback.
"""

from daemon.runtime.store.errors import CorruptionError, DurabilityError, LockedError, StoreError
from daemon.runtime.store.fs import OsFs
from daemon.runtime.store.inspection import inspect
from daemon.runtime.store.layout import LOCK_NAME as LOCK_NAME
from daemon.runtime.store.records import (
    CHECKPOINT_MAGIC,
    MAX_RECORD_BYTES,
    SegmentScan,
    decode_checkpoint,
    encode_checkpoint,
    encode_record,
    scan_segment,
)
from daemon.runtime.store.statedir import DEFAULT_SEGMENT_BYTES as DEFAULT_SEGMENT_BYTES
from daemon.runtime.store.statedir import FSYNC_MODES as FSYNC_MODES
from daemon.runtime.store.statedir import POLICIES, Recovery, StateDir

__all__ = [
    "CHECKPOINT_MAGIC",
    "MAX_RECORD_BYTES",
    "POLICIES",
    "CorruptionError",
    "DurabilityError",
    "LockedError",
    "OsFs",
    "Recovery",
    "SegmentScan",
    "StateDir",
    "StoreError",
    "decode_checkpoint",
    "encode_checkpoint",
    "encode_record",
    "inspect",
    "scan_segment",
]
