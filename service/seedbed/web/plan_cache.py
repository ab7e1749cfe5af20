"""A bounded cache of validated plans, keyed by a hash of the request's canonical JSON.

Planning is a pure function of the parsed request (and of the limits, fixed for the life of
an app), so a request equal to one seen before, however it was spelled (key order,
whitespace), reuses that plan and, for POST /v1/plan, its encoded response body. Entries are
evicted least recently used first, by count and by the bytes of their bodies, so the cache
cannot grow past its budget whatever the callers send.

A request that differs from a cached one only in its seed (a sweep, an ensemble) reuses that
plan too: no choice depends on the seed (`seedbed.core.plan.reseeded`), so the cache also keeps
each plan under the key of its request without the seed.
"""

from __future__ import annotations

import hashlib
import json
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

from seedbed.core.plan_types import Plan
from seedbed.core.request.network import seed_problem


@dataclass(frozen=True)
class RequestKeys:
    """Cache keys of one parsed JSON body."""

    whole: str  # the request as sent (canonical JSON: sorted keys, no spaces)
    unseeded: str | None  # the request without its seed; None unless the seed is valid
    size: int  # bytes of the canonical JSON


def _canonical(data: Any) -> bytes:
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()


def request_keys(data: Any) -> RequestKeys:
    """sha256 keys of the request with and without its seed. A canonical JSON text never starts
    with "s" or "u", so the prefixed forms cannot equal the key of any other body."""
    if not isinstance(data, dict) or "seed" not in data or seed_problem(data["seed"]) is not None:
        text = _canonical(data)
        return RequestKeys(hashlib.sha256(text).hexdigest(), None, len(text))
    rest = _canonical({k: v for k, v in data.items() if k != "seed"})
    seed = _canonical(data["seed"])
    whole = hashlib.sha256(b"seed=" + seed + b"\n" + rest).hexdigest()
    unseeded = hashlib.sha256(b"unseeded\n" + rest).hexdigest()
    return RequestKeys(whole, unseeded, len(rest) + len(seed))


@dataclass
class CachedPlan:
    plan: Plan
    # The encoded POST /v1/plan body and its ETag, filled on first use by that route.
    body: bytes | None = None
    etag: str | None = None
    lock: threading.Lock = field(default_factory=threading.Lock, repr=False)


class PlanCache:
    """Thread-safe LRU of CachedPlan; max_entries 0 turns it off."""

    def __init__(self, max_entries: int, max_bytes: int) -> None:
        self.max_entries = max_entries
        self.max_bytes = max_bytes
        self._entries: OrderedDict[str, tuple[CachedPlan, int]] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    def get(self, key: str) -> CachedPlan | None:
        with self._lock:
            found = self._entries.get(key)
            if found is None:
                self.misses += 1
                return None
            self._entries.move_to_end(key)
            self.hits += 1
            return found[0]

    def put(self, key: str, entry: CachedPlan, size: int) -> None:
        """Keep `entry`, charged `size` bytes (its request and response are of that order)."""
        if self.max_entries <= 0 or size > self.max_bytes:
            return
        with self._lock:
            old = self._entries.pop(key, None)
            if old is not None:
                self._bytes -= old[1]
            self._entries[key] = (entry, size)
            self._bytes += size
            while len(self._entries) > self.max_entries or self._bytes > self.max_bytes:
                _, (_, dropped) = self._entries.popitem(last=False)
                self._bytes -= dropped

    def __len__(self) -> int:
        return len(self._entries)
