"""The locked state folder: WAL appends, group commit, checkpoints, retention and recovery."""

from __future__ import annotations

import ctypes
import errno
import fcntl
import gc
import math
import os
import signal
import stat
import time
from collections.abc import Callable
from dataclasses import dataclass

from daemon.runtime.store.errors import CorruptionError, DurabilityError, LockedError, StoreError
from daemon.runtime.store.fs import OsFs
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
from daemon.runtime.store.records import (
    checkpoint_seq,
    decode_checkpoint,
    encode_checkpoint,
    encode_record,
    scan_segment,
)

DEFAULT_SEGMENT_BYTES = 16 * 1024 * 1024
POLICIES = ("refuse", "checkpoint")
FSYNC_MODES = ("group", "always")


@dataclass(frozen=True)
class Recovery:
    """What :meth:`StateDir.recover` found.

    ``records`` are the WAL records after ``checkpoint_seq`` in sequence order, each with its
    ``"seq"``. ``corrupt_segments`` names the files moved aside by this recovery (current
    names). ``dropped_after_seq`` is set when policy ``"checkpoint"`` dropped records: every
    record after it that the folder held is gone.
    """

    checkpoint: dict | None
    checkpoint_seq: int
    records: list
    torn_tail: bool
    truncated_bytes: int
    corrupt_segments: tuple[str, ...]
    fallback_checkpoint: bool
    notes: tuple[str, ...]
    dropped_after_seq: int | None = None


class StateDir:
    """A locked state folder: WAL appends, checkpoints and recovery.

    Life cycle: ``open()`` -> ``recover()`` -> ``append()`` / ``checkpoint()`` /
    ``maybe_sync()`` ... -> ``close()``. Also a context manager (open on enter, close on exit).
    """

    def __init__(self, path, *, fsync: str = "group", group_ms: float = 50,
                 segment_bytes: int = DEFAULT_SEGMENT_BYTES, fs: OsFs | None = None):
        if fsync not in FSYNC_MODES:
            raise ValueError(f"fsync must be one of {FSYNC_MODES}, got {fsync!r}")
        if (isinstance(group_ms, bool) or not isinstance(group_ms, int | float)
                or not math.isfinite(group_ms) or group_ms < 0):
            raise ValueError(f"group_ms must be a finite number >= 0, got {group_ms!r}")
        if isinstance(segment_bytes, bool) or not isinstance(segment_bytes, int) \
                or segment_bytes < 1:
            raise ValueError(f"segment_bytes must be an integer >= 1, got {segment_bytes!r}")
        self.path = os.path.abspath(os.fspath(path))
        self.fsync_mode = fsync
        self.group_ms = float(group_ms)
        self.segment_bytes = segment_bytes
        self._fs = fs if fs is not None else OsFs()
        self._lock_fd: int | None = None
        self._recovered = False
        self._failed: str | None = None
        self._seg_fd: int | None = None
        self._seg_size = 0
        self._next_seq = 1
        self._chain: list[int] = []  # seqs of the valid checkpoints kept: [previous,] newest
        self._pending = 0
        self._last_sync: float | None = None
        # WAL bytes appended since the newest checkpoint (written or being written) began
        self._wal_bytes = 0
        self._bg: _Background | None = None  # the checkpoint being written by a child process
        self.notes: list[str] = []

    # ------------------------------------------------------------------ properties
    @property
    def pending(self) -> int:
        """Records written but not yet fsynced."""
        return self._pending

    @property
    def last_seq(self) -> int:
        """Sequence number of the last record (or of the checkpoint, when it is newer)."""
        return self._next_seq - 1

    @property
    def wal_bytes(self) -> int:
        """WAL bytes appended since the newest checkpoint (durable or in the making) began."""
        return self._wal_bytes

    @property
    def checkpoint_running(self) -> bool:
        """Whether a background checkpoint (:meth:`begin_checkpoint`) is being written."""
        return self._bg is not None

    @property
    def failed(self) -> str | None:
        """Why the folder refuses writes, or None."""
        return self._failed

    def _p(self, name: str) -> str:
        return os.path.join(self.path, name)

    # ------------------------------------------------------------------ open / close
    def open(self) -> list[str]:
        """Create (0700) and lock the folder; returns notes about its permissions."""
        if self._lock_fd is not None:
            raise StoreError(f"state folder {self.path} is already open")
        notes: list[str] = []
        if not os.path.lexists(self.path):
            parent = os.path.dirname(self.path)
            try:
                os.makedirs(parent, exist_ok=True)
                self._fs.mkdir(self.path, 0o700)
                os.chmod(self.path, 0o700)  # the umask may have taken bits away
            except OSError as exc:
                raise StoreError(f"cannot create state folder {self.path}: {exc}") from exc
            notes.append(f"created state folder {self.path}")
        try:
            st = os.stat(self.path)
        except OSError as exc:
            raise StoreError(f"cannot stat state folder {self.path}: {exc}") from exc
        if not stat.S_ISDIR(st.st_mode):
            raise StoreError(f"state path {self.path} is not a directory")
        mode = stat.S_IMODE(st.st_mode)
        if mode & 0o022:
            raise StoreError(
                f"refusing state folder {self.path}: mode {mode:04o} lets group or others "
                f"write to it; run 'chmod 700 {self.path}'")
        if mode & 0o055:
            notes.append(f"state folder {self.path} is readable by group or others "
                         f"(mode {mode:04o}); 'chmod 700' is recommended")
        if st.st_uid != os.geteuid():
            notes.append(f"state folder {self.path} is owned by uid {st.st_uid}, "
                         f"not by this process (uid {os.geteuid()})")
        lock_path = self._p(LOCK_NAME)
        try:
            fd = self._fs.open(lock_path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
        except OSError as exc:
            raise StoreError(f"cannot open lock file {lock_path}: {exc}") from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            pid = _read_pid(fd)
            os.close(fd)
            if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN):
                raise LockedError(self.path, pid) from None
            raise StoreError(f"cannot lock {lock_path}: {exc}") from exc
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        except OSError as exc:
            # the pid is for people reading LockedError; the flock itself is what excludes
            notes.append(f"could not write the pid into {lock_path}: {exc}")
        self._lock_fd = fd
        self._recovered = False
        self._failed = None
        self.notes = notes
        return notes

    def close(self) -> None:
        """Fsync what is pending and release the lock (idempotent)."""
        if self._lock_fd is None:
            return
        try:
            if self._bg is not None:
                self.wait_checkpoint()
        except DurabilityError:
            pass  # the folder refuses writes from now on; what is pending goes to the WAL
        try:
            if self._failed is None and self._pending:
                self.sync()
        finally:
            if self._seg_fd is not None:
                try:
                    self._fs.close(self._seg_fd)
                except OSError:
                    pass  # already synced or already failed; nothing left to protect
                self._seg_fd = None
            os.close(self._lock_fd)  # releases the flock
            self._lock_fd = None
            self._recovered = False
            self._pending = 0

    def __enter__(self) -> StateDir:
        self.open()
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------------ helpers
    def _require_open(self) -> None:
        if self._lock_fd is None:
            raise StoreError(f"state folder {self.path} is not open")

    def _require_writable(self) -> None:
        self._require_open()
        if self._failed is not None:
            raise DurabilityError(f"state folder {self.path} refuses writes after an earlier "
                                  f"failure: {self._failed}")
        if not self._recovered:
            raise StoreError("recover() must run before writing")

    def _fail(self, what: str, exc: OSError) -> DurabilityError:
        self._failed = f"{what}: {exc}"
        return DurabilityError(f"{what} failed in {self.path}: {exc}; the state folder refuses "
                               f"further writes")

    def _write_all(self, fd: int, data: bytes) -> None:
        view = memoryview(data)
        while view:
            k = self._fs.write(fd, view)
            if k <= 0:
                raise OSError(errno.ENOSPC, "write wrote nothing")
            view = view[k:]

    def _fsync_dir(self) -> None:
        fd = self._fs.open(self.path, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
        try:
            self._fs.fsync(fd)
        finally:
            self._fs.close(fd)

    def _listdir(self) -> set[str]:
        try:
            return set(os.listdir(self.path))
        except OSError as exc:
            raise StoreError(f"cannot list state folder {self.path}: {exc}") from exc

    def _read(self, name: str) -> bytes:
        with open(self._p(name), "rb") as f:
            return f.read()

    def _move_aside(self, name: str, kind: str, names: set[str], accepted: bool = False) -> str:
        used = [int(m["n"]) for m in map(_ASIDE_RE.fullmatch, names) if m]
        new = f"{name}.{kind}-{max(used, default=0) + 1}" + (".accepted" if accepted else "")
        try:
            self._fs.rename(self._p(name), self._p(new))
        except OSError as exc:
            raise self._fail(f"moving {name} aside", exc) from exc
        names.discard(name)
        names.add(new)
        return new

    # ------------------------------------------------------------------ recovery
    def recover(self, policy: str = "refuse") -> Recovery:
        """Load the newest valid checkpoint and the WAL records after it.

        See the :mod:`daemon.runtime.store` docstring for the torn-tail, corruption and fallback
        rules.
        """
        self._require_open()
        if policy not in POLICIES:
            raise ValueError(f"policy must be one of {POLICIES}, got {policy!r}")
        if self._recovered:
            raise StoreError("recover() already ran since open()")
        if self._failed is not None:
            raise DurabilityError(f"state folder {self.path} refuses work after an earlier "
                                  f"failure: {self._failed}")
        if self._seg_fd is not None:  # left by a recovery that raised
            self._fs.close(self._seg_fd)
            self._seg_fd = None
        notes: list[str] = []
        names = self._listdir()
        changed = False

        pending = sorted(n for n in names if _is_pending(n))
        if pending and policy == "refuse":
            base = _ASIDE_RE.fullmatch(pending[0])["base"]
            first = int(_SEG_RE.fullmatch(base).group(1))
            raise CorruptionError(
                f"WAL segment {base} was found corrupt earlier and moved aside to {pending[0]}; "
                f"records from seq {first} on are missing. Recover with policy 'checkpoint' to "
                f"accept the loss, or repair the segment and rename it back",
                segment=base, offset=None, moved_to=pending[0])

        for name in sorted(names):
            if _TMP_RE.fullmatch(name):
                try:
                    self._fs.unlink(self._p(name))
                except OSError as exc:
                    raise self._fail(f"removing {name}", exc) from exc
                names.discard(name)
                notes.append(f"removed unfinished checkpoint {name}")
                changed = True

        # -------------------------------------------------------------- checkpoint
        checkpoint, ckpt_seq, fallback = None, 0, False
        valid: list[int] = []  # the chosen checkpoint and the valid one before it
        for seq in reversed(_numbered(names, _CKPT_RE)):
            name = _ckpt_name(seq)
            try:
                data = self._read(name)
            except OSError as exc:
                notes.append(f"checkpoint {name} cannot be read ({exc}); skipped")
                fallback = fallback or not valid
                continue
            try:
                # the fallback's body is not used: its framing and CRC are checked, not decoded
                if valid:
                    cseq, body = checkpoint_seq(data), None
                else:
                    cseq, body = decode_checkpoint(data)
                if cseq != seq:
                    raise StoreError(f"it holds seq {cseq} but its name says {seq}")
            except StoreError as exc:
                moved = self._move_aside(name, "corrupt", names)
                notes.append(f"checkpoint {name} is damaged ({exc}); moved aside to {moved}")
                fallback = fallback or not valid
                changed = True
                continue
            if not valid:
                checkpoint, ckpt_seq = body, seq
            valid.insert(0, seq)
            if len(valid) == 2:
                break
        if fallback:
            notes.append(f"fell back to checkpoint {_ckpt_name(ckpt_seq)}" if checkpoint
                         is not None else "no usable checkpoint: recovering from the WAL alone")
        # the previous valid checkpoint stays the fallback if the next one replaces the newest
        self._chain = valid

        # -------------------------------------------------------------- WAL
        segs = _numbered(names, _SEG_RE)
        expected = ckpt_seq + 1
        records: list = []
        torn, truncated = False, 0
        moved_aside: list[str] = []
        dropped_after: int | None = None
        tail: tuple[int, int, int] | None = None  # first seq, record count, bytes of last seg
        for i, first in enumerate(segs):
            name = _seg_name(first)
            is_last = i == len(segs) - 1
            if not is_last and segs[i + 1] - 1 < expected:
                continue  # every record in it is covered already
            problem: tuple[int, str] | None = None
            if first > expected:
                problem = (0, f"records {expected}..{first - 1} are missing before it")
            else:
                try:
                    data = self._read(name)
                except OSError as exc:
                    raise StoreError(f"cannot read WAL segment {name}: {exc}") from exc
                scan = scan_segment(data, first)
                records.extend(r for r in scan.records if r["seq"] >= expected)
                end_seq = first + len(scan.records)
                expected = max(expected, end_seq)
                if scan.status == "torn" and is_last:
                    self._truncate(name, scan.good_bytes)
                    torn, truncated, changed = True, scan.size - scan.good_bytes, True
                    notes.append(f"torn tail in {name} at byte {scan.bad_offset} "
                                 f"({scan.reason}); truncated {truncated} bytes, last good "
                                 f"record is seq {end_seq - 1}")
                elif scan.status != "ok":
                    if (end_seq <= ckpt_seq and not is_last
                            and segs[i + 1] <= ckpt_seq + 1):
                        notes.append(f"{name} is damaged at byte {scan.bad_offset} "
                                     f"({scan.reason}) but the checkpoint covers it")
                        continue
                    problem = (scan.bad_offset, scan.reason)
                if problem is None and is_last:
                    tail = (first, len(scan.records), scan.good_bytes)
            if problem is None:
                continue
            offset, why = problem
            if policy == "refuse":
                moved = self._move_aside(name, "corrupt", names)
                self._sync_dir_or_fail()
                raise CorruptionError(
                    f"WAL segment {name} is corrupt at byte {offset}: {why}; moved aside to "
                    f"{moved}. Recover with policy 'checkpoint' to continue without its records",
                    segment=name, offset=offset, moved_to=moved)
            moved = self._move_aside(name, "corrupt", names, accepted=True)
            moved_aside.append(moved)
            dropped_after = max(ckpt_seq, min(first, expected) - 1)
            records = [r for r in records if r["seq"] <= dropped_after]
            expected = dropped_after + 1
            notes.append(f"WAL segment {name} is corrupt at byte {offset}: {why}; moved aside to "
                         f"{moved}; policy 'checkpoint': records after seq {dropped_after} "
                         f"dropped")
            for later in segs[i + 1:]:
                gone = self._move_aside(_seg_name(later), "dropped", names)
                notes.append(f"WAL segment {_seg_name(later)} dropped with it, moved to {gone}")
            changed = True
            tail = None
            break

        if pending:  # only reached with policy "checkpoint"
            for name in pending:
                new = name + ".accepted"
                try:
                    self._fs.rename(self._p(name), self._p(new))
                except OSError as exc:
                    raise self._fail(f"renaming {name}", exc) from exc
                moved_aside.append(new)
                notes.append(f"accepted the loss of the records in {name} (now {new})")
            if dropped_after is None:
                dropped_after = expected - 1
            changed = True

        # -------------------------------------------------------------- resume
        self._next_seq = expected
        if tail is not None:
            first, count, good = tail
            try:
                if first > ckpt_seq and first + count == expected and good < self.segment_bytes:
                    fd = self._fs.open(self._p(_seg_name(first)),
                                       os.O_WRONLY | os.O_APPEND | os.O_CLOEXEC)
                    self._seg_fd, self._seg_size = fd, good
                    self._fs.fsync(fd)
                elif count:
                    # records read from the page cache after a crash may not be on disk yet
                    fd = self._fs.open(self._p(_seg_name(first)), os.O_RDONLY | os.O_CLOEXEC)
                    try:
                        self._fs.fsync(fd)
                    finally:
                        self._fs.close(fd)
            except OSError as exc:
                raise self._fail(f"syncing {_seg_name(first)}", exc) from exc
        if changed:
            self._sync_dir_or_fail()
        self._recovered = True
        self._pending = 0
        self._last_sync = None
        self._wal_bytes = 0
        return Recovery(checkpoint=checkpoint, checkpoint_seq=ckpt_seq, records=records,
                        torn_tail=torn, truncated_bytes=truncated,
                        corrupt_segments=tuple(moved_aside), fallback_checkpoint=fallback,
                        notes=tuple(notes), dropped_after_seq=dropped_after)

    def _truncate(self, name: str, length: int) -> None:
        try:
            fd = self._fs.open(self._p(name), os.O_WRONLY | os.O_CLOEXEC)
            try:
                self._fs.truncate(fd, length)
                self._fs.fsync(fd)
            finally:
                self._fs.close(fd)
        except OSError as exc:
            raise self._fail(f"truncating {name}", exc) from exc

    def _sync_dir_or_fail(self) -> None:
        try:
            self._fsync_dir()
        except OSError as exc:
            raise self._fail("fsync of the folder", exc) from exc

    # ------------------------------------------------------------------ appending
    def append(self, record: dict) -> int:
        """Write one record; returns its sequence number.

        With ``fsync="always"`` the record is durable on return; with ``"group"`` once
        :meth:`maybe_sync` or :meth:`sync` has run.
        """
        self._require_writable()
        seq = self._next_seq
        frame = encode_record(seq, record)
        if self._seg_fd is not None and self._seg_size > 0 \
                and self._seg_size + len(frame) > self.segment_bytes:
            self._roll()
        if self._seg_fd is None:
            self._new_segment(seq)
        try:
            self._write_all(self._seg_fd, frame)
        except OSError as exc:
            raise self._fail(f"write of record {seq}", exc) from exc
        self._seg_size += len(frame)
        self._wal_bytes += len(frame)
        self._next_seq = seq + 1
        self._pending += 1
        if self.fsync_mode == "always":
            self._fsync_segment()
        return seq

    def _new_segment(self, first_seq: int) -> None:
        name = _seg_name(first_seq)
        flags = os.O_WRONLY | os.O_APPEND | os.O_CLOEXEC
        try:
            try:
                fd = self._fs.open(self._p(name), flags | os.O_CREAT | os.O_EXCL, 0o600)
            except FileExistsError:
                # an empty segment of this name (left by a crash or a truncation to zero)
                # holds nothing and can be used; anything else must not be written over
                if os.stat(self._p(name)).st_size != 0:
                    raise
                fd = self._fs.open(self._p(name), flags)
        except OSError as exc:
            raise self._fail(f"creating {name}", exc) from exc
        self._seg_fd, self._seg_size = fd, 0
        try:
            self._fsync_dir()  # the new name must survive a power loss with its data
        except OSError as exc:
            raise self._fail("fsync of the folder", exc) from exc

    def _fsync_segment(self) -> None:
        if self._seg_fd is None or not self._pending:
            return
        try:
            self._fs.fsync(self._seg_fd)
        except OSError as exc:
            raise self._fail("fsync of the WAL", exc) from exc
        self._pending = 0

    def _roll(self) -> None:
        # a segment is complete on disk before the next one exists, so damage in any segment
        # but the last is corruption, never a torn write
        self._fsync_segment()
        fd, self._seg_fd = self._seg_fd, None
        if fd is not None:
            try:
                self._fs.close(fd)
            except OSError as exc:
                raise self._fail("close of a WAL segment", exc) from exc

    def flush_due(self, now_monotonic: float) -> bool:
        """Whether records are pending and ``group_ms`` has passed since the last fsync."""
        if not self._pending:
            return False
        if self._last_sync is None:
            return True
        return (now_monotonic - self._last_sync) * 1000.0 >= self.group_ms

    def maybe_sync(self, now_monotonic: float | None = None) -> bool:
        """Fsync if :meth:`flush_due`; returns whether it did. Call it from the service loop."""
        now = time.monotonic() if now_monotonic is None else now_monotonic
        if not self.flush_due(now):
            return False
        self.sync(now)
        return True

    def sync(self, now_monotonic: float | None = None) -> None:
        """Fsync pending records now."""
        self._require_open()
        if self._failed is not None:
            raise DurabilityError(f"state folder {self.path} refuses writes after an earlier "
                                  f"failure: {self._failed}")
        if self._pending:
            self._fsync_segment()
            self._last_sync = time.monotonic() if now_monotonic is None else now_monotonic

    # ------------------------------------------------------------------ checkpoints
    def checkpoint(self, body: dict) -> int:
        """Durably write a checkpoint covering every record so far; returns its seq.

        Waits first for a background checkpoint still being written.
        """
        self._require_writable()
        if self._bg is not None:
            self.wait_checkpoint()
        seq = self._next_seq - 1
        data = encode_checkpoint(seq, body)
        self._fsync_segment()  # the fallback path needs the WAL up to here
        try:
            self._write_checkpoint_file(seq, data)
        except OSError as exc:
            raise self._fail(f"writing checkpoint {_ckpt_name(seq)}", exc) from exc
        if self._seg_size:
            self._roll()  # an empty open segment is already named for the next record
        self._wal_bytes = 0
        self._checkpoint_done(seq)
        return seq

    def _write_checkpoint_file(self, seq: int, data: bytes) -> None:
        """Temporary file, fsync, rename over the final name, fsync of the folder."""
        final = _ckpt_name(seq)
        tmp = final + ".tmp"
        try:
            fd = self._fs.open(self._p(tmp), os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_CLOEXEC,
                               0o600)
            try:
                self._write_all(fd, data)
                self._fs.fsync(fd)
            finally:
                self._fs.close(fd)
            self._fs.rename(self._p(tmp), self._p(final))
            self._fsync_dir()
        except OSError:
            try:
                self._fs.unlink(self._p(tmp))
            except OSError:
                pass  # the next recovery removes it
            raise

    def _checkpoint_done(self, seq: int) -> None:
        self._chain = [s for s in self._chain if s != seq][-1:] + [seq]
        self._prune()

    # ------------------------------------------------------------------ background checkpoints
    def begin_checkpoint(self, make_body: Callable[[], dict]) -> int:
        """Start a checkpoint covering every record so far, written by a child process.

        The child is a ``fork()`` of this process at this instant: its memory is the state at
        exactly this WAL position, whatever the caller does next, so ``make_body`` (building
        the body), the encoding, the write and the fsyncs all run there, off the caller's
        thread, while the caller carries on appending records (they go to a new segment).
        The caller's pause is the fork and one WAL fsync. Completion is picked up by
        :meth:`poll_checkpoint` (or :meth:`wait_checkpoint`); until then the previous
        checkpoints and the whole WAL stay, so a crash at any moment recovers as before (a
        half-written ``.tmp`` file is removed by the next recovery). The child holds the
        folder's lock with this process and dies with it (``PR_SET_PDEATHSIG``), so no
        second daemon can open the folder while it writes. Returns the checkpoint's seq.
        """
        self._require_writable()
        if self._bg is not None:
            raise StoreError("a background checkpoint is already being written")
        seq = self._next_seq - 1
        self._fsync_segment()  # the fallback path needs the WAL up to here
        if self._seg_size:
            self._roll()  # records after the fork go to a segment of their own
        r, w = os.pipe()
        parent = os.getpid()
        # stop signals wait (blocked) across the fork: one arriving before the child has
        # dropped the parent's handlers would be swallowed by them; it is delivered, to a
        # default disposition, when the child unblocks
        mask = signal.pthread_sigmask(signal.SIG_BLOCK, _STOP_SIGNALS)
        try:
            pid = os.fork()
            if pid == 0:  # the child: never returns
                os.close(r)
                _child_checkpoint(self, seq, make_body, w, parent, mask)
        finally:
            signal.pthread_sigmask(signal.SIG_SETMASK, mask)
        os.close(w)
        os.set_blocking(r, False)
        self._bg = _Background(pid, seq, r, time.monotonic())
        self._wal_bytes = 0
        return seq

    def poll_checkpoint(self) -> int | None:
        """The seq of a background checkpoint that has just become durable, else None.

        Raises :class:`DurabilityError` (and the folder refuses writes) when the child
        could not write or fsync it; a child that failed otherwise (killed, out of memory)
        is logged in :attr:`notes` and the next checkpoint tries again.
        """
        bg = self._bg
        if bg is None:
            return None
        try:
            done, status = os.waitpid(bg.pid, os.WNOHANG)
        except ChildProcessError:
            done, status = bg.pid, -1  # reaped elsewhere: its outcome is unknown
        if done == 0:
            return None
        return self._reap(status)

    def wait_checkpoint(self) -> int | None:
        """Block until the background checkpoint ends; as :meth:`poll_checkpoint`."""
        bg = self._bg
        if bg is None:
            return None
        try:
            _, status = os.waitpid(bg.pid, 0)
        except ChildProcessError:
            status = -1
        return self._reap(status)

    def _reap(self, status: int) -> int | None:
        bg, self._bg = self._bg, None
        try:
            why = os.read(bg.pipe, 4096).decode("utf-8", "replace")
        except OSError:
            why = ""
        finally:
            os.close(bg.pipe)
        if status == 0:
            self._checkpoint_done(bg.seq)
            return bg.seq
        if why.startswith("io:"):
            self._failed = f"writing checkpoint {_ckpt_name(bg.seq)}: {why[3:]}"
            raise DurabilityError(f"writing checkpoint {_ckpt_name(bg.seq)} failed in "
                                  f"{self.path}: {why[3:]}; the state folder refuses further "
                                  f"writes")
        what = why or (f"killed by signal {-status if status < 0 else os.WTERMSIG(status)}"
                       if status < 0 or os.WIFSIGNALED(status) else f"exit status {status}")
        self.notes.append(f"background checkpoint {bg.seq} failed ({what}); the previous one "
                          f"and the WAL still cover it")
        return None

    def _prune(self) -> None:
        try:
            names = os.listdir(self.path)
        except OSError:
            return  # tidying only; the next checkpoint tries again
        keep = {_ckpt_name(s) for s in self._chain}
        for seq in _numbered(names, _CKPT_RE):
            if _ckpt_name(seq) not in keep:
                self._unlink_quietly(_ckpt_name(seq))
        if len(self._chain) < 2:
            return  # no previous checkpoint to fall back to: keep the whole WAL
        fallback = self._chain[0]
        segs = _numbered(names, _SEG_RE)
        for first, nxt in zip(segs, segs[1:], strict=False):
            if nxt <= fallback + 1:
                self._unlink_quietly(_seg_name(first))

    def _unlink_quietly(self, name: str) -> None:
        try:
            self._fs.unlink(self._p(name))
        except OSError:
            pass  # a leftover is harmless and removed at a later checkpoint


@dataclass
class _Background:
    pid: int
    seq: int
    pipe: int
    started: float


_PR_SET_PDEATHSIG = 1


_STOP_SIGNALS = (signal.SIGTERM, signal.SIGINT, signal.SIGHUP)


def _child_checkpoint(store: StateDir, seq: int, make_body, w: int, parent: int,
                      mask) -> None:
    """The forked child's whole life: build, encode, write, fsync, rename; then ``_exit``.

    Exit status 0 on success; otherwise a line on the pipe (``io:`` for a failed write or
    fsync) and status 1. Nothing here touches the sockets or the logging of the parent.
    """
    code, why = 1, ""
    try:
        gc.disable()  # acyclic garbage only (see the service), and a short life
        # the parent's handlers queue into the parent's loop (through a wake-up socket the
        # child shares): a stop signal to the whole group (systemd's default) must not make
        # the child wake its parent or run on; it dies, its .tmp is dropped at recovery
        try:
            signal.set_wakeup_fd(-1)
        except ValueError:
            pass  # not the main thread: no wake-up fd was set there
        for sig in _STOP_SIGNALS:
            signal.signal(sig, signal.SIG_DFL)
        signal.pthread_sigmask(signal.SIG_SETMASK, mask)  # a pending stop signal ends it here
        try:
            ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, signal.SIGKILL)
        except (OSError, AttributeError):
            pass  # not Linux: a killed daemon's child may finish its file; it is still valid
        if os.getppid() != parent:
            os._exit(1)  # the daemon died before the death signal was armed
        data = encode_checkpoint(seq, make_body())
        try:
            store._write_checkpoint_file(seq, data)
        except OSError as exc:
            why = f"io:{exc}"
        else:
            code = 0
    except BaseException as exc:  # noqa: BLE001 - the child reports and exits, whatever it was
        why = f"{type(exc).__name__}: {str(exc)[:300]}"
    finally:
        try:
            if why:
                os.write(w, why.encode("utf-8", "replace")[:4000])
        finally:
            os._exit(code)


def _read_pid(fd: int) -> int | None:
    try:
        text = os.pread(fd, 64, 0).decode("ascii", "replace").strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None
