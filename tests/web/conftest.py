"""Fixtures for the dashboard's browser tests: the real service, real Chromium.

The service runs in-process under uvicorn in a background thread, on a free
loopback port, with SQLite in a temporary folder. Two trains are registered once
per session:

- the demo train (``replay_data/wrenfield/train.toml``), fed the first hours of the
  demo archive;
- a copy of it under another name, fed the simulated loss of catalyst activity that
  ``tests/service/test_alerts_api.py`` uses, which raises alerts.

The browser is Debian's chromium driven by Playwright (pytest-playwright's
fixtures, with the launch arguments overridden): Playwright's own browser
download is never used. Without the chromium binary the fixture fails and names
the command that installs it (``scripts/system-deps.sh`` does it for ``make
test``).

Screenshots go to ``$STAGEWATCH_ARTIFACTS/web`` when that variable is set (CI
sets it), otherwise to a temporary folder; the path is printed at the end of the
run.
"""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
import uvicorn
from playwright.sync_api import Page, expect

from service.app import create_app
from service.settings import Settings
from tests.service.test_alerts_api import add_keys, loss_batches
from tests.service.test_app import ADMIN, DEMO, NAME, demo_readings
from tests.service.test_live import free_port
from tests.web.live import ALERT_TRAIN, ARCHIVE_HOURS, LiveService, post_readings

CHROMIUM = Path("/usr/lib/chromium/chromium")
INSTALL_CHROMIUM = "sudo apt-get install -y chromium"
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-dev-shm-usage",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]

_screens: list[Path] = []


@pytest.fixture(scope="session")
def live_service(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveService]:
    """The service on 127.0.0.1 with the demo train and an alerting copy, fed."""
    folder = tmp_path_factory.mktemp("dashboard-service")
    database_url = f"sqlite:///{folder / 'stagewatch.db'}"
    settings = Settings(
        data_dir=folder, database_url=database_url, bootstrap_key=ADMIN, log_json=False
    )
    port = free_port()
    server = uvicorn.Server(
        uvicorn.Config(
            create_app(settings),
            host="127.0.0.1",
            port=port,
            log_level="warning",
            ws="none",
            # Open live streams would otherwise hold the shutdown.
            timeout_graceful_shutdown=2,
        )
    )
    thread = threading.Thread(target=server.run, name="dashboard-uvicorn", daemon=True)
    thread.start()
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 120.0  # numba may compile on a cold cache
        while not server.started:
            if not thread.is_alive() or time.monotonic() > deadline:
                raise RuntimeError("the service did not start")
            time.sleep(0.05)
        now = time.time()
        archive_end = now - 120.0
        service = LiveService(base=base, database_url=database_url, archive_end=archive_end)
        with service.client() as client:
            demo = DEMO.read_text()
            copy = demo.replace(f'name = "{NAME}"', f'name = "{ALERT_TRAIN}"', 1)
            assert copy != demo
            for toml in (demo, copy):
                r = client.post("/api/v1/trains", json={"toml": toml})
                assert r.status_code == 201, r.text
            post_readings(client, NAME, demo_readings(ARCHIVE_HOURS, archive_end))
            for batch in loss_batches(now):
                post_readings(client, ALERT_TRAIN, batch)
        add_keys(database_url)
        yield service
    finally:
        server.should_exit = True
        thread.join(timeout=30)


@pytest.fixture(scope="session")
def base_url(live_service: LiveService) -> str:
    """pytest-playwright's base URL: pages open relative to the live service."""
    return live_service.base


@pytest.fixture(scope="session")
def browser_type_launch_args(browser_type_launch_args: dict[str, Any]) -> dict[str, Any]:
    """Launch Debian's chromium, headless, with the flags it needs in a container."""
    if not CHROMIUM.exists():
        pytest.fail(
            f"Debian's chromium is not installed ({CHROMIUM} is missing); install it with: "
            f"{INSTALL_CHROMIUM}",
            pytrace=False,
        )
    return {
        **browser_type_launch_args,
        "executable_path": str(CHROMIUM),
        "args": CHROMIUM_ARGS,
        "headless": True,
    }


@pytest.fixture(scope="session")
def browser_context_args(browser_context_args: dict[str, Any]) -> dict[str, Any]:
    """A laptop-sized window, no animations."""
    return {
        **browser_context_args,
        "viewport": {"width": 1440, "height": 900},
        "reduced_motion": "reduce",
    }


@pytest.fixture
def page(page: Page) -> Iterator[Page]:
    """pytest-playwright's page, failing the test on any uncaught script error."""
    errors: list[str] = []
    page.on("pageerror", lambda error: errors.append(str(error)))
    yield page
    assert errors == [], f"script errors on the page: {errors}"


@pytest.fixture(scope="session", autouse=True)
def _patient_expect() -> None:
    # A shared 2-core machine: give the page time; nothing here asserts speed.
    expect.set_options(timeout=20_000)


@pytest.fixture(scope="session")
def screens(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The folder the page screenshots are saved to."""
    root = os.environ.get("STAGEWATCH_ARTIFACTS")
    folder = Path(root) / "web" if root else tmp_path_factory.mktemp("dashboard-screens")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


@pytest.fixture
def screenshot(screens: Path) -> Callable[[Page, str], Path]:
    """Save a full-page screenshot of a page under a name; check a PNG was written."""

    def save(page: Page, name: str) -> Path:
        path = screens / f"{name}.png"
        page.screenshot(path=str(path), full_page=True)
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", path
        _screens.append(path)
        return path

    return save


def pytest_terminal_summary(terminalreporter: Any) -> None:
    """Say where the dashboard screenshots are."""
    if _screens:
        folders = sorted({str(p.parent) for p in _screens})
        terminalreporter.write_line(
            f"dashboard screenshots ({len(_screens)}): {', '.join(folders)}"
        )

