"""Property tests of event parsing: open-ended inputs never crash the parser."""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime, timedelta
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.errors import EventError
from streamrate.events import (
    MAX_SIDE_SIZE,
    MatchEvent,
    event_to_json,
    parse_event,
    parse_matchup,
)

ids = st.text(
    alphabet=st.characters(min_codepoint=0x21, max_codepoint=0x2FF, exclude_characters="\x7f"),
    min_size=1,
    max_size=12,
)
names = st.from_regex(r"[A-Za-z_][A-Za-z0-9_]{0,10}", fullmatch=True)
values = st.one_of(
    st.from_regex(r"[a-z][a-z0-9\-]{0,12}", fullmatch=True),
    st.integers(-1000, 1000),
    st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False),
)


@st.composite
def valid_events(draw: st.DrawFn) -> dict[str, Any]:
    people = draw(st.lists(ids, min_size=2, max_size=10, unique=True))
    k = draw(st.integers(1, len(people) - 1))
    when = datetime(2026, 1, 1, tzinfo=UTC) + timedelta(seconds=draw(st.integers(0, 10**8)))
    players = people[:k] + people[k:]
    feats = draw(
        st.dictionaries(
            st.sampled_from(players), st.dictionaries(names, values, max_size=3), max_size=3
        )
    )
    return {
        "match_id": draw(ids),
        "finished_at": when.isoformat(),
        "first": people[:k],
        "second": people[k:],
        "score": draw(st.sampled_from([0, 0.5, 1, 1.0, 0.0])),
        "context": draw(st.dictionaries(names, values, max_size=5)),
        "features": feats,
    }


@given(valid_events())
def test_valid_events_parse_and_round_trip(data: dict[str, Any]) -> None:
    ev = parse_event(json.dumps(data))
    assert ev.first == tuple(data["first"]) and ev.second == tuple(data["second"])
    assert ev.score in (0.0, 0.5, 1.0)
    assert all(isinstance(v, str) or math.isfinite(v) for v in ev.context.values())
    assert parse_event(event_to_json(ev)) == ev


json_leaf = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(),
    st.floats(),
    st.text(max_size=70),
)
json_any = st.recursive(
    json_leaf,
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=12,
)


@settings(max_examples=300)
@given(valid_events(), st.sampled_from([*sorted(MatchEvent.model_fields), "extra"]), json_any)
def test_mutated_events_parse_or_fail_cleanly(data: dict[str, Any], field: str, value: Any) -> None:
    """Replacing any field by any JSON value either validates or raises EventError
    naming that field (never another exception, never a silent wrong event)."""
    data[field] = value
    raw = json.dumps(data, allow_nan=True)
    try:
        ev = parse_event(raw)
    except EventError as exc:
        assert field in str(exc) or "second" in str(exc) or "features" in str(exc)
        return
    assert field != "extra"
    assert 1 <= len(ev.first) <= MAX_SIDE_SIZE and 1 <= len(ev.second) <= MAX_SIDE_SIZE
    assert not set(ev.first) & set(ev.second)
    assert ev.score in (0.0, 0.5, 1.0)


@given(st.binary(max_size=200))
def test_arbitrary_bytes_never_crash(raw: bytes) -> None:
    try:
        parse_event(raw)
    except EventError as exc:
        assert str(exc)  # a reason is always given


@given(valid_events())
def test_a_matchup_is_an_event_without_the_outcome(data: dict[str, Any]) -> None:
    for key in ("match_id", "finished_at", "score"):
        data.pop(key)
    m = parse_matchup(data)
    assert m.entities() == tuple(data["first"]) + tuple(data["second"])
