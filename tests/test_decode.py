"""The writer's fast decoder (streamrate/decode.py) against the pydantic model.

The model (``parse_event``) is the definition of the event format. Over thousands
of generated payloads, valid and invalid (NaN and infinities, huge numbers,
years 0000 to 9999, unknown and missing fields, wrong types, oversized input,
duplicate keys, an entity twice on a side or on both sides, any unicode), the
fast decoder must accept exactly what the model accepts, give the same event
(same values, types, time offset, JSON and content digest), and refuse with the
same message, which names the same field. Margins too: valid ones, NaN, infinities,
huge ones, -0.0, signs that contradict the score, wrong types and null.
"""

from __future__ import annotations

import json
import math
from operator import add
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from streamrate.decode import decode_events, fast_event
from streamrate.errors import EventError
from streamrate.events import (
    MAX_CONTEXT_FIELDS,
    MAX_EVENT_BYTES,
    MAX_SIDE_SIZE,
    MatchEvent,
    event_digest,
    event_to_json,
    parse_event,
)

MANY = settings(max_examples=2000, suppress_health_check=[HealthCheck.too_slow])
BATCHES = settings(max_examples=400, suppress_health_check=[HealthCheck.too_slow])  # x 1-8

# -- pieces, each sometimes wrong ------------------------------------------------
ALNUM = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789"
plain_ids = st.builds(
    add, st.sampled_from(ALNUM), st.text(ALNUM + "_.:-", max_size=14)
)  # [A-Za-z0-9][A-Za-z0-9_.:-]{0,14}, drawn without a regex (fast)
nasty_text = st.text(max_size=70)  # any code point: spaces, controls, bidi, surrogates ...
ids = st.one_of(
    plain_ids,
    plain_ids,
    st.text(alphabet=st.characters(codec="ascii"), min_size=0, max_size=66),
    st.sampled_from(["", " ", "a b", "x" * 64, "x" * 65, "é", "名前", "a\u200bb", "\u00a0", "a\n"]),
    nasty_text,
)
side = st.one_of(
    st.lists(ids, min_size=1, max_size=3),
    st.lists(plain_ids, min_size=0, max_size=MAX_SIDE_SIZE + 2),
)
number = st.one_of(
    st.integers(-(10**10), 10**10),
    st.integers(),
    st.floats(),  # NaN and infinities too
    st.sampled_from([0, -0.0, 1e9, -1e9, 1e9 + 1, 1e300, 2**63, 2**64, 1e-320]),
)
category = st.one_of(plain_ids, ids, st.text(max_size=66))
names = st.one_of(
    st.builds(add, st.sampled_from(ALNUM[:52] + "_"), st.text(ALNUM + "_.-", max_size=12)),
    st.sampled_from(["", "1a", "a b", "x" * 32, "x" * 33, "ma\u00f1a", "a\n", "-x", "_"]),
)
value = st.one_of(category, number, st.booleans(), st.none(), st.lists(st.integers(), max_size=2))
context = st.one_of(
    st.dictionaries(names, st.one_of(plain_ids, plain_ids, value), max_size=4),
    st.dictionaries(
        names,
        st.sampled_from(["saltflats", "duel"]),
        min_size=MAX_CONTEXT_FIELDS - 1,
        max_size=MAX_CONTEXT_FIELDS + 2,
    ),
    st.sampled_from([None, [], "map", 3]),
)
digits = st.integers(0, 9999).map(lambda y: f"{y:04d}")
two = st.integers(0, 99).map(lambda v: f"{v:02d}")
fraction = st.one_of(
    st.just(""), st.text("0123456789", min_size=1, max_size=10).map(lambda d: "." + d)
)
offset = st.one_of(
    st.sampled_from(["Z", "z", "+00:00", "-00:00", "+01:00", "-05:30", "+23:59", "+24:00", ""]),
    st.tuples(st.sampled_from("+-"), two, two).map(lambda t: f"{t[0]}{t[1]}:{t[2]}"),
)
times = st.one_of(
    st.tuples(digits, two, two, st.sampled_from("Tt "), two, two, two, fraction, offset).map(
        lambda p: f"{p[0]}-{p[1]}-{p[2]}{p[3]}{p[4]}:{p[5]}:{p[6]}{p[7]}{p[8]}"
    ),
    st.sampled_from(
        [
            "2026-03-01T18:00:00Z",
            "2026-03-01T18:00:00.123456+02:00",
            "9999-12-31T23:59:59Z",
            "9999-12-31T23:59:59-01:00",
            "0001-01-01T00:00:00+01:00",
            "0000-01-01T00:00:00Z",
            "2024-02-29T12:00:00Z",
            "2023-02-29T12:00:00Z",
            "2026-03-01T23:59:60Z",
            "2026-03-01T24:00:00Z",
            "2026-03-01T18:00:00.1234567Z",
            "2026-03-01",
            "2026-03-01T18:00Z",
        ]
    ),
    st.integers(0, 2**40),
    nasty_text,
)
score = st.one_of(
    st.sampled_from([0, 0.5, 1, 1.0, 0.0, -0.0, True, False, 2, -1, "1", None, 0.25]),
    number,
)
margin = st.one_of(
    number,  # NaN, infinities, huge, -0.0, integers beyond 64 bits
    st.integers(-12, 12),
    st.floats(-30, 30),
    st.sampled_from([0, 0.0, -0.0, 1, -1, 2.5, 1e9, -1e9, 1e9 + 1, True, False, "2", None, []]),
)
"""Any number (so often of the wrong sign for the score), wrong types and null."""
FIELDS = (
    "match_id", "finished_at", "first", "second", "score", "context", "features", "margin"
)  # fmt: skip


@st.composite
def payloads(draw: st.DrawFn) -> bytes:
    """A JSON event, often valid, otherwise wrong in one or more ways."""
    first = draw(side)
    second = draw(st.one_of(side, side.map(lambda s: s + first[:1])))  # sometimes overlapping
    data: dict[str, Any] = {
        "match_id": draw(st.one_of(ids, st.integers(), st.none())),
        "finished_at": draw(times),
        "first": first,
        "second": second,
        "score": draw(score),
    }
    if draw(st.booleans()):
        data["context"] = draw(context)
    if draw(st.integers(0, 5)) == 0:
        who = draw(st.sampled_from([*first, *second, "stranger"]))
        data["features"] = draw(
            st.one_of(st.just({}), st.dictionaries(st.just(who), st.dictionaries(names, value)))
        )
    if draw(st.integers(0, 2)) == 0:
        data["margin"] = draw(margin)
    if draw(st.integers(0, 6)) == 0:
        data[draw(st.sampled_from(["extra", "Score", "match id", "contexts"]))] = 1
    if draw(st.integers(0, 8)) == 0:
        data.pop(draw(st.sampled_from(FIELDS)), None)
    if draw(st.integers(0, 8)) == 0:
        key = draw(st.sampled_from(FIELDS))
        data[key] = draw(st.one_of(st.none(), st.integers(), st.text(max_size=5), st.just([])))
    text = json.dumps(data, ensure_ascii=draw(st.booleans()))  # NaN, Infinity as JSON tokens
    trick = draw(st.integers(0, 9))
    if trick == 0:  # a duplicate key, first or last
        dup = draw(st.sampled_from(FIELDS))
        body = json.dumps({dup: data.get(dup, draw(score))})[1:-1]
        text = (
            "{" + body + ", " + text[1:] if draw(st.booleans()) else text[:-1] + ", " + body + "}"
        )
    elif trick == 1:  # padded past the size limit, or just under it
        pad = MAX_EVENT_BYTES - len(text.encode()) + draw(st.integers(-2, 2))
        text = text[:-1] + " " * max(pad, 0) + "}"
    raw = text.encode("utf-8", "surrogatepass")
    if trick == 2:
        raw = raw[: draw(st.integers(0, len(raw)))]
    elif trick == 3:
        at = draw(st.integers(0, len(raw)))
        raw = raw[:at] + draw(st.binary(min_size=1, max_size=3)) + raw[at:]
    elif trick == 4:
        raw = draw(st.sampled_from([b"[]", b"null", b"1", b'"x"', b"", b" ", b"{}", b"\xff"]))
    return raw


@st.composite
def plain_events(draw: st.DrawFn) -> bytes:
    """The common shape: ids, times and categories as producers write them."""
    team = draw(st.integers(1, 3))
    people = draw(st.lists(plain_ids, min_size=2 * team, max_size=2 * team, unique=True))
    ctx = draw(
        st.dictionaries(
            st.builds(add, st.sampled_from(ALNUM[:26] + "_"), st.text(ALNUM[:26], max_size=8)),
            st.one_of(plain_ids, st.integers(-(10**9), 10**9), st.floats(-1e9, 1e9)),
            max_size=4,
        )
    )
    data = {
        "match_id": draw(plain_ids),
        "finished_at": draw(
            st.tuples(
                st.integers(2000, 2100),
                st.integers(1, 12),
                st.integers(1, 28),
                st.integers(0, 23),
                st.integers(0, 59),
                st.integers(0, 59),
                st.sampled_from(["", ".5", ".123", ".123456"]),
                st.sampled_from(["Z", "+00:00", "+02:00", "-07:30"]),
            ).map(lambda p: "{:04d}-{:02d}-{:02d}T{:02d}:{:02d}:{:02d}{}{}".format(*p))
        ),
        "first": people[:team],
        "second": people[team:],
        "score": draw(st.sampled_from([0, 0.5, 1, 1.0])),
        "context": ctx,
    }
    if draw(st.booleans()):
        who = draw(st.sampled_from(people))
        data["features"] = {who: {"training_hours": draw(st.floats(0, 100)), "style": "rush"}}
    if draw(st.booleans()):  # a margin that agrees with the score
        size = draw(st.one_of(st.integers(1, 9), st.floats(0.5, 100.0)))
        data["margin"] = {0: -size, 0.5: draw(st.sampled_from([0, 0.0, -0.0])), 1: size}[
            data["score"]
        ]
    return json.dumps(data).encode()


def _model(raw: bytes) -> MatchEvent | str:
    try:
        return parse_event(raw)
    except EventError as exc:
        return str(exc)


def _same_event(got: MatchEvent, want: MatchEvent) -> None:
    assert type(got) is MatchEvent
    assert got == want
    assert got.__dict__ == want.__dict__
    assert list(got.__dict__) == list(want.__dict__)
    assert got.model_fields_set == want.model_fields_set
    assert event_to_json(got) == event_to_json(want)
    assert event_digest(got) == event_digest(want)
    assert repr(got.score) == repr(want.score)
    assert repr(got.margin) == repr(want.margin)
    for k, v in want.context.items():
        assert type(got.context[k]) is type(v) and repr(got.context[k]) == repr(v)
    assert list(got.context) == list(want.context)
    assert got.finished_at.isoformat() == want.finished_at.isoformat()
    assert got.finished_at.utcoffset() == want.finished_at.utcoffset()


def _check(raws: list[bytes]) -> None:
    evs, stamps = decode_events(raws)
    assert len(evs) == len(stamps) == len(raws)
    for raw, got, t in zip(raws, evs, stamps, strict=True):
        want = _model(raw)
        if isinstance(want, str):
            assert isinstance(got, EventError) and str(got) == want
            assert math.isnan(t)
        else:
            assert isinstance(got, MatchEvent)
            _same_event(got, want)
            assert t == want.finished_at.timestamp()
        quick = fast_event(raw)
        if quick is not None:  # the fast path alone never accepts what the model refuses
            assert not isinstance(want, str)
            _same_event(quick, want)


@MANY
@given(payloads())
def test_one_payload_is_decided_as_the_model_decides(raw: bytes) -> None:
    _check([raw])


@BATCHES
@given(st.lists(st.one_of(plain_events(), payloads()), min_size=1, max_size=8))
def test_a_batch_is_decided_payload_by_payload_as_the_model_decides(raws: list[bytes]) -> None:
    _check(raws)


@BATCHES
@given(st.lists(plain_events(), min_size=1, max_size=8))
def test_common_events_take_the_fast_path(raws: list[bytes]) -> None:
    """Not a fallback in disguise: plain events are accepted by the fast path itself."""
    for raw in raws:
        assert fast_event(raw) is not None
    _check(raws)


def test_a_bad_payload_in_a_batch_is_refused_alone_with_the_models_message() -> None:
    good = (
        b'{"match_id": "m-1", "finished_at": "2026-03-01T18:00:00Z", "first": ["kelvash"],'
        b' "second": ["morvenn"], "score": 1, "context": {"map": "saltflats", "year": 2004}}'
    )
    bad = good.replace(b'"score": 1', b'"score": 2').replace(b"m-1", b"m-2")
    evs, _ = decode_events([good, bad, good])
    assert isinstance(evs[0], MatchEvent) and isinstance(evs[2], MatchEvent)
    assert evs[0].context == {"map": "saltflats", "year": 2004.0}
    assert isinstance(evs[1], EventError) and str(evs[1]).startswith("score: must be 1")
    assert decode_events([]) == ([], [])


def test_margins_take_the_fast_path_and_sign_conflicts_get_the_models_message() -> None:
    base = (
        b'{"match_id": "m-1", "finished_at": "2026-03-01T18:00:00Z", "first": ["kelvash"],'
        b' "second": ["morvenn"], "score": %s, "margin": %s}'
    )
    for score, sent, kept in ((b"1", b"3", 3.0), (b"0.5", b"-0.0", 0.0), (b"0", b"-1.5", -1.5)):
        ev = fast_event(base % (score, sent))
        assert ev is not None and repr(ev.margin) == repr(kept)
    for score, sent in ((b"1", b"-1"), (b"0.5", b"2"), (b"0", b"0.5")):
        raw = base % (score, sent)
        assert fast_event(raw) is None
        (got,), _ = decode_events([raw])
        assert str(got) == "margin: must be > 0 only when score is 1 and < 0 only when score is 0"
