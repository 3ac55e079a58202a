"""Posting spooled readings to the service, in batches, until the spool is empty.

Per train, the oldest pending readings go out in one ``POST
/api/v1/trains/{name}/readings``; what the service answers is recorded in the
spool in one transaction. What each answer means:

- 200: every reading the answer lists as refused is marked refused with the
  service's reason; every other one is sent (new or a duplicate: the service
  stores a reading once, so a batch posted again after a crash is harmless);
- a network error, a timeout, 5xx or 429: nothing is marked; the bridge waits
  and tries again, the wait doubling from ``retry_initial`` up to ``retry_max``
  with random jitter (so a fleet of bridges does not retry in step);
- 401 or 403: the key is wrong or lacks the ingest role; nothing is marked, it is
  logged as an error and retried like a network error (the readings are fine,
  the deployment is not, and throwing the spool away would lose them);
- 404: the service has no such train (not registered yet, or retired): that
  train waits ``retry_max``, the others go on;
- 413: the batch is too large for the service: that train's batches are halved;
- any other 4xx: the service refused the request as a whole; the batch is split
  in halves until the reading at fault is alone, and that reading is marked
  refused with the answer's detail. The others go on.
"""

from __future__ import annotations

import asyncio
import logging
import random
import time
from collections.abc import Sequence
from typing import Any
from urllib.parse import quote

import httpx

from service.bridge.config import ForwardSection
from service.bridge.spool import Pending, Spool
from service.bridge.status import BridgeStats

__all__ = ["Forwarder", "ServiceUnavailable"]

log = logging.getLogger("stagewatch.bridge.forward")


class ServiceUnavailable(Exception):
    """The service could not take a batch now; try again after a wait."""


def _detail(response: httpx.Response) -> str:
    """Return the service's error detail, shortened, for a log line or a refusal reason."""
    try:
        detail: Any = response.json().get("detail", response.text)
    except (ValueError, AttributeError):
        detail = response.text
    text = detail if isinstance(detail, str) else str(detail)
    text = " ".join(text.split())
    return text if len(text) <= 300 else text[:297] + "..."


class Forwarder:
    """Drains the spool into the service (see the module notes).

    Parameters
    ----------
    spool : Spool
        Where the readings wait.
    client : httpx.AsyncClient
        With the service's base URL, the ``Authorization`` header and a timeout.
    config : ForwardSection
        Batch size and retry timing.
    stats : BridgeStats
        Counts ``sent`` and ``refused``.
    rng : random.Random, optional
        Source of the retry jitter.
    """

    def __init__(
        self,
        spool: Spool,
        client: httpx.AsyncClient,
        config: ForwardSection,
        stats: BridgeStats,
        rng: random.Random | None = None,
    ) -> None:
        self.spool = spool
        self.client = client
        self.config = config
        self.stats = stats
        self.rng = rng or random.Random()
        self.failures = 0
        self.retry_at = 0.0
        self.wake = asyncio.Event()
        self._blocked: dict[str, float] = {}
        self._limit: dict[str, int] = {}

    def next_delay(self) -> float:
        """Return the wait before the next attempt after ``failures`` failures in a row [s].

        ``min(retry_max, retry_initial * 2**(failures - 1))``, times a random
        factor in [0.5, 1) so that bridges restarted together spread out.
        """
        exponent = min(max(self.failures - 1, 0), 60)
        ceiling = min(self.config.retry_max, self.config.retry_initial * 2.0**exponent)
        return ceiling * self.rng.uniform(0.5, 1.0)

    def ready_trains(self, now: float | None = None) -> list[str]:
        """Trains with pending readings that are not waiting after a 404."""
        now = time.monotonic() if now is None else now
        return [t for t in self.spool.pending_trains() if self._blocked.get(t, 0.0) <= now]

    async def send_round(self) -> int:
        """Post one batch for every ready train.

        Returns
        -------
        int
            Readings settled (sent or refused) in this round.

        Raises
        ------
        ServiceUnavailable
            The service could not be reached or answered 5xx, 401, 403 or 429.
        """
        settled = 0
        for train in self.ready_trains():
            limit = self._limit.get(train, self.config.batch_size)
            batch = self.spool.next_batch(train, limit)
            if batch:
                settled += await self._post(train, batch)
        return settled

    async def _post(self, train: str, batch: Sequence[Pending]) -> int:
        body = {
            "readings": [
                {"tag": p.tag, "time": p.time, "value": p.value}
                | ({} if p.quality is None else {"quality": p.quality})
                for p in batch
            ]
        }
        path = f"/api/v1/trains/{quote(train, safe='')}/readings"
        try:
            response = await self.client.post(path, json=body)
        except httpx.TransportError as exc:
            raise ServiceUnavailable(
                f"cannot reach the service: {type(exc).__name__} {exc}".strip()
            ) from None
        code = response.status_code
        if code == 200:
            return self._settle(train, batch, response)
        if code >= 500 or code == 429:
            raise ServiceUnavailable(f"the service answered {code}: {_detail(response)}")
        if code in (401, 403):
            log.error(
                "the service refused the bridge's key (%d: %s): check service.key_file or "
                "key_env, and that the key has the ingest role; readings stay in the spool",
                code,
                _detail(response),
            )
            raise ServiceUnavailable(f"the service answered {code}")
        if code == 404:
            self._blocked[train] = time.monotonic() + self.config.retry_max
            log.error(
                "train %s: the service answered 404 (%s); its readings stay in the spool, "
                "next try in %.0f s",
                train,
                _detail(response),
                self.config.retry_max,
            )
            return 0
        if code == 413 and len(batch) > 1:
            self._limit[train] = max(1, len(batch) // 2)
            log.warning("train %s: batch too large for the service; now %d", train, len(batch) // 2)
            return 0
        if len(batch) == 1:
            reason = f"the service answered {code}: {_detail(response)}"
            self.spool.settle(train, [], [(batch[0].id, reason)], accepted=0, duplicates=0)
            self.stats.count(refused=1)
            log.warning(
                "train %s: refused %s at %s: %s", train, batch[0].tag, batch[0].time, reason
            )
            return 1
        half = len(batch) // 2
        return await self._post(train, batch[:half]) + await self._post(train, batch[half:])

    def _settle(self, train: str, batch: Sequence[Pending], response: httpx.Response) -> int:
        try:
            answer = response.json()
            refused_list = answer["refused"]
            refused = {int(r["index"]): str(r["reason"]) for r in refused_list}
            accepted, duplicates = int(answer["accepted"]), int(answer["duplicates"])
        except (ValueError, KeyError, TypeError) as exc:
            raise ServiceUnavailable(f"unexpected answer from the service: {exc}") from None
        sent = [p.id for k, p in enumerate(batch) if k not in refused]
        marked = [(batch[k].id, reason) for k, reason in refused.items() if 0 <= k < len(batch)]
        self.spool.settle(train, sent, marked, accepted=accepted, duplicates=duplicates)
        self.stats.count(sent=len(sent), refused=len(marked))
        if marked:
            reasons: dict[str, list[str]] = {}
            for k, reason in refused.items():
                reasons.setdefault(reason, []).append(batch[k].tag)
            for reason, tags in reasons.items():
                shown = ", ".join(sorted(set(tags))[:5])
                log.warning(
                    "train %s: the service refused %d reading(s) of %s: %s",
                    train,
                    len(tags),
                    shown,
                    reason,
                )
        return len(batch)

    async def run(self, stop: asyncio.Event) -> None:
        """Forward until ``stop`` is set, waiting after failures (see the module notes)."""
        while not stop.is_set():
            try:
                settled = await self.send_round()
            except Exception as exc:  # keep forwarding whatever went wrong; the spool holds all
                self.failures += 1
                self.stats.post_failures.inc()
                delay = self.next_delay()
                self.retry_at = time.time() + delay
                if isinstance(exc, ServiceUnavailable):
                    log.warning("%s; next try in %.1f s (attempt %d)", exc, delay, self.failures)
                else:
                    log.exception("forwarding failed; next try in %.1f s", delay)
                await _wait(stop, delay)
                continue
            if self.failures:
                log.info("the service takes readings again after %d failed attempts", self.failures)
            self.failures = 0
            if settled == 0:
                self.wake.clear()
                await _wait_any(stop, self.wake, timeout=1.0)

    async def drain(self, attempts: int) -> bool:
        """Forward until nothing ready is pending, or ``attempts`` failures in a row.

        Parameters
        ----------
        attempts : int
            Failed attempts in a row after which to give up.

        Returns
        -------
        bool
            True when no ready train has pending readings left.
        """
        while self.ready_trains():
            try:
                await self.send_round()
            except ServiceUnavailable as exc:
                self.failures += 1
                self.stats.post_failures.inc()
                if self.failures >= attempts:
                    log.error("%s; giving up after %d attempts", exc, self.failures)
                    return False
                delay = self.next_delay()
                log.warning("%s; next try in %.1f s (attempt %d)", exc, delay, self.failures)
                await asyncio.sleep(delay)
                continue
            self.failures = 0
        return True


async def _wait(stop: asyncio.Event, seconds: float) -> None:
    """Sleep ``seconds`` [s] or until ``stop`` is set."""
    try:
        await asyncio.wait_for(stop.wait(), timeout=seconds)
    except TimeoutError:
        pass


async def _wait_any(stop: asyncio.Event, wake: asyncio.Event, timeout: float) -> None:
    """Sleep until ``stop`` or ``wake`` is set, at most ``timeout`` [s]."""
    waiters = [asyncio.ensure_future(stop.wait()), asyncio.ensure_future(wake.wait())]
    try:
        await asyncio.wait(waiters, timeout=timeout, return_when=asyncio.FIRST_COMPLETED)
    finally:
        for waiter in waiters:
            waiter.cancel()
        await asyncio.gather(*waiters, return_exceptions=True)
