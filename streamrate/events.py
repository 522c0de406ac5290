"""The wire formats: the only place where bytes become typed values.

A finished match is a :class:`MatchEvent`. The same pydantic model validates the
JSON-lines files read by ``streamrate replay`` and the payload of each Redis
stream entry; ``streamrate schema`` prints its JSON Schema.

Example:

>>> ev = parse_event(b'{"match_id": "m-1", "finished_at": "2026-03-01T18:00:00Z",'
...                  b' "first": ["kestrel"], "second": ["marlow"], "score": 1,'
...                  b' "context": {"map": "saltflats", "mode": "duel"}}')
>>> ev.first, ev.second, ev.score
(('kestrel',), ('marlow',), 1.0)
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path
from typing import Annotated, Any

from pydantic import (
    AfterValidator,
    AwareDatetime,
    BaseModel,
    ConfigDict,
    Field,
    StrictFloat,
    StrictInt,
    StringConstraints,
    ValidationError,
    field_validator,
    model_validator,
)

from streamrate.errors import EventError

MAX_EVENT_BYTES = 16_384
"""Longest accepted encoded event, in bytes."""
MAX_SIDE_SIZE = 32
"""Most entities on one side of a match."""
MAX_ID_CHARS = 64
MAX_NAME_CHARS = 32
MAX_CATEGORY_CHARS = 64
MAX_CONTEXT_FIELDS = 16
MAX_FEATURES_PER_ENTITY = 16
MAX_NUMBER_ABS = 1e9
"""Numbers beyond this magnitude are rejected: they are almost always unit mistakes."""

EntityId = Annotated[
    str,
    StringConstraints(min_length=1, max_length=MAX_ID_CHARS, pattern=r"^[^\x00-\x20\x7f]+$"),
]
FieldName = Annotated[
    str,
    StringConstraints(
        min_length=1, max_length=MAX_NAME_CHARS, pattern=r"^[A-Za-z_][A-Za-z0-9_.\-]*$"
    ),
]
Category = Annotated[
    str,
    StringConstraints(min_length=1, max_length=MAX_CATEGORY_CHARS, pattern=r"^[^\x00-\x1f\x7f]+$"),
]


def _finite(x: float) -> float:
    if not math.isfinite(x):
        raise ValueError("number must be finite (no NaN or infinity)")
    if abs(x) > MAX_NUMBER_ABS:
        raise ValueError(f"number magnitude must be at most {MAX_NUMBER_ABS:g}")
    return float(x)


Number = Annotated[StrictInt | StrictFloat, AfterValidator(_finite)]
Value = Category | Number
"""A context or feature value: a category (string) or a finite number."""

Side = Annotated[tuple[EntityId, ...], Field(min_length=1, max_length=MAX_SIDE_SIZE)]
ContextMap = Annotated[dict[FieldName, Value], Field(max_length=MAX_CONTEXT_FIELDS)]
FeatureMap = Annotated[dict[FieldName, Value], Field(max_length=MAX_FEATURES_PER_ENTITY)]

_STRICT = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=False)


class Matchup(BaseModel):
    """Two sides and what is known about the match; what a query asks about.

    ``first`` and ``second`` are lists of entity ids (one id for solo play, several
    for a team). ``context`` maps names to categories or numbers (map, mode, patch,
    region, stage ...). ``features`` maps an entity id (of this match) to its own
    features; they give a prior to entities the model has not seen yet.
    """

    model_config = _STRICT

    first: Side
    second: Side
    context: ContextMap = Field(default_factory=dict)
    features: Annotated[dict[EntityId, FeatureMap], Field(max_length=2 * MAX_SIDE_SIZE)] = Field(
        default_factory=dict
    )

    @model_validator(mode="after")
    def _sides_are_disjoint(self) -> Matchup:
        first, second = self.first, self.second
        if len(first) == 1 and len(second) == 1 and not self.features:
            # The common solo case, kept cheap: this runs on every event.
            if first[0] == second[0]:
                raise ValueError(f"second: entity {first[0]!r} is on both sides")
            return self
        for name, side in (("first", self.first), ("second", self.second)):
            if len(set(side)) != len(side):
                raise ValueError(f"{name}: an entity is listed twice on one side")
        both = set(self.first) & set(self.second)
        if both:
            raise ValueError(f"second: entity {sorted(both)[0]!r} is on both sides")
        stray = set(self.features) - set(self.first) - set(self.second)
        if stray:
            raise ValueError(f"features: entity {sorted(stray)[0]!r} does not play in this match")
        return self

    def entities(self) -> tuple[str, ...]:
        return self.first + self.second


class MatchEvent(Matchup):
    """A finished match: who played, in what context, and the first side's score.

    ``score`` is 1 when the first side won, 0.5 for a draw, 0 when it lost.
    ``finished_at`` is an RFC 3339 time with an offset. ``match_id`` is unique per
    match; a second event with the same id is a producer retry.
    """

    match_id: EntityId
    finished_at: AwareDatetime
    score: float

    @field_validator("score", mode="before")
    @classmethod
    def _score_is_an_outcome(cls, v: Any) -> float:
        if isinstance(v, bool) or not isinstance(v, int | float) or v not in (0, 0.5, 1):
            raise ValueError("must be 1 (first side won), 0.5 (draw) or 0 (first side lost)")
        return float(v)


def _describe(exc: ValidationError) -> str:
    parts = []
    for err in exc.errors(include_url=False):
        loc = ".".join(str(p) for p in err["loc"]) or "event"
        msg = err["msg"].removeprefix("Value error, ")
        parts.append(f"{loc}: {msg}")
    return "; ".join(parts)


_validate_event_json = MatchEvent.__pydantic_validator__.validate_json


def parse_event(raw: bytes | str) -> MatchEvent:
    """Validate one JSON-encoded event; raise :class:`EventError` naming the field.

    This is the hot path of the consumer, so it calls pydantic's compiled
    validator directly (``bench/bench_parse.py`` measures it).
    """
    if len(raw) > MAX_EVENT_BYTES // 4 and isinstance(raw, str):
        raw = raw.encode("utf-8")
    if len(raw) > MAX_EVENT_BYTES:
        raise EventError(f"event: {len(raw)} bytes is longer than the limit of {MAX_EVENT_BYTES}")
    try:
        return _validate_event_json(raw)  # type: ignore[no-any-return]
    except ValidationError as exc:
        raise EventError(_describe(exc)) from exc


def event_from_dict(data: dict[str, Any]) -> MatchEvent:
    """Validate an already decoded event (a dict); raise :class:`EventError`."""
    try:
        return MatchEvent.model_validate(data)
    except ValidationError as exc:
        raise EventError(_describe(exc)) from exc


def parse_matchup(raw: bytes | str | dict[str, Any]) -> Matchup:
    """Validate a query's pairing; raise :class:`EventError` naming the field."""
    try:
        if isinstance(raw, dict):
            return Matchup.model_validate(raw)
        return Matchup.model_validate_json(raw)
    except ValidationError as exc:
        raise EventError(_describe(exc)) from exc


def event_to_json(event: MatchEvent) -> str:
    """Encode an event the way files and streams carry it."""
    return event.model_dump_json(exclude_defaults=True)


def read_events(path: Path | str) -> Iterator[MatchEvent]:
    """Yield the events of a JSON-lines file in file order.

    Blank lines are skipped. An invalid line raises :class:`EventError` with its
    line number; nothing after it is read.
    """
    with open(path, "rb") as fh:
        for lineno, line in enumerate(fh, start=1):
            if not line.strip():
                continue
            try:
                yield parse_event(line)
            except EventError as exc:
                raise EventError(f"{path}:{lineno}: {exc}") from exc


def time_key(event: MatchEvent) -> datetime:
    return event.finished_at


def event_schema() -> dict[str, Any]:
    """JSON Schema of :class:`MatchEvent` (what ``streamrate schema`` prints)."""
    schema = MatchEvent.model_json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    return schema
