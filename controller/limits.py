"""The brakes on change: small objects, each one rule, composed by reconcile.

- :func:`step_limit` — per change the request moves at most ×up and at least ×down.
- :class:`Cooldown` — a workload changes at most once per period (pure: reads the
  last change time kept in the policy's status).
- :class:`TokenBucket` — the cluster-wide budget of changes per minute.
- :class:`RolloutSlots` — the cluster-wide number of rollouts in flight.
- :class:`Budget` — the bucket and the slots together; :meth:`Budget.view` gives the
  plain :class:`BudgetView` that ``decide`` reads, :meth:`Budget.spend` takes a change.
- :class:`ExponentialBackoff` — per-key retry delay for failed calls (429/5xx),
  doubling up to a cap, with full jitter drawn from an injected ``random.Random``.

Shaped like client-go's rate limiters (a per-item exponential failure limiter and a
global token bucket), with
the clock injected: every method takes ``now`` (float seconds from any monotonic
origin), nothing reads the time itself.
"""

from __future__ import annotations

import math
import random
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime

__all__ = [
    "step_limit",
    "round_up",
    "Cooldown",
    "TokenBucket",
    "RolloutSlots",
    "Budget",
    "BudgetView",
    "ExponentialBackoff",
]


def round_up(value: float, step: int) -> int:
    """Smallest multiple of ``step`` ≥ ``value``; float noise below 1e-9 is ignored
    (``0.2 × 1000 × 1.15`` is 229.99999999999997 in binary floating point)."""
    return int(math.ceil(value / step - 1e-9)) * step


def step_limit(current_m: int, target_m: int, *, up: float, down: float) -> tuple[int, bool]:
    """Move from ``current_m`` towards ``target_m`` by at most ×up / at least ×down.

    Returns (new request in millicores, whether the limit cut the move short). A cut
    move lands on a multiple of 5m toward ``current`` when that is still a move
    (else on whole millicores), so it never exceeds ×up nor goes below ×down."""
    if current_m <= 0:
        return target_m, False
    hi = current_m * up
    lo = current_m * down
    if target_m > hi + 1e-9:
        value = int(math.floor(hi / 5 + 1e-9)) * 5
        if value <= current_m:
            value = int(math.floor(hi + 1e-9))
        return max(value, current_m), True
    if target_m < lo - 1e-9:
        value = round_up(lo, 5)
        if value >= current_m:
            value = round_up(lo, 1)
        return min(max(value, 1), current_m), True
    return target_m, False


@dataclass(frozen=True)
class Cooldown:
    """At most one change per ``period_s`` per workload."""

    period_s: float

    def remaining(self, last_change: datetime | None, now: datetime) -> float:
        """Seconds until the workload may change again (0.0: it may change now)."""
        if last_change is None or self.period_s <= 0:
            return 0.0
        return max(0.0, self.period_s - (now - last_change).total_seconds())

    def ready(self, last_change: datetime | None, now: datetime) -> bool:
        return self.remaining(last_change, now) == 0.0


class TokenBucket:
    """``rate`` tokens per second, at most ``burst`` saved up; starts full.

    >>> b = TokenBucket(rate=1 / 60, burst=2, now=0.0)
    >>> b.try_take(0.0), b.try_take(0.0), b.try_take(0.0)
    (True, True, False)
    >>> b.delay(0.0)  # seconds until the next token
    60.0
    """

    def __init__(self, *, rate: float, burst: int, now: float) -> None:
        if rate <= 0 or burst < 1:
            raise ValueError("a token bucket needs rate > 0 and burst >= 1")
        self.rate = rate
        self.burst = burst
        self._tokens = float(burst)
        self._at = now

    @classmethod
    def per_minute(cls, changes: float, *, now: float, burst: int | None = None) -> TokenBucket:
        """``changes`` per minute; the burst defaults to one minute's worth (at least 1)."""
        return cls(rate=changes / 60.0, burst=burst if burst is not None else max(1, int(changes)), now=now)

    def _refill(self, now: float) -> None:
        if now > self._at:
            self._tokens = min(float(self.burst), self._tokens + (now - self._at) * self.rate)
            self._at = now

    def available(self, now: float) -> float:
        self._refill(now)
        return self._tokens

    def try_take(self, now: float, n: int = 1) -> bool:
        self._refill(now)
        if self._tokens + 1e-9 >= n:
            self._tokens -= n
            return True
        return False

    def delay(self, now: float, n: int = 1) -> float:
        """Seconds until ``n`` tokens are there (0.0 if they are now)."""
        self._refill(now)
        missing = n - self._tokens
        return 0.0 if missing <= 1e-9 else missing / self.rate


class RolloutSlots:
    """At most ``capacity`` workloads rolling out at once, keyed by workload.

    Level-based: :meth:`sync` sets the holders from what the cluster shows (workloads
    whose rollout has not finished), so a restart forgets nothing it can see."""

    def __init__(self, capacity: int) -> None:
        if capacity < 1:
            raise ValueError("rollout slots need capacity >= 1")
        self.capacity = capacity
        self._held: set[str] = set()

    @property
    def free(self) -> int:
        return max(0, self.capacity - len(self._held))

    def holders(self) -> frozenset[str]:
        return frozenset(self._held)

    def acquire(self, key: str) -> bool:
        """Take a slot for ``key`` (True if it already holds one)."""
        if key in self._held:
            return True
        if len(self._held) >= self.capacity:
            return False
        self._held.add(key)
        return True

    def release(self, key: str) -> None:
        self._held.discard(key)

    def sync(self, rolling: Iterable[str]) -> None:
        """Replace the holders with the workloads observed rolling out."""
        self._held = set(rolling)


@dataclass(frozen=True)
class BudgetView:
    """A snapshot of the global budget, as plain values for ``decide``.
    None means unlimited."""

    changes_left: int | None = None
    rollouts_free: int | None = None

    def refusal(self) -> str | None:
        """Why a change cannot go now, or None if it can."""
        if self.changes_left is not None and self.changes_left < 1:
            return "the cluster-wide budget of changes per minute is spent"
        if self.rollouts_free is not None and self.rollouts_free < 1:
            return "every concurrent-rollout slot is taken"
        return None


class Budget:
    """The token bucket and the rollout slots together (either may be None: unlimited)."""

    def __init__(self, *, bucket: TokenBucket | None = None, slots: RolloutSlots | None = None) -> None:
        self.bucket = bucket
        self.slots = slots

    def view(self, now: float) -> BudgetView:
        return BudgetView(
            changes_left=None if self.bucket is None else int(math.floor(self.bucket.available(now) + 1e-9)),
            rollouts_free=None if self.slots is None else self.slots.free,
        )

    def spend(self, key: str, now: float) -> bool:
        """Take one change for workload ``key``: a token and a rollout slot, or nothing.
        A workload that already holds a slot (its rollout still running) needs only a token."""
        if self.bucket is not None and self.bucket.available(now) + 1e-9 < 1:
            return False
        if self.slots is not None and not self.slots.acquire(key):
            return False
        if self.bucket is not None:
            self.bucket.try_take(now)
        return True


class ExponentialBackoff:
    """Per-key delay after failures: ``base × 2**(failures−1)`` capped at ``cap``, with
    full jitter (a uniform draw in [0, that]) from the injected ``rng``.
    :meth:`forget` on success, like client-go's ItemExponentialFailureRateLimiter."""

    def __init__(self, *, base: float = 0.5, cap: float = 60.0, rng: random.Random) -> None:
        if base <= 0 or cap < base:
            raise ValueError("backoff needs 0 < base <= cap")
        self.base = base
        self.cap = cap
        self.rng = rng
        self._failures: dict[str, int] = {}

    def ceiling(self, key: str) -> float:
        """Upper end of the jitter interval for ``key``'s current failure count
        (0.0 without failures)."""
        n = self._failures.get(key, 0)
        # 2.0**n overflows past n ≈ 1024; the cap has long taken over by 64
        return min(self.cap, self.base * 2.0 ** (min(n, 64) - 1)) if n else 0.0

    def failed(self, key: str) -> float:
        """Count a failure of ``key`` and return the delay before retrying it."""
        self._failures[key] = self._failures.get(key, 0) + 1
        return self.rng.uniform(0.0, self.ceiling(key))

    def failures(self, key: str) -> int:
        return self._failures.get(key, 0)

    def forget(self, key: str) -> None:
        self._failures.pop(key, None)

