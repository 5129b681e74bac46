"""Settings read from YAML and checked by pydantic.

The analyst edits ``config/default.yaml`` (or a copy). Every key is known: an unknown key
is an error, so a typo never silently falls back to a default. A bad file yields one line
per problem naming the file, line, dotted key, bad value and what is allowed.
"""

from __future__ import annotations

import fnmatch
from pathlib import Path
from typing import Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from . import constants
from .errors import ConfigError

DEFAULT_CONFIG = Path(__file__).resolve().parent.parent / "config" / "default.yaml"


def matches_any(node: str, patterns: list[str]) -> bool:
    """Whether a node id matches one of the globs (case-sensitive, ``*`` ``?`` ``[...]``)."""
    return any(fnmatch.fnmatchcase(node, pattern) for pattern in patterns)


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class ClockSettings(_Strict):
    """How hours map to the local day people live by."""

    timezone: str = "America/Denver"

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ValueError(
                f"unknown time zone {value!r}; use an IANA name such as 'UTC' or 'Europe/Paris'"
            ) from exc
        return value


class BaselineSettings(_Strict):
    """Double-seasonal robust exponential smoothing, per node."""

    transform: Literal["log1p", "identity"] = "log1p"
    dtype: Literal["float32", "float64"] = "float32"
    alpha: float = Field(0.05, gt=0, le=1)
    gamma: float = Field(0.10, ge=0, le=1)
    delta: float = Field(0.02, ge=0, le=1)
    season_hours: int = Field(24, ge=1, le=8760)
    weekly: bool = True
    variance_rate: float = Field(0.03, gt=0, le=1)
    clip_scales: float = Field(3.0, gt=0)
    adopt_after_hours: int = Field(12, ge=0)
    relearn_hours: int = Field(24, ge=0, le=24 * 14)
    warmup_hours: int = Field(48, ge=0)
    initial_scale: float = Field(0.5, gt=0)
    min_scale: float = Field(0.01, ge=0)
    count_noise: bool = True


class DirectionRule(_Strict):
    """Thresholds for one direction (surge or drop)."""

    enabled: bool = True
    z: float = Field(4.0, gt=0)
    min_excess: float = Field(5.0, ge=0)
    min_ratio: float = Field(1.05, ge=1)
    min_expected: float = Field(5.0, ge=0)
    persistence: int = Field(1, ge=1, le=168)
    cooldown_hours: int = Field(6, ge=0)


class DropRule(DirectionRule):
    """The drop rule: stricter defaults than a surge's, so a ``drop:`` block that gives only
    some keys keeps the drop defaults of the others (not the surge rule's)."""

    z: float = Field(5.0, gt=0)
    min_excess: float = Field(20.0, ge=0)
    min_ratio: float = Field(1.5, ge=1)
    min_expected: float = Field(20.0, ge=0)


class PartialDirectionRule(_Strict):
    """An override: only the keys given replace the group's defaults."""

    enabled: bool | None = None
    z: float | None = Field(None, gt=0)
    min_excess: float | None = Field(None, ge=0)
    min_ratio: float | None = Field(None, ge=1)
    min_expected: float | None = Field(None, ge=0)
    persistence: int | None = Field(None, ge=1, le=168)
    cooldown_hours: int | None = Field(None, ge=0)

    def apply(self, base: DirectionRule) -> DirectionRule:
        return base.model_copy(update=self.model_dump(exclude_none=True))


class RuleOverride(_Strict):
    """Thresholds for the nodes whose id matches one of the globs."""

    name: str = Field(min_length=1)
    match: list[str] = Field(min_length=1)
    surge: PartialDirectionRule = PartialDirectionRule()
    drop: PartialDirectionRule = PartialDirectionRule()

    def matches(self, node: str) -> bool:
        return matches_any(node, self.match)


class RuleSettings(_Strict):
    """Surge and drop rules; the first matching override wins for a node."""

    surge: DirectionRule = DirectionRule()
    drop: DropRule = DropRule()
    overrides: list[RuleOverride] = []

    @field_validator("drop", mode="before")
    @classmethod
    def _drop_from_direction_rule(cls, value: object) -> object:
        """A plain DirectionRule given in code is taken at its values."""
        if isinstance(value, DirectionRule) and not isinstance(value, DropRule):
            return value.model_dump()
        return value


class FlowConfig(_Strict):
    """Neighbour-flow learner (see alerter/flows.py for the model); the tunable subset."""

    enabled: bool = True
    lags: int = Field(0, ge=0, le=24)
    own_lag: bool = False
    forgetting: bool = True
    step: float = Field(0.05, gt=0, le=1)
    beta_max: float = Field(1.0, gt=0)
    cap: float | None = Field(1.0, ge=0)
    prior: float = Field(0.01, ge=0)
    age_tau_hours: float = Field(168.0, gt=0)
    excess_decay: float = Field(0.5, ge=0, le=1)


class AttributionSettings(_Strict):
    """How alerts name upstream neighbours and what kind of surge they call it."""

    top: int = Field(3, ge=1, le=50)
    min_share: float = Field(0.05, ge=0, le=1)
    originating_above: float = Field(0.6, ge=0, le=1)
    propagated_below: float = Field(0.3, ge=0, le=1)
    removed_memory_hours: int = Field(24, ge=0, le=24 * 30)
    new_link_hours: int = Field(48, ge=0, le=24 * 30)


class CapacityRule(_Strict):
    """The hourly load a group of nodes can take before a spill-over warning."""

    match: list[str] = Field(min_length=1)
    visits_per_hour: float = Field(gt=0)

    def matches(self, node: str) -> bool:
        return matches_any(node, self.match)


class IncidentSettings(_Strict):
    """Grouping alerts into incidents and closing them."""

    link_min_share: float = Field(0.2, ge=0, le=1)
    adjacent_hours: int = Field(1, ge=0, le=24)
    quiet_hours: int = Field(3, ge=1, le=168)
    capacity: list[CapacityRule] = []


class ScoringSettings(_Strict):
    """How alerts are matched to labelled events."""

    slack_hours: int = Field(3, ge=0, le=48)


class LiveNames(_Strict):
    """Redis names of the live path; ``#`` is the partition, ``@`` the hour (see constants)."""

    input: str = Field(constants.INPUT_STREAM, min_length=1)
    outbox: str = Field(constants.OUTBOX_STREAM, min_length=1)
    dead_letter: str = Field(constants.DEAD_LETTER_STREAM, min_length=1)
    late: str = Field(constants.LATE_STREAM, min_length=1)
    checkpoint: str = Field(constants.CHECKPOINT_KEY, min_length=1)
    group: str = Field(constants.GROUP, min_length=1)
    barrier: str = Field(constants.BARRIER_KEY, min_length=1)

    @field_validator("barrier")
    @classmethod
    def _hour_and_phase(cls, value: str) -> str:
        if "@" not in value or constants.PHASE_MARK not in value:
            raise ValueError(f"{value!r} must hold '@' (the hour) and '{constants.PHASE_MARK}' (the phase), "
                             f"e.g. {constants.BARRIER_KEY!r}")
        return value


class LiveRetry(_Strict):
    """Backoff while Redis is unreachable: doubles from ``initial_seconds`` up to ``max_seconds``."""

    initial_seconds: float = Field(0.5, gt=0)
    max_seconds: float = Field(30.0, gt=0)


class LiveSettings(_Strict):
    """The live path: Redis server, stream names, hour closing, recovery and limits."""

    redis_url: str | None = None
    redis_mode: Literal["auto", "standalone", "cluster"] = "auto"
    password_env: str = Field("ALERTER_REDIS_PASSWORD", min_length=1)
    embedded_dir: str = Field("var/redis", min_length=1)
    consumer: str = Field(constants.CONSUMER, min_length=1)
    partitions: int = Field(1, ge=1, le=1024)
    grace_seconds: float = Field(300.0, ge=0, le=86400)
    claim_idle_seconds: float = Field(60.0, gt=0)
    barrier_timeout_seconds: float = Field(600.0, gt=0, le=86400)
    barrier_ttl_seconds: int = Field(172800, ge=60, le=30 * 86400)
    read_count: int = Field(200, ge=1, le=100000)
    block_ms: int = Field(1000, ge=1, le=60000)
    batch_size: int = Field(20000, ge=1, le=1000000)
    max_entry_bytes: int = Field(16 * 1024 * 1024, ge=1024, le=512 * 1024 * 1024)
    retry: LiveRetry = LiveRetry()
    names: LiveNames = LiveNames()

    @field_validator("redis_url")
    @classmethod
    def _known_scheme(cls, value: str | None) -> str | None:
        if value is not None and not value.startswith(("redis://", "rediss://", "unix://")):
            raise ValueError(
                "a Redis URL starts with redis://, rediss:// (TLS) or unix://, e.g. "
                "redis://localhost:6379/0; leave it null to use the embedded server"
            )
        return value


class SinkRetry(_Strict):
    """Retries of one delivery: exponential backoff with jitter, then the dead-letter stream."""

    max_attempts: int = Field(6, ge=1, le=100)
    initial_seconds: float = Field(1.0, gt=0)
    max_seconds: float = Field(120.0, gt=0)
    jitter: float = Field(0.2, ge=0, le=1)


class QuietHours(_Strict):
    """A local-time window in which only updates of at least ``min_severity`` are posted."""

    start: str = Field("22:00", pattern=r"^([01]\d|2[0-3]):[0-5]\d$")
    end: str = Field("07:00", pattern=r"^([01]\d|2[0-3]):[0-5]\d$")
    min_severity: Literal["low", "medium", "high"] = "high"


class SinkRoute(_Strict):
    """Where an incident goes: the first route whose globs match its root node wins."""

    name: str = Field(min_length=1)
    match: list[str] = Field(["*"], min_length=1)
    url_env: str | None = None
    min_severity: Literal["low", "medium", "high"] = "low"
    quiet: QuietHours | None = None

    def matches(self, node: str) -> bool:
        return matches_any(node, self.match)


class SinkUpdates(_Strict):
    """Updates as edits of (or replies under) the incident's first message, for endpoints that
    answer a post with a message id. Without this block every update is a short follow-up."""

    # dotted path of the message id in the JSON answer to the first post, e.g. "message.id"
    id_field: str = Field(min_length=1, pattern=r"^[A-Za-z0-9_-]+(\.[A-Za-z0-9_-]+)*$")
    url_template: str = Field("$url/$message_id", min_length=1)  # $url: the sink's URL; $message_id: that id
    method: Literal["POST", "PUT", "PATCH"] = "PATCH"
    body_template: str | None = None  # default: the sink's body_template; may use $message_id too


class SinkTarget(_Strict):
    """One sink fed from the outbox through its own consumer group."""

    name: str = Field(min_length=1, max_length=40, pattern=r"^[A-Za-z0-9_-]+$")
    kind: Literal["webhook", "jsonl", "cloudevents", "redis_stream"]
    enabled: bool = True
    entries: Literal["incidents", "all"] = "incidents"
    url_env: str | None = None
    body_template: str = '{"text": $text}'
    markup: Literal["plain", "markdown"] = "plain"
    timeout_seconds: float = Field(10.0, gt=0, le=300)
    messages_per_minute: int = Field(20, ge=1, le=100000)
    uncertain: Literal["dead_letter", "resend"] = "dead_letter"
    path: str | None = None
    rotate_bytes: int = Field(64 * 1024 * 1024, ge=1024)
    rotate_daily: bool = True
    stream: str | None = None
    stream_maxlen: int = Field(100000, ge=10)
    source: str = Field("/alerter", min_length=1)
    routes: list[SinkRoute] = []
    updates: SinkUpdates | None = None

    @model_validator(mode="after")
    def _needs(self) -> SinkTarget:
        need = {"webhook": ("url_env",), "cloudevents": ("url_env",), "jsonl": ("path",),
                "redis_stream": ("stream",)}[self.kind]
        missing = [k for k in need if getattr(self, k) is None]
        if missing:
            raise ValueError(f"sink {self.name!r} of kind {self.kind} needs {', '.join(missing)}; "
                             "url_env names an environment variable holding the URL, never the URL itself")
        if self.kind == "webhook" and "$text" not in self.body_template and "$title" not in self.body_template:
            raise ValueError(f"sink {self.name!r}: body_template {self.body_template!r} must contain $text "
                             "(or $title), e.g. '{\"text\": $text}'")
        if self.updates is not None and self.kind != "webhook":
            raise ValueError(f"sink {self.name!r}: updates (edit or reply under the first message) works with "
                             f"kind webhook only, not {self.kind}; remove the updates block")
        if self.updates is not None and "$url" not in self.updates.url_template:
            raise ValueError(f"sink {self.name!r}: updates.url_template {self.updates.url_template!r} must start "
                             "from $url (the URL in url_env), e.g. '$url/messages/$message_id' or "
                             "'$url?thread=$message_id'")
        return self


class SinkSeverity(_Strict):
    """Severity of an incident update from its total absolute excess (visits in the hour)."""

    medium_excess: float = Field(1000.0, ge=0)
    high_excess: float = Field(10000.0, ge=0)


class DigestSettings(_Strict):
    """The daily digest posted to the webhook sinks at a local time."""

    enabled: bool = False
    local_time: str = Field("09:00", pattern=r"^([01]\d|2[0-3]):[0-5]\d$")
    top: int = Field(5, ge=1, le=50)
    sinks: list[str] = []


class SinkSettings(_Strict):
    """Delivery from the outbox to chat webhooks, files, CloudEvents and dashboard streams."""

    targets: list[SinkTarget] = []
    retry: SinkRetry = SinkRetry()
    severity: SinkSeverity = SinkSeverity()
    digest: DigestSettings = DigestSettings()
    max_id_chars: int = Field(80, ge=8, le=1000)
    max_message_chars: int = Field(3500, ge=200, le=100000)
    top_upstream: int = Field(3, ge=0, le=20)
    max_members: int = Field(8, ge=1, le=200)
    read_count: int = Field(200, ge=1, le=10000)
    join_hours: int = Field(2, ge=1, le=48)
    delivered_retention_hours: int = Field(336, ge=1)


class Config(_Strict):
    """The whole configuration."""

    clock: ClockSettings = ClockSettings()
    baseline: BaselineSettings = BaselineSettings()
    rules: RuleSettings = RuleSettings()
    flows: FlowConfig = FlowConfig()
    attribution: AttributionSettings = AttributionSettings()
    incidents: IncidentSettings = IncidentSettings()
    scoring: ScoringSettings = ScoringSettings()
    live: LiveSettings = LiveSettings()
    sinks: SinkSettings = SinkSettings()


# --- loading with line numbers -------------------------------------------------------


class _LineLoader(yaml.SafeLoader):
    """A safe loader that remembers the line of every mapping key."""


def _construct_mapping(loader: _LineLoader, node: yaml.MappingNode) -> dict[Any, Any]:
    mapping = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node)
        mapping[key] = loader.construct_object(value_node, deep=True)
        loader.lines[(id(mapping), key)] = key_node.start_mark.line + 1
    loader.containers.append(mapping)
    return mapping


_LineLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def _line_of(data: Any, lines: dict[tuple[int, Any], int], loc: tuple[Any, ...]) -> int | None:
    """The line of the deepest key of ``loc`` that exists in the parsed YAML."""
    line = None
    node = data
    for part in loc:
        if isinstance(node, dict) and part in node:
            line = lines.get((id(node), part), line)
            node = node[part]
        elif isinstance(node, list) and isinstance(part, int) and part < len(node):
            node = node[part]
        else:
            break
    return line


def _allowed_keys(model: type[BaseModel], loc: tuple[Any, ...]) -> list[str]:
    """The keys allowed at the parent of ``loc``, for 'unknown key' messages."""
    current: Any = model
    for part in loc[:-1]:
        if isinstance(part, int):
            continue
        field = current.model_fields.get(part) if hasattr(current, "model_fields") else None
        if field is None:
            return []
        annotation = field.annotation
        args = getattr(annotation, "__args__", ())
        current = args[0] if args and hasattr(args[0], "model_fields") else annotation
    return sorted(getattr(current, "model_fields", {}))


def _describe(error: dict[str, Any], data: Any, lines: dict[tuple[int, Any], int], path: str) -> str:
    loc = tuple(error["loc"])
    key = ".".join(str(p) for p in loc) or "(top level)"
    line = _line_of(data, lines, loc)
    where = f"{path}:{line}" if line else path
    if error["type"] == "extra_forbidden":
        allowed = ", ".join(_allowed_keys(Config, loc)) or "none"
        return f"{where}: {key}: unknown key; allowed keys here: {allowed}"
    bad = error.get("input")
    message = str(error["msg"]).removeprefix("Value error, ")
    return f"{where}: {key} = {bad!r}: {message}"


def parse_config(text: str, path: str = "<string>") -> Config:
    """Validate YAML text; raise ConfigError listing every problem with its line."""
    loader = _LineLoader(text)
    loader.lines = {}
    loader.containers = []
    try:
        data = loader.get_single_data()
    except yaml.YAMLError as exc:
        raise ConfigError(path, [f"not valid YAML: {exc}"]) from exc
    finally:
        loader.dispose()
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(path, [f"the top level must be a mapping of sections, got {type(data).__name__}"])
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        problems = [_describe(dict(e), data, loader.lines, path) for e in exc.errors()]
        raise ConfigError(path, problems) from None


def load_config(path: str | Path | None = None) -> Config:
    """Read a YAML config file; ``None`` means the bundled ``config/default.yaml``."""
    target = Path(path) if path is not None else DEFAULT_CONFIG
    if path is None and not target.exists():
        return Config()
    try:
        text = target.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(str(target), [f"cannot read the file: {exc.strerror}"]) from exc
    return parse_config(text, str(target))
