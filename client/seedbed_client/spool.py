"""Where a response body goes while it arrives: memory, or a temporary file beside its target.

A sink counts and hashes what it receives and reports progress. Binary bodies go to files
(`FileSink`): beside the destination for `save`, which renames it once verified, else in the
cache's partial/ folder, from where the verified body is renamed into the cache and mapped.
JSON bodies are collected in memory (`MemorySink`).
"""

from __future__ import annotations

import hashlib
import mmap
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO, Protocol

ProgressHook = Callable[[int, int | None], None]  # (bytes received, total or None)


class BodySink(Protocol):
    received: int

    def begin(self, total: int | None) -> None: ...

    def write(self, chunk: bytes) -> None: ...

    def digest(self) -> str: ...

    def abandon(self) -> None: ...


class MemorySink:
    """Collects the body in a bytearray (arrays built on it are writable)."""

    def __init__(self, progress: ProgressHook | None = None) -> None:
        self.received = 0
        self.total: int | None = None
        self._data = bytearray()
        self._hash = hashlib.sha256()
        self._progress = progress

    def begin(self, total: int | None) -> None:
        self.total = total

    def write(self, chunk: bytes) -> None:
        self._data += chunk
        self._hash.update(chunk)
        self.received += len(chunk)
        if self._progress is not None:
            self._progress(self.received, self.total)

    def digest(self) -> str:
        return self._hash.hexdigest()

    def buffer(self) -> bytearray:
        return self._data

    def abandon(self) -> None:
        self._data = bytearray()


class FileSink:
    """Writes the body to a temporary file in `directory` (same file system as its target, so
    the finished file can be renamed into place atomically)."""

    def __init__(self, directory: Path, progress: ProgressHook | None = None) -> None:
        directory.mkdir(parents=True, exist_ok=True)
        fd, name = tempfile.mkstemp(prefix="incoming-", suffix=".part", dir=directory)
        self.path = Path(name)
        self._file = os.fdopen(fd, "wb")
        self.received = 0
        self.total: int | None = None
        self._hash = hashlib.sha256()
        self._progress = progress

    def begin(self, total: int | None) -> None:
        self.total = total

    def write(self, chunk: bytes) -> None:
        self._file.write(chunk)
        self._hash.update(chunk)
        self.received += len(chunk)
        if self._progress is not None:
            self._progress(self.received, self.total)

    def digest(self) -> str:
        return self._hash.hexdigest()

    def close(self) -> Path:
        """Flush to disk and close; the file is complete once this returns."""
        if not self._file.closed:
            self._file.flush()
            os.fsync(self._file.fileno())
            self._file.close()
        return self.path

    def abandon(self) -> None:
        if not self._file.closed:
            self._file.close()
        self.path.unlink(missing_ok=True)


def map_file(path: Path) -> mmap.mmap | bytes:
    """A read-only view of a file for checking it without reading it into memory."""
    with open(path, "rb") as fh:
        size = os.fstat(fh.fileno()).st_size
        if size == 0:
            return b""
        return mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)


def map_handle(handle: BinaryIO) -> mmap.mmap | bytes:
    """A read-only map of an open file (it stays valid after the file is renamed or unlinked)."""
    size = os.fstat(handle.fileno()).st_size
    if size == 0:
        return b""
    return mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)


def read_file(path: Path) -> bytearray:
    """The whole file in memory, writable: arrays built on it cannot change behind our back
    (a mapping of the file would show later changes to it)."""
    with open(path, "rb") as fh:
        size = os.fstat(fh.fileno()).st_size
        data = bytearray(size)
        view = memoryview(data)
        done = 0
        while done < size:
            n = fh.readinto(view[done:])
            if not n:
                break
            done += n
    return data[:done] if done < size else data


def copy_to_spool(source: Path, directory: Path) -> FileSink:
    """Copy a file into a new spool file in `directory` (hashing it on the way)."""
    sink = FileSink(directory)
    try:
        with open(source, "rb") as fh:
            while chunk := fh.read(1024 * 1024):
                sink.write(chunk)
        sink.close()
    except BaseException:
        sink.abandon()
        raise
    return sink
