"""The file system calls that change a state folder, in one class a test can replace."""

from __future__ import annotations

import os


class OsFs:
    """The file system calls that change the folder; tests pass a subclass that fails on cue."""

    def open(self, path: str, flags: int, mode: int = 0o600) -> int:
        return os.open(path, flags, mode)

    def write(self, fd: int, data) -> int:
        return os.write(fd, data)

    def fsync(self, fd: int) -> None:
        os.fsync(fd)

    def close(self, fd: int) -> None:
        os.close(fd)

    def truncate(self, fd: int, length: int) -> None:
        os.ftruncate(fd, length)

    def rename(self, src: str, dst: str) -> None:
        os.rename(src, dst)

    def unlink(self, path: str) -> None:
        os.unlink(path)

    def mkdir(self, path: str, mode: int) -> None:
        os.mkdir(path, mode)
