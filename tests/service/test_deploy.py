"""The deployment files in deploy/: they parse, and keep the properties they promise.

No image is built and no unit is started here (no container engine or systemd in
the test environment); these checks catch a settings file the service would
refuse, a service reachable beyond the machine, or a root or cache-less process.
"""

from __future__ import annotations

import configparser
import re
import shutil
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import pytest
import typer
import yaml

from service.cli import app as cli
from service.settings import SETTINGS_FILE_VARIABLE, load_settings

DEPLOY = Path("deploy")


def test_the_example_settings_file_is_valid(monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setenv(SETTINGS_FILE_VARIABLE, str(DEPLOY / "settings.example.toml"))
    settings = load_settings()  # unknown keys and bad values would raise
    assert settings.host == "127.0.0.1"
    assert settings.database_url.startswith("postgresql+psycopg://")
    assert settings.ingest_rate_limit == 5000.0
    assert set(tomllib.loads((DEPLOY / "settings.example.toml").read_text())) <= set(
        type(settings).model_fields
    )


def test_the_image_runs_the_service_as_a_user_with_a_health_check():
    text = (DEPLOY / "Dockerfile").read_text()
    stages = re.findall(r"^FROM (\S+)", text, flags=re.MULTILINE)
    assert stages and all(s == "python:3.11-slim" for s in stages)
    users = re.findall(r"^USER (\S+)", text, flags=re.MULTILINE)
    assert users == ["stagewatch"]
    assert re.search(r"^HEALTHCHECK .*\n?.*/healthz", text, flags=re.MULTILINE)
    assert "STAGEWATCH_CACHE_DIR=/var/cache/stagewatch" in text
    assert 'VOLUME ["/var/lib/stagewatch"]' in text
    assert 'ENTRYPOINT ["stagewatch"]' in text and 'CMD ["serve"]' in text
    # The build copies only what exists.
    for source in re.findall(r"^COPY (?!--)(.+) \S+$", text, flags=re.MULTILINE):
        for name in source.split():
            assert Path(name).exists(), name


def test_compose_publishes_on_loopback_only_and_waits_for_postgresql():
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    services = compose["services"]
    assert set(services) == {"db", "stagewatch"}
    app = services["stagewatch"]
    assert all(str(p).startswith("127.0.0.1:") for p in app["ports"])
    assert app["depends_on"]["db"]["condition"] == "service_healthy"
    assert "pg_isready" in " ".join(services["db"]["healthcheck"]["test"])
    assert app["environment"]["STAGEWATCH_DATABASE_URL"].startswith("postgresql+psycopg://")
    assert (DEPLOY / app["build"]["context"] / app["build"]["dockerfile"]).exists()
    volumes = {v.split(":")[1] for v in app["volumes"]}
    assert volumes == {"/var/lib/stagewatch", "/var/cache/stagewatch"}


def test_the_systemd_unit_runs_serve_as_the_service_user():
    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.optionxform = str  # type: ignore[assignment,method-assign]  # keys keep their case
    unit.read_string((DEPLOY / "stagewatch.service").read_text())
    service = unit["Service"]
    assert service["User"] == "stagewatch"
    assert service["ExecStart"].endswith("/bin/stagewatch serve")
    assert service["StateDirectory"] == "stagewatch" and service["CacheDirectory"] == "stagewatch"
    assert "MemoryDenyWriteExecute" not in service  # numba writes and runs code
    text = (DEPLOY / "stagewatch.service").read_text()
    assert "Environment=STAGEWATCH_CACHE_DIR=/var/cache/stagewatch" in text
    assert unit["Install"]["WantedBy"] == "multi-user.target"


def test_the_commands_the_deploy_files_use_exist():
    group = typer.main.get_group(cli)
    assert {"serve", "keys", "db"} <= set(group.commands)
    assert {"upgrade", "current"} <= set(group.commands["db"].commands)  # type: ignore[attr-defined]


def test_the_images_sources_build_a_wheel_with_every_file_the_service_reads(tmp_path: Path):
    # The image's build stage copies only some of the repository (its COPY lines)
    # and installs a wheel, not the source tree: the dashboard's static files and
    # the database migrations must be inside that wheel, or the container serves no
    # dashboard and cannot upgrade its database.
    text = (DEPLOY / "Dockerfile").read_text()
    copied = [
        name
        for source in re.findall(r"^COPY (?!--)(.+) \S+$", text, flags=re.MULTILINE)
        for name in source.split()
    ]
    src = tmp_path / "src"
    src.mkdir()
    for name in copied:
        if Path(name).is_dir():
            shutil.copytree(name, src / name, ignore=shutil.ignore_patterns("__pycache__"))
        else:
            shutil.copy(name, src / name)
    build = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
         "--wheel-dir", str(tmp_path / "wheels"), str(src)],
        capture_output=True, text=True, check=False,
    )  # fmt: skip
    assert build.returncode == 0, build.stderr[-2000:]
    (wheel,) = (tmp_path / "wheels").glob("stagewatch-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    needed = [
        p.as_posix()
        for package in ("estimator", "service")
        for p in Path(package).rglob("*")
        if p.is_file() and "__pycache__" not in p.parts
    ]
    assert any(n.startswith("service/web/") for n in needed)
    assert any(n.startswith("service/migrations/versions/") for n in needed)
    missing = sorted(n for n in needed if n not in names)
    assert missing == []
