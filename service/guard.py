"""Clients that misbehave: per-client rate limits and a cap on concurrent decodes.

- **Rate limits.** Each client (its address) has a token bucket per kind of request: `uploads`
  (POST /v1/search and /v1/check, which decode images) and `writes` (verdicts, keeper choices). A bucket
  holds `rate` tokens, refilled at `rate` a minute; a request takes one. An empty bucket answers 429 with
  `Retry-After`, the whole seconds until a token is back. Reads are not limited: they cost little and the
  page makes many. The token bucket is the classic algorithm (common practice, e.g. RFC 2697's
  single-rate meter works the same way).
- **Concurrent decodes.** At most `max_decodes` requests decode uploads at once, so that many 50-megapixel
  uploads cannot hold many full-size images in memory together. A request that waits longer than
  `decode_wait_s` for its turn gets 503 with `Retry-After`.

Slow clients are waitress's job: it reads a request whole before a worker thread sees it, and closes a
connection idle for `client_timeout_s` (its channel_timeout), so a slow sender holds no thread.
"""

from __future__ import annotations

import math
import threading
import time
from contextlib import contextmanager
from typing import Iterator

from nearsight.indexer.core.errors import BusyError, TooManyRequestsError

UPLOAD_ENDPOINTS = frozenset({"api.search", "api.check"})  # the writes are app.WRITE_ENDPOINTS
MAX_CLIENTS = 10_000  # buckets kept; the least recently seen are dropped past it


class RateLimiter:
    """Token buckets per (client, kind), `per_minute` tokens each, refilled continuously."""

    def __init__(self, per_minute: dict[str, int], clock=time.monotonic):
        self.per_minute = dict(per_minute)
        self.clock = clock
        self._buckets: dict[tuple[str, str], tuple[float, float]] = {}  # -> (tokens, last refill)
        self._lock = threading.Lock()

    def take(self, client: str, kind: str) -> None:
        """Take one token, or raise TooManyRequestsError with the seconds until one is back."""
        rate = self.per_minute.get(kind, 0)
        if rate <= 0:  # 0: no limit
            return
        now = self.clock()
        with self._lock:
            tokens, last = self._buckets.pop((client, kind), (float(rate), now))
            tokens = min(float(rate), tokens + (now - last) * rate / 60.0)
            if tokens < 1.0:
                self._buckets[(client, kind)] = (tokens, now)
                wait = math.ceil((1.0 - tokens) * 60.0 / rate)
                raise TooManyRequestsError(
                    f"too many {kind} from this client: at most {rate} a minute; try again in {wait} s", wait)
            self._buckets[(client, kind)] = (tokens - 1.0, now)  # re-inserted last: most recently seen
            while len(self._buckets) > MAX_CLIENTS:
                self._buckets.pop(next(iter(self._buckets)))


class DecodeGate:
    """At most `limit` holders at once; a caller waits up to `wait_s` for a place."""

    def __init__(self, limit: int, wait_s: float):
        self.limit, self.wait_s = max(1, int(limit)), float(wait_s)
        self._places = threading.BoundedSemaphore(self.limit)

    @contextmanager
    def place(self) -> Iterator[None]:
        if not self._places.acquire(timeout=self.wait_s):
            raise BusyError(f"this server is decoding {self.limit} uploads already; try again shortly",
                            max(1, math.ceil(self.wait_s)))
        try:
            yield
        finally:
            self._places.release()
