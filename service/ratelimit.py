"""Per-key request rate limit: a token bucket per API key, in this process.

Each key holds up to `burst` tokens, refilled at `rate` per second; a request takes one. With
several API processes the effective limit is per process (documented in the README).
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable

__all__ = ["RateLimiter"]


class RateLimiter:
    def __init__(
        self, rate: float, burst: int, clock: Callable[[], float] = time.monotonic
    ) -> None:
        self.rate = rate
        self.burst = burst
        self._clock = clock
        self._buckets: dict[str, tuple[float, float]] = {}
        self._lock = threading.Lock()

    def acquire(self, key: str) -> float:
        """Take a token for `key`: 0.0 when allowed, else the seconds until one is available."""
        now = self._clock()
        with self._lock:
            tokens, last = self._buckets.get(key, (float(self.burst), now))
            tokens = min(float(self.burst), tokens + (now - last) * self.rate)
            if tokens >= 1.0:
                self._buckets[key] = (tokens - 1.0, now)
                return 0.0
            self._buckets[key] = (tokens, now)
            return (1.0 - tokens) / self.rate

    @staticmethod
    def retry_after(wait: float) -> str:
        """Retry-After header value: whole seconds, at least 1."""
        return str(max(1, math.ceil(wait)))
