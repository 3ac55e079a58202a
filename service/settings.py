"""Settings of the stagewatch service, and the check that keeps it off open networks.

Every setting has a default, may be written in a TOML settings file and may be
set in the environment as ``STAGEWATCH_<NAME>`` (``STAGEWATCH_PORT=9000``). When
the same setting comes from several places, the environment wins over the file,
and the file over the default. The file is named by ``STAGEWATCH_SETTINGS_FILE``;
its keys are the field names, at the top level::

    host = "0.0.0.0"
    port = 8470
    data_dir = "/var/lib/stagewatch"
    retention_readings = 2_592_000.0   # 30 days [s]
    cors_origins = ["https://dashboard.example.com"]
    webhooks = ["https://alerts.example.com/stagewatch"]

A key the service does not know is an error (a typo would otherwise be ignored).
In the environment, ``STAGEWATCH_CORS_ORIGINS`` and ``STAGEWATCH_WEBHOOKS`` take a
JSON list or a comma-separated list.

Times are in seconds. ``future_tolerance`` is wall-clock time; ``checkpoint_every``
and the retention periods are plant time (the readings' time stamps).
"""

from __future__ import annotations

import ipaddress
import json
import os
from pathlib import Path
from typing import Annotated, Any

from pydantic import Field, SecretStr, ValidationError, field_validator, model_validator
from pydantic_settings import (
    BaseSettings,
    NoDecode,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
    TomlConfigSettingsSource,
)

__all__ = [
    "ENV_PREFIX",
    "SETTINGS_FILE_VARIABLE",
    "Settings",
    "SettingsError",
    "UnsafeBinding",
    "check_listen_safety",
    "is_loopback",
    "load_settings",
]

ENV_PREFIX = "STAGEWATCH_"
SETTINGS_FILE_VARIABLE = f"{ENV_PREFIX}SETTINGS_FILE"


class SettingsError(ValueError):
    """Settings that cannot be read or are invalid; the message names each problem."""


class UnsafeBinding(RuntimeError):
    """The service was asked to listen beyond this machine without API keys."""


class Settings(BaseSettings):
    """Settings of the stagewatch service.

    Sources, highest precedence first: arguments to the constructor, environment
    variables ``STAGEWATCH_<NAME>``, the TOML file named by
    ``STAGEWATCH_SETTINGS_FILE``, the defaults below.

    Attributes
    ----------
    database_url : str
        SQLAlchemy URL of the database. Default: a SQLite file
        ``stagewatch.db`` in ``data_dir``.
    data_dir : Path
        Folder for the service's files (the default database among them).
    host : str
        Address to listen on. Anything but a loopback address needs API keys
        (see :func:`check_listen_safety`).
    port : int
        TCP port to listen on.
    require_keys : bool
        Whether requests must carry an API key. Turning it off makes every
        request an administrator's, and is refused unless ``host`` is loopback.
    future_tolerance : float
        Readings stamped more than this far ahead of the server's clock are
        refused [s].
    estimate_every : float or None
        Store one estimate row per this interval of plant time [s] (the last of
        each interval), None for every row. The latest estimate and the live
        stream carry every row; history reads downsample further with ``every``.
    checkpoint_min_wall : float
        Least wall-clock time between two checkpoints of one train [s]; default
        10. Plant time alone would checkpoint a back-filled train every few
        requests.
    database_timeout : float
        How long a database operation waits for a lock held by another writer
        before the request is answered 503 with Retry-After [s]; default 5.
    event_memory : float
        Span of each train's in-memory event log [s of plant time] (at least its
        largest dead time plus two snapshot intervals). Older readings stay in the
        journal; a late reading sampled before the window reads them back, so the
        estimates are the same as with the whole horizon in memory.
    checkpoint_every : float
        Interval between saved estimator checkpoints [s of plant time].
    retention_readings, retention_estimates : float or None
        How long readings and estimates are kept [s of plant time]; None keeps
        them for ever.
    max_batch : int
        Most readings accepted in one request.
    max_body_bytes : int
        Largest request body accepted [bytes]; a larger one is answered 413.
    ingest_rate_limit : float or None
        Readings per second each API key may post on average [1/s], with bursts
        of 10 s worth (at least one full batch); beyond it ingest answers 429
        with ``Retry-After``. None (the default): no limit.
    log_json : bool
        Write logs as JSON lines (True) or as text for a terminal (False).
    bootstrap_key : SecretStr or None
        An administrator key taken from the environment, for a first start
        before any key is stored (``make run`` sets one). Prefer stored keys
        (``stagewatch keys create``) for anything that lasts.
    cors_origins : list of str
        Origins allowed to call the API from a browser; empty allows none.
    webhooks : list of str
        ``http://`` or ``https://`` URLs to which every alert event is posted as
        JSON (see :mod:`service.webhooks`); empty posts nowhere.
    """

    model_config = SettingsConfigDict(
        env_prefix=ENV_PREFIX,
        extra="forbid",
        validate_default=True,
    )

    database_url: str = Field(
        default="",
        description="SQLAlchemy database URL; default sqlite:///<data_dir>/stagewatch.db.",
    )
    data_dir: Path = Field(default=Path("./var"), description="Folder for the service's files.")
    host: str = Field(default="127.0.0.1", min_length=1, description="Address to listen on.")
    port: int = Field(default=8470, ge=1, le=65535, description="TCP port to listen on.")
    require_keys: bool = Field(default=True, description="Whether requests need an API key.")
    future_tolerance: float = Field(
        default=300.0, ge=0.0, description="Refuse readings stamped further ahead [s]."
    )
    checkpoint_every: float = Field(
        default=300.0, gt=0.0, description="Checkpoint interval [s of plant time]."
    )
    estimate_every: float | None = Field(
        default=10.0,
        gt=0.0,
        description=(
            "Store one estimate row per this interval of plant time [s], the last of "
            "each; None stores every row. The latest estimate and the live stream "
            "carry every row."
        ),
    )
    database_timeout: float = Field(
        default=5.0,
        gt=0.0,
        description="How long a write waits for a locked database before a 503 [s].",
    )
    checkpoint_min_wall: float = Field(
        default=10.0,
        ge=0.0,
        description="Least wall-clock time between two checkpoints of a train [s].",
    )
    event_memory: float = Field(
        default=300.0,
        gt=0.0,
        description=(
            "Span of each train's in-memory event log [s of plant time]; a late reading "
            "sampled before it reads older readings back from the journal."
        ),
    )
    retention_readings: float | None = Field(
        default=None, gt=0.0, description="Keep readings this long [s]; None: for ever."
    )
    retention_estimates: float | None = Field(
        default=None, gt=0.0, description="Keep estimates this long [s]; None: for ever."
    )
    max_batch: int = Field(default=10_000, ge=1, description="Most readings in one request.")
    max_body_bytes: int = Field(
        default=4_000_000, ge=1, description="Largest request body [bytes]."
    )
    ingest_rate_limit: float | None = Field(
        default=None,
        gt=0.0,
        allow_inf_nan=False,
        description="Readings per second each API key may post [1/s]; None: no limit.",
    )
    log_json: bool = Field(default=True, description="Log JSON lines rather than text.")
    bootstrap_key: SecretStr | None = Field(
        default=None, description="Administrator key for a first start."
    )
    cors_origins: Annotated[list[str], NoDecode] = Field(
        default_factory=list, description="Origins allowed to call the API from a browser."
    )
    webhooks: Annotated[list[str], NoDecode] = Field(
        default_factory=list, description="URLs to post every alert event to, as JSON."
    )

    @field_validator("cors_origins", "webhooks", mode="before")
    @classmethod
    def _split_origins(cls, value: Any) -> Any:
        """Accept a JSON list or a comma-separated string (as the environment gives)."""
        if not isinstance(value, str):
            return value
        text = value.strip()
        if text.startswith("["):
            return json.loads(text)
        return [part.strip() for part in text.split(",") if part.strip()]

    @field_validator("webhooks")
    @classmethod
    def _web_urls(cls, value: list[str]) -> list[str]:
        """Refuse a webhook that is not an http:// or https:// URL."""
        for url in value:
            if not url.lower().startswith(("http://", "https://")):
                raise ValueError(f"webhook {url!r} must be an http:// or https:// URL")
        return value

    @field_validator("bootstrap_key")
    @classmethod
    def _no_empty_key(cls, value: SecretStr | None) -> SecretStr | None:
        """Treat an empty bootstrap key (``STAGEWATCH_BOOTSTRAP_KEY=``) as none."""
        if value is not None and not value.get_secret_value().strip():
            return None
        return value

    @model_validator(mode="after")
    def _default_database(self) -> Settings:
        """Place the default SQLite database in ``data_dir``."""
        if not self.database_url:
            self.database_url = f"sqlite:///{self.data_dir / 'stagewatch.db'}"
        return self

    @classmethod
    def settings_customise_sources(
        cls,
        settings_cls: type[BaseSettings],
        init_settings: PydanticBaseSettingsSource,
        env_settings: PydanticBaseSettingsSource,
        dotenv_settings: PydanticBaseSettingsSource,
        file_secret_settings: PydanticBaseSettingsSource,
    ) -> tuple[PydanticBaseSettingsSource, ...]:
        """Read the constructor's arguments, then the environment, then the file.

        Parameters
        ----------
        settings_cls : type
            The settings class being built.
        init_settings, env_settings, dotenv_settings, file_secret_settings : source
            The sources pydantic-settings offers; no ``.env`` file or secrets
            folder is read.

        Returns
        -------
        tuple of source
            Highest precedence first.

        Raises
        ------
        SettingsError
            When ``STAGEWATCH_SETTINGS_FILE`` names a file that does not exist.
        """
        sources: list[PydanticBaseSettingsSource] = [init_settings, env_settings]
        path = os.environ.get(SETTINGS_FILE_VARIABLE, "").strip()
        if path:
            file = Path(path)
            if not file.is_file():
                raise SettingsError(f"{SETTINGS_FILE_VARIABLE}: no such file: {file}")
            sources.append(TomlConfigSettingsSource(settings_cls, toml_file=file))
        return tuple(sources)


def load_settings(**overrides: Any) -> Settings:
    """Read the settings, turning every problem into one :class:`SettingsError`.

    Parameters
    ----------
    **overrides
        Values that take precedence over every source (for the command line's
        ``--host`` and ``--port``, say).

    Returns
    -------
    Settings
        The validated settings.

    Raises
    ------
    SettingsError
        Naming each invalid setting (``port: Input should be less than or equal
        to 65535``), or an unreadable settings file.
    """
    try:
        return Settings(**overrides)
    except SettingsError:
        raise
    except ValidationError as exc:
        problems = "; ".join(
            f"{'.'.join(str(p) for p in err['loc']) or 'settings'}: {err['msg']}"
            for err in exc.errors()
        )
        raise SettingsError(f"invalid settings: {problems}") from None
    except (OSError, ValueError) as exc:  # tomllib.TOMLDecodeError is a ValueError
        source = os.environ.get(SETTINGS_FILE_VARIABLE, "settings file")
        raise SettingsError(f"{source}: {exc}") from None


def is_loopback(host: str) -> bool:
    """Whether ``host`` names an address reachable only from this machine.

    Parameters
    ----------
    host : str
        A host name or IP address, as given to the server (``"127.0.0.1"``,
        ``"::1"``, ``"[::1]"``, ``"localhost"``).

    Returns
    -------
    bool
        True for ``localhost`` and addresses in 127.0.0.0/8 or ``::1``
        (including the IPv4-mapped ``::ffff:127.x.y.z``). Other names are not
        resolved and count as not loopback, as do ``0.0.0.0``, ``::`` and ``""``
        (every interface).
    """
    name = host.strip().removeprefix("[").removesuffix("]").lower()
    if name == "localhost" or name.endswith(".localhost"):
        return True
    try:
        address = ipaddress.ip_address(name)
    except ValueError:
        return False
    if isinstance(address, ipaddress.IPv6Address) and address.ipv4_mapped is not None:
        return address.ipv4_mapped.is_loopback
    return address.is_loopback


def check_listen_safety(settings: Settings, keys_configured: bool) -> None:
    """Refuse to serve beyond this machine without API keys.

    Parameters
    ----------
    settings : Settings
        The service settings (``host``, ``require_keys``, ``bootstrap_key``).
    keys_configured : bool
        Whether the key store holds at least one key that is not revoked. A
        ``bootstrap_key`` in the settings counts as a key too.

    Raises
    ------
    UnsafeBinding
        When ``host`` is not a loopback address and either ``require_keys`` is
        off or no key exists: anyone on the network could then send readings
        and change the configuration.

    Notes
    -----
    On a loopback address everything is allowed: only this machine can connect,
    which is what a developer's ``make run`` and a reverse proxy on the same
    host both need.
    """
    if is_loopback(settings.host):
        return
    if not settings.require_keys:
        raise UnsafeBinding(
            f"refusing to listen on {settings.host} with require_keys off: every request "
            "would be an administrator's; turn require_keys on, or listen on 127.0.0.1"
        )
    if not keys_configured and settings.bootstrap_key is None:
        raise UnsafeBinding(
            f"refusing to listen on {settings.host} without API keys: create one with "
            "`stagewatch keys create --role admin`"
        )
