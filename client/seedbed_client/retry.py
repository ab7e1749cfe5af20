"""When to try again and how long to wait: exponential backoff with full jitter, bounded.

Every seedbed request is idempotent (the same request always gives the same bytes, and nothing
changes on the server), so any failed attempt may be repeated. Waits follow "full jitter": a
uniform draw from [0, min(max_delay, base_delay * 2**n)] before attempt n+2, which spreads
clients that failed together so they do not retry in lockstep. A Retry-After from the service
(on 429 and 503) replaces the drawn wait. Both the number of attempts and the total time are
capped; a wait that would end past the time budget is not taken.
"""

from __future__ import annotations

import email.utils
import random
import time
from collections.abc import Mapping
from dataclasses import dataclass

__all__ = [
    "RetryPolicy",
]

RETRY_STATUSES = frozenset({429, 500, 502, 503, 504})


@dataclass(frozen=True)
class RetryPolicy:
    """Bounds on retrying: attempts in all, the backoff curve, and a total time budget (s)."""

    attempts: int = 5
    base_delay: float = 0.25
    max_delay: float = 8.0
    total_time: float = 60.0

    def __post_init__(self) -> None:
        if isinstance(self.attempts, bool) or not isinstance(self.attempts, int):
            raise ValueError(f"RetryPolicy.attempts must be an integer, got {self.attempts!r}")
        if self.attempts < 1:
            raise ValueError(f"RetryPolicy.attempts must be at least 1, got {self.attempts}")
        for name in ("base_delay", "max_delay", "total_time"):
            value = getattr(self, name)
            if not isinstance(value, int | float) or not value >= 0:
                raise ValueError(f"RetryPolicy.{name} must be a number >= 0, got {value!r}")

    def backoff(self, failures: int, rng: random.Random) -> float:
        """The wait after `failures` failed attempts (1 for the first): full jitter."""
        ceiling = min(self.max_delay, self.base_delay * (2.0 ** (failures - 1)))
        return rng.uniform(0.0, ceiling)


NO_RETRY = RetryPolicy(attempts=1)


def retry_after_seconds(headers: Mapping[str, str], now: float | None = None) -> float | None:
    """Retry-After as seconds from now: delta-seconds or an HTTP-date (RFC 9110 sec. 10.2.3).

    None when absent or unreadable; a date in the past gives 0.
    """
    value = headers.get("retry-after")
    if value is None:
        return None
    value = value.strip()
    if value.isdigit():
        return float(value)
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when is None:
        return None
    current = time.time() if now is None else now
    return max(0.0, when.timestamp() - current)


@dataclass
class RetryBudget:
    """The state of one request's retries: attempts made and the time they may still use."""

    policy: RetryPolicy
    started: float
    rng: random.Random
    attempts: int = 0

    def next_wait(self, now: float, retry_after: float | None) -> float | None:
        """Seconds to wait before the next attempt, or None when the budget is spent."""
        if self.attempts >= self.policy.attempts:
            return None
        wait = (
            retry_after if retry_after is not None else self.policy.backoff(self.attempts, self.rng)
        )
        if now + wait - self.started > self.policy.total_time:
            return None
        return wait
