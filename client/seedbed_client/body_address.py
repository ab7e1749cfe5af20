"""The name a cached body is stored under: the digest its bytes must hash to on every read.

A body is cut into pieces of 16 MiB; its address is "p16-" and the hex SHA-256 of the pieces'
SHA-256 digests, concatenated in order. Writing it costs one SHA-256 pass, as a plain digest of
the whole body would, but checking it on a read can hash the pieces on several cores at once: a
cache hit is bound by that check. Bodies stored by earlier clients are named by the plain
SHA-256 of the whole body (64 hex digits, no prefix) and are still checked that way.
"""

from __future__ import annotations

import hashlib
import os
from concurrent.futures import ThreadPoolExecutor
from typing import Any

__all__ = ["PIECE_BYTES", "PREFIX", "AddressHasher", "address_of"]

PIECE_BYTES = 16 << 20
PREFIX = "p16-"
# A read uses at most this many threads (hashlib releases the GIL on each piece).
_MAX_THREADS = 4


class AddressHasher:
    """The address of a body fed in parts of any size (the parts need not align to pieces)."""

    def __init__(self) -> None:
        self._piece = hashlib.sha256()
        self._filled = 0
        self._digests: list[bytes] = []

    def update(self, data: Any) -> None:
        with memoryview(data) as whole, whole.cast("B") as view:
            at = 0
            while at < len(view):
                take = min(len(view) - at, PIECE_BYTES - self._filled)
                self._piece.update(view[at : at + take])
                self._filled += take
                at += take
                if self._filled == PIECE_BYTES:
                    self._digests.append(self._piece.digest())
                    self._piece = hashlib.sha256()
                    self._filled = 0

    def hexdigest(self) -> str:
        digests = list(self._digests)
        if self._filled:
            digests.append(self._piece.digest())
        return PREFIX + hashlib.sha256(b"".join(digests)).hexdigest()


def address_of(buffer: Any, like: str, threads: int | None = None) -> str:
    """The address of `buffer` in the scheme `like` is written in: pieces (hashed on up to
    `threads` threads, default the machine's cores, at most four) or the plain SHA-256."""
    with memoryview(buffer) as whole, whole.cast("B") as view:
        if not like.startswith(PREFIX):
            return hashlib.sha256(view).hexdigest()
        starts = range(0, len(view), PIECE_BYTES)
        workers = min(threads or os.cpu_count() or 1, _MAX_THREADS, len(starts))

        def piece(at: int) -> bytes:
            with view[at : at + PIECE_BYTES] as part:
                return hashlib.sha256(part).digest()

        if workers > 1:
            with ThreadPoolExecutor(workers, thread_name_prefix="seedbed-address") as pool:
                digests = list(pool.map(piece, starts))
        else:
            digests = [piece(at) for at in starts]
    return PREFIX + hashlib.sha256(b"".join(digests)).hexdigest()
