"""The SHA-256 of every tensor the service has served, remembered per request.

A safetensors body needs every tensor's digest in its header, before its first byte, so a
response without them generates and hashes everything before it can start sending. The bytes
of a request are fixed by its canonical form and the algorithm (the reproducibility contract),
so the digests a safetensors response computed hold for every later response to the same
request, in any format: a repeated fetch streams at once and checks each tensor against the
remembered digest while it goes out (a mismatch ends the body before its last piece, as with a
stored recipe's digests).
Only exact tensors are remembered; bounded by entries and by the number of digests held.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Mapping

from seedbed.web.etag import strong_etag

# Each digest costs about 150 bytes with its name: 64 Ki digests are about 10 MB.
_MAX_DIGESTS = 1 << 16


def digest_key(
    canonical_request: Mapping[str, object],
    algorithm: str,
    tensor: str | None,
    rows: tuple[int, int] | None,
) -> str:
    """What fixes the served bytes: the request, the algorithm and the selection (not the
    format: every format carries the same tensor bytes)."""
    return strong_etag(
        "digests",
        request=canonical_request,
        algorithm=algorithm,
        tensor=tensor,
        rows=None if rows is None else list(rows),
    )


class DigestMemo:
    """Thread-safe LRU of {tensor name: sha256 hex} per digest_key; max_entries 0 turns it off."""

    def __init__(self, max_entries: int, max_digests: int = _MAX_DIGESTS) -> None:
        self.max_entries = max_entries
        self.max_digests = max_digests
        self._entries: OrderedDict[str, dict[str, str]] = OrderedDict()
        self._held = 0
        self._lock = threading.Lock()

    def get(self, key: str) -> dict[str, str] | None:
        with self._lock:
            found = self._entries.get(key)
            if found is not None:
                self._entries.move_to_end(key)
            return found

    def put(self, key: str, digests: Mapping[str, str]) -> None:
        kept = dict(digests)
        if self.max_entries <= 0 or len(kept) > self.max_digests:
            return
        with self._lock:
            old = self._entries.pop(key, None)
            if old is not None:
                self._held -= len(old)
            self._entries[key] = kept
            self._held += len(kept)
            while len(self._entries) > self.max_entries or self._held > self.max_digests:
                _, dropped = self._entries.popitem(last=False)
                self._held -= len(dropped)

    def __len__(self) -> int:
        return len(self._entries)
