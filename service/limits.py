"""Request limits: the body size of every request, and a per-key ingest rate.

:class:`BodySizeLimit` refuses a request body over ``max_body_bytes`` with 413,
whether it declares its length or arrives in chunks, before any handler parses it.

:class:`IngestRateLimiter` keeps a token bucket of readings for each API key.

A key may post on average ``rate`` readings per second, and up to ``capacity``
readings at once after a quiet spell. Each batch takes as many tokens as it has
readings (refused readings included: screening them is work too); a batch that
finds too few tokens takes none and is answered 429 with the seconds to wait, so
a client that honours ``Retry-After`` gets through with its batch whole.

The limit protects the service and the database from one runaway client (a bridge
replaying a backlog in a tight loop, a misconfigured script); it is not a quota.
It is off unless the ``ingest_rate_limit`` setting is given. The buckets live in
the process: with several workers each keeps its own, so the limit applies per
worker.
"""

from __future__ import annotations

import json
import math
import threading
import time
from collections.abc import Callable, Hashable
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

__all__ = ["BURST_SECONDS", "BodySizeLimit", "IngestRateLimiter"]

BURST_SECONDS = 10.0
"""A key's bucket holds this many seconds of its rate [s] (and at least one full batch)."""


class IngestRateLimiter:
    """Token buckets of readings, one per API key, safe to share between threads.

    Parameters
    ----------
    rate : float
        Readings per second each key may post on average [1/s]; positive, finite.
    capacity : float
        Most readings a key may post at once [-]: the bucket's size. A bucket
        starts full.
    clock : callable
        Returns the time [s], monotonic; ``time.monotonic`` by default.

    Raises
    ------
    ValueError
        When ``rate`` or ``capacity`` is not a positive finite number.
    """

    def __init__(
        self, rate: float, capacity: float, clock: Callable[[], float] = time.monotonic
    ) -> None:
        if not (math.isfinite(rate) and rate > 0):
            raise ValueError(f"rate must be a positive number of readings per second, got {rate}")
        if not (math.isfinite(capacity) and capacity > 0):
            raise ValueError(f"capacity must be a positive number of readings, got {capacity}")
        self.rate = rate
        self.capacity = capacity
        self._clock = clock
        self._lock = threading.Lock()
        self._buckets: dict[Hashable, tuple[float, float]] = {}  # key -> (tokens, when)

    @classmethod
    def for_batches(cls, rate: float, max_batch: int) -> IngestRateLimiter:
        """Build a limiter whose bucket holds :data:`BURST_SECONDS` of ``rate`` and a full batch.

        Parameters
        ----------
        rate : float
            Readings per second per key [1/s].
        max_batch : int
            Most readings the service takes in one request: a bucket at least this
            big means every batch the service accepts can pass, after a wait.
        """
        return cls(rate, max(rate * BURST_SECONDS, float(max_batch)))

    def take(self, key: Hashable, count: int) -> float:
        """Take ``count`` tokens from ``key``'s bucket if it has them.

        Parameters
        ----------
        key : hashable
            Whose bucket: the API key's id (or name for keys that are not stored).
        count : int
            Readings in the batch.

        Returns
        -------
        float
            0 when the tokens were taken; otherwise the wait until the bucket will
            hold ``count`` tokens [s], and nothing was taken.

        Raises
        ------
        ValueError
            When ``count`` exceeds the bucket's capacity: such a batch could never
            pass (the service refuses it earlier, by ``max_batch``).
        """
        if count > self.capacity:
            raise ValueError(f"a batch of {count} readings exceeds the bucket of {self.capacity:g}")
        now = self._clock()
        with self._lock:
            tokens, when = self._buckets.get(key, (self.capacity, now))
            tokens = min(self.capacity, tokens + (now - when) * self.rate)
            if tokens >= count:
                self._buckets[key] = (tokens - count, now)
                return 0.0
            self._buckets[key] = (tokens, now)
            return (count - tokens) / self.rate


class BodySizeLimit:
    """ASGI middleware: answer 413 to a request whose body exceeds ``max_bytes``.

    A declared ``Content-Length`` over the limit is refused before a byte of the
    body is read. Otherwise the body is read here, counting, and handed on whole
    once complete; a body that grows past the limit is refused when it does. So
    no handler ever parses more than ``max_bytes``, and the answer is the same
    JSON refusal (``{"detail": ...}``) as every other.

    Parameters
    ----------
    app : ASGI application
        The application to protect.
    max_bytes : int
        Largest body accepted [bytes] (the ``max_body_bytes`` setting).
    """

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        if max_bytes < 0:
            raise ValueError(f"max_bytes must be >= 0, got {max_bytes}")
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        """Pass the request on with its whole body, or answer 413 (HTTP only)."""
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = _content_length(scope)
        if declared is not None and declared > self.max_bytes:
            await self._refuse(send)
            return
        chunks: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] != "http.request":  # the client went away
                await self.app(scope, _replay([message], receive), send)
                return
            body = message.get("body", b"")
            size += len(body)
            if size > self.max_bytes:
                await self._refuse(send)
                return
            chunks.append(body)
            if not message.get("more_body", False):
                break
        whole: Message = {"type": "http.request", "body": b"".join(chunks), "more_body": False}
        await self.app(scope, _replay([whole], receive), send)

    async def _refuse(self, send: Send) -> None:
        detail = f"request body larger than max_body_bytes ({self.max_bytes} bytes)"
        payload = json.dumps({"detail": detail}).encode()
        await send(
            {
                "type": "http.response.start",
                "status": 413,
                "headers": [
                    (b"content-type", b"application/json"),
                    (b"content-length", str(len(payload)).encode()),
                    (b"connection", b"close"),
                ],
            }
        )
        await send({"type": "http.response.body", "body": payload})


def _content_length(scope: Scope) -> int | None:
    """Return the request's declared body length [bytes]; None if absent or unreadable."""
    for name, value in scope.get("headers", []):
        if name == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None


def _replay(messages: list[Message], receive: Receive) -> Receive:
    """Make a ``receive`` that hands out ``messages`` first, then the client's own."""
    pending = list(messages)

    async def replayed() -> Any:
        if pending:
            return pending.pop(0)
        return await receive()

    return replayed
