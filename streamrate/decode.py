"""The writer's validating decoder: a batch of stream payloads to checked events.

:func:`decode_events` accepts and refuses exactly what
:func:`streamrate.events.parse_event` does, and refuses with its message: the
pydantic model in :mod:`streamrate.events` stays the definition of the format.
It is faster on the common path by doing the work per batch, not per event:

1. each payload is decoded by msgspec into a :class:`_Wire` struct, which checks
   in compiled code the fields (no unknown one, none missing), their JSON types,
   and the lengths of ids and sides;
2. the rules msgspec cannot state are checked over the whole batch at once, as
   C-level operations over columns: every id of the batch joined into one
   string and checked in one call (printable ASCII without space: all of it
   letters, digits, punctuation or symbols, the id rule's categories), field
   names and categories against sets of those already checked, outcomes by one
   set inclusion, times by one compiled pattern each, sides disjoint; feature
   maps and margins (bounds, sign against the score) event by event, only in a
   batch that has them;
3. the events are then built directly (no second validation, no Python call
   per event).

The fast path only ever accepts. Whatever it is not sure of goes to
``parse_event`` for that payload: any decoding error, any string outside
printable ASCII, any rule broken, an unusual time spelling (lower-case ``t`` or
``z``, more than 6 digits of a second), a payload over the size limit. A batch
in which any payload is doubted is decided one payload at a time. So a refusal
is always pydantic's, with its message; ``tests/test_decode.py`` holds the fast
path to the model over thousands of generated payloads, valid and invalid.

``bench/bench_parse.py`` measures both, per event.

>>> evs, times = decode_events([
...     b'{"match_id": "m-1", "finished_at": "2026-03-01T18:00:00Z", "first": ["kelvash"],'
...     b' "second": ["morvenn"], "score": 1}',
...     b'{"match_id": "m-2", "finished_at": "2026-03-01T18:00:00Z", "first": ["kelvash"],'
...     b' "second": ["kelvash"], "score": 1}'])
>>> evs[0].second, times[0], str(evs[1])
(('morvenn',), 1772388000.0, "event: second: entity 'kelvash' is on both sides")
"""

from __future__ import annotations

import math
import re
from collections import deque
from collections.abc import Iterable, Sequence
from datetime import datetime
from itertools import chain, repeat
from operator import attrgetter, eq, itemgetter
from typing import Annotated, Any, cast

import msgspec

from streamrate.errors import EventError
from streamrate.events import (
    MAX_CATEGORY_CHARS,
    MAX_CONTEXT_FIELDS,
    MAX_EVENT_BYTES,
    MAX_FEATURES_PER_ENTITY,
    MAX_ID_CHARS,
    MAX_NAME_CHARS,
    MAX_NUMBER_ABS,
    MAX_SIDE_SIZE,
    MatchEvent,
    parse_event,
)

_Id = Annotated[str, msgspec.Meta(min_length=1, max_length=MAX_ID_CHARS)]
_Side = Annotated[tuple[_Id, ...], msgspec.Meta(min_length=1, max_length=MAX_SIDE_SIZE)]
_Value = str | int | float


class _Wire(msgspec.Struct, forbid_unknown_fields=True, gc=False):
    """A payload as msgspec decodes it, before the checks of step 2."""

    match_id: _Id
    finished_at: str
    first: _Side
    second: _Side
    score: int | float
    context: dict[str, _Value] | msgspec.UnsetType = msgspec.UNSET
    features: dict[str, dict[str, _Value]] | msgspec.UnsetType = msgspec.UNSET
    margin: int | float | msgspec.UnsetType | None = msgspec.UNSET


_decode_wire = msgspec.json.Decoder(_Wire).decode
_MATCH_ID, _FINISHED_AT = attrgetter("match_id"), attrgetter("finished_at")
_FIRST, _SECOND, _SCORE = attrgetter("first"), attrgetter("second"), attrgetter("score")
_CONTEXT, _FEATURES = attrgetter("context"), attrgetter("features")
_MARGIN = attrgetter("margin")
_ONLY = itemgetter(0)
_UNSET = msgspec.UNSET
_OUTCOMES = frozenset((0, 0.5, 1))
_TIME = re.compile(
    r"[0-9]{4}-(?:0[1-9]|1[0-2])-(?:0[1-9]|[12][0-9]|3[01])"
    r"T(?:[01][0-9]|2[0-3]):[0-5][0-9]:[0-5][0-9](?:\.[0-9]{1,6})?"
    r"(?:Z|[+-](?:[01][0-9]|2[0-3]):[0-5][0-9])"
).fullmatch
"""The spellings of ``finished_at`` taken on the fast path: a subset of
:data:`streamrate.events.RFC3339` with ranges a calendar can hold."""
_FIELD_NAME = re.compile(rf"[A-Za-z_][A-Za-z0-9_.\-]{{0,{MAX_NAME_CHARS - 1}}}").fullmatch
_new = object.__new__
_set = object.__setattr__
_FIELDS = frozenset(("first", "second", "match_id", "finished_at", "score"))
_FIELDS_CONTEXT = _FIELDS | {"context"}
_FEATURES_ONLY = frozenset(("features",))
_CONTEXT_ONLY = frozenset(("context",))
_MARGIN_ONLY = frozenset(("margin",))
_NONE: frozenset[str] = frozenset()
_CACHE_MAX = 100_000
_names: set[str] = set()  # context field names already checked
_categories: set[str] = set()  # string values already checked


class _Doubt(Exception):
    """The fast path is not sure: decide with the model."""


def _graphic_ascii(text: str) -> bool:
    """Whether every character is printable ASCII other than the space: exactly the
    ASCII characters of the id rule (letters, digits, punctuation, symbols)."""
    return text.isascii() and text.isprintable() and " " not in text


def _is_category(v: str) -> bool:
    return 0 < len(v) <= MAX_CATEGORY_CHARS and _graphic_ascii(v)


def _values(values: dict[str, Any], limit: int) -> dict[str, Any]:
    """A context map (or one entity's features) checked as the model would: at most
    ``limit`` names, each a field name, each value a category or a finite number
    within bounds; numbers as floats. Else :class:`_Doubt`."""
    if not values:
        return values
    if len(values) > limit:
        raise _Doubt
    if not _names.issuperset(values):
        for name in values:
            if name not in _names:
                if not _FIELD_NAME(name):
                    raise _Doubt
                if len(_names) < _CACHE_MAX:
                    _names.add(name)
    if _categories.issuperset(values.values()):  # strings only: a number equals no string
        return values
    numbers = False
    for v in values.values():
        kind = type(v)
        if kind is str:
            if v not in _categories:
                if not _is_category(v):
                    raise _Doubt
                if len(_categories) < _CACHE_MAX:
                    _categories.add(v)
        elif kind is int or kind is float:
            if not math.isfinite(v) or abs(v) > MAX_NUMBER_ABS:
                raise _Doubt
            numbers = True
        else:
            raise _Doubt
    if not numbers:
        return values
    return {k: v if type(v) is str else float(v) for k, v in values.items()}


def _context(ctx: dict[str, Any]) -> dict[str, Any]:
    return _values(ctx, MAX_CONTEXT_FIELDS)


def _features(
    features: dict[str, dict[str, Any]], first: tuple[str, ...], second: tuple[str, ...]
) -> dict[str, dict[str, Any]]:
    """An event's feature maps checked as the model would (each entity one of this
    match, whose id the batch check has passed), or :class:`_Doubt`."""
    if len(features) > 2 * MAX_SIDE_SIZE:
        raise _Doubt
    out: dict[str, dict[str, Any]] = {}
    for entity, values in features.items():
        if entity not in first and entity not in second:
            raise _Doubt
        out[entity] = _values(values, MAX_FEATURES_PER_ENTITY)
    return out


def _margin(margin: Any, score: float) -> float | None:
    """An event's margin checked as the model would (bounded, finite, its sign agreeing
    with the score; -0.0 as 0.0), or :class:`_Doubt`."""
    if margin is None:
        return None
    kind = type(margin)
    if kind is not int and kind is not float:
        raise _Doubt
    if not math.isfinite(margin) or abs(margin) > MAX_NUMBER_ABS:
        raise _Doubt
    if (margin > 0 and score != 1) or (margin < 0 and score != 0):
        raise _Doubt
    return float(margin) + 0.0


def _fast(wires: list[_Wire]) -> tuple[list[MatchEvent], list[float]]:
    """The events of payloads that all passed step 1, or :class:`_Doubt` (step 2, 3)."""
    if not wires:
        return [], []
    mids = list(map(_MATCH_ID, wires))
    firsts = list(map(_FIRST, wires))
    seconds = list(map(_SECOND, wires))
    features = list(map(_FEATURES, wires))
    ids = "".join(chain(mids, chain.from_iterable(firsts), chain.from_iterable(seconds)))
    if not _graphic_ascii(ids):
        raise _Doubt
    if max(map(len, firsts)) == 1 == max(map(len, seconds)):
        if any(map(eq, map(_ONLY, firsts), map(_ONLY, seconds))):
            raise _Doubt
    else:
        for first, second in zip(firsts, seconds, strict=True):
            a, b = set(first), set(second)
            if len(a) != len(first) or len(b) != len(second) or not a.isdisjoint(b):
                raise _Doubt
    scores = list(map(_SCORE, wires))
    if not _OUTCOMES.issuperset(scores):
        raise _Doubt
    texts = list(map(_FINISHED_AT, wires))
    if not all(map(_TIME, texts)):
        raise _Doubt
    try:
        finished = list(map(datetime.fromisoformat, texts))
        times = list(map(datetime.timestamp, finished))
    except (ValueError, OverflowError) as exc:
        raise _Doubt from exc
    n = len(wires)
    contexts = list(map(_CONTEXT, wires))
    if contexts.count(_UNSET) or features.count(_UNSET) != n:  # not the usual shape
        fields = [
            _FIELDS
            | (_CONTEXT_ONLY if ctx is not _UNSET else _NONE)
            | (_FEATURES_ONLY if feats is not _UNSET else _NONE)
            for ctx, feats in zip(contexts, features, strict=True)
        ]
        contexts = [{} if ctx is _UNSET else ctx for ctx in contexts]
    else:
        fields = [_FIELDS_CONTEXT] * n
    given = list(map(_MARGIN, wires))
    if given.count(_UNSET) == n:  # the usual shape: no margins
        margins: list[float | None] = [None] * n
    else:
        margins = [
            None if m is _UNSET else _margin(m, s) for m, s in zip(given, scores, strict=True)
        ]
        fields = [
            f | _MARGIN_ONLY if m is not _UNSET else f for f, m in zip(fields, given, strict=True)
        ]
    if not (
        all(map(_names.issuperset, contexts))
        and all(map(_categories.issuperset, map(dict.values, contexts)))
        and max(map(len, contexts)) <= MAX_CONTEXT_FIELDS
    ):
        contexts = list(map(_context, contexts))
    if any(features):  # unset or empty is falsy
        feature_maps = [
            _features(f, a, b) if f else {}
            for f, a, b in zip(features, firsts, seconds, strict=True)
        ]
    else:
        feature_maps = list(map(dict, repeat((), n)))
    events = make_events(
        firsts, seconds, contexts, feature_maps, mids, finished, scores, margins, fields
    )
    return events, times


def make_events(
    firsts: Sequence[tuple[str, ...]],
    seconds: Sequence[tuple[str, ...]],
    contexts: Sequence[dict[str, Any]],
    feature_maps: Sequence[dict[str, dict[str, Any]]],
    mids: Sequence[str],
    finished: Sequence[datetime],
    scores: Iterable[float],
    margins: Sequence[float | None],
    fields: Sequence[frozenset[str]],
) -> list[MatchEvent]:
    """Events built as pydantic itself would leave them from values already checked
    against the model, without a Python call per event: one comprehension, then
    C-level maps (each dict and set is the event's own). ``fields``: the names each
    payload gave (pydantic's ``model_fields_set``)."""
    n = len(mids)
    dicts = [  # the field order of pydantic's own ``__dict__``
        {
            "first": first,
            "second": second,
            "context": ctx,
            "features": feats,
            "match_id": mid,
            "finished_at": when,
            "score": float(score),
            "margin": margin,
        }
        for first, second, ctx, feats, mid, when, score, margin in zip(
            firsts, seconds, contexts, feature_maps, mids, finished, scores, margins, strict=True
        )
    ]
    out = list(map(_new, repeat(MatchEvent, n)))
    deque(map(_set, out, repeat("__dict__"), dicts), 0)
    deque(map(_set, out, repeat("__pydantic_fields_set__"), map(set, fields)), 0)
    deque(map(_set, out, repeat("__pydantic_extra__"), repeat(None)), 0)
    deque(map(_set, out, repeat("__pydantic_private__"), repeat(None)), 0)
    return out


def _model(raw: bytes) -> tuple[MatchEvent | EventError, float]:
    """The model's decision on one payload: its event, or its refusal."""
    try:
        ev = parse_event(raw)
    except EventError as exc:
        return exc, math.nan
    return ev, ev.finished_at.timestamp()


def _one(raw: bytes) -> tuple[MatchEvent | EventError, float]:
    """One payload: the fast path, else the model."""
    try:
        if len(raw) > MAX_EVENT_BYTES:
            raise _Doubt
        evs, times = _fast([_decode_wire(raw)])
        return evs[0], times[0]
    except (msgspec.DecodeError, _Doubt):
        return _model(raw)


def decode_events(
    raws: Sequence[bytes],
) -> tuple[list[MatchEvent | EventError], list[float]]:
    """Each payload's event, or the :class:`EventError` ``parse_event`` raises for it,
    and each event's ``finished_at`` as unix seconds (NaN for a refusal)."""
    if not raws:
        return [], []
    try:
        if max(map(len, raws)) > MAX_EVENT_BYTES:
            raise _Doubt
        wires = list(map(_decode_wire, raws))
    except (msgspec.DecodeError, _Doubt):
        return _each(raws)
    try:
        fast, stamps = _fast(wires)
    except _Doubt:
        return _each(raws)
    return cast(list[MatchEvent | EventError], fast), stamps


def _each(raws: Sequence[bytes]) -> tuple[list[MatchEvent | EventError], list[float]]:
    """Payload by payload (a batch in which some payload is doubted)."""
    got = list(map(_one, raws))
    return [ev for ev, _ in got], [t for _, t in got]


def fast_event(raw: bytes) -> MatchEvent | None:
    """The fast path alone, for one payload: its event, or None when it is not sure
    (then :func:`decode_events` asks the model). For tests and benchmarks."""
    try:
        if len(raw) > MAX_EVENT_BYTES:
            return None
        return _fast([_decode_wire(raw)])[0][0]
    except (msgspec.DecodeError, _Doubt):
        return None
