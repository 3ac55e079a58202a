"""The dashboard in real headless Chromium against the real service on loopback.

Every number the page shows carries the API's unrounded value in ``data-value``
beside its text, so the tests compare both with the API: the value exactly, the
text as the page rounds it.
"""

from __future__ import annotations

import re
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from playwright.sync_api import Locator, Page, expect

from estimator.alarm_state import AlertState
from tests.service.test_alerts_api import OPERATOR, READER, WARNING_R201
from tests.service.test_app import NAME
from tests.web.live import ALERT_TRAIN, LiveService

Screenshot = Callable[[Page, str], Path]
KEY_ITEM = "stagewatch.apiKey"
VESSELS = ("R-201", "R-202", "R-203")
NOTICE = re.compile(r"monitoring aid, not a safety system.*site procedures", re.S)
STATES = tuple(state.value for state in AlertState)


def use_key(page: Page, key: str) -> None:
    """Put the API key where the page keeps it before any of its scripts run."""
    page.add_init_script(f"sessionStorage.setItem({KEY_ITEM!r}, {key!r})")


def latest(service: LiveService, train: str = NAME) -> dict[str, Any]:
    with service.client(READER) as client:
        r = client.get(f"/api/v1/trains/{train}/estimates/latest")
    assert r.status_code == 200, r.text
    body: dict[str, Any] = r.json()
    return body


def alert(service: LiveService, train: str, alert_id: str) -> dict[str, Any]:
    with service.client(READER) as client:
        r = client.get(f"/api/v1/trains/{train}/alerts", params={"state": list(STATES)})
    assert r.status_code == 200, r.text
    found: dict[str, Any] = next(a for a in r.json()["data"] if a["alert_id"] == alert_id)
    return found


def field(page: Page, name: str) -> Locator:
    return page.locator(f'[data-field="{name}"]')


def expect_number(page: Page, name: str, value: float, text: str) -> None:
    """The page shows ``text`` for ``name`` and holds exactly the API's value."""
    shown = field(page, name)
    expect(shown).to_have_text(text)
    assert float(shown.get_attribute("data-value") or "nan") == value, name


def expect_estimate(page: Page, estimate: dict[str, Any]) -> None:
    """Every number of the cascade and the side panel matches ``estimate``."""
    expect(field(page, "time")).to_have_attribute("data-value", re.compile(r"\d"))
    assert float(field(page, "time").get_attribute("data-value") or "nan") == estimate["time"]
    for vessel in estimate["vessels"]:
        v = vessel["name"]
        for species, c in vessel["concentration"].items():
            expect_number(page, f"{v}.c.{species}", c["value"], f"{c['value']:.1f}")
            expect_number(page, f"{v}.c.{species}.std", c["std"], f"{c['std']:.1f}")
        x = vessel["conversion"]
        expect_number(page, f"{v}.x", x["value"], f"{x['value'] * 100:.1f}")
        expect_number(page, f"{v}.x.std", x["std"], f"{x['std'] * 100:.1f}")
        xd = vessel["design_conversion"]
        expect_number(page, f"{v}.xd", xd, f"{xd * 100:.1f}")
    a = estimate["activity"]
    expect_number(page, "activity", a["value"], f"{a['value']:.3f}")
    expect_number(page, "activity.std", a["std"], f"{a['std']:.3f}")
    expect_number(page, "flow", estimate["flow"], f"{estimate['flow'] * 3600:.2f}")
    for species, value in estimate["feed"].items():
        expect_number(page, f"feed.{species}", value, f"{value:.1f}")


def open_train(page: Page, train: str = NAME, window: str = "24h") -> None:
    page.goto(f"/#/train/{train}?window={window}")
    expect(page.locator(".live-pill")).to_have_attribute("data-live", "live")


def test_overview_asks_for_a_key_then_lists_the_demo_train(
    page: Page, live_service: LiveService, screenshot: Screenshot
):
    page.goto("/")
    # No key yet: the service answers 401 and the page asks for one.
    dialog = page.locator("#key-dialog")
    expect(dialog).to_be_visible()
    expect(page.locator("#key-error")).to_contain_text("needs an API key")
    page.fill("#key-input", READER)
    page.click("#key-save")
    expect(dialog).to_be_hidden()
    assert page.evaluate(f"sessionStorage.getItem({KEY_ITEM!r})") == READER

    card = page.locator(f'.train-card[data-train="{NAME}"]')
    expect(card).to_be_visible()
    expect(card.locator("h2")).to_have_text("Wrenfield Sweeteners, line 2 isomerisation cascade")
    expect(card.locator(".vessel-chip")).to_have_text([re.compile(f"^{v}") for v in VESSELS])
    estimate = latest(live_service)
    activity = card.locator('[data-figure="activity"] [data-value]')
    assert float(activity.get_attribute("data-value") or "nan") == estimate["activity"]["value"]
    expect(activity).to_have_text(f"{estimate['activity']['value']:.3f}")
    worst = max(v["shortfall"] for v in estimate["vessels"])
    shortfall = card.locator('[data-figure="shortfall"] [data-value]')
    assert float(shortfall.get_attribute("data-value") or "nan") == worst
    expect(card.locator('[data-figure="age"] .age')).to_have_text(re.compile(r"^\d+ (s|min)$"))

    # The alerting copy: its active alert count is the API's.
    with live_service.client(READER) as client:
        alerts = client.get(f"/api/v1/trains/{ALERT_TRAIN}/alerts").json()["data"]
    states = [a["state"] for a in alerts]
    active = sum(s in ("active_unacknowledged", "active_acknowledged") for s in states)
    assert active > 0
    other = page.locator(f'.train-card[data-train="{ALERT_TRAIN}"] [data-figure="alerts"] a')
    expect(other).to_have_text(str(active))
    expect(page.locator("#notice")).to_contain_text(NOTICE)
    screenshot(page, "overview")


def test_train_view_shows_the_latest_estimate_of_the_api(
    page: Page, live_service: LiveService, screenshot: Screenshot
):
    use_key(page, READER)
    open_train(page)
    estimate = latest(live_service)
    expect_estimate(page, estimate)
    # The cascade draws the vessels in flow order, each with a conversion strip.
    expect(page.locator("svg.cascade g.vessel")).to_have_count(3)
    assert page.locator("svg.cascade g.vessel").evaluate_all(
        "gs => gs.map(g => g.dataset.vessel)"
    ) == list(VESSELS)
    # The trends hold the window's history (downsampled) and draw three charts.
    trends = page.locator("#trends")
    expect(trends).to_have_attribute("data-points", re.compile(r"^[1-9]\d+$"))
    expect(page.locator("#trends canvas")).to_have_count(3)
    with live_service.client(READER) as client:
        end = estimate["time"]
        rows = client.get(
            f"/api/v1/trains/{NAME}/estimates",
            params={"start": end - 86400, "end": end + 1, "every": 86400 / 720},
        ).json()
    shown = int(trends.get_attribute("data-points") or "0")
    # The history, plus the newest estimate when downsampling left it out.
    assert shown in (rows["count"], rows["count"] + 1)
    screenshot(page, "train")

    # A shorter window asks for its own history.
    page.click('[data-window="1h"]')
    expect(page.locator('[data-window="1h"]')).to_have_attribute("aria-pressed", "true")
    assert page.url.endswith("window=1h")
    expect(trends).not_to_have_attribute("data-points", str(shown))


def test_a_reading_posted_to_the_api_shows_up_live_without_reloading(
    page: Page, live_service: LiveService
):
    use_key(page, READER)
    open_train(page)
    before = latest(live_service)
    expect_estimate(page, before)
    page.evaluate("window.__sameDocument = true")

    flow = 13.75  # m^3/h, against 12 before
    reading = {"tag": "FI-200", "time": time.time() - 30.0, "value": flow}
    assert reading["time"] > before["time"]
    with live_service.client(OPERATOR) as client:
        r = client.post(f"/api/v1/trains/{NAME}/readings", json={"readings": [reading]})
    assert r.status_code == 200 and r.json()["accepted"] == 1, r.text
    after = latest(live_service)
    assert after["time"] == pytest.approx(reading["time"])
    assert after["flow"] * 3600 == pytest.approx(flow)

    expect(field(page, "time")).to_have_attribute("data-value", repr(after["time"]))
    expect_estimate(page, after)
    expect(field(page, "flow")).to_have_text("13.75")
    assert page.evaluate("window.__sameDocument") is True


def test_acknowledging_and_shelving_on_the_alerts_page_change_the_alert_in_the_api(
    page: Page, live_service: LiveService, screenshot: Screenshot
):
    assert alert(live_service, ALERT_TRAIN, WARNING_R201)["state"] == "active_unacknowledged"
    use_key(page, READER)
    page.goto(f"/#/alerts?train={ALERT_TRAIN}")
    expect(page.locator("#filter-train")).to_have_value(ALERT_TRAIN)
    expect(page.locator("#main")).to_contain_text(NOTICE)
    row = page.locator(f'tr[data-alert-id="{WARNING_R201}"][data-train="{ALERT_TRAIN}"]')
    expect(row.locator('[data-field="state"]')).to_have_text("Active, unacknowledged")
    screenshot(page, "alerts")

    # A read key may look but not act: the page shows the service's refusal.
    row.locator('[data-action="acknowledge"]').click()
    expect(page.locator("#action-dialog")).to_be_visible()
    page.fill("#action-reason", "looked at it")
    page.click("#action-submit")
    expect(page.locator("#action-error")).to_contain_text("has role 'read'")
    assert alert(live_service, ALERT_TRAIN, WARNING_R201)["state"] == "active_unacknowledged"
    page.click("#action-cancel")

    # With an operator's key (role ingest) the acknowledgement goes through.
    page.click("#key-change")
    page.fill("#key-input", OPERATOR)
    page.click("#key-save")
    row.locator('[data-action="acknowledge"]').click()
    # An empty reason is refused by the page before anything is sent.
    page.click("#action-submit")
    expect(page.locator("#action-error")).to_contain_text("Give a reason")
    reason = "lab sample of R-201 ordered"
    page.fill("#action-reason", reason)
    page.click("#action-submit")
    expect(page.locator("#action-dialog")).to_be_hidden()
    expect(row.locator('[data-field="state"]')).to_have_text("Active, acknowledged")
    expect(row.locator('[data-action="acknowledge"]')).to_have_count(0)

    after = alert(live_service, ALERT_TRAIN, WARNING_R201)
    assert after["state"] == "active_acknowledged" and after["note"] == reason
    with live_service.client(READER) as client:
        log = client.get(
            f"/api/v1/trains/{ALERT_TRAIN}/alerts/events", params={"alert_id": WARNING_R201}
        ).json()["data"]
    assert (log[-1]["to_state"], log[-1]["who"], log[-1]["why"]) == (
        "active_acknowledged",
        "operator-ann",
        reason,
    )
    # The alert's log on the page shows who did it and why.
    row.locator('[data-action="log"]').click()
    expect(page.locator(".event-log li").first).to_contain_text(f"operator-ann: {reason}")

    # Shelving asks for how long and why; the service keeps both.
    low = f"activity_low:{ALERT_TRAIN}"
    clicked = time.time()
    page.locator(f'tr[data-alert-id="{low}"] [data-action="shelve"]').click()
    expect(page.locator("#shelve-field")).to_be_visible()
    page.select_option("#shelve-for", "7200")
    page.fill("#action-reason", "catalyst batch 7 known weak")
    page.click("#action-submit")
    expect(page.locator(f'tr[data-alert-id="{low}"] [data-field="state"]')).to_contain_text(
        "Shelved"
    )
    shelved = alert(live_service, ALERT_TRAIN, low)
    assert shelved["state"] == "shelved" and shelved["note"] == "catalyst batch 7 known weak"
    assert clicked + 7200 <= shelved["shelved_until"] <= time.time() + 7200


def test_train_view_fits_a_laptop_and_a_wall_screen(
    page: Page, live_service: LiveService, screenshot: Screenshot
):
    use_key(page, READER)
    sizes = {"laptop": (1280, 720), "wall": (3840, 2160)}
    font = {}
    for name, (width, height) in sizes.items():
        page.set_viewport_size({"width": width, "height": height})
        # A control room's wall screen is often dark: the page follows the system.
        page.emulate_media(color_scheme="dark" if name == "wall" else "light")
        open_train(page, ALERT_TRAIN)  # the same page for both: it follows the window
        scheme = "dark" if name == "wall" else "light"
        expect(page.locator("#trends")).to_have_attribute("data-scheme", scheme)
        expect(page.locator("#trends canvas")).to_have_count(3)
        # Nothing sticks out sideways; the charts follow the window's width.
        assert page.evaluate("document.documentElement.scrollWidth") <= width
        chart = page.locator('.plot[data-chart="conversion"] canvas').bounding_box()
        assert chart is not None and chart["width"] > 0.4 * width
        font[name] = float(
            page.evaluate("parseFloat(getComputedStyle(document.documentElement).fontSize)")
        )
        # Alert markers: the copy's loss of activity raised alerts inside the window.
        expect(page.locator("#trends")).to_have_attribute("data-markers", re.compile(r"^[1-9]"))
        screenshot(page, f"train-{name}")
    assert font["wall"] > 1.5 * font["laptop"]
