"""The wire formats: the only place where bytes become typed values.

A finished match is a :class:`MatchEvent`. The same pydantic model validates the
JSON-lines files read by ``streamrate replay`` and the payload of each Redis
stream entry; ``streamrate schema`` prints its JSON Schema.

Example:

>>> ev = parse_event(b'{"match_id": "m-1", "finished_at": "2026-03-01T18:00:00Z",'
...                  b' "first": ["kelvash"], "second": ["morvenn"], "score": 1,'
...                  b' "context": {"map": "saltflats", "mode": "duel"}}')
>>> ev.first, ev.second, ev.score
(('kelvash',), ('morvenn',), 1.0)
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Iterable, Iterator, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated, Any

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    GetCoreSchemaHandler,
    GetJsonSchemaHandler,
    StrictFloat,
    StrictInt,
    StringConstraints,
    TypeAdapter,
    ValidationError,
    ValidationInfo,
    WithJsonSchema,
    field_validator,
    model_validator,
)
from pydantic.json_schema import JsonSchemaValue
from pydantic_core import core_schema

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
MARGIN_SIGN = "must be > 0 only when score is 1 and < 0 only when score is 0"
"""The refusal of a ``margin`` whose sign contradicts ``score``."""

ID_CHARS = r"[\p{L}\p{M}\p{N}\p{P}\p{S}]"
"""The characters of an id or a category: Unicode general categories L (letters),
M (marks), N (numbers), P (punctuation) and S (symbols), nothing else.

That leaves out every separator (Zs, Zl, Zp: the space, U+00A0 no-break space,
U+3000 ideographic space, U+2028/U+2029 line and paragraph separators), every
control (Cc: U+0000-U+001F, U+007F-U+009F including U+0085), every format
character (Cf: U+200B zero-width space, U+202E right-to-left override and the
other bidirectional controls, U+FEFF byte-order mark, U+00AD soft hyphen),
private-use (Co), surrogates (Cs) and unassigned code points (Cn). Categories
come from the Unicode tables of the validator (pydantic-core's regex engine).
"""
_ID_PATTERN = f"^{ID_CHARS}+$"

SCHEMA_ID_PATTERN = (
    r"^[^\x00-\x20\x7f-\xa0\xad\u061c\u1680\u180e\u2000-\u200f\u2028-\u202f"
    r"\u205f-\u206f\u3000\ue000-\uf8ff\ufeff\ufff9-\ufffb]+$"
)
r"""The id rule as published in JSON Schemas: general regex engines (Python's ``re``,
ECMA-262 without the ``u`` flag) lack ``\p{..}`` classes, so the schema lists the
separators, controls, invisible and private-use characters it refuses instead. It
is the looser of the two; the service applies :data:`ID_CHARS` exactly."""


def _id_schema(max_chars: int) -> WithJsonSchema:
    return WithJsonSchema(
        {"type": "string", "minLength": 1, "maxLength": max_chars, "pattern": SCHEMA_ID_PATTERN}
    )


EntityId = Annotated[
    str,
    StringConstraints(min_length=1, max_length=MAX_ID_CHARS, pattern=_ID_PATTERN),
    _id_schema(MAX_ID_CHARS),
]
FieldName = Annotated[
    str,
    StringConstraints(
        min_length=1, max_length=MAX_NAME_CHARS, pattern=r"^[A-Za-z_][A-Za-z0-9_.\-]*$"
    ),
]
Category = Annotated[
    str,
    StringConstraints(min_length=1, max_length=MAX_CATEGORY_CHARS, pattern=_ID_PATTERN),
    _id_schema(MAX_CATEGORY_CHARS),
]

_one_id_char: TypeAdapter[str] = TypeAdapter(Annotated[str, StringConstraints(pattern=_ID_PATTERN)])


def bad_ids(ids: Iterable[str]) -> str | None:
    """What is wrong with a list of ids read back from storage, or None when all is well.

    Same rule as the event format (checked by the same validator, one distinct
    character at a time), 1 to :data:`MAX_ID_CHARS` characters, no id twice.

    >>> bad_ids(["kelvash", "morvenn"]) is None, bad_ids(["kes trel"])
    (True, "id character ' ' (U+0020) is not a letter, mark, digit, punctuation or symbol")
    """
    seen: set[str] = set()
    for i in ids:
        if not 0 < len(i) <= MAX_ID_CHARS:
            return f"id {i[:MAX_ID_CHARS]!r} is not 1 to {MAX_ID_CHARS} characters long"
        if i in seen:
            return f"id {i!r} is listed twice"
        seen.add(i)
    chars = set().union(*seen) if seen else set()
    for ch in chars:
        try:
            _one_id_char.validate_python(ch)
        except ValidationError:
            return (
                f"id character {ch!r} (U+{ord(ch):04X}) is not a letter, mark, digit, "
                "punctuation or symbol"
            )
    return None


RFC3339 = (
    r"^[0-9]{4}-[0-9]{2}-[0-9]{2}[Tt][0-9]{2}:[0-9]{2}:[0-9]{2}(\.[0-9]{1,9})?"
    r"([Zz]|[+-][0-9]{2}:[0-9]{2})$"
)
"""An RFC 3339 date-time with its offset (section 5.6); leap seconds (``:60``) are refused."""


class _Rfc3339:
    """``finished_at`` as the wire carries it: an RFC 3339 string, never a number.

    JSON input must be a string matching :data:`RFC3339` (checked in pydantic-core,
    then parsed there); Python callers may also pass an aware ``datetime``.
    """

    @classmethod
    def __get_pydantic_core_schema__(
        cls, source: Any, handler: GetCoreSchemaHandler
    ) -> core_schema.CoreSchema:
        text = core_schema.chain_schema(
            [
                core_schema.str_schema(strict=True, pattern=RFC3339),
                core_schema.datetime_schema(tz_constraint="aware"),
            ]
        )
        aware = core_schema.datetime_schema(strict=True, tz_constraint="aware")
        return core_schema.json_or_python_schema(
            json_schema=text, python_schema=core_schema.union_schema([aware, text])
        )

    @classmethod
    def __get_pydantic_json_schema__(
        cls, schema: core_schema.CoreSchema, handler: GetJsonSchemaHandler
    ) -> JsonSchemaValue:
        return {"type": "string", "format": "date-time", "pattern": RFC3339}


Rfc3339Time = Annotated[datetime, _Rfc3339]


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
    ``margin`` (optional) is by how much, in the game's own unit (goals, rounds,
    points): the first side's margin of victory, a finite number of magnitude at
    most :data:`MAX_NUMBER_ABS`, positive only for a win and negative only for a
    loss (so a draw has 0; 0 with a win or a loss is a level game decided by a
    tiebreak). Absent (or null) means unknown.
    ``finished_at`` is an RFC 3339 string with an offset (never a number).
    ``match_id`` is unique per match: a second event with the same id and the
    same content (:func:`event_digest`) is a producer retry; with other content
    it is a conflict. Ids and string categories use :data:`ID_CHARS` only.
    """

    match_id: EntityId
    finished_at: Rfc3339Time
    score: float
    margin: Annotated[
        Number | None,
        Field(
            description="the first side's margin of victory in the game's unit (goals, rounds); "
            "> 0 only when score is 1, < 0 only when score is 0; absent: unknown"
        ),
    ] = None

    @field_validator("score", mode="before")
    @classmethod
    def _score_is_an_outcome(cls, v: Any) -> float:
        if isinstance(v, bool) or not isinstance(v, int | float) or v not in (0, 0.5, 1):
            raise ValueError("must be 1 (first side won), 0.5 (draw) or 0 (first side lost)")
        return float(v)

    @field_validator("margin", mode="after")
    @classmethod
    def _margin_agrees_with_score(cls, v: float | None, info: ValidationInfo) -> float | None:
        if v is None:
            return None
        score = info.data.get("score")
        if v > 0 and score is not None and score != 1.0:
            raise ValueError(MARGIN_SIGN)
        if v < 0 and score is not None and score != 0.0:
            raise ValueError(MARGIN_SIGN)
        return v + 0.0  # -0.0 is 0.0: one content, one digest


def _message(err: Any) -> str:
    """One error in plain words; patterns are named by their rule, not their regex."""
    kind = err["type"]
    field = str(err["loc"][0]) if err["loc"] else ""
    if field == "finished_at" and kind in ("string_type", "string_pattern_mismatch"):
        return "must be an RFC 3339 time string with an offset, e.g. 2026-03-01T18:00:00Z"
    if kind == "string_pattern_mismatch" and err["ctx"].get("pattern") == _ID_PATTERN:
        return (
            "must be letters, marks, digits, punctuation or symbols only "
            "(no spaces, controls or invisible characters)"
        )
    return str(err["msg"]).removeprefix("Value error, ")


def _describe(exc: ValidationError) -> str:
    parts = []
    for err in exc.errors(include_url=False):
        loc = ".".join(str(p) for p in err["loc"]) or "event"
        parts.append(f"{loc}: {_message(err)}")
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


EARLIEST_FINISH = datetime(2000, 1, 1, tzinfo=UTC)
"""Events that finished before this are refused by the service (a unit or clock mistake)."""
_EARLIEST_S = EARLIEST_FINISH.timestamp()


def time_problem(event: MatchEvent, received_ms: int, future_limit_s: float) -> str | None:
    """Why ``finished_at`` cannot be trusted against the time the entry was received, or None.

    ``received_ms`` is the stream id's clock (milliseconds); an event may finish at
    most ``future_limit_s`` after it, and not before :data:`EARLIEST_FINISH`.

    >>> ev = parse_event(b'{"match_id": "m-1", "finished_at": "9999-12-31T00:00:00Z",'
    ...                  b' "first": ["kelvash"], "second": ["morvenn"], "score": 1}')
    >>> time_problem(ev, 1_780_000_000_000, 86400.0)[:40]
    'finished_at: 9999-12-31T00:00:00+00:00 i'
    """
    t = event.finished_at.timestamp()
    if t > received_ms / 1000 + future_limit_s:
        received = datetime.fromtimestamp(received_ms / 1000, tz=UTC)
        return (
            f"finished_at: {event.finished_at.isoformat()} is more than {future_limit_s:g} s "
            f"after the entry was received ({received.isoformat(timespec='seconds')})"
        )
    if t < _EARLIEST_S:
        return f"finished_at: {event.finished_at.isoformat()} is before 2000-01-01"
    return None


def event_digest(event: MatchEvent) -> bytes:
    """8-byte BLAKE2b of the event's canonical text: what "the same content" means.

    Canonical: fields in a fixed order, context and feature names sorted,
    ``finished_at`` as its instant (any offset spelling), numbers as floats, each
    value tagged string or number, ``margin`` only when given (so events without
    one keep the digest they had before margins existed). Parts are joined with
    control characters, which no id, name or category may contain, so the text
    is unambiguous. Key
    order, spacing, ``1`` against ``1.0`` and ``Z`` against ``+00:00`` do not
    make two events differ; any other change does.

    >>> a = parse_event(b'{"match_id": "m-1", "finished_at": "2026-03-01T19:00:00+01:00",'
    ...                 b' "first": ["kelvash"], "second": ["morvenn"], "score": 1}')
    >>> b = parse_event(b'{"score": 1.0, "match_id": "m-1", "first": ["kelvash"],'
    ...                 b' "second": ["morvenn"], "finished_at": "2026-03-01T18:00:00Z"}')
    >>> event_digest(a) == event_digest(b), len(event_digest(a))
    (True, 8)
    """
    return event_digests([event], [event.finished_at.timestamp()])[0]


def event_digests(events: Sequence[MatchEvent], times: Sequence[float]) -> list[bytes]:
    """:func:`event_digest` of each event of a batch, given their ``finished_at`` as
    unix seconds (``times``, which the decoder has at hand); the canonical text of a
    context of categories is kept, as contexts repeat from match to match."""
    out: list[bytes] = []
    append = out.append
    blake2b = hashlib.blake2b
    join = "\x1f".join
    for event, t in zip(events, times, strict=True):
        ctx = event.context
        text = (
            f"{event.match_id}\x1e{t!r}\x1e{join(event.first)}\x1e{join(event.second)}"
            f"\x1e{event.score!r}"
        )
        if event.margin is not None:  # only when given: older events keep their digests
            text = f"{text}\x1em{event.margin!r}"
        if ctx:
            text = f"{text}\x1e{_canonical_context(ctx)}"
        if event.features:
            feats = "\x1c".join(
                f"{k}\x1b{_canonical_values(v)}" for k, v in sorted(event.features.items())
            )
            text = f"{text}\x1e{feats}"
        append(blake2b(text.encode("utf-8"), digest_size=8).digest())
    return out


_canonical_contexts: dict[tuple[tuple[str, Any], ...], str] = {}


def _canonical_context(ctx: dict[str, Any]) -> str:
    """The canonical text of a context; kept for contexts of categories only (a number
    never equals a string, so a context with numbers, where 0.0 and -0.0 would share
    a key, never hits)."""
    key = tuple(ctx.items())
    canon = _canonical_contexts.get(key)
    if canon is None:
        canon = _canonical_values(ctx)
        if len(_canonical_contexts) < 10_000 and all(type(v) is str for v in ctx.values()):
            _canonical_contexts[key] = canon
    return canon


def _canonical_values(values: dict[str, Any]) -> str:
    return "\x1f".join(
        f"{k}\x1ds{v}" if isinstance(v, str) else f"{k}\x1dn{float(v)!r}"
        for k, v in sorted(values.items())
    )


def time_key(event: MatchEvent) -> datetime:
    return event.finished_at


def event_schema() -> dict[str, Any]:
    """JSON Schema of :class:`MatchEvent` (what ``streamrate schema`` prints)."""
    schema = MatchEvent.model_json_schema()
    schema["$schema"] = "https://json-schema.org/draft/2020-12/schema"
    return schema
