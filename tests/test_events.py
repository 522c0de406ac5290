"""The match-event format: what is accepted, what is rejected and why."""

from __future__ import annotations

import json

import pytest

from streamrate.errors import EventError
from streamrate.events import (
    MAX_EVENT_BYTES,
    MatchEvent,
    event_digest,
    event_to_json,
    parse_event,
)

GOOD = {
    "match_id": "m-1",
    "finished_at": "2026-03-01T18:00:00Z",
    "first": ["kelvash"],
    "second": ["morvenn"],
    "score": 1,
    "context": {"map": "saltflats", "mode": "duel", "patch": 3},
}


def _with(**changes: object) -> bytes:
    ev = dict(GOOD)
    ev.update(changes)
    return json.dumps(ev).encode()


def test_good_event_round_trips() -> None:
    ev = parse_event(json.dumps(GOOD))
    assert ev.first == ("kelvash",) and ev.score == 1.0
    assert parse_event(event_to_json(ev)) == ev


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"first": []}, "first"),
        ({"second": ["kelvash"]}, "second"),
        ({"score": 0.3}, "score"),
        ({"score": True}, "score"),
        ({"finished_at": "2026-03-01T18:00:00"}, "finished_at"),
        ({"finished_at": 12345}, "finished_at"),
        ({"finished_at": "1772388000"}, "finished_at"),
        ({"match_id": "m\u00a01"}, "match_id"),
        ({"second": ["mar\u200blow"]}, "second"),
        ({"context": {"map": "salt flats"}}, "context.map"),
        ({"surprise": 1}, "surprise"),
        ({"match_id": ""}, "match_id"),
        ({"first": ["x" * 65]}, "first"),
        ({"context": {"map": ""}}, "context.map"),
        ({"context": {"9bad": "x"}}, "context"),
        ({"features": {"nobody": {"rank": 3}}}, "features"),
    ],
)
def test_bad_events_name_the_field(changes: dict[str, object], field: str) -> None:
    with pytest.raises(EventError, match=field.replace(".", r"\.")):
        parse_event(_with(**changes))


@pytest.mark.parametrize("number", ["NaN", "Infinity", "-Infinity", "1e400"])
def test_non_finite_numbers_are_rejected(number: str) -> None:
    raw = json.dumps(GOOD).replace('"patch": 3', f'"patch": {number}')
    with pytest.raises(EventError, match=r"context\.patch"):
        parse_event(raw)


def test_over_long_input_is_rejected_before_parsing() -> None:
    raw = _with(match_id="m" * 10) + b" " * MAX_EVENT_BYTES
    with pytest.raises(EventError, match="longer than the limit"):
        parse_event(raw)


def test_schema_forbids_unknown_fields() -> None:
    schema = MatchEvent.model_json_schema()
    assert schema["additionalProperties"] is False
    assert set(schema["required"]) == {"first", "second", "match_id", "finished_at", "score"}


@pytest.mark.parametrize(
    ("score", "margin", "kept"),
    [(1, 3, 3.0), (1, 0.5, 0.5), (0, -2, -2.0), (0.5, 0, 0.0), (0.5, -0.0, 0.0), (1, 0, 0.0)],
)
def test_a_margin_that_agrees_with_the_score_is_kept(
    score: float, margin: float, kept: float
) -> None:
    ev = parse_event(_with(score=score, margin=margin))
    assert repr(ev.margin) == repr(kept)
    assert parse_event(event_to_json(ev)) == ev


@pytest.mark.parametrize(
    ("score", "margin", "why"),
    [
        (1, -1, "must be > 0 only when"),
        (0, 2, "must be > 0 only when"),
        (0.5, 1, "must be > 0 only when"),
        (0.5, -0.5, "must be > 0 only when"),
        (1, "NaN", "finite"),
        (1, "Infinity", "finite"),
        (1, 1e10, "at most"),
        (1, True, "valid"),
        (1, "3", "valid"),
        (1, [3], "valid"),
    ],
)
def test_a_bad_margin_is_refused_naming_it(score: float, margin: object, why: str) -> None:
    raw = json.dumps({**GOOD, "score": score, "margin": 0}).replace(
        '"margin": 0',
        f'"margin": {margin}'
        if margin in ("NaN", "Infinity")
        else f'"margin": {json.dumps(margin)}',
    )
    with pytest.raises(EventError, match=f"^margin.*{why}"):
        parse_event(raw)


def test_events_without_a_margin_keep_their_digests() -> None:
    """Digests of events written before margins existed, computed by that code."""
    a = parse_event(
        b'{"match_id": "m-1", "finished_at": "2026-03-01T18:00:00Z", "first": ["kelvash"],'
        b' "second": ["morvenn"], "score": 1, "context": {"map": "saltflats", "year": 2004}}'
    )
    b = parse_event(
        b'{"match_id": "m-2", "finished_at": "2026-03-01T18:00:00Z",'
        b' "first": ["kelvash", "tessor"], "second": ["morvenn"], "score": 0.5}'
    )
    assert event_digest(a).hex() == "841f2057d7e4a789"
    assert event_digest(b).hex() == "e2f45609a8aa55e2"
    null = parse_event(event_to_json(a)[:-1] + ', "margin": null}')
    assert null.margin is None and event_digest(null) == event_digest(a)
    assert "margin" not in event_to_json(a)


def test_a_margin_is_part_of_the_content() -> None:
    plain = parse_event(_with())
    two, three = parse_event(_with(margin=2)), parse_event(_with(margin=3))
    assert len({event_digest(plain), event_digest(two), event_digest(three)}) == 3
    assert event_digest(parse_event(_with(margin=2.0))) == event_digest(two)
    tied = parse_event(_with(score=0.5, margin=0))
    assert event_digest(parse_event(_with(score=0.5, margin=-0.0))) == event_digest(tied)
    assert event_digest(parse_event(_with(score=0.5))) != event_digest(tied)


def test_the_schema_publishes_the_margin() -> None:
    prop = MatchEvent.model_json_schema()["properties"]["margin"]
    assert "margin" not in MatchEvent.model_json_schema()["required"]
    assert {"type": "null"} in prop["anyOf"]
