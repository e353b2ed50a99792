"""One token bucket for every rate limit of the live server (OSC replies, web clients)."""

from __future__ import annotations

import time
from typing import Optional


class TokenBucket:
    """``take()`` is true at most ``rate`` times a second on average, ``burst`` at once.

    ``now`` is any monotonic clock in seconds (``time.monotonic()`` when not given;
    the web server passes the event loop's time).
    """

    __slots__ = ("rate", "burst", "tokens", "t")

    def __init__(self, rate: float, burst: float, now: Optional[float] = None):
        self.rate, self.burst = float(rate), float(burst)
        self.tokens = float(burst)
        self.t = time.monotonic() if now is None else now

    def take(self, now: Optional[float] = None) -> bool:
        if now is None:
            now = time.monotonic()
        self.tokens = min(self.burst, self.tokens + (now - self.t) * self.rate)
        self.t = now
        if self.tokens >= 1.0:
            self.tokens -= 1.0
            return True
        return False
