"""The per-key token bucket."""

from __future__ import annotations

import pytest

from service.ratelimit import RateLimiter


class FakeClock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_burst_then_refill_at_the_rate() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=2.0, burst=3, clock=clock)
    assert [limiter.acquire("k") for _ in range(3)] == [0.0, 0.0, 0.0]
    wait = limiter.acquire("k")
    assert wait == pytest.approx(0.5)  # one token at 2 per second
    clock.now += 0.5
    assert limiter.acquire("k") == 0.0
    assert limiter.acquire("k") > 0.0


def test_keys_have_separate_buckets_and_buckets_cap_at_burst() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=1.0, burst=2, clock=clock)
    assert limiter.acquire("a") == limiter.acquire("a") == 0.0
    assert limiter.acquire("a") > 0.0
    assert limiter.acquire("b") == 0.0
    clock.now += 1000.0
    assert [limiter.acquire("a") for _ in range(2)] == [0.0, 0.0]
    assert limiter.acquire("a") > 0.0


@pytest.mark.parametrize(("wait", "header"), [(0.01, "1"), (1.0, "1"), (1.2, "2")])
def test_retry_after_is_whole_seconds(wait: float, header: str) -> None:
    assert RateLimiter.retry_after(wait) == header
