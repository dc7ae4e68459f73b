"""The per-key token bucket, driven by a fake clock."""

from __future__ import annotations

import pytest

from service.errors import RateLimited
from service.usecases.callers import Caller, Role
from service.usecases.ratelimit import RateLimiter


class FakeClock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now

    def advance(self, seconds: float) -> None:
        self.now += seconds


def caller(name: str) -> Caller:
    return Caller(key_id=1, name=name, role=Role.READER, groups=frozenset(), collections=None)


def admitted(limiter: RateLimiter, who: Caller, requests: int) -> int:
    count = 0
    for _ in range(requests):
        try:
            limiter.check(who)
        except RateLimited:
            continue
        count += 1
    return count


def test_a_full_bucket_admits_a_burst_then_refuses() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=2.0, burst=5, clock=clock)
    assert admitted(limiter, caller("a"), 8) == 5


def test_the_refusal_says_how_long_to_wait_for_one_token() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=0.25, burst=1, clock=clock)
    limiter.check(caller("a"))
    with pytest.raises(RateLimited) as refused:
        limiter.check(caller("a"))
    assert refused.value.retry_after == 4
    assert refused.value.code == "rate_limited"


def test_retry_after_is_at_least_one_second_for_fast_rates() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=100.0, burst=1, clock=clock)
    limiter.check(caller("a"))
    with pytest.raises(RateLimited) as refused:
        limiter.check(caller("a"))
    assert refused.value.retry_after == 1


def test_tokens_refill_at_the_rate() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=2.0, burst=4, clock=clock)
    who = caller("a")
    assert admitted(limiter, who, 4) == 4
    clock.advance(1.0)
    assert admitted(limiter, who, 4) == 2
    clock.advance(0.49)
    assert admitted(limiter, who, 1) == 0
    clock.advance(0.02)
    assert admitted(limiter, who, 1) == 1


def test_the_bucket_never_holds_more_than_the_burst() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=10.0, burst=3, clock=clock)
    who = caller("a")
    limiter.check(who)
    clock.advance(3600.0)
    assert admitted(limiter, who, 10) == 3


def test_refused_requests_do_not_spend_tokens() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=1.0, burst=1, clock=clock)
    who = caller("a")
    limiter.check(who)
    assert admitted(limiter, who, 50) == 0
    clock.advance(1.0)
    assert admitted(limiter, who, 1) == 1


def test_each_key_has_its_own_bucket() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=1.0, burst=2, clock=clock)
    assert admitted(limiter, caller("a"), 3) == 2
    assert admitted(limiter, caller("b"), 3) == 2


def test_a_rate_of_zero_turns_the_limit_off() -> None:
    clock = FakeClock()
    limiter = RateLimiter(rate=0.0, burst=1, clock=clock)
    assert admitted(limiter, caller("a"), 1000) == 1000
