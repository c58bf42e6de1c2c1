"""Configuration: one validated model read from a TOML file and ``RWLS_`` environment variables.

A bad value stops the program with a message naming the key, e.g.
``channels.sub7_flow.forgetting_factor: must be in (0, 1], got 1.2``.

Environment variables override the file before validation: ``RWLS_HTTP__PORT=9090`` sets
``http.port``; ``__`` separates levels, which are lower-cased except a channel id
(``RWLS_CHANNELS__Flow__FORGETTING_FACTOR`` sets ``channels.Flow.forgetting_factor``).
A value is read as a TOML value when it parses as one (``9090``, ``true``, ``["1", "u"]``),
else as text; a text key (``broker.password``, ``broker.client_id``, a topic) always gets text.
The broker password is a ``SecretStr``: it never shows in ``repr`` or in an error message.
"""

from __future__ import annotations

import math
import os
import re
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Literal
from urllib.parse import urlsplit

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    SecretStr,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from estimator import ChannelBank, ChannelSettings, RegressorSpec, Weighting, WeightRule, parse_term
from service.config.alarm_settings import (
    ALARM_KINDS,
    AlarmKindConfig,
    AlarmsConfig,
    BaselineConfig,
    DetectorConfig,
    check_alarm_kinds,
    default_priority,
)
from service.config.environment import apply_environment
from service.config.false_alarm_budget import BudgetThresholds, derive_thresholds
from service.config.http_settings import HttpConfig
from service.config.shared_tables import validate_alike_once
from service.config.tag_settings import ChannelTagsConfig, TagsConfig
from service.config.token_settings import AuthConfig

__all__ = [
    "BrokerConfig",
    "ChannelConfig",
    "ConfigError",
    "EngineConfig",
    "HttpConfig",
    "RwlsConfig",
    "StoreConfig",
    "load_config",
    "parse_config",
]

_CHANNEL_ID = re.compile(r"^[A-Za-z0-9_.-]{1,128}$")
_BROKER_SCHEMES = {"mqtt": (1883, False), "mqtts": (8883, True)}
_TOPIC_MAX_BYTES = 65535  # MQTT strings carry a two-byte length prefix


class ConfigError(Exception):
    """The configuration is unusable; ``problems`` lists ``key: message`` lines."""

    def __init__(self, problems: list[str]) -> None:
        super().__init__("\n".join(problems))
        self.problems = problems


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class _StrictValues(_Strict):
    # No coercion in the service sections: ``port = "80"`` or ``qos = true`` is a mistake to report.
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


def _check_topic(value: str) -> str:
    """A concrete MQTT topic name (publish or exact subscription), as MQTT 3.1.1 section 4.7 allows."""
    if not value:
        raise ValueError("must not be empty")
    if "+" in value or "#" in value:
        raise ValueError(f"MQTT wildcards '+' and '#' are not allowed, got {value!r}")
    if "\x00" in value:
        raise ValueError("must not contain a NUL character")
    if len(value.encode("utf-8")) > _TOPIC_MAX_BYTES:
        raise ValueError(f"must be at most {_TOPIC_MAX_BYTES} bytes of UTF-8")
    return value


def _split_broker_url(url: str) -> tuple[str, int, bool]:
    """``(host, port, tls)`` of an ``mqtt://`` or ``mqtts://`` URL; ``ValueError`` says what is wrong.

    Messages never echo the whole URL: it might carry credentials.
    """
    if any(c.isspace() for c in url):
        raise ValueError("must not contain spaces")
    parts = urlsplit(url)
    if parts.scheme not in _BROKER_SCHEMES or not url.lower().startswith(parts.scheme + "://"):
        raise ValueError("must start with mqtt:// or mqtts:// (TLS)")
    default_port, tls = _BROKER_SCHEMES[parts.scheme]
    if "@" in parts.netloc:
        raise ValueError("must not hold credentials; use broker.username and broker.password")
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise ValueError("must be scheme://host[:port] with no path, query or fragment")
    if not parts.hostname:
        raise ValueError("needs a host, e.g. mqtt://127.0.0.1:1883")
    # The port is read by hand: urlsplit accepts 0 and reports other problems with its own wording.
    rest = parts.netloc.rpartition("]")[2] if parts.netloc.startswith("[") else parts.netloc
    _, colon, port_text = rest.partition(":")
    if not colon:
        return parts.hostname, default_port, tls
    if not port_text.isdigit() or not (1 <= int(port_text) <= 65535):
        raise ValueError(f"port must be an integer in 1..65535, got {port_text!r}")
    return parts.hostname, int(port_text), tls


class WeightRuleConfig(_Strict):
    """An application weight rule: count samples with ``low <= input <= high`` ``factor`` times."""

    input: str
    low: float
    high: float
    factor: float = Field(gt=0.0)

    @model_validator(mode="after")
    def _band(self) -> WeightRuleConfig:
        if not (math.isfinite(self.low) and math.isfinite(self.high) and self.low <= self.high):
            raise ValueError(f"need finite low <= high, got low={self.low}, high={self.high}")
        return self


def _one_term(text: str) -> str:
    parse_term(text)             # ValueError names the term and what is wrong with it
    return text


# One term of a list, checked on its own: every bad term of a list is reported in one pass, each by its index.
TermText = Annotated[str, AfterValidator(_one_term)]


class NoiseConfig(_Strict):
    """Noise-variance tracker of a channel."""

    half_life: float = Field(default=200.0, gt=0.0, description="memory in samples")
    half_life_seconds: float | None = Field(default=None, gt=0.0, description="memory in seconds instead")
    robust: bool = False
    warmup: int = Field(default=10, ge=1)
    initial_sigma: float = Field(default=1.0, gt=0.0, description="sigma assumed before warm-up (tracked)")
    model_terms: list[TermText] = Field(default_factory=list, description="operating-point log-variance terms")
    model_forgetting_factor: float = Field(default=0.999, gt=0.0, le=1.0)

    @field_validator("model_terms")
    @classmethod
    def _terms(cls, value: list[str]) -> list[str]:
        if value:
            RegressorSpec(value)
        return value


class ChannelConfig(_Strict):
    """One channel table, ``[channels.<id>]``."""

    terms: list[TermText] = Field(min_length=1)
    forgetting_factor: float = 1.0
    weighting: Weighting = Weighting.UNIT
    weight_rules: list[WeightRuleConfig] = Field(default_factory=list)
    covariance_limit: float = Field(default=1e6, gt=0.0)
    covariance_scale: Literal["estimated", "known"] = "estimated"
    noise: NoiseConfig = Field(default_factory=NoiseConfig)
    topic: str | None = Field(default=None, description="MQTT topic of the channel's samples")
    tags: ChannelTagsConfig | None = Field(default=None, description="the tags the channel's samples are "
                                           "assembled from, instead of a topic of whole samples")
    detectors: DetectorConfig = Field(default_factory=DetectorConfig)
    alarms: dict[str, AlarmKindConfig] = Field(default_factory=dict, description="attributes per alarm kind")
    baseline: BaselineConfig | None = Field(default=None, description="a baseline in force from the start")

    @model_validator(mode="after")
    def _baseline_terms(self) -> ChannelConfig:
        if self.baseline is not None:
            try:
                self.baseline.values(RegressorSpec(self.terms).names)
            except ValueError as exc:
                raise ValueError(f"baseline: {exc}") from None
        return self

    @model_validator(mode="after")
    def _tag_inputs(self) -> ChannelConfig:
        if self.tags is None:
            return self
        if self.topic is not None:
            raise ValueError("a channel takes whole samples on its topic or is assembled from tags, not both")
        if self.weighting == Weighting.SAMPLE:
            raise ValueError("weighting 'sample' needs each sample's sigma or weight, which tag messages do not "
                             "carry; use 'tracked' or 'unit' (with weight_rules) for a channel fed by tags")
        needed = set(RegressorSpec(self.terms).input_names)
        if self.noise.model_terms:
            needed |= set(RegressorSpec(self.noise.model_terms).input_names)
        named = set(self.tags.inputs)
        if needed - named:
            raise ValueError(f"tags.inputs: no tag for input(s) {', '.join(sorted(needed - named))} the terms use")
        if named - needed:
            raise ValueError(f"tags.inputs: input(s) {', '.join(sorted(named - needed))} not used by any term")
        return self

    @field_validator("alarms")
    @classmethod
    def _alarm_kinds(cls, value: dict[str, AlarmKindConfig]) -> dict[str, AlarmKindConfig]:
        return check_alarm_kinds(value)

    def priorities(self) -> dict[str, str]:
        """Priority of each alarm kind of this channel (configured, else the kind's default)."""
        configured = {kind: alarm.priority for kind, alarm in self.alarms.items() if alarm.priority}
        return {kind: configured.get(kind) or default_priority(kind) for kind in ALARM_KINDS}

    @field_validator("terms")
    @classmethod
    def _terms(cls, value: list[str]) -> list[str]:
        RegressorSpec(value)
        return value

    @field_validator("topic")
    @classmethod
    def _topic(cls, value: str | None) -> str | None:
        return None if value is None else _check_topic(value)

    @field_validator("forgetting_factor")
    @classmethod
    def _forgetting(cls, value: float) -> float:
        if not (0.0 < value <= 1.0):
            raise ValueError(f"must be in (0, 1], got {value}")
        return value

    def settings_key(self) -> tuple[object, ...]:
        """Equal keys give equal :meth:`settings`: the values it reads, its lists and tables by identity (the
        channels :mod:`service.config.shared_tables` copied from one validated table share them)."""
        return (id(self.terms), self.forgetting_factor, self.weighting, id(self.weight_rules), self.covariance_limit,
                self.covariance_scale, id(self.noise), id(self.detectors), id(self.alarms))

    def settings(self, budget: BudgetThresholds | None = None) -> ChannelSettings:
        """The estimator-side settings of this channel (detector thresholds from ``budget`` where not given)."""
        noise = self.noise
        derived = None if budget is None else {"offset_h": budget.offset_h, "variance_h": budget.variance_h,
                                               "drift_alpha": budget.drift_alpha}
        return ChannelSettings(
            terms=tuple(self.terms),
            forgetting_factor=self.forgetting_factor,
            weighting=self.weighting,
            weight_rules=tuple(WeightRule(r.input, r.low, r.high, r.factor) for r in self.weight_rules),
            covariance_limit=self.covariance_limit,
            covariance_scale=self.covariance_scale,
            noise_half_life=noise.half_life_seconds if noise.half_life_seconds is not None else noise.half_life,
            noise_half_life_in_seconds=noise.half_life_seconds is not None,
            noise_robust=noise.robust,
            noise_warmup=noise.warmup,
            initial_sigma=noise.initial_sigma,
            noise_model_terms=tuple(noise.model_terms),
            noise_model_forgetting_factor=noise.model_forgetting_factor,
            detectors=self.detectors.settings(self.alarms, derived),
        )


class BrokerConfig(_StrictValues):
    """``[broker]``: the MQTT connection of the live service.

    ``host``, ``port`` and ``tls`` are read from ``url``; the TLS file paths and the
    credentials are empty when unused.
    """

    url: str = "mqtt://127.0.0.1:1883"
    client_id: str = Field(default="rwls-1", min_length=1, max_length=128,
                           description="fixed id, so the broker keeps the session across reconnects")
    username: str = ""
    password: SecretStr = SecretStr("")
    ca_file: str = ""
    cert_file: str = ""
    key_file: str = ""
    qos: int = 1
    keepalive: int = Field(default=30, ge=5, le=3600, description="seconds")
    dead_letter_topic: str = "rwls/dead-letter"
    max_payload_bytes: int = Field(default=65536, ge=64, le=16 * 1024 * 1024)
    reconnect_min_delay: float = Field(default=0.5, gt=0.0, le=3600.0, allow_inf_nan=False,
                                       description="seconds")
    reconnect_max_delay: float = Field(default=30.0, gt=0.0, le=3600.0, allow_inf_nan=False,
                                       description="seconds")
    protocol: Literal["auto", "5", "3.1.1"] = Field(
        default="auto", description="MQTT version; auto tries 5 and falls back to 3.1.1")
    ingest: Literal["thread", "process"] = Field(
        default="process", description="run the MQTT client in a thread of the service or in its own process")

    @field_validator("url")
    @classmethod
    def _url(cls, value: str) -> str:
        _split_broker_url(value)
        return value

    @field_validator("password")
    @classmethod
    def _password(cls, value: SecretStr, info: ValidationInfo) -> SecretStr:
        # MQTT 3.1.1 section 3.1.2.9: no password without a user name.
        if value.get_secret_value() and not info.data.get("username"):
            raise ValueError("set but broker.username is empty")
        return value

    @field_validator("ca_file", "cert_file", "key_file")
    @classmethod
    def _tls_files(cls, value: str, info: ValidationInfo) -> str:
        url = info.data.get("url")
        if value and url is not None and not _split_broker_url(url)[2]:
            raise ValueError("TLS file given but broker.url is not mqtts://")
        if value and info.field_name == "key_file" and not info.data.get("cert_file"):
            raise ValueError("set but broker.cert_file is empty")
        return value

    @field_validator("qos")
    @classmethod
    def _qos(cls, value: int) -> int:
        if value not in (0, 1):
            raise ValueError(f"must be 0 or 1, got {value}")
        return value

    @field_validator("dead_letter_topic")
    @classmethod
    def _dead_letter(cls, value: str) -> str:
        return _check_topic(value)

    @field_validator("reconnect_max_delay")
    @classmethod
    def _delays(cls, value: float, info: ValidationInfo) -> float:
        low = info.data.get("reconnect_min_delay")
        if low is not None and value < low:
            raise ValueError(f"must be >= broker.reconnect_min_delay ({low}), got {value}")
        return value

    @property
    def host(self) -> str:
        """Broker host name or address (IPv6 without brackets)."""
        return _split_broker_url(self.url)[0]

    @property
    def port(self) -> int:
        """Broker port: the URL's, else 1883 for ``mqtt://`` and 8883 for ``mqtts://``."""
        return _split_broker_url(self.url)[1]

    @property
    def tls(self) -> bool:
        """Whether the connection uses TLS (``mqtts://``)."""
        return _split_broker_url(self.url)[2]


class StoreConfig(_StrictValues):
    """``[store]``: where the service keeps its data.

    ``path`` is the data directory (the input log, the ingest lock, and the SQLite store unless ``url``
    names a PostgreSQL database: ``postgresql://user@host:5432/db``).
    """

    path: str = Field(default="rwls-data", min_length=1)
    url: str = Field(default="", description="postgresql://... for a shared store; empty: SQLite in path")
    durable: bool = Field(default=True, description="input log, checkpoints and recovery (off: memory only)")
    checkpoint_seconds: float = Field(default=30.0, gt=0.0, le=86400.0, allow_inf_nan=False)
    history_step: float = Field(default=60.0, gt=0.0, allow_inf_nan=False, description="seconds between rows")
    history_retention_days: float = Field(default=30.0, gt=0.0, allow_inf_nan=False)
    schema_name: str = Field(default="", pattern=r"^([a-z_][a-z0-9_]{0,62})?$",
                             description="PostgreSQL schema of this replica's tables; empty: the default, "
                                         "or rwls_shard_K_of_N when sharded")

    @field_validator("url")
    @classmethod
    def _url(cls, value: str) -> str:
        if value and not value.startswith(("postgresql://", "postgresql+psycopg://", "sqlite:///")):
            raise ValueError("must be postgresql://user@host:port/database (or sqlite:///file)")
        return value


class FleetConfig(_StrictValues):
    """``[fleet]``: this replica's share of the channels, and where the other replicas answer.

    ``shard`` is ``"K/N"`` (or ``"auto/N"``: K from the StatefulSet ordinal at the end of the host name);
    empty: one replica owns every channel. ``replicas`` lists every replica's base URL by index
    (``http://rwls-0.rwls:8080``, ...), for reads of channels owned elsewhere and the fleet snapshot.
    """

    shard: str = Field(default="", description="K/N or auto/N; empty: not sharded")
    replicas: tuple[str, ...] = Field(default=(), description="base URL of every replica, by index")
    reads: Literal["proxy", "redirect"] = Field(
        default="proxy", description="a read of another replica's channel: fetched for the caller, or 307")
    peer_timeout: float = Field(default=2.0, gt=0.0, le=60.0, allow_inf_nan=False, description="seconds")
    ca_file: str = Field(default="", description="PEM CA that signed the replicas' HTTPS certificates "
                                                 "(empty: the system's)")
    cert_file: str = Field(default="", description="PEM client certificate for replicas that require one")
    key_file: str = Field(default="", description="PEM private key of cert_file")

    @field_validator("replicas", mode="before")
    @classmethod
    def _as_tuple(cls, value: object) -> object:
        return tuple(value) if isinstance(value, list) else value

    @field_validator("replicas")
    @classmethod
    def _urls(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        for url in value:
            if not url.startswith(("http://", "https://")):
                raise ValueError(f"each replica URL must start with http:// or https://, got {url!r}")
        return tuple(url.rstrip("/") for url in value)


class EngineConfig(_StrictValues):
    """``[engine]``: the bounded ingest queue and its micro-batches."""

    queue_size: int = Field(default=100_000, ge=1, description="messages (a batch payload is one)")
    max_batch: int = Field(default=5000, ge=1, description="messages per micro-batch")
    max_wait_ms: float = Field(default=2.0, ge=0.0, le=60_000.0, allow_inf_nan=False,
                               description="how long a micro-batch waits to fill")
    snapshot_interval_ms: float = Field(default=2.0, ge=0.0, le=60_000.0, allow_inf_nan=False,
                                        description="under load, a new snapshot for readers at most this often")

    @field_validator("max_batch")
    @classmethod
    def _batch(cls, value: int, info: ValidationInfo) -> int:
        size = info.data.get("queue_size")
        if size is not None and value > size:
            raise ValueError(f"must be <= engine.queue_size ({size}), got {value}")
        return value


class RwlsConfig(_Strict):
    """The whole configuration: file plus ``RWLS_`` environment overrides."""

    channels: dict[str, ChannelConfig] = Field(min_length=1)
    broker: BrokerConfig = Field(default_factory=BrokerConfig)
    http: HttpConfig = Field(default_factory=HttpConfig)
    store: StoreConfig = Field(default_factory=StoreConfig)
    engine: EngineConfig = Field(default_factory=EngineConfig)
    alarms: AlarmsConfig = Field(default_factory=AlarmsConfig)
    auth: AuthConfig = Field(default_factory=AuthConfig)
    fleet: FleetConfig = Field(default_factory=FleetConfig)
    tags: TagsConfig = Field(default_factory=TagsConfig)

    @model_validator(mode="after")
    def _budget(self) -> RwlsConfig:
        if self.alarms.budget is not None:
            try:
                self.budget_thresholds()
            except ValueError as exc:
                raise ValueError(f"alarms.budget: {exc}") from None
        return self

    def budget_thresholds(self) -> BudgetThresholds | None:
        """The thresholds ``alarms.budget`` implies for this plant (None without a budget)."""
        budget = self.alarms.budget
        if budget is None:
            return None
        return derive_thresholds(budget.false_alarms, budget.per_seconds, budget.sample_period, len(self.channels))

    def apply_baselines(self, bank: ChannelBank) -> None:
        """Put every configured ``[channels.<id>.baseline]`` in force (at start, live and offline alike)."""
        # Channels alike (one validated table: shared baseline and terms objects) take one baseline in one go.
        alike: dict[tuple[int, int], list[str]] = {}
        for cid, channel in self.channels.items():
            if channel.baseline is not None:
                alike.setdefault((id(channel.baseline), id(channel.terms)), []).append(cid)
        for members in alike.values():
            channel = self.channels[members[0]]
            baseline = channel.baseline
            if baseline is not None:
                values, covariance = baseline.values(RegressorSpec(channel.terms).names)
                bank.set_baselines(members, values, noise_sigma=baseline.noise_sigma, covariance=covariance,
                                   source=baseline.source, note="from the configuration")

    def channel_settings(self) -> dict[str, ChannelSettings]:
        """Every channel's estimator settings, with the fleet budget applied; channels alike share one object
        (the bank then works out what follows from them once)."""
        budget = self.budget_thresholds()
        made: dict[tuple[object, ...], ChannelSettings] = {}
        settings = {}
        for cid, channel in self.channels.items():
            key = channel.settings_key()
            found = made.get(key)
            settings[cid] = found if found is not None else made.setdefault(key, channel.settings(budget))
        return settings

    def alarm_priorities(self) -> dict[str, dict[str, str]]:
        """Each channel's priority by alarm kind; channels alike share one mapping (the alarm book's layout then
        reads it once)."""
        made: dict[int, dict[str, str]] = {}
        priorities = {}
        for cid, channel in self.channels.items():
            found = made.get(id(channel.alarms))
            priorities[cid] = found if found is not None else made.setdefault(id(channel.alarms), channel.priorities())
        return priorities

    @field_validator("channels")
    @classmethod
    def _ids(cls, value: dict[str, ChannelConfig]) -> dict[str, ChannelConfig]:
        for key in value:
            if not _CHANNEL_ID.match(key):
                raise ValueError(f"channel id {key!r} must be 1-128 of letters, digits, '_', '.', '-'")
        return value

    def channel_tags(self) -> dict[str, ChannelTagsConfig]:
        """The channels assembled from tags, each with its ``tags`` table, in channel order."""
        return {cid: channel.tags for cid, channel in self.channels.items() if channel.tags is not None}

    def require_topics(self) -> dict[str, str]:
        """Check that the configuration can serve MQTT: every channel not fed by tags has its own topic.

        Returns
        -------
        dict
            Topic -> channel id, in channel order.

        Raises
        ------
        ConfigError
            A channel with neither topic nor tags, a topic used twice, or a channel topic equal
            to ``broker.dead_letter_topic``; one line per problem, naming the key. (Tag topics are
            checked by the tag registry, :mod:`service.tags.registry`.)
        """
        problems: list[str] = []
        owners: dict[str, str] = {}
        for cid, channel in self.channels.items():
            key = f"channels.{cid}.topic"
            if channel.topic is None and channel.tags is not None:
                continue
            if channel.topic is None:
                problems.append(f"{key}: required to serve (or a [channels.{cid}.tags] table)")
            elif channel.topic in owners:
                problems.append(f"{key}: also used by channel {owners[channel.topic]}")
            elif channel.topic == self.broker.dead_letter_topic:
                problems.append(f"{key}: same as broker.dead_letter_topic")
            else:
                owners[channel.topic] = cid
        if problems:
            raise ConfigError(problems)
        return owners


def _explain(error: ValidationError, sources: Mapping[tuple[str, ...], str] | None = None) -> list[str]:
    # Only pydantic's message is used, never its ``input``: that could be the password.
    problems = []
    for item in error.errors():
        loc = tuple(str(part) for part in item["loc"])
        key = "".join(f"[{part}]" if isinstance(part, int) else f".{part}" for part in item["loc"]).lstrip(".")
        key = key or "(file)"
        message = item["msg"].removeprefix("Value error, ")
        if item["type"] == "extra_forbidden":
            message = "unknown key"
        elif item["type"] == "missing":
            message = "required key missing"
        origin = [name for path, name in (sources or {}).items() if loc[:len(path)] == path]
        if origin:
            message += f" (from {origin[-1]})"
        problems.append(f"{key}: {message}")
    return problems


def _validate(data: Mapping[str, object], sources: Mapping[tuple[str, ...], str] | None = None) -> RwlsConfig:
    problems: list[str] = []
    if "channels" in data:
        data = {**data, "channels": validate_alike_once(data["channels"], ChannelConfig, _check_topic)}
    try:
        return RwlsConfig.model_validate(data)
    except ValidationError as exc:
        problems = _explain(exc, sources)
    # Raised outside the handler so the pydantic error, whose text holds the raw input, is not chained.
    raise ConfigError(problems)


def parse_config(data: Mapping[str, object]) -> RwlsConfig:
    """Validate an already-parsed TOML document (no environment overrides).

    Raises
    ------
    ConfigError
        One line per problem, each naming its key.
    """
    return _validate(data)


def _tag_files_beside(data: dict[str, object], directory: Path) -> None:
    """Tag lists named in the file are relative to the file's directory (an override's to the working one)."""
    tags = data.get("tags")
    files = tags.get("files") if isinstance(tags, dict) else None
    if isinstance(tags, dict) and isinstance(files, list):
        tags["files"] = [str(directory / name) if isinstance(name, str) and not Path(name).is_absolute() else name
                         for name in files]


def load_config(path: str | Path | None, environ: Mapping[str, str] | None = None) -> RwlsConfig:
    """Read a TOML configuration file, apply ``RWLS_`` environment overrides, and validate.

    Parameters
    ----------
    path : str or Path or None
        The TOML file; ``None`` builds the configuration from the environment alone.
    environ : mapping, optional
        Environment variables; ``os.environ`` when omitted. ``RWLS_A__B=value`` sets key
        ``a.b``; the level after ``CHANNELS`` (a channel id) keeps its case, the others are
        lower-cased. The value is read as a TOML value when it parses, else as text; text keys
        always get text.

    Raises
    ------
    ConfigError
        Unreadable file, TOML syntax error, an override that cannot apply, or invalid values
        (each naming its key, and the variable when an override set it).
    """
    data: dict[str, object] = {}
    if path is not None:
        try:
            text = Path(path).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise ConfigError([f"{path}: cannot read: {exc}"]) from None
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError([f"{path}: TOML syntax error: {exc}"]) from None
    if path is not None:
        _tag_files_beside(data, Path(path).parent)
    merged, sources, problems = apply_environment(data, os.environ if environ is None else environ, RwlsConfig)
    if problems:
        raise ConfigError(problems)
    return _validate(merged, sources)
