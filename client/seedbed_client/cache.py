"""A local, content-addressed, size-capped store of verified weights responses.

Layout under the cache directory:

    v2/by-content/<address of the body>  a response body exactly as received (shared by keys
                                         whose bodies are identical); the address is
                                         seedbed_client.body_address's (p16-..., or the plain
                                         sha256 for bodies stored by earlier clients)
    v2/by-request/<key>.json             which body answers a request key, its ETag, format
                                         and labels (a recipe's service, name and version);
                                         the file's modification time is its last use
    v2/partial/                          bodies being written; renamed into by-content/ when
                                         complete

A cache written by earlier clients (`v1/`, whose folders were named otherwise) is moved into
this layout the first time a client opens it: its folders are renamed, nothing is copied.

The key is the SHA-256 of the canonical request JSON plus the format and tensor/rows selection
(`wire.WeightsCall.cache_key`). Every write is a temporary file renamed into place, the blob
before its entry: a crash leaves at most an orphan blob, never an entry pointing at half a
body. Orphans and stale temporary files are removed by the next eviction.

Reading never trusts the disk: the caller checks the blob against its address (and the body's
structure against its manifest) before using an entry, and discards it when it fails.
"""

from __future__ import annotations

import contextlib
import json
import os
import platform
import shutil
import tempfile
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from seedbed_client.environment import ENV_CACHE_DIR, ENV_CACHE_MAX_BYTES, environment

__all__ = [
    "WeightCache",
    "default_cache_dir",
]

DEFAULT_MAX_BYTES = 2 * 1024**3
# Files that nothing references are removed only after this long, so a store running in another
# process (blob renamed, entry not yet written) is never undercut.
ORPHAN_GRACE_S = 600.0


def default_cache_dir(env: Mapping[str, str] | None = None) -> Path:
    """SEEDBED_CACHE_DIR, else the platform's per-user cache directory + seedbed."""
    environ = environment(env)
    explicit = environ.get(ENV_CACHE_DIR)
    if explicit:
        return Path(explicit).expanduser()
    system = platform.system()
    if system == "Darwin":
        return Path.home() / "Library" / "Caches" / "seedbed"
    if system == "Windows":
        base = environ.get("LOCALAPPDATA")
        root = Path(base) if base else Path.home() / "AppData" / "Local"
        return root / "seedbed" / "Cache"
    xdg = environ.get("XDG_CACHE_HOME")
    root = Path(xdg).expanduser() if xdg and Path(xdg).is_absolute() else Path.home() / ".cache"
    return root / "seedbed"


def default_max_bytes(env: Mapping[str, str] | None = None) -> int:
    environ = environment(env)
    text = environ.get(ENV_CACHE_MAX_BYTES)
    if text is None or not text.strip():
        return DEFAULT_MAX_BYTES
    try:
        value = int(text.replace("_", ""))
    except ValueError:
        value = -1
    if value < 0:
        raise ValueError(f"{ENV_CACHE_MAX_BYTES}={text!r}: allowed: a whole number of bytes >= 0")
    return value


@dataclass(frozen=True)
class CacheEntry:
    key: str
    blob: str  # the body's address (body_address) = the blob's file name
    format: str
    etag: str | None
    size: int
    entry_path: Path
    blob_path: Path
    labels: Mapping[str, Any] | None = None


class WeightCache:
    """The on-disk store. Safe to share between processes: every change is an atomic rename."""

    def __init__(self, directory: Path | str, max_bytes: int = DEFAULT_MAX_BYTES) -> None:
        if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 0:
            raise ValueError(f"cache_max_bytes must be a whole number >= 0, got {max_bytes!r}")
        self.directory = Path(directory).expanduser()
        self.max_bytes = max_bytes
        root = self.directory / "v2"
        self._blobs = root / "by-content"
        self._entries = root / "by-request"
        self._tmp = root / "partial"
        self._migrate_v1(root)

    def _migrate_v1(self, root: Path) -> None:
        """Adopt a v1 cache by renaming its folders (entries name bodies the same way)."""
        old = self.directory / "v1"
        if root.exists() or not old.is_dir():
            return
        # Another process may be migrating too: whoever renames first wins, the rest find v2.
        with contextlib.suppress(OSError):
            root.mkdir(parents=True, exist_ok=True)
            for before, after in (("blobs", self._blobs), ("entries", self._entries)):
                if (old / before).is_dir() and not after.exists():
                    os.replace(old / before, after)
            shutil.rmtree(old, ignore_errors=True)

    # --- reading -------------------------------------------------------------------------------

    def lookup(self, key: str) -> CacheEntry | None:
        path = self._entries / f"{key}.json"
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
            blob = str(doc["content"] if "content" in doc else doc["blob"])
            labels = doc.get("labels")
            entry = CacheEntry(
                key=key,
                blob=blob,
                format=str(doc["format"]),
                etag=doc.get("etag"),
                size=int(doc["size"]),
                entry_path=path,
                blob_path=self._blobs / blob,
                labels=labels if isinstance(labels, dict) else None,
            )
        except FileNotFoundError:
            return None
        except (OSError, ValueError, KeyError, TypeError):
            # An unreadable entry is as good as none; remove it so it is not read again.
            path.unlink(missing_ok=True)
            return None
        if not entry.blob_path.is_file():
            path.unlink(missing_ok=True)
            return None
        return entry

    def touch(self, entry: CacheEntry, etag: str | None = None) -> None:
        """Mark an entry used now (LRU order); record a new ETag if the service sent one."""
        if etag is not None and etag != entry.etag:
            self._write_entry(entry.key, entry.blob, entry.format, etag, entry.size, entry.labels)
            return
        # A read-only or vanished entry only loses its place in the LRU order.
        with contextlib.suppress(OSError):
            os.utime(entry.entry_path)

    def discard(self, entry: CacheEntry) -> None:
        entry.entry_path.unlink(missing_ok=True)
        if not self._referenced(entry.blob):
            _remove(entry.blob_path)

    # --- writing -------------------------------------------------------------------------------

    def store(
        self,
        key: str,
        body: Path | bytes | bytearray,
        digest: str,
        fmt: str,
        etag: str | None,
        *,
        labels: Mapping[str, Any] | None = None,
        move: bool = False,
    ) -> CacheEntry | None:
        """Keep a verified body (in memory, or a file that is copied) under `key`.

        `digest` is the body's address (body_address), its name in by-content/. With `move`, a
        file on the same file system is renamed in instead of copied. Returns None when the body
        alone is larger than the cap (nothing is stored then).
        """
        size = body.stat().st_size if isinstance(body, Path) else len(body)
        if size > self.max_bytes:
            return None
        target = self._blobs / digest
        if move and isinstance(body, Path) and not target.is_file():
            target.parent.mkdir(parents=True, exist_ok=True)
            with contextlib.suppress(OSError):  # another file system: copy below instead
                os.replace(body, target)
        if not target.is_file():  # an identical body may be stored already under another key
            self._tmp.mkdir(parents=True, exist_ok=True)
            target.parent.mkdir(parents=True, exist_ok=True)
            fd, name = tempfile.mkstemp(prefix="blob-", suffix=".part", dir=self._tmp)
            try:
                with os.fdopen(fd, "wb") as out:
                    if isinstance(body, Path):
                        with open(body, "rb") as src:
                            shutil.copyfileobj(src, out, 1024 * 1024)
                    else:
                        out.write(body)
                    out.flush()
                    os.fsync(out.fileno())
                os.replace(name, target)
            except BaseException:
                Path(name).unlink(missing_ok=True)
                raise
        self._write_entry(key, digest, fmt, etag, size, labels)
        self.evict(keep=key)
        return self.lookup(key)

    def partial_dir(self) -> Path:
        """Where downloads bound for this cache are written (same file system as by-content/)."""
        self._tmp.mkdir(parents=True, exist_ok=True)
        return self._tmp

    def newest_labelled(self, **labels: Any) -> CacheEntry | None:
        """The entry with these labels and the highest `version` label (recipes offline)."""
        best: CacheEntry | None = None
        for _, path, _ in self._all_entries():
            entry = self.lookup(path.name.removesuffix(".json"))
            got = entry.labels if entry is not None else None
            if entry is None or got is None or any(got.get(k) != v for k, v in labels.items()):
                continue
            version = got.get("version")
            if not isinstance(version, int):
                continue
            if best is None or version > int((best.labels or {}).get("version", 0)):
                best = entry
        return best

    def _write_entry(
        self,
        key: str,
        blob: str,
        fmt: str,
        etag: str | None,
        size: int,
        labels: Mapping[str, Any] | None = None,
    ) -> None:
        self._entries.mkdir(parents=True, exist_ok=True)
        doc: dict[str, Any] = {"content": blob, "etag": etag, "format": fmt, "size": size}
        if labels:
            doc["labels"] = dict(labels)
        fd, name = tempfile.mkstemp(prefix="entry-", suffix=".tmp", dir=self._entries)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                json.dump(doc, fh, sort_keys=True)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(name, self._entries / f"{key}.json")
        except BaseException:
            Path(name).unlink(missing_ok=True)
            raise

    # --- size cap ------------------------------------------------------------------------------

    def _all_entries(self) -> list[tuple[float, Path, str]]:
        out = []
        for path in self._entries.glob("*.json"):
            try:
                doc = json.loads(path.read_text(encoding="utf-8"))
                blob = str(doc["content"] if "content" in doc else doc["blob"])
                out.append((path.stat().st_mtime, path, blob))
            except (OSError, ValueError, KeyError, TypeError):
                path.unlink(missing_ok=True)
        return out

    def _referenced(self, blob: str) -> bool:
        return any(b == blob for _, _, b in self._all_entries())

    def evict(self, keep: str | None = None) -> None:
        """Drop least recently used entries until the blobs fit the cap; clear old leftovers."""
        now = time.time()
        entries = sorted(self._all_entries())  # oldest use first
        referenced = {blob for _, _, blob in entries}
        for folder in (self._blobs, self._tmp):
            for path in folder.glob("*") if folder.is_dir() else ():
                if path.name not in referenced and _age(path, now) > ORPHAN_GRACE_S:
                    _remove(path)
        sizes = {}
        for _, _, blob in entries:
            try:
                sizes[blob] = (self._blobs / blob).stat().st_size
            except OSError:
                sizes[blob] = 0
        total = sum(sizes.values())
        users: dict[str, int] = {}
        for _, _, blob in entries:
            users[blob] = users.get(blob, 0) + 1
        for _, path, blob in entries:
            if total <= self.max_bytes:
                break
            if keep is not None and path.name == f"{keep}.json":
                continue
            path.unlink(missing_ok=True)
            users[blob] -= 1
            if users[blob] == 0:
                _remove(self._blobs / blob)
                total -= sizes[blob]

    def size_bytes(self) -> int:
        """Bytes held in by-content/ now."""
        if not self._blobs.is_dir():
            return 0
        return sum(p.stat().st_size for p in self._blobs.glob("*") if p.is_file())


def _remove(path: Path) -> None:
    """Unlink a body. Where an open file cannot be unlinked (Windows: arrays may map a cached
    body), it stays as an orphan and a later eviction removes it."""
    with contextlib.suppress(OSError):
        path.unlink(missing_ok=True)


def _age(path: Path, now: float) -> float:
    try:
        return now - path.stat().st_mtime
    except OSError:
        return 0.0
