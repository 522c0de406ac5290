"""Property tests of event parsing: open-ended inputs never crash the parser."""

from __future__ import annotations

import json
import math
import re
import unicodedata
from datetime import UTC, datetime, timedelta
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.errors import EventError
from streamrate.events import (
    MAX_SIDE_SIZE,
    SCHEMA_ID_PATTERN,
    MatchEvent,
    event_digest,
    event_digests,
    event_to_json,
    parse_event,
    parse_matchup,
)
from tests.decide_reference import reference_digest

ID_CATEGORIES = ("L", "M", "N", "P", "S")
ids = st.text(alphabet=st.characters(categories=ID_CATEGORIES), min_size=1, max_size=12)
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


# -- the id rule: every character in general category L, M, N, P or S ---------------
# The characters the README names as refused, each with its category (Unicode 14, from
# memory and checked with unicodedata below).
NAMED_REFUSED = {
    "\u00a0": "Zs",  # no-break space
    "\u200b": "Cf",  # zero-width space
    "\u2028": "Zl",  # line separator
    "\u2029": "Zp",  # paragraph separator
    "\u202e": "Cf",  # right-to-left override
    "\ufeff": "Cf",  # byte-order mark
    "\u3000": "Zs",  # ideographic space
    "\u0085": "Cc",  # next line
    " ": "Zs",
    "\t": "Cc",
    "\u00ad": "Cf",  # soft hyphen
    "\ue000": "Co",  # private use
    "\u0378": "Cn",  # unassigned in every Unicode version so far
}
refused_chars = st.one_of(
    st.sampled_from(sorted(NAMED_REFUSED)),
    st.characters(categories=("Zs", "Zl", "Zp", "Cc", "Cf", "Co")),
)
# Any code point at all, except those unassigned in Python's tables: those may be
# assigned in the validator's newer tables, so their verdict depends on versions.
any_char = st.characters(exclude_categories=("Cs",)).filter(
    lambda c: unicodedata.category(c) != "Cn"
)


def _allowed(text: str) -> bool:
    return all(unicodedata.category(c)[0] in "LMNPS" for c in text)


def test_named_characters_have_the_stated_categories() -> None:
    for ch, cat in NAMED_REFUSED.items():
        assert unicodedata.category(ch) == cat, repr(ch)


def _event_with(where: str, text: str) -> dict[str, Any]:
    ev: dict[str, Any] = {
        "match_id": "m-1",
        "finished_at": "2026-03-01T18:00:00Z",
        "first": ["kelvash"],
        "second": ["morvenn"],
        "score": 1,
    }
    if where == "match_id":
        ev["match_id"] = text
    elif where == "first":
        ev["first"] = [text]
    elif where == "context":
        ev["context"] = {"map": text}
    else:
        ev["features"] = {"kelvash": {"style": text}}
    return ev


WHERE = st.sampled_from(["match_id", "first", "context", "features"])
FIELD = {"match_id": "match_id", "first": "first.0", "context": "context.map",
         "features": "features.kelvash.style"}  # fmt: skip


@given(
    where=WHERE,
    head=st.text(st.characters(categories=ID_CATEGORIES), max_size=8),
    bad=refused_chars,
    tail=st.text(st.characters(categories=ID_CATEGORIES), max_size=8),
)
def test_an_id_with_a_separator_control_or_invisible_character_is_refused(
    where: str, head: str, bad: str, tail: str
) -> None:
    raw = json.dumps(_event_with(where, head + bad + tail))
    try:
        parse_event(raw)
    except EventError as exc:
        assert FIELD[where] in str(exc)
    else:
        raise AssertionError(f"{head + bad + tail!r} was accepted in {where}")


@given(where=WHERE, text=st.text(any_char, min_size=1, max_size=20))
def test_ids_are_accepted_exactly_when_every_character_is_in_l_m_n_p_s(
    where: str, text: str
) -> None:
    raw = json.dumps(_event_with(where, text))
    try:
        parse_event(raw)
        ok = True
    except EventError as exc:
        ok = False
        assert FIELD[where] in str(exc)
    assert ok == _allowed(text), repr(text)


@given(
    st.one_of(
        st.integers(-(10**12), 10**12),
        st.floats(allow_nan=False, allow_infinity=False),
        st.integers(0, 10**10).map(str),
        st.booleans(),
        st.none(),
        st.lists(st.integers(), max_size=2),
    )
)
def test_finished_at_is_only_an_rfc3339_string(value: Any) -> None:
    raw = json.dumps(_event_with("match_id", "m-1") | {"finished_at": value})
    try:
        parse_event(raw)
    except EventError as exc:
        assert str(exc).startswith("finished_at: must be an RFC 3339 time string")
    else:
        raise AssertionError(f"finished_at {value!r} was accepted")


@given(valid_events(), st.sampled_from(["score", "first", "match_id", "finished_at", "ctx"]))
def test_the_digest_changes_with_the_content_and_not_with_the_spelling(
    data: dict[str, Any], change: str
) -> None:
    ev = parse_event(json.dumps(data))
    # Same content, other spelling: keys reversed, compact, numbers as floats, +00:00.
    respelled = {k: data[k] for k in reversed(list(data))}
    respelled["score"] = float(data["score"])
    respelled["finished_at"] = ev.finished_at.astimezone(UTC).isoformat()
    respelled["context"] = {
        k: (float(v) if isinstance(v, int) else v) for k, v in reversed(data["context"].items())
    }
    assert event_digest(parse_event(json.dumps(respelled, separators=(",", ":")))) == (
        event_digest(ev)
    )
    other = dict(data)
    if change == "score":
        other["score"] = 0.5 if data["score"] != 0.5 else 1
    elif change == "first":
        other["first"], other["second"] = data["second"], data["first"]
    elif change == "match_id":
        other["match_id"] = data["match_id"] + "x" if len(data["match_id"]) < 64 else "y"
    elif change == "finished_at":
        other["finished_at"] = (ev.finished_at + timedelta(seconds=1)).isoformat()
    else:
        other["context"] = {**data["context"], "zz_extra": "x"}
    assert event_digest(parse_event(json.dumps(other))) != event_digest(ev)


@given(st.text(any_char, min_size=1, max_size=20))
def test_the_published_schema_pattern_is_looser_than_the_service_and_refuses_the_named(
    text: str,
) -> None:
    # Schema consumers use general regex engines (Python's re here, Draft 2020-12).
    if _allowed(text):
        assert re.match(SCHEMA_ID_PATTERN, text)
    for ch in NAMED_REFUSED:
        if unicodedata.category(ch) != "Cn":
            assert not re.match(SCHEMA_ID_PATTERN, text + ch)


categories = st.from_regex(r"[a-z][a-z0-9\-]{0,6}", fullmatch=True)


@st.composite
def digest_batches(draw: st.DrawFn) -> list[MatchEvent]:
    """Batches mostly of the usual shape (contexts of categories, no features, no
    margin), sometimes mixed with events of another shape."""
    out = []
    for k in range(draw(st.integers(1, 8))):
        data = draw(valid_events())
        data["match_id"] = f"{data['match_id']}-{k}"
        shape = draw(st.sampled_from(["usual", "usual", "usual", "bare", "any", "margin"]))
        if shape in ("usual", "bare", "margin"):
            data["features"] = {}
            data["context"] = (
                {} if shape == "bare" else draw(st.dictionaries(names, categories, max_size=3))
            )
        if shape == "margin":
            data["margin"] = {1: 2.0, 0: -1.5, 0.5: 0.0}[data["score"]]
        out.append(parse_event(json.dumps(data)))
    return out


@given(digest_batches())
def test_batch_digests_are_the_digests_of_each_event(batch: list[MatchEvent]) -> None:
    # The digests of a batch (event_digests, with its cache of contexts cold, then
    # warm) against the canonical text as first written, one event at a time
    # (tests/decide_reference.py; margins are pinned in tests/test_events.py).
    times = [ev.finished_at.timestamp() for ev in batch]
    first, again = event_digests(batch, times), event_digests(batch, times)
    assert first == again == [event_digest(ev) for ev in batch]
    for ev, got in zip(batch, first, strict=True):
        if ev.margin is None:
            assert got == reference_digest(ev)
