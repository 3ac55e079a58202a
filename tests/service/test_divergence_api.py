"""A diverged filter's re-initialisation reaches the service's alert log and estimates.

The estimator side (when and how the filter is re-initialised) is checked in
tests/estimator/test_divergence.py; here the same scenario (half the catalyst
activity lost at once, a filter tuned as if the activity could hardly move) runs
through the REST service, and the recorded event must be in the alert log, among
the current alerts, in a restarted service's state, and equal to what the session
logs for the same readings.
"""

from __future__ import annotations

import time
import tomllib
from pathlib import Path

from estimator.alerts import DISCLAIMER
from estimator.config import parse_train_config
from estimator.session import TrainSession
from tests.service.test_alerts_api import (
    HOUR,
    app_client,
    loss_batches,
    post_batches,
    served_events,
    without_api_fields,
)
from tests.service.test_app import DEMO, NAME, URL

ALERT = f"estimator_reinitialised:{NAME}"
TUNED = 'activity_noise = { sigma = 0.006, per = "1 h" }'
OVERCONFIDENT = 'activity_noise = { sigma = 0.0001, per = "1 h" }'


def overconfident_toml() -> str:
    text = DEMO.read_text()
    assert TUNED in text  # the demo's own tuning, replaced below
    return text.replace(TUNED, OVERCONFIDENT)


def test_a_reinitialisation_is_logged_served_and_survives_a_restart(
    database_url: str, tmp_path: Path
):
    toml = overconfident_toml()
    batches = loss_batches(time.time(), hours=20.0, loss=0.5, loss_at=8 * HOUR, seed=5)
    with app_client(database_url, tmp_path) as client:
        r = client.post("/api/v1/trains", json={"toml": toml})
        assert r.status_code == 201, r.text
        post_batches(client, batches)
        served = served_events(client, alert_id=ALERT)
        states = [e["to_state"] for e in served]
        assert states[:2] == ["active_unacknowledged", "cleared_unacknowledged"]
        raised = served[0]
        assert "started again from the design model" in raised["message"]
        assert raised["message"].endswith(DISCLAIMER)
        assert raised["figure"] > 4.0 and raised["threshold"] == 4.0
        start = min(b[0]["time"] for b in batches)
        assert 8 * HOUR < raised["time"] - start < 12 * HOUR
        # Cleared but not yet acknowledged: still among the current alerts.
        current = {a["alert_id"]: a["state"] for a in client.get(f"{URL}/alerts").json()["data"]}
        assert current[ALERT] == "cleared_unacknowledged"
        # The estimates found the plant again after it.
        latest = client.get(f"{URL}/estimates/latest").json()
        assert abs(latest["activity"]["value"] - 0.5) < 0.03

    # The session logs the same event for the same readings.
    session = TrainSession(parse_train_config(tomllib.loads(toml)))
    logged = []
    for batch in batches:
        out = session.ingest(
            [r["tag"] for r in batch], [r["time"] for r in batch], [r["value"] for r in batch]
        )
        logged += [e.to_dict() for e in out.alerts if e.alert_id == ALERT]
    assert [without_api_fields(e) for e in served] == logged

    # A restarted service keeps the alert's state and the log.
    with app_client(database_url, tmp_path) as client:
        current = {a["alert_id"]: a["state"] for a in client.get(f"{URL}/alerts").json()["data"]}
        assert current[ALERT] == "cleared_unacknowledged"
        assert served_events(client, alert_id=ALERT) == served
