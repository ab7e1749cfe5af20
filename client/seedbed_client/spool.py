"""Where a response body goes while it arrives: memory, or a temporary file beside its target.

A sink counts and hashes what it receives and reports progress. Binary bodies go to files
(`FileSink`): beside the destination for `save`, which renames it once verified, else in the
cache's partial/ folder, from where the verified body is renamed into the cache and mapped.
JSON bodies are collected in memory (`MemorySink`).
"""

from __future__ import annotations

import mmap
import os
import tempfile
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import BinaryIO, Protocol

from seedbed_client.body_address import AddressHasher

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
        self._hash = AddressHasher()
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


# Pieces at least this large are hashed on the helper thread; smaller ones are not worth the
# hand-off.
_BEHIND_MIN = 1 << 16


class _HashBehind:
    """The address of a stream, computed on a helper thread one piece behind the writer: hashlib
    releases the GIL on large updates, so hashing a piece overlaps receiving or writing the
    next. At most one piece is referenced while it is hashed; the pieces must not change."""

    def __init__(self) -> None:
        self._sha = AddressHasher()
        self._pool: ThreadPoolExecutor | None = None
        self._pending: Future[None] | None = None

    def update(self, piece: bytes) -> None:
        self._settle()
        if len(piece) < _BEHIND_MIN:
            self._sha.update(piece)
            return
        if self._pool is None:
            self._pool = ThreadPoolExecutor(1, thread_name_prefix="seedbed-hash")
        self._pending = self._pool.submit(self._sha.update, piece)

    def _settle(self) -> None:
        if self._pending is not None:
            pending, self._pending = self._pending, None
            pending.result()

    def hexdigest(self) -> str:
        self._settle()
        return self._sha.hexdigest()

    def close(self) -> None:
        try:
            self._settle()
        finally:
            if self._pool is not None:
                self._pool.shutdown(wait=True)
                self._pool = None


class FileSink:
    """Writes the body to a temporary file in `directory` (same file system as its target, so
    the finished file can be renamed into place atomically).

    `durable`: close() forces the data to disk. Needed for a file that becomes the caller's
    (save); a spool that is only mapped and then unlinked, or copied into the cache (which
    syncs its own copy), skips it."""

    def __init__(
        self, directory: Path, progress: ProgressHook | None = None, *, durable: bool = True
    ) -> None:
        directory.mkdir(parents=True, exist_ok=True)
        fd, name = tempfile.mkstemp(prefix="incoming-", suffix=".part", dir=directory)
        self.path = Path(name)
        self._file = os.fdopen(fd, "wb")
        self.received = 0
        self.total: int | None = None
        self._hash = _HashBehind()
        self._progress = progress
        self._durable = durable

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
        """Flush (to disk when durable) and close; the file is complete once this returns."""
        if not self._file.closed:
            self._file.flush()
            if self._durable:
                os.fsync(self._file.fileno())
            self._file.close()
        self._hash.close()
        return self.path

    def abandon(self) -> None:
        if not self._file.closed:
            self._file.close()
        self._hash.close()
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


def copy_to_spool(source: Path, directory: Path, *, durable: bool = True) -> FileSink:
    """Copy a file into a new spool file in `directory` (hashing it on the way)."""
    sink = FileSink(directory, durable=durable)
    try:
        with open(source, "rb") as fh:
            while chunk := fh.read(4 * 1024 * 1024):
                sink.write(chunk)
        sink.close()
    except BaseException:
        sink.abandon()
        raise
    return sink
