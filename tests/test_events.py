"""The match-event format: what is accepted, what is rejected and why."""

from __future__ import annotations

import json

import pytest

from streamrate.errors import EventError
from streamrate.events import MAX_EVENT_BYTES, MatchEvent, event_to_json, parse_event

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
