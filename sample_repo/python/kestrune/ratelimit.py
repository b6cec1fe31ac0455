"""Request throttling for the public rider API and the internal dashboards."""

from __future__ import annotations

import functools
import logging
import threading
import time
from collections import defaultdict
from typing import Callable, Dict

log = logging.getLogger(__name__)


class RateLimitExceeded(Exception):
    """Raised when a caller has used up its request allowance."""


class TokenBucket:
    """Classic token bucket: tokens refill at a steady rate up to a fixed capacity."""

    def __init__(self, rate_per_s: float, capacity: int, clock: Callable[[], float] = time.monotonic):
        """Create a full bucket that refills at ``rate_per_s`` tokens per second."""
        self.rate_per_s = rate_per_s
        self.capacity = capacity
        self._tokens = float(capacity)
        self._clock = clock
        self._updated = clock()
        self._lock = threading.Lock()

    def _refill(self) -> None:
        now = self._clock()
        elapsed = now - self._updated
        self._tokens = min(self.capacity, self._tokens + elapsed * self.rate_per_s)
        self._updated = now

    def try_acquire(self, cost: float = 1.0) -> bool:
        """Take tokens for one request if enough are available; return False when the caller must wait."""
        with self._lock:
            self._refill()
            if self._tokens >= cost:
                self._tokens -= cost
                return True
            return False

    @property
    def available(self) -> float:
        """Number of tokens that could be spent right now."""
        with self._lock:
            self._refill()
            return self._tokens


class PerClientLimiter:
    """Keeps a separate token bucket for every API key."""

    def __init__(self, rate_per_s: float = 5.0, capacity: int = 20):
        """Every new API key gets its own bucket with these settings."""
        self._factory = lambda: TokenBucket(rate_per_s, capacity)
        self._buckets: Dict[str, TokenBucket] = defaultdict(self._factory)

    def check(self, client_id: str) -> None:
        """Raise RateLimitExceeded if this API key has sent too many requests recently."""
        if not self._buckets[client_id].try_acquire():
            log.info("throttling client %s", client_id)
            raise RateLimitExceeded(client_id)


def rate_limited(limiter: PerClientLimiter, key_arg: str = "client_id"):
    """Decorator that checks the per-client limiter before running the wrapped handler."""

    def decorate(func):
        """Wrap one handler function."""
        @functools.wraps(func)
        def wrapper(*args, **kwargs):
            """Check the caller's allowance, then call the handler."""
            limiter.check(kwargs.get(key_arg, "anonymous"))
            return func(*args, **kwargs)

        return wrapper

    return decorate


def log_calls(func):
    """Decorator that logs how long each call of the wrapped function took."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        """Time the call and log the duration even if it raises."""
        started = time.perf_counter()
        try:
            return func(*args, **kwargs)
        finally:
            log.debug("%s took %.1f ms", func.__qualname__, (time.perf_counter() - started) * 1000)

    return wrapper
