"""Service settings: one frozen object built at the edge and passed down.

Settings come from a TOML file (``configs/service.toml``) with command-line
overrides on top (``--set consumer.batch_count=200`` style dotted keys, values
parsed as JSON when they parse, else taken as strings). Unknown keys are errors.

Every Redis key of a model space is derived from one prefix and the space name,
inside a Redis Cluster hash tag so that all keys of a space land on one slot
(``XREADGROUP`` + checkpoint ``SET`` + dead-letter ``XADD`` then never cross
slots)::

    {sr:duel}:events   the event stream (consumer group ``streamrate``)
    {sr:duel}:dead     dead letters: original fields + source id + reason
    {sr:duel}:ckpt     the checkpoint (Redis checkpoint store only)
    {sr:duel}:q        query requests (pub/sub channel)
    {sr:duel}:live     the live feed (pub/sub channel)
    {sr:duel}:q:errors error replies to requests that named no usable reply channel

>>> s = Settings(spaces=(SpaceSettings(name="duel"),))
>>> s.keys(s.spaces[0]).events
'{sr:duel}:events'
"""

from __future__ import annotations

import json
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from streamrate.errors import ConfigError

_FROZEN = ConfigDict(extra="forbid", frozen=True)
_NAME = r"^[A-Za-z0-9_.\-]{1,48}$"


class RedisSettings(BaseModel):
    """Where Redis is. ``url`` may be ``redis://`` or ``rediss://`` with user:password."""

    model_config = _FROZEN
    url: str | None = None
    socket_timeout_s: float = Field(5.0, gt=0)
    connect_timeout_s: float = Field(2.0, gt=0)
    reconnect_min_s: float = Field(0.05, gt=0)
    reconnect_max_s: float = Field(5.0, gt=0)

    @model_validator(mode="after")
    def _url_scheme(self) -> RedisSettings:
        if self.url is not None and not self.url.startswith(("redis://", "rediss://", "unix://")):
            raise ValueError("url must start with redis://, rediss:// or unix://")
        return self


class QualitySettings(BaseModel):
    """Live forecast-quality and drift statistics (:mod:`streamrate.quality`), in events."""

    model_config = _FROZEN
    enabled: bool = True
    recent_events: int = Field(1000, ge=10, le=1_000_000)
    reference_events: int = Field(10_000, ge=10, le=1_000_000)
    group_field: str | None = None
    group_top_k: int = Field(8, ge=1, le=50)
    drift_fields: tuple[str, ...] = Field((), max_length=16)
    publish_every_s: float = Field(5.0, ge=0)


class SpaceSettings(BaseModel):
    """One model space: its own stream, model, checkpoint, queries and live feed."""

    model_config = _FROZEN
    name: str = Field("duel", pattern=_NAME)
    model: str = "elo"
    model_settings: dict[str, Any] = Field(default_factory=dict)
    group: str = Field("streamrate", pattern=_NAME)
    consumer: str = Field("consumer-1", pattern=_NAME)
    event_field: str = "event"
    batch_count: int = Field(500, ge=1, le=100_000)
    block_ms: int = Field(500, ge=1)
    checkpoint_every_events: int = Field(5000, ge=1)
    checkpoint_every_s: float = Field(5.0, gt=0)
    claim_idle_ms: int = Field(30_000, ge=0)
    dedupe_keep_ids: int = Field(200_000, ge=0)
    dedupe_window_s: float = Field(7 * 86400.0, ge=0)
    retention_s: float | None = Field(None, gt=0)
    lock_chunk: int = Field(64, ge=1)
    quality: QualitySettings = Field(default_factory=QualitySettings)


class CheckpointSettings(BaseModel):
    """``store="file"``: one fsynced file per space in ``dir``; ``"redis"``: a key per space."""

    model_config = _FROZEN
    store: Literal["file", "redis"] = "file"
    dir: Path = Path("checkpoints")


DEFAULT_METRICS_PORT = 8564
"""Outside 9090-9999: Prometheus' own ports (9090-9094) and the exporter range of its
default port allocations list (9100-9999, all given out), so no well-known exporter
on the same host expects this port."""


class MetricsSettings(BaseModel):
    """Prometheus endpoint at ``http://bind:port/metrics``; on by default, loopback only."""

    model_config = _FROZEN
    enabled: bool = True
    bind: str = "127.0.0.1"
    port: int = Field(DEFAULT_METRICS_PORT, ge=0, le=65535)


class QuerySettings(BaseModel):
    model_config = _FROZEN
    lobby_exact_max: int = Field(10, ge=2, le=16)
    lobby_max: int = Field(256, ge=2)
    max_request_bytes: int = Field(65_536, ge=256)


@dataclass(frozen=True)
class SpaceKeys:
    """All Redis names of one space (see the module docstring)."""

    tag: str
    events: str
    dead: str
    ckpt: str
    requests: str
    live: str
    errors: str


class Settings(BaseModel):
    """Everything ``streamrate serve`` needs."""

    model_config = _FROZEN
    prefix: str = Field("sr", pattern=r"^[A-Za-z0-9_.\-]{1,32}$")
    log_level: Literal["DEBUG", "INFO", "WARNING", "ERROR"] = "INFO"
    redis: RedisSettings = Field(default_factory=RedisSettings)
    checkpoint: CheckpointSettings = Field(default_factory=CheckpointSettings)
    metrics: MetricsSettings = Field(default_factory=MetricsSettings)
    queries: QuerySettings = Field(default_factory=QuerySettings)
    spaces: tuple[SpaceSettings, ...] = (SpaceSettings(),)

    @model_validator(mode="after")
    def _unique_spaces(self) -> Settings:
        names = [s.name for s in self.spaces]
        if not names:
            raise ValueError("spaces: at least one model space is needed")
        if len(set(names)) != len(names):
            raise ValueError("spaces: two spaces share a name")
        return self

    def keys(self, space: SpaceSettings) -> SpaceKeys:
        tag = "{" + f"{self.prefix}:{space.name}" + "}"
        return SpaceKeys(
            tag=tag,
            events=f"{tag}:events",
            dead=f"{tag}:dead",
            ckpt=f"{tag}:ckpt",
            requests=f"{tag}:q",
            live=f"{tag}:live",
            errors=f"{tag}:q:errors",
        )

    def space(self, name: str | None = None) -> SpaceSettings:
        if name is None:
            return self.spaces[0]
        for s in self.spaces:
            if s.name == name:
                return s
        raise ConfigError(f"no model space named {name!r}; known: {[s.name for s in self.spaces]}")


def _parse_value(text: str) -> Any:
    try:
        return json.loads(text)
    except json.JSONDecodeError:
        return text


def apply_override(data: dict[str, Any], assignment: str) -> None:
    """Set ``a.b.c=value`` in nested ``data``; a numeric part indexes the space list."""
    key, sep, raw = assignment.partition("=")
    if not sep or not key:
        raise ConfigError(f"override {assignment!r} is not of the form key=value")
    parts = key.strip().split(".")
    node: Any = data
    for i, part in enumerate(parts[:-1]):
        if isinstance(node, list):
            idx = int(part) if part.isdigit() else -1
            if not 0 <= idx < len(node):
                raise ConfigError(f"override {key!r}: no list item {part!r}")
            node = node[idx]
        else:
            nxt = node.get(part)
            if nxt is None:
                nxt = [{}] if part == "spaces" and parts[i + 1].isdigit() else {}
                node[part] = nxt
            node = nxt
    last = parts[-1]
    if isinstance(node, list):
        raise ConfigError(f"override {key!r} must name a field, not a list item")
    node[last] = _parse_value(raw.strip())


def load_settings(path: Path | str | None = None, overrides: list[str] | None = None) -> Settings:
    """Read TOML (if given), apply dotted overrides, validate; :class:`ConfigError` on trouble."""
    data: dict[str, Any] = {}
    if path is not None:
        try:
            data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise ConfigError(f"cannot read settings file {path}: {exc}") from exc
    if "spaces" not in data and any(o.startswith("spaces.") for o in overrides or []):
        data["spaces"] = [{}]
    for o in overrides or []:
        apply_override(data, o)
    try:
        return Settings.model_validate(data)
    except ValidationError as exc:
        msgs = "; ".join(
            f"{'.'.join(str(p) for p in e['loc']) or 'settings'}: {e['msg']}"
            for e in exc.errors(include_url=False)
        )
        raise ConfigError(msgs) from exc
