"""The dashboard's files are served at / without taking any route from the API."""

from __future__ import annotations

import re

import httpx

from service.app import WEB_DIR
from tests.web.live import LiveService


def test_dashboard_is_served_at_root_and_the_api_keeps_its_routes(live_service: LiveService):
    with httpx.Client(base_url=live_service.base, timeout=30.0) as client:
        index = client.get("/")
        assert index.status_code == 200
        assert index.headers["content-type"].startswith("text/html")
        assert "monitoring aid, not a safety system" in index.text
        # Module scripts run only when served with a JavaScript type.
        script = client.get("/js/app.js")
        assert script.status_code == 200
        assert script.headers["content-type"].split(";")[0] in (
            "text/javascript",
            "application/javascript",
        )
        licence = client.get("/vendor/uplot/LICENSE")
        assert licence.status_code == 200 and "MIT License" in licence.text
        assert client.get("/no-such-page.html").status_code == 404

        # The API, its documents and the operations routes answer as before.
        assert client.get("/healthz").json() == {"status": "ok"}
        assert client.get("/readyz").status_code == 200
        assert client.get("/api/v1/trains").status_code == 401  # a key is still needed
        assert client.get("/metrics").status_code == 401
        assert client.get("/docs").status_code == 200
        paths = client.get("/openapi.json").json()["paths"]
        assert all(p.startswith(("/api/", "/metrics", "/healthz", "/readyz")) for p in paths)


def test_every_file_the_page_loads_is_in_the_package_folder():
    # index.html names its stylesheets and scripts; each must exist in service/web,
    # which pyproject's package-data ships with the package.
    html = (WEB_DIR / "index.html").read_text()
    named = re.findall(r'(?:href|src)="([^"#:]+)"', html)
    assert {"css/stagewatch.css", "js/app.js", "vendor/uplot/uPlot.iife.min.js"} <= set(named)
    for name in named:
        assert (WEB_DIR / name).is_file(), name
    imports = set()
    for module in (WEB_DIR / "js").glob("*.js"):
        imports |= set(re.findall(r"from '\./([\w-]+\.js)'", module.read_text()))
    assert imports and all((WEB_DIR / "js" / m).is_file() for m in imports)
