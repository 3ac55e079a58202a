"""What the dashboard tests share besides fixtures: the live service's description."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import httpx

from tests.service.test_app import ADMIN

ALERT_TRAIN = "wrenfield-line3"
"""The demo train's copy that is fed a loss of catalyst activity, so it alerts."""
ARCHIVE_HOURS = 6.0
"""Hours of the demo archive fed to the demo train."""


@dataclass(frozen=True)
class LiveService:
    """The running service and what was loaded into it."""

    base: str
    database_url: str
    archive_end: float  # the time the archive readings were shifted to end at [s]

    def client(self, key: str = ADMIN) -> httpx.Client:
        """An HTTP client for the API with the given key."""
        return httpx.Client(
            base_url=self.base, headers={"Authorization": f"Bearer {key}"}, timeout=60.0
        )


def post_readings(client: httpx.Client, train: str, readings: list[dict[str, Any]]) -> None:
    """Post readings in batches; every one must be taken."""
    for k in range(0, len(readings), 500):
        batch = readings[k : k + 500]
        r = client.post(f"/api/v1/trains/{train}/readings", json={"readings": batch})
        assert r.status_code == 200, r.text
        assert r.json()["refused"] == [], r.text
