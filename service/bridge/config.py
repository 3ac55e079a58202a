"""The bridge's configuration (TOML): sources, tag mapping, spool, service, write-back.

A bridge file names where readings come from (``[[sources]]``: CSV drop folders
and OPC UA servers), how each historian tag or node id maps onto a train's tag
(``[[tags]]``, with unit conversion and linear scaling), the local spool that
holds every reading until the service has taken it (``[spool]``), the service
to post to (``[service]``), how to forward (``[forward]``), the status line and
metrics (``[status]``) and, optionally, where to publish the latest estimates
(``[writeback]``). Durations carry units (``"5 s"``, ``"2 min"``). Relative
paths are taken relative to the folder of the bridge file, so a deployment can
keep its folders beside its configuration.

Loading collects every problem it finds and raises one
:class:`~estimator.errors.ConfigError` naming each entry at fault
(``sources[1].security_policy: ...``), like the train description does.
Secrets (the API key, OPC UA passwords) are never written in the file itself:
the file names an environment variable or a file that holds them.
"""

from __future__ import annotations

import math
import re
import tomllib
import zoneinfo
from collections.abc import Mapping, Sequence
from functools import cached_property
from pathlib import Path
from typing import Annotated, Any, Literal, Self

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    ValidationInfo,
    model_validator,
)

from estimator.errors import ConfigError, ConfigProblem, QuantityError
from estimator.errors import ConfigProblems as _Problems
from estimator.errors import config_error as _error
from estimator.errors import join_key as _join
from estimator.errors import raise_problems as _raise_if
from estimator.units import DIMENSIONS, UNITS_REQUIRED, quantity, unit_scale_offset

__all__ = [
    "BridgeConfig",
    "CsvFolderSourceConfig",
    "ForwardSection",
    "OpcUaSourceConfig",
    "ServiceSection",
    "SourceConfig",
    "SpoolSection",
    "StatusSection",
    "TagMapConfig",
    "WritebackConfig",
    "WritebackCsvConfig",
    "WritebackOpcUaConfig",
    "load_bridge_config",
    "parse_bridge_config",
]

_FROZEN = ConfigDict(extra="forbid", frozen=True)
_BASE_DIR = "bridge_base_dir"
_SLUG = re.compile(r"[a-z0-9][a-z0-9_-]{0,63}")
_SOURCE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,63}")
SECURITY_POLICIES = ("None", "Basic256Sha256", "Aes128Sha256RsaOaep", "Aes256Sha256RsaPss")


def _slug(value: str) -> str:
    if _SLUG.fullmatch(value) is None:
        raise _error(
            "must be 1 to 64 lowercase letters, digits, '-' or '_' (a train name such as "
            f"'wrenfield-line2'), got {value!r}"
        )
    return value


def _source_name(value: str) -> str:
    if _SOURCE_NAME.fullmatch(value) is None:
        raise _error(
            f"must be 1 to 64 letters, digits, '.', '-' or '_', starting with a letter or "
            f"digit, got {value!r}"
        )
    return value


def _text(value: str) -> str:
    if not value.strip() or value != value.strip():
        raise _error(f"must be non-empty text without surrounding spaces, got {value!r}")
    if len(value) > 256:
        raise _error(f"must be at most 256 characters, got {len(value)}")
    return value


def _resolve(value: Path, info: ValidationInfo) -> Path:
    """Take a relative path relative to the bridge file's folder."""
    base = info.context.get(_BASE_DIR) if isinstance(info.context, Mapping) else None
    value = value.expanduser()
    if not value.is_absolute() and base is not None:
        value = Path(base) / value
    return value


def _http_url(value: str) -> str:
    if not re.fullmatch(r"https?://[^\s/]+(/\S*)?", value):
        raise _error(f"must be an http:// or https:// URL, got {value!r}")
    return value


def _opc_url(value: str) -> str:
    if not value.startswith("opc.tcp://"):
        raise _error(f"must start with opc.tcp://, got {value!r}")
    return value


def _time_zone(value: str) -> str:
    try:
        zoneinfo.ZoneInfo(value)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise _error(f"unknown time zone {value!r}; use e.g. 'Europe/Vienna'") from None
    return value


def _time_format(value: str) -> str:
    if value not in ("iso", "epoch") and "%" not in value:
        raise _error(
            "must be 'iso', 'epoch' or a strptime pattern such as "
            f"'%d.%m.%Y %H:%M:%S', got {value!r}"
        )
    return value


def _finite(value: float) -> float:
    if not math.isfinite(value):
        raise _error(f"must be a finite number, got {value!r}")
    return value


TrainName = Annotated[str, AfterValidator(_slug)]
SourceName = Annotated[str, AfterValidator(_source_name)]
Text = Annotated[str, AfterValidator(_text)]
HttpUrl = Annotated[str, AfterValidator(_text), AfterValidator(_http_url)]
OpcUrl = Annotated[str, AfterValidator(_text), AfterValidator(_opc_url)]
ConfigPath = Annotated[Path, AfterValidator(_resolve)]
Seconds = Annotated[float, quantity("time", gt=0.0)]
"""A positive duration, written with its unit ("5 s"), stored in [s]."""
SecondsOrZero = Annotated[float, quantity("time", ge=0.0)]
"""A duration that may be zero, stored in [s]."""
Finite = Annotated[float, AfterValidator(_finite)]
Port = Annotated[int, Field(ge=1, le=65535)]
SecurityPolicy = Literal["None", "Basic256Sha256", "Aes128Sha256RsaOaep", "Aes256Sha256RsaPss"]
SecurityMode = Literal["Sign", "SignAndEncrypt"]


class ServiceSection(BaseModel):
    """The stagewatch service the bridge posts to.

    Attributes
    ----------
    url : str
        Base URL, e.g. ``http://127.0.0.1:8470``.
    key_file : Path, optional
        File holding the API key (role ``ingest`` or higher), first line.
    key_env : str, optional
        Name of the environment variable holding the API key instead.
    timeout : float
        Time allowed for one request [s].
    """

    model_config = _FROZEN

    url: HttpUrl
    key_file: ConfigPath | None = None
    key_env: Text | None = None
    timeout: Seconds = 10.0

    @model_validator(mode="after")
    def _check(self) -> Self:
        if (self.key_file is None) == (self.key_env is None):
            raise _Problems(
                [("key_file", "give the API key's file (key_file) or its variable (key_env), one")]
            )
        return self


class SpoolSection(BaseModel):
    """The local spool (SQLite) that holds readings until the service has them.

    Attributes
    ----------
    path : Path
        The spool's database file (created if missing).
    max_readings : int
        Most readings waiting to be sent; when it is reached, new readings are
        refused (a CSV file waits in its folder, OPC UA values are dropped and
        counted).
    warn_fraction : float
        Share of ``max_readings`` above which every status line is a warning [-].
    keep_sent : float
        How long sent and refused readings stay in the spool for inspection [s];
        they also make room when the spool is full.
    """

    model_config = _FROZEN

    path: ConfigPath
    max_readings: Annotated[int, Field(ge=10)] = 1_000_000
    warn_fraction: Annotated[float, Field(gt=0.0, lt=1.0)] = 0.8
    keep_sent: Seconds = 86_400.0


class ForwardSection(BaseModel):
    """How spooled readings are posted to the service.

    Attributes
    ----------
    batch_size : int
        Most readings in one request.
    retry_initial : float
        First wait after a network error or a 5xx answer [s]; it doubles on each
        further failure, with random jitter, up to ``retry_max``.
    retry_max : float
        Longest wait between attempts [s].
    bad_quality : {"withhold", "send"}
        What to do with a reading whose quality is bad (below 64) but which has a
        value: keep it in the spool only (default), or send it with its quality.
        A bad reading without a value is always withheld.
    once_attempts : int
        With ``--once``: failed attempts in a row before giving up and leaving
        the rest in the spool for the next run.
    """

    model_config = _FROZEN

    batch_size: Annotated[int, Field(ge=1, le=10_000)] = 500
    retry_initial: Seconds = 1.0
    retry_max: Seconds = 300.0
    bad_quality: Literal["withhold", "send"] = "withhold"
    once_attempts: Annotated[int, Field(ge=1)] = 5

    @model_validator(mode="after")
    def _check(self) -> Self:
        if self.retry_max < self.retry_initial:
            raise _Problems([("retry_max", "must not be shorter than retry_initial")])
        return self


class StatusSection(BaseModel):
    """The status line and the Prometheus metrics.

    Attributes
    ----------
    interval : float
        Time between status lines [s].
    metrics_port : int, optional
        TCP port of the Prometheus text endpoint; none by default.
    metrics_host : str
        Address the metrics endpoint listens on.
    """

    model_config = _FROZEN

    interval: Seconds = 60.0
    metrics_port: Port | None = None
    metrics_host: Text = "127.0.0.1"


class CsvFolderSourceConfig(BaseModel):
    """A drop folder for the historian's scheduled CSV exports.

    Each file matching ``pattern`` is read once, whole, and moved to
    ``done_folder`` once its readings are in the spool, or to ``failed_folder``
    with a ``<file>.reason.txt`` beside it when it cannot be read. Long form has
    a tag, a time, a value and optionally a quality column; wide form has a time
    column and one column per tag (an empty cell is no reading).

    Attributes
    ----------
    time_format : str
        ``"iso"`` (ISO 8601), ``"epoch"`` (seconds since 1970-01-01 UTC) or a
        ``strptime`` pattern such as ``"%d.%m.%Y %H:%M:%S"``.
    time_zone : str
        IANA zone of times written without an offset, e.g. ``"Europe/Vienna"``.
    decimal : {".", ","}
        Decimal mark of the values.
    delimiter : str, optional
        Column separator; default ``","``, or ``";"`` with a decimal comma.
    quality_codes : dict
        Quality as written -> quality byte 0-255 (bad below 64, good from 192).
        Without it, numbers 0-255 pass unchanged and ``good``, ``uncertain``
        and ``bad`` map to 192, 64 and 0.
    poll : float
        Time between looks at the folder [s].
    settle : float
        A file is taken only when it has not changed for this long [s], so a
        file still being written is left alone.
    train : str, optional
        Train for tags without a ``[[tags]]`` entry: they pass under their own
        name. Without it such tags are counted as unmapped and skipped.
    """

    model_config = _FROZEN

    kind: Literal["csv_folder"]
    name: SourceName
    folder: ConfigPath
    done_folder: ConfigPath | None = None
    failed_folder: ConfigPath | None = None
    pattern: Text = "*.csv"
    form: Literal["long", "wide"] = "long"
    tag_column: Text = "tag"
    time_column: Text = "time"
    value_column: Text = "value"
    quality_column: Text = "quality"
    time_format: Annotated[str, AfterValidator(_time_format)] = "iso"
    time_zone: Annotated[str, AfterValidator(_time_zone)] = "UTC"
    decimal: Literal[".", ","] = "."
    delimiter: str | None = None
    encoding: Text = "utf-8-sig"
    quality_codes: dict[str, Annotated[int, Field(ge=0, le=255)]] = Field(default_factory=dict)
    poll: Seconds = 10.0
    settle: SecondsOrZero = 2.0
    train: TrainName | None = None

    @model_validator(mode="after")
    def _check(self) -> Self:
        problems: list[tuple[str, str]] = []
        if self.delimiter is not None:
            if len(self.delimiter) != 1 or self.delimiter in '\r\n"':
                problems.append(("delimiter", f"must be one character, got {self.delimiter!r}"))
            elif self.delimiter == self.decimal:
                problems.append(("delimiter", "must differ from the decimal mark"))
        if self.form == "long":
            columns = [self.tag_column, self.time_column, self.value_column, self.quality_column]
            if len(set(columns)) != len(columns):
                problems.append(("tag_column", "the column names must differ from each other"))
        _raise_if(problems)
        return self

    @property
    def column_separator(self) -> str:
        """The delimiter in use: as configured, else ``;`` with a decimal comma."""
        if self.delimiter is not None:
            return self.delimiter
        return ";" if self.decimal == "," else ","

    @property
    def done(self) -> Path:
        """Where files go once their readings are spooled."""
        return self.done_folder or self.folder / "done"

    @property
    def failed(self) -> Path:
        """Where files go that cannot be read, with the reason beside them."""
        return self.failed_folder or self.folder / "failed"


class OpcUaSourceConfig(BaseModel):
    """An OPC UA server whose nodes are read by polling or by subscription.

    The nodes read are the ``source_tag`` node ids of the ``[[tags]]`` entries
    that name this source. Each value keeps its source timestamp (else the
    server's) and its status code; a bad status code travels as quality 0
    without a value.

    Attributes
    ----------
    endpoint : str
        ``opc.tcp://host:port/path``.
    mode : {"poll", "subscribe"}
        Read every node each ``interval``, or subscribe to data changes with
        ``interval`` as the publishing interval.
    interval : float
        Polling or publishing interval [s].
    queue_size : int
        Values the server queues per node between publishes (subscription).
    security_policy : str
        ``"None"`` (no signing, no encryption: say so explicitly),
        ``"Basic256Sha256"``, ``"Aes128Sha256RsaOaep"`` or ``"Aes256Sha256RsaPss"``.
    security_mode : {"Sign", "SignAndEncrypt"}
        With a security policy other than None.
    certificate, private_key : Path
        The bridge's application certificate and key (needed with a policy).
    server_certificate : Path, optional
        The server's certificate; fetched from the endpoint list when absent.
    user, password_env, password_file :
        User-name login; the password comes from a variable or a file.
    user_certificate, user_private_key : Path
        Certificate login instead.
    anonymous : bool
        Log in anonymously; only when set true.
    timeout : float
        Time allowed for one request [s].
    reconnect_max : float
        Longest wait between reconnection attempts [s].
    """

    model_config = _FROZEN

    kind: Literal["opcua"]
    name: SourceName
    endpoint: OpcUrl
    mode: Literal["poll", "subscribe"] = "poll"
    interval: Seconds = 5.0
    queue_size: Annotated[int, Field(ge=1, le=10_000)] = 100
    security_policy: SecurityPolicy
    security_mode: SecurityMode = "SignAndEncrypt"
    certificate: ConfigPath | None = None
    private_key: ConfigPath | None = None
    private_key_password_env: Text | None = None
    server_certificate: ConfigPath | None = None
    application_uri: Text | None = None
    user: Text | None = None
    password_env: Text | None = None
    password_file: ConfigPath | None = None
    user_certificate: ConfigPath | None = None
    user_private_key: ConfigPath | None = None
    anonymous: bool = False
    timeout: Seconds = 5.0
    reconnect_max: Seconds = 60.0

    @model_validator(mode="after")
    def _check(self) -> Self:
        problems: list[tuple[str, str]] = []
        if self.security_policy != "None":
            for key in ("certificate", "private_key"):
                if getattr(self, key) is None:
                    problems.append(
                        (key, f"required with security_policy {self.security_policy!r}")
                    )
        logins = [
            name
            for name, given in (
                ("user", self.user is not None),
                ("user_certificate", self.user_certificate is not None),
                ("anonymous", self.anonymous),
            )
            if given
        ]
        if not logins:
            problems.append(
                (
                    "user",
                    "choose a login: user with password_env or password_file, "
                    "user_certificate with user_private_key, or anonymous = true",
                )
            )
        elif len(logins) > 1:
            problems.append((logins[1], f"give one login only, not {' and '.join(logins)}"))
        if self.user is not None:
            if (self.password_env is None) == (self.password_file is None):
                problems.append(("password_env", "give password_env or password_file, one"))
            if self.security_policy == "None":
                problems.append(
                    (
                        "user",
                        "a password would travel in clear text with security_policy 'None'; "
                        "choose a security policy or another login",
                    )
                )
        if (self.user_certificate is None) != (self.user_private_key is None):
            problems.append(("user_private_key", "give user_certificate and user_private_key"))
        _raise_if(problems)
        return self


SourceConfig = Annotated[CsvFolderSourceConfig | OpcUaSourceConfig, Field(discriminator="kind")]
"""One source of readings, told apart by its ``kind``."""


def _dimension_of(unit: str) -> str | None:
    """Find the dimension (one of :data:`estimator.units.DIMENSIONS`) of a unit, if any."""
    for dimension in DIMENSIONS:
        try:
            unit_scale_offset(unit, dimension)
        except QuantityError:
            continue
        return dimension
    return None


class TagMapConfig(BaseModel):
    """One historian tag or node id, mapped onto a train's tag.

    The value sent is ``convert(scale * raw + offset)``: the linear scaling
    first (raw counts to the source's unit, say), then the unit conversion from
    ``unit`` to ``train_unit`` (the unit the train declares for the tag).

    Attributes
    ----------
    source_tag : str
        The historian's tag, or the OPC UA node id (``ns=2;s=Line2.FI200``).
    train, tag : str
        Where the readings go.
    source : str, optional
        Name of the source this entry belongs to; required for OPC UA nodes.
        Without it, it applies to every CSV source.
    unit, train_unit : str, optional
        Unit of the source values and of the train's tag; both or neither.
    scale, offset : float
        Linear scaling applied to the raw value first [-], [unit].
    """

    model_config = _FROZEN

    source_tag: Text
    train: TrainName
    tag: Text
    source: SourceName | None = None
    unit: Text | None = None
    train_unit: Text | None = None
    scale: Finite = 1.0
    offset: Finite = 0.0

    @model_validator(mode="after")
    def _check(self) -> Self:
        problems: list[tuple[str, str]] = []
        if (self.unit is None) != (self.train_unit is None):
            problems.append(("train_unit", "give unit and train_unit together, or neither"))
        elif self.unit is not None and self.train_unit is not None:
            dimension = _dimension_of(self.train_unit)
            if dimension is None:
                problems.append(
                    (
                        "train_unit",
                        f"{self.train_unit!r} is not a unit stagewatch reads (a flow, "
                        "temperature, concentration, duration or plain number)",
                    )
                )
            else:
                try:
                    unit_scale_offset(self.unit, dimension)
                except QuantityError as exc:
                    problems.append(
                        ("unit", f"cannot convert {self.unit!r} to {self.train_unit!r}: {exc}")
                    )
        if self.scale == 0.0:
            problems.append(("scale", "must not be zero"))
        _raise_if(problems)
        return self

    @cached_property
    def gain_and_bias(self) -> tuple[float, float]:
        """The whole map as ``train_value = gain * raw + bias``.

        Returns
        -------
        gain : float
            Train-unit per raw unit.
        bias : float
            Train value of a raw zero [train unit].
        """
        if self.unit is None or self.train_unit is None:
            return self.scale, self.offset
        dimension = _dimension_of(self.train_unit)
        assert dimension is not None  # checked when the entry was validated
        source_scale, source_offset = unit_scale_offset(self.unit, dimension)
        train_scale, train_offset = unit_scale_offset(self.train_unit, dimension)
        gain = source_scale * self.scale / train_scale
        bias = (source_scale * self.offset + source_offset - train_offset) / train_scale
        return gain, bias


class WritebackOpcUaConfig(BaseModel):
    """The OPC UA server the bridge runs to publish estimates (read-only variables).

    Attributes
    ----------
    endpoint : str
        ``opc.tcp://host:port/path`` to listen on.
    namespace : str
        Namespace URI of the published variables.
    security_policy : str
        ``"None"`` (say so explicitly) or a policy that needs ``certificate``
        and ``private_key``.
    """

    model_config = _FROZEN

    endpoint: OpcUrl
    namespace: Text = "urn:stagewatch:bridge:estimates"
    security_policy: SecurityPolicy
    security_mode: SecurityMode = "SignAndEncrypt"
    certificate: ConfigPath | None = None
    private_key: ConfigPath | None = None

    @model_validator(mode="after")
    def _check(self) -> Self:
        problems: list[tuple[str, str]] = []
        if self.security_policy != "None":
            for key in ("certificate", "private_key"):
                if getattr(self, key) is None:
                    problems.append(
                        (key, f"required with security_policy {self.security_policy!r}")
                    )
        _raise_if(problems)
        return self


class WritebackCsvConfig(BaseModel):
    """A CSV file the historian imports, appended with the latest estimates.

    Long form: ``tag,time,value`` with tags such as ``wrenfield-line2.R-201.conversion``
    and times in ISO 8601 UTC.
    """

    model_config = _FROZEN

    path: ConfigPath
    delimiter: Literal[",", ";", "\t"] = ","
    decimal: Literal[".", ","] = "."

    @model_validator(mode="after")
    def _check(self) -> Self:
        if self.delimiter == self.decimal:
            raise _Problems([("delimiter", "must differ from the decimal mark")])
        return self


class WritebackConfig(BaseModel):
    """Publishing the latest estimates back to the plant.

    Attributes
    ----------
    trains : list of str
        Trains whose estimates are published.
    interval : float
        Time between publications [s].
    opcua, csv :
        Where to publish; at least one.
    """

    model_config = _FROZEN

    trains: Annotated[list[TrainName], Field(min_length=1)]
    interval: Seconds = 30.0
    opcua: WritebackOpcUaConfig | None = None
    csv: WritebackCsvConfig | None = None

    @model_validator(mode="after")
    def _check(self) -> Self:
        if self.opcua is None and self.csv is None:
            raise _Problems([("opcua", "give [writeback.opcua], [writeback.csv] or both")])
        return self


class BridgeConfig(BaseModel):
    """A whole bridge file, validated."""

    model_config = _FROZEN

    service: ServiceSection
    spool: SpoolSection
    forward: ForwardSection = ForwardSection()
    status: StatusSection = StatusSection()
    sources: Annotated[list[SourceConfig], Field(min_length=1)]
    tags: list[TagMapConfig] = Field(default_factory=list)
    writeback: WritebackConfig | None = None

    @model_validator(mode="after")
    def _cross_check(self) -> Self:
        problems: list[tuple[str, str]] = []
        kinds: dict[str, str] = {}
        for i, source in enumerate(self.sources):
            if source.name in kinds:
                problems.append((f"sources[{i}].name", f"{source.name!r} is used twice"))
            kinds[source.name] = source.kind
        seen: set[tuple[str | None, str, str, str]] = set()
        for i, entry in enumerate(self.tags):
            key = (entry.source, entry.source_tag, entry.train, entry.tag)
            if key in seen:
                problems.append((f"tags[{i}]", f"{entry.source_tag!r} is mapped twice"))
            seen.add(key)
            if entry.source is not None and entry.source not in kinds:
                problems.append((f"tags[{i}].source", f"no source named {entry.source!r}"))
        for i, source in enumerate(self.sources):
            if isinstance(source, OpcUaSourceConfig):
                nodes = [t for t in self.tags if t.source == source.name]
                if not nodes:
                    problems.append(
                        (f"sources[{i}]", "no [[tags]] entry names this source: nothing to read")
                    )
                problems.extend(_node_id_problems(self.tags, source.name))
        _raise_if(problems)
        return self

    def tags_of(self, source: str) -> list[TagMapConfig]:
        """List the mapping entries of one source (OPC UA: the nodes it reads)."""
        return [t for t in self.tags if t.source == source]


def _node_id_problems(tags: Sequence[TagMapConfig], source: str) -> list[tuple[str, str]]:
    """Check the node ids of an OPC UA source's entries (asyncua parses them)."""
    from asyncua import ua

    problems: list[tuple[str, str]] = []
    for i, entry in enumerate(tags):
        if entry.source != source:
            continue
        try:
            ua.NodeId.from_string(entry.source_tag)
        except Exception:  # asyncua raises its own parsing error types
            problems.append(
                (
                    f"tags[{i}].source_tag",
                    f"not an OPC UA node id such as 'ns=2;s=Line2.FI200', got {entry.source_tag!r}",
                )
            )
    return problems


def _dotted(loc: Sequence[str | int]) -> str:
    key = ""
    for part in loc:
        if isinstance(part, int):
            key += f"[{part}]"
        elif part in ("csv_folder", "opcua"):
            continue  # the discriminator's branch name, not a key of the file
        else:
            key = f"{key}.{part}" if key else str(part)
    return key


def _reason(error: Mapping[str, Any]) -> str:
    kind = error["type"]
    value = error.get("input")
    shown = repr(value) if len(repr(value)) <= 60 else repr(value)[:57] + "..."
    context = error.get("ctx") or {}
    if kind == "missing":
        return "required"
    if kind == "extra_forbidden":
        return "unknown key (check the spelling)"
    if kind in ("quantity", "config"):
        return str(error["msg"])
    if kind == "value_error" and "error" in context:
        return str(context["error"])
    if kind == "literal_error":
        return f"must be {context.get('expected', 'one of the listed values')}, got {shown}"
    if kind == "union_tag_invalid":
        return f"kind must be 'csv_folder' or 'opcua', got {context.get('tag')!r}"
    if kind == "union_tag_not_found":
        return "kind is required: 'csv_folder' or 'opcua'"
    message = str(error["msg"])
    return f"{message[:1].lower()}{message[1:]}, got {shown}"


def _translate(exc: ValidationError) -> list[ConfigProblem]:
    problems: list[ConfigProblem] = []
    for error in exc.errors(include_url=False):
        key = _dotted(error["loc"])
        cause = (error.get("ctx") or {}).get("error")
        if isinstance(cause, _Problems):
            problems.extend(ConfigProblem(_join(key, rel), why) for rel, why in cause.problems)
        else:
            problems.append(ConfigProblem(key or "bridge config", _reason(error)))
    return problems


def parse_bridge_config(
    data: Mapping[str, Any], source: str = "bridge config", base_dir: Path | None = None
) -> BridgeConfig:
    """Validate a bridge configuration already read into Python objects.

    Parameters
    ----------
    data : Mapping
        The document as read from TOML.
    source : str, optional
        What to call the document in the error (a file path).
    base_dir : Path, optional
        Folder relative paths are taken from (the file's folder).

    Returns
    -------
    BridgeConfig
        The validated configuration, durations in [s], paths absolute when
        ``base_dir`` is given.

    Raises
    ------
    ConfigError
        Listing every problem found, each under its dotted key.
    """
    try:
        return BridgeConfig.model_validate(
            data, context={UNITS_REQUIRED: True, _BASE_DIR: base_dir}
        )
    except ValidationError as exc:
        problems = list(dict.fromkeys(_translate(exc)))
        raise ConfigError(problems, source) from None


def load_bridge_config(path: str | Path) -> BridgeConfig:
    """Read and validate a bridge file (TOML).

    Parameters
    ----------
    path : str or Path
        The bridge's ``.toml`` file.

    Returns
    -------
    BridgeConfig
        The validated configuration; relative paths are resolved against the
        file's folder.

    Raises
    ------
    ConfigError
        The file cannot be read or parsed (key ``<file>``), or its content has
        problems (see :func:`parse_bridge_config`).
    """
    file = Path(path)
    try:
        text = file.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        problem = ConfigProblem("<file>", f"cannot read the file: {exc}")
        raise ConfigError([problem], str(file)) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError([ConfigProblem("<file>", f"TOML syntax: {exc}")], str(file)) from None
    return parse_bridge_config(data, str(file), base_dir=file.resolve().parent)
