"""Service settings: defaults, file and environment precedence, and the listen check."""

from __future__ import annotations

from pathlib import Path

import pytest
from pydantic import SecretStr

from service.settings import (
    SETTINGS_FILE_VARIABLE,
    Settings,
    SettingsError,
    UnsafeBinding,
    check_listen_safety,
    is_loopback,
    load_settings,
)


@pytest.fixture(autouse=True)
def clean_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    """Run each test without the caller's STAGEWATCH_ settings."""
    names = {f"STAGEWATCH_{field.upper()}" for field in Settings.model_fields}
    for name in names | {SETTINGS_FILE_VARIABLE}:
        monkeypatch.delenv(name, raising=False)


def write_settings(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, text: str) -> Path:
    path = tmp_path / "stagewatch.toml"
    path.write_text(text)
    monkeypatch.setenv(SETTINGS_FILE_VARIABLE, str(path))
    return path


# ---------------------------------------------------------------- defaults and sources


def test_defaults():
    settings = Settings()
    assert settings.host == "127.0.0.1"
    assert settings.port == 8470
    assert settings.data_dir == Path("var")
    assert settings.database_url == "sqlite:///var/stagewatch.db"
    assert settings.require_keys is True
    assert settings.future_tolerance == 300.0
    assert settings.checkpoint_every == 300.0
    assert settings.retention_readings is None
    assert settings.retention_estimates is None
    assert settings.max_batch == 10_000
    assert settings.max_body_bytes == 4_000_000
    assert settings.log_json is True
    assert settings.bootstrap_key is None
    assert settings.cors_origins == []


def test_default_database_lives_in_data_dir(monkeypatch, tmp_path):
    monkeypatch.setenv("STAGEWATCH_DATA_DIR", str(tmp_path))
    assert Settings().database_url == f"sqlite:///{tmp_path}/stagewatch.db"
    monkeypatch.setenv("STAGEWATCH_DATABASE_URL", "postgresql+psycopg://sw@db/stagewatch")
    assert Settings().database_url == "postgresql+psycopg://sw@db/stagewatch"


def test_file_overrides_defaults(monkeypatch, tmp_path):
    write_settings(
        tmp_path,
        monkeypatch,
        'host = "0.0.0.0"\nport = 9100\nretention_readings = 2592000.0\n'
        'cors_origins = ["https://ops.example.com"]\nlog_json = false\n',
    )
    settings = Settings()
    assert settings.host == "0.0.0.0"
    assert settings.port == 9100
    assert settings.retention_readings == 2_592_000.0
    assert settings.cors_origins == ["https://ops.example.com"]
    assert settings.log_json is False
    assert settings.max_batch == 10_000  # not in the file: the default


def test_environment_overrides_file(monkeypatch, tmp_path):
    write_settings(tmp_path, monkeypatch, "port = 9100\nmax_batch = 500\n")
    monkeypatch.setenv("STAGEWATCH_PORT", "9200")
    settings = Settings()
    assert settings.port == 9200
    assert settings.max_batch == 500


def test_arguments_override_environment(monkeypatch):
    monkeypatch.setenv("STAGEWATCH_PORT", "9200")
    assert Settings(port=9300).port == 9300
    assert load_settings(port=9400).port == 9400


def test_environment_field_types(monkeypatch):
    monkeypatch.setenv("STAGEWATCH_REQUIRE_KEYS", "false")
    monkeypatch.setenv("STAGEWATCH_RETENTION_ESTIMATES", "86400")
    monkeypatch.setenv("STAGEWATCH_CORS_ORIGINS", "https://a.example, https://b.example")
    settings = Settings()
    assert settings.require_keys is False
    assert settings.retention_estimates == 86_400.0
    assert settings.cors_origins == ["https://a.example", "https://b.example"]
    monkeypatch.setenv("STAGEWATCH_CORS_ORIGINS", '["https://c.example"]')
    assert Settings().cors_origins == ["https://c.example"]


def test_bootstrap_key_is_secret(monkeypatch):
    monkeypatch.setenv("STAGEWATCH_BOOTSTRAP_KEY", "sw_not-for-logs")
    settings = Settings()
    assert settings.bootstrap_key is not None
    assert settings.bootstrap_key.get_secret_value() == "sw_not-for-logs"
    assert "sw_not-for-logs" not in repr(settings)
    assert "sw_not-for-logs" not in settings.model_dump_json()


def test_empty_bootstrap_key_means_none(monkeypatch):
    monkeypatch.setenv("STAGEWATCH_BOOTSTRAP_KEY", "")
    assert Settings().bootstrap_key is None


def test_unrelated_stagewatch_variables_are_ignored(monkeypatch):
    # Other parts of stagewatch read their own variables (the numba cache folder).
    monkeypatch.setenv("STAGEWATCH_CACHE_DIR", "/tmp/elsewhere")
    assert Settings().port == 8470


# ---------------------------------------------------------------- errors


def test_missing_settings_file_is_an_error(monkeypatch, tmp_path):
    monkeypatch.setenv(SETTINGS_FILE_VARIABLE, str(tmp_path / "absent.toml"))
    with pytest.raises(SettingsError, match="no such file: .*absent.toml"):
        load_settings()


def test_unknown_key_in_file_is_an_error(monkeypatch, tmp_path):
    write_settings(tmp_path, monkeypatch, "prot = 9100\n")
    with pytest.raises(SettingsError, match="prot: Extra inputs are not permitted"):
        load_settings()


def test_malformed_file_names_the_file(monkeypatch, tmp_path):
    path = write_settings(tmp_path, monkeypatch, "port = [\n")
    with pytest.raises(SettingsError, match=str(path)):
        load_settings()


@pytest.mark.parametrize(
    ("variable", "value", "message"),
    [
        ("STAGEWATCH_PORT", "70000", "port: Input should be less than or equal to 65535"),
        ("STAGEWATCH_MAX_BATCH", "0", "max_batch: Input should be greater than or equal to 1"),
        ("STAGEWATCH_CHECKPOINT_EVERY", "0", "checkpoint_every: Input should be greater than 0"),
        ("STAGEWATCH_RETENTION_READINGS", "-1", "retention_readings: Input should be greater"),
    ],
)
def test_invalid_values_are_named(monkeypatch, variable, value, message):
    monkeypatch.setenv(variable, value)
    with pytest.raises(SettingsError, match=message):
        load_settings()


# ---------------------------------------------------------------- listen safety


@pytest.mark.parametrize(
    "host", ["127.0.0.1", "127.3.2.1", "::1", "[::1]", "localhost", "LOCALHOST", "::ffff:127.0.0.1"]
)
def test_loopback_hosts(host):
    assert is_loopback(host)


@pytest.mark.parametrize(
    "host", ["0.0.0.0", "::", "", "10.0.0.5", "192.168.1.2", "plant-server", "::ffff:10.0.0.1"]
)
def test_non_loopback_hosts(host):
    assert not is_loopback(host)


def test_loopback_is_allowed_without_keys():
    check_listen_safety(Settings(host="127.0.0.1"), keys_configured=False)
    check_listen_safety(Settings(host="::1", require_keys=False), keys_configured=False)


def test_open_interface_without_keys_is_refused():
    with pytest.raises(UnsafeBinding) as caught:
        check_listen_safety(Settings(host="0.0.0.0"), keys_configured=False)
    assert str(caught.value) == (
        "refusing to listen on 0.0.0.0 without API keys: create one with "
        "`stagewatch keys create --role admin`"
    )


def test_open_interface_with_keys_is_allowed():
    check_listen_safety(Settings(host="0.0.0.0"), keys_configured=True)
    check_listen_safety(
        Settings(host="10.0.0.5", bootstrap_key=SecretStr("sw_x")), keys_configured=False
    )


def test_open_interface_without_require_keys_is_refused_even_with_keys():
    settings = Settings(host="0.0.0.0", require_keys=False, bootstrap_key=SecretStr("sw_x"))
    with pytest.raises(UnsafeBinding, match="require_keys off"):
        check_listen_safety(settings, keys_configured=True)


def test_unsafe_binding_is_a_runtime_error():
    assert issubclass(UnsafeBinding, RuntimeError)
