"""Alert events posted to webhooks, in the background, never in the ingest path.

A :class:`WebhookSender` posts each alert event it is offered, as a JSON document
(:class:`~service.schemas.AlertEventPublic`), to every configured URL. Each URL has
its own worker thread and bounded queue, so a receiver that is down delays only its
own deliveries:

- :meth:`WebhookSender.offer` never blocks: when a URL's queue is full the event is
  dropped for that URL, with a log line and a count
  (``stagewatch_webhook_events_total{outcome="dropped"}``);
- a delivery that fails (no connection, a timeout, HTTP 408, 429 or 5xx) is tried
  again after an exponential backoff with jitter (0.5 s doubling to at most 60 s,
  each wait drawn between half and all of that), at most 8 tries in all; other
  HTTP errors (a 4xx the receiver means) are not retried;
- events go to a URL in the order they were offered, one at a time.

Receivers should expect an event more than once (a delivery whose answer was lost
is tried again) and may drop repeats by ``train`` and ``sequence``, which identify
an event.

The sender uses the standard library's HTTP client: no dependency of its own.
"""

from __future__ import annotations

import json
import logging
import queue
import random
import threading
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from prometheus_client import CollectorRegistry, Counter

__all__ = ["Post", "WebhookSender", "post_json", "shown"]

log = logging.getLogger("stagewatch.webhooks")

Post = Callable[[str, bytes, float], int]
"""``(url, body, timeout [s]) -> HTTP status``; raises ``OSError`` when no answer came."""

_RETRY_STATUS = frozenset({408, 425, 429})
_USER_AGENT = "stagewatch-webhooks/0.1"


def post_json(url: str, body: bytes, timeout: float) -> int:
    """POST a JSON body and return the HTTP status.

    Parameters
    ----------
    url : str
        An ``http://`` or ``https://`` URL.
    body : bytes
        The JSON document, UTF-8.
    timeout : float
        Longest wait for connecting and for each read [s].

    Returns
    -------
    int
        The answer's status (an error status is returned, not raised).

    Raises
    ------
    OSError
        No answer: refused, unreachable, timed out (``urllib.error.URLError`` and
        ``TimeoutError`` are ``OSError``).
    """
    request = urllib.request.Request(
        url,
        data=body,
        method="POST",
        headers={"Content-Type": "application/json", "User-Agent": _USER_AGENT},
    )
    try:
        with urllib.request.urlopen(request, timeout=timeout) as answer:
            answer.read()
            return int(answer.status)
    except urllib.error.HTTPError as exc:
        exc.close()
        return int(exc.code)


def shown(url: str) -> str:
    """Return a URL fit for a log line: without its query or credentials (they may be secret)."""
    parts = urllib.parse.urlsplit(url)
    host = parts.hostname or ""
    if parts.port is not None:
        host = f"{host}:{parts.port}"
    return urllib.parse.urlunsplit((parts.scheme, host, parts.path, "", ""))


def _retryable(status: int) -> bool:
    return status in _RETRY_STATUS or status >= 500


class WebhookSender:
    """Background delivery of alert events to webhook URLs.

    Parameters
    ----------
    urls : sequence of str
        Where to POST each event.
    queue_size : int
        Most events waiting per URL; beyond it new events are dropped for that URL.
    first_delay : float
        Wait before the second try [s]; it doubles for each try after.
    max_delay : float
        Longest wait between tries [s].
    max_tries : int
        Tries per event and URL, the first included.
    timeout : float
        Longest wait for a receiver's answer [s].
    post : Post, optional
        What sends one request (:func:`post_json` when omitted).
    registry : CollectorRegistry, optional
        Where to count events by outcome (delivered, failed, dropped).

    Attributes
    ----------
    delivered, failed, dropped : int
        Events delivered, given up after the tries, and dropped from a full queue,
        summed over the URLs.
    """

    def __init__(
        self,
        urls: Sequence[str],
        *,
        queue_size: int = 1000,
        first_delay: float = 0.5,
        max_delay: float = 60.0,
        max_tries: int = 8,
        timeout: float = 10.0,
        post: Post | None = None,
        registry: CollectorRegistry | None = None,
    ) -> None:
        if queue_size < 1 or max_tries < 1:
            raise ValueError("queue_size and max_tries must be at least 1")
        if not (0.0 < first_delay <= max_delay):
            raise ValueError("the delays must satisfy 0 < first_delay <= max_delay")
        self.urls = tuple(urls)
        self.first_delay = float(first_delay)
        self.max_delay = float(max_delay)
        self.max_tries = int(max_tries)
        self.timeout = float(timeout)
        self._post: Post = post or post_json
        self._queues: dict[str, queue.Queue[bytes]] = {
            url: queue.Queue(maxsize=queue_size) for url in self.urls
        }
        self._threads: list[threading.Thread] = []
        self._stopping = threading.Event()
        self._count_lock = threading.Lock()
        self.delivered = self.failed = self.dropped = 0
        self._counter = (
            Counter(
                "stagewatch_webhook_events",
                "Alert events for webhooks, by outcome (delivered, failed, dropped)",
                ["outcome"],
                registry=registry,
            )
            if registry is not None
            else None
        )
        self._random = random.Random()

    def start(self) -> None:
        """Start one worker thread per URL (once)."""
        if self._threads:
            return
        for url in self.urls:
            thread = threading.Thread(
                target=self._work, args=(url,), name=f"webhook {shown(url)}", daemon=True
            )
            thread.start()
            self._threads.append(thread)

    def stop(self, timeout: float = 5.0) -> None:
        """Stop the workers; events still queued or between tries are not sent.

        Parameters
        ----------
        timeout : float
            Longest wait for each worker to finish the request it is making [s].
        """
        self._stopping.set()
        for url, q in self._queues.items():
            left = q.qsize()
            if left:
                log.warning("webhook %s: %d alert events not sent at shutdown", shown(url), left)
        for thread in self._threads:
            thread.join(timeout)
        self._threads.clear()

    def offer(self, event: Mapping[str, Any]) -> bool:
        """Queue an event for every URL without blocking.

        Parameters
        ----------
        event : mapping
            A JSON-ready document (an alert event).

        Returns
        -------
        bool
            True when every URL's queue took it; False when it was dropped for
            at least one (logged and counted).
        """
        body = json.dumps(event, separators=(",", ":"), allow_nan=False).encode()
        taken = True
        for url, q in self._queues.items():
            try:
                q.put_nowait(body)
            except queue.Full:
                taken = False
                self._count("dropped")
                log.warning(
                    "webhook %s: queue full (%d events), alert event %s dropped",
                    shown(url),
                    q.maxsize,
                    event.get("alert_id", "?"),
                )
        return taken

    def delay(self, tries: int) -> float:
        """Return the wait after the ``tries``-th failed try [s], jitter included."""
        ceiling = min(self.max_delay, self.first_delay * 2.0 ** (tries - 1))
        return self._random.uniform(0.5 * ceiling, ceiling)

    def _count(self, outcome: str) -> None:
        with self._count_lock:
            setattr(self, outcome, getattr(self, outcome) + 1)
        if self._counter is not None:
            self._counter.labels(outcome).inc()

    def _work(self, url: str) -> None:
        q = self._queues[url]
        while not self._stopping.is_set():
            try:
                body = q.get(timeout=0.5)
            except queue.Empty:
                continue
            self._deliver(url, body)

    def _deliver(self, url: str, body: bytes) -> None:
        """Try one event until it is taken, refused for good, or out of tries."""
        for tries in range(1, self.max_tries + 1):
            try:
                status = self._post(url, body, self.timeout)
                problem = f"HTTP {status}"
                retry = _retryable(status)
            except OSError as exc:
                status, problem, retry = 0, str(exc) or type(exc).__name__, True
            if 200 <= status < 300:
                self._count("delivered")
                return
            if not retry or tries == self.max_tries:
                self._count("failed")
                log.error(
                    "webhook %s: alert event not delivered after %d tries (%s)",
                    shown(url),
                    tries,
                    problem,
                )
                return
            wait = self.delay(tries)
            log.info("webhook %s: %s; try %d again in %.1f s", shown(url), problem, tries + 1, wait)
            if self._stopping.wait(wait):
                return
