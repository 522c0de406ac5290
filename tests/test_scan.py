"""The compiled scan (streamrate/scan.py) against the pydantic model and hashlib.

The scan may decline any payload; what it is sure of must be what
``parse_event`` accepts, with the same values and the same ``event_digest``.
Held over the generated payloads of tests/test_decode.py (valid and invalid),
over a strategy of the common spellings (which the scan must take, so the fast
path cannot quietly become empty), and over those spellings with one byte
changed, inserted or removed (the edges of what it takes).
"""

from __future__ import annotations

import hashlib
import json
from datetime import UTC, date, datetime
from itertools import permutations
from operator import add
from string import ascii_letters, digits

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from streamrate.errors import EventError
from streamrate.events import (
    MAX_CATEGORY_CHARS,
    MAX_CONTEXT_FIELDS,
    MAX_EVENT_BYTES,
    MAX_ID_CHARS,
    MAX_NAME_CHARS,
    MAX_SIDE_SIZE,
    MatchEvent,
    _canonical_values,
    event_digest,
    parse_event,
)
from streamrate.scan import Scanned, _blake2b_of, context_of, scan_payloads
from tests.test_decode import payloads, plain_events, plain_ids

MANY = settings(max_examples=2000)
BATCHES = settings(max_examples=300)

BASE = (
    b'{"match_id": "m-1", "finished_at": "2026-03-01T18:00:00Z", "first": ["kelvash"],'
    b' "second": ["morvenn"], "score": 1, "context": {"map": "saltflats", "mode": "duel"}}'
)
GRAPHIC = "".join(chr(c) for c in range(0x21, 0x7F) if chr(c) not in '"\\')
"""Printable ASCII but the space: what ids and categories may hold, minus the two
characters JSON would have to escape."""


# -- the common spellings --------------------------------------------------------
common_ids = st.one_of(plain_ids, st.text(GRAPHIC, min_size=1, max_size=MAX_ID_CHARS))
field_names = st.builds(
    add,
    st.sampled_from(ascii_letters + "_"),
    st.text(ascii_letters + digits + "_.-", max_size=MAX_NAME_CHARS - 1),
)
categories = st.one_of(plain_ids, st.text(GRAPHIC, min_size=1, max_size=MAX_CATEGORY_CHARS))
EARLIEST_S = int(datetime(2000, 1, 1, tzinfo=UTC).timestamp()) - 86_400
LATEST_S = int(datetime(2201, 1, 1, tzinfo=UTC).timestamp()) + 86_400
fractions = st.one_of(
    st.just(""),
    st.tuples(st.text(digits, min_size=1, max_size=6), st.integers(0, 5)).map(
        lambda p: "." + p[0] + "0" * min(p[1], 6 - len(p[0]))
    ),  # up to 6 digits (microseconds), trailing zeros or not
)
offsets = st.one_of(
    st.just("Z"),
    st.tuples(st.sampled_from("+-"), st.integers(0, 23), st.integers(0, 59)).map(
        lambda p: f"{p[0]}{p[1]:02d}:{p[2]:02d}"
    ),
)
common_times = st.tuples(
    st.dates(date(2000, 1, 1), date(2200, 12, 31)),
    st.integers(0, 23),
    st.integers(0, 59),
    st.integers(0, 59),
    fractions,
    offsets,
).map(lambda p: f"{p[0].isoformat()}T{p[1]:02d}:{p[2]:02d}:{p[3]:02d}{p[4]}{p[5]}")
space = st.one_of(st.just(""), st.just(" "), st.text(" \t\n\r", max_size=3))


@st.composite
def common(draw: st.DrawFn) -> bytes:
    """A payload in the documented subset, spelled with any key order and spacing."""
    k1, k2 = draw(st.integers(1, 5)), draw(st.integers(1, 5))
    people = draw(st.lists(common_ids, min_size=k1 + k2, max_size=k1 + k2, unique=True))

    def ws() -> str:
        return draw(space)

    def strings(items: list[str]) -> str:
        return "[" + ws() + ",".join(f'{ws()}"{x}"{ws()}' for x in items) + ws() + "]"

    members = {
        "match_id": f'"{draw(common_ids)}"',
        "finished_at": f'"{draw(common_times)}"',
        "first": strings(people[:k1]),
        "second": strings(people[k1:]),
        "score": draw(st.sampled_from(["0", "1", "0.0", "1.0", "0.5"])),
    }
    if draw(st.integers(0, 3)):
        ctx = draw(st.dictionaries(field_names, categories, max_size=4))
        inner = ",".join(f'{ws()}"{k}"{ws()}:{ws()}"{v}"{ws()}' for k, v in ctx.items())
        members["context"] = "{" + ws() + inner + "}"
    keys = list(members)
    if draw(st.booleans()):
        keys = draw(st.permutations(keys))
    body = ",".join(f'{ws()}"{k}"{ws()}:{ws()}{members[k]}{ws()}' for k in keys)
    return f"{ws()}{{{body}}}{ws()}".encode()


@st.composite
def mutated(draw: st.DrawFn) -> bytes:
    """A common payload with one byte changed, inserted or removed."""
    raw = draw(common())
    marks = [k for k, c in enumerate(raw) if c in b'"{}[],:.-+T']  # often at the structure
    at = draw(st.one_of(st.integers(0, len(raw)), st.sampled_from(marks)))
    byte = draw(st.one_of(st.sampled_from(b'0159.-+:eE"\\,{}[] \t\x00\x1fZzTt\x7f\x80\xff'),
                          st.integers(0, 255)))  # fmt: skip
    how = draw(st.integers(0, 2))
    if how == 0 and at < len(raw):
        return raw[:at] + bytes([byte]) + raw[at + 1 :]
    if how == 1:
        return raw[:at] + bytes([byte]) + raw[at:]
    return raw[:at] + raw[at + 1 :]


# -- the check ---------------------------------------------------------------------
def _check(raws: list[bytes]) -> Scanned:
    """Every sure payload is accepted by the model with the same content."""
    got = scan_payloads(raws)
    assert got.sure.dtype == np.bool_ and got.sure.shape == (len(raws),)
    assert got.at.tolist() == np.flatnonzero(got.sure).tolist()
    m = len(got.at)
    for column in (got.match_ids, got.firsts, got.seconds, got.finished, got.context_keys):
        assert len(column) == m
    assert got.scores.shape == got.times.shape == (m,) and len(got.digests) == m
    assert got.times.dtype == got.scores.dtype == np.float64
    for j, i in enumerate(got.at.tolist()):
        try:
            ev = parse_event(raws[i])
        except EventError as exc:  # pragma: no cover - the failure being tested for
            pytest.fail(f"sure of a payload the model refuses: {raws[i]!r}: {exc}")
        _same(got, j, ev)
    return got


def _same(got: Scanned, j: int, ev: MatchEvent) -> None:
    assert got.match_ids[j] == ev.match_id
    assert type(got.firsts[j]) is tuple and got.firsts[j] == ev.first
    assert type(got.seconds[j]) is tuple and got.seconds[j] == ev.second
    assert repr(float(got.scores[j])) == repr(ev.score)
    assert not ev.features and ev.margin is None
    assert context_of(got.context_keys[j]) == ev.context
    assert list(context_of(got.context_keys[j]).items()) == list(ev.context.items())  # order
    assert got.context_keys[j] == "\x1f".join(f"{k}\x1ds{v}" for k, v in ev.context.items())
    assert got.has_context[j] == ("context" in ev.model_fields_set)
    assert float(got.times[j]) == ev.finished_at.timestamp()
    when = datetime.fromisoformat(got.finished[j])
    assert when == ev.finished_at and when.utcoffset() == ev.finished_at.utcoffset()
    assert type(got.digests[j]) is bytes and got.digests[j] == event_digest(ev)


# -- properties ----------------------------------------------------------------------
@MANY
@given(payloads())
def test_what_the_scan_is_sure_of_the_model_accepts_alike(raw: bytes) -> None:
    _check([raw])


@MANY
@given(st.one_of(plain_events(), mutated()))
def test_near_misses_of_the_common_spellings_are_sure_only_when_right(raw: bytes) -> None:
    _check([raw])


@MANY
@given(common())
def test_the_common_spellings_are_taken(raw: bytes) -> None:
    got = _check([raw])
    assert got.sure.tolist() == [True], raw


@BATCHES
@given(st.lists(st.one_of(common(), payloads(), plain_events(), mutated()), max_size=8))
def test_a_batch_is_scanned_as_each_payload_alone(raws: list[bytes]) -> None:
    whole = _check(raws)
    alone = [scan_payloads([raw]) for raw in raws]
    assert whole.sure.tolist() == [bool(one.sure[0]) for one in alone]
    sure = [one for one in alone if one.sure[0]]
    assert whole.match_ids == [one.match_ids[0] for one in sure]
    assert whole.firsts == [one.firsts[0] for one in sure]
    assert whole.seconds == [one.seconds[0] for one in sure]
    assert whole.scores.tolist() == [one.scores[0] for one in sure]
    assert whole.times.tolist() == [one.times[0] for one in sure]
    assert whole.finished == [one.finished[0] for one in sure]
    assert whole.context_keys == [one.context_keys[0] for one in sure]
    assert whole.digests == [one.digests[0] for one in sure]


@MANY
@given(common_times)
def test_times_are_pythons_timestamps(text: str) -> None:
    raw = BASE.replace(b"2026-03-01T18:00:00Z", text.encode())
    got = _check([raw])
    assert got.sure.tolist() == [True]
    assert got.finished == [text]
    assert got.times.tolist() == [datetime.fromisoformat(text).timestamp()]


@MANY
@given(st.integers(EARLIEST_S, LATEST_S), st.text(digits, min_size=6, max_size=6))
def test_the_repr_rule_holds_for_microseconds_in_the_scans_years(whole: int, fraction: str) -> None:
    """Six fraction digits (16 significant): the rule holds for every t of the years
    the scan takes (2000 to 2200, offsets included), see ``scan._time``."""
    kept = fraction.rstrip("0")
    us = whole * 1_000_000 + int(fraction)
    assert repr(us / 1e6) == f"{whole}.{kept or '0'}"


@MANY
@given(st.integers(1, 10**10 - 1), st.text(digits, max_size=5))
def test_the_repr_rule_of_the_digest_text(whole: int, fraction: str) -> None:
    """What the kernel writes for ``repr(t)``: the integer part, ".", the fraction
    without trailing zeros (or "0"), for 0 < t < 1e10 and at most 5 fraction digits."""
    kept = fraction.rstrip("0")
    us = whole * 1_000_000 + int((fraction + "000000")[:6])
    assert repr(us / 1e6) == f"{whole}.{kept or '0'}"


# -- BLAKE2b ---------------------------------------------------------------------------
@settings(max_examples=500)
@given(st.binary(max_size=400), st.integers(1, 64))
@example(b"", 8)
@example(b"\x01" * 127, 8)
@example(b"\x02" * 128, 8)
@example(b"\x03" * 129, 8)
@example(b"\x04" * 256, 8)
@example(b"\x05" * 256, 64)
def test_blake2b_is_hashlibs(data: bytes, size: int) -> None:
    assert _blake2b_of(data, size) == hashlib.blake2b(data, digest_size=size).digest()
    assert _blake2b_of(data) == hashlib.blake2b(data, digest_size=8).digest()


def test_blake2b_512_of_abc() -> None:
    # RFC 7693 (The BLAKE2 Cryptographic Hash and Message Authentication Code, IETF,
    # 2015), Appendix A: BLAKE2b-512("abc"). Value from memory; hashlib agrees.
    want = bytes.fromhex(
        "ba80a53f981c4d0d6a2797b69f12f6e94c212f14685ac4b74b12bb6fdbffa2d1"
        "7d87c5392aab792dc252d5de4533cc9518d38aa8dbf1925ab92386edd4009923"
    )
    assert _blake2b_of(b"abc", 64) == want == hashlib.blake2b(b"abc").digest()


def test_a_digest_ending_in_zero_bytes_keeps_them() -> None:
    """numpy's S8 would strip trailing NULs; the digests must stay 8 bytes."""
    raws = [BASE.replace(b'"m-1"', f'"m-{k}"'.encode()) for k in range(4000)]
    ends = [k for k, raw in enumerate(raws) if event_digest(parse_event(raw))[-1] == 0]
    assert ends  # about one in 256
    got = _check([raws[k] for k in ends])
    assert got.sure.all() and all(len(d) == 8 and d[-1] == 0 for d in got.digests)


# -- hand-written edges ------------------------------------------------------------------
def _fields(n: int) -> bytes:
    return ", ".join(f'"f{k}": "v{k}"' for k in range(n)).encode()


def _side(n: int) -> bytes:
    return json.dumps([f"p{k}" for k in range(n)]).encode()


def _one(raw: bytes) -> bool:
    return bool(_check([raw]).sure[0])


@pytest.mark.parametrize(
    ("old", "new"),
    [
        (b'"score": 1,', b'"score": 1, "score": 1,'),  # a duplicate key
        (b'"match_id": "m-1"', b'"match_id": "m-1", "match_id": "m-1"'),
        (b'"map": "saltflats"', b'"map": "saltflats", "map": "saltflats"'),  # a name twice
        (b"kelvash", b"kel\\u0076ash"),  # an escape
        (b"m-1", b"m\\/1"),
        (b"2026-03-01", b"9999-03-01"),  # beyond 2200: the usual path checks the time
        (b"2026-03-01", b"1999-03-01"),
        (b"2026-03-01", b"2023-02-29"),  # not a leap year
        (b"2026-03-01", b"2100-02-29"),
        (b"2026-03-01", b"2026-04-31"),
        (b"18:00:00Z", b"24:00:00Z"),
        (b"18:00:00Z", b"18:00:60Z"),
        (b"18:00:00Z", b"18:00:00.Z"),
        (b"18:00:00Z", b"18:00:00.1234567Z"),
        (b"18:00:00Z", b"18:00:00z"),
        (b"18:00:00Z", b"18:00:00+24:00"),
        (b"18:00:00Z", b"18:00:00+01:60"),
        (b"18:00:00Z", b"18:00:00+0100"),
        (b"18:00:00Z", b"18:00:00"),
        (b"T18", b"t18"),
        (b'"score": 1', b'"score": 1e0'),
        (b'"score": 1', b'"score": true'),
        (b'"score": 1', b'"score": 1.00'),
        (b'"score": 1', b'"score": 01'),
        (b'"score": 1', b'"score": -0'),
        (b'"score": 1', b'"score": 1.5'),
        (b'"score": 1', b'"score": "1"'),
        (b'["kelvash"]', b'["kelvash", "kelvash"]'),  # an id twice on a side
        (b'["morvenn"]', b'["kelvash"]'),  # the same id on both sides
        (b'["morvenn"]', b'["tuvrenn", "kelvash"]'),
        (b'["morvenn"]', b"[]"),
        (b"duel", b"du\x00el"),  # a control byte, a non-ASCII letter
        (b"kelvash", b"kel\x00vash"),
        (b"kelvash", "kelvásh".encode()),
        (b"kelvash", b"kel vash"),
        (b'"duel"', b"2"),  # a number in the context
        (b'"duel"', b"null"),
        (b'"mode"', b'"1mode"'),
        (b'"mode"', b'"' + b"m" * (MAX_NAME_CHARS + 1) + b'"'),  # too long
        (b"saltflats", b"s" * (MAX_CATEGORY_CHARS + 1)),
        (b"kelvash", b"k" * (MAX_ID_CHARS + 1)),
        (b"m-1", b"m" * (MAX_ID_CHARS + 1)),
        (b'"duel"', b'x"duel"'),  # a value that is not a string
        (b'"map": "saltflats"', _fields(MAX_CONTEXT_FIELDS + 1)),
        (b'["morvenn"]', _side(MAX_SIDE_SIZE + 1)),
        (b'"score": 1', b'"score": 1, "margin": 1'),
        (b'"score": 1', b'"score": 1, "features": {}'),
        (b'"score": 1', b'"score": 1, "extra": 1'),
        (b'"match_id": "m-1", ', b""),  # a required key missing
        (b"}}", b"}}x"),  # trailing garbage
        (b"}}", b"}},"),
        (b"}}", b"}}{}"),
        (b"{", b"\xef\xbb\xbf{"),  # a byte-order mark
        (b"{", b"\x0c{"),  # a form feed is not JSON whitespace
    ],
)
def test_an_unusual_spelling_is_not_sure(old: bytes, new: bytes) -> None:
    raw = BASE.replace(old, new, 1)
    assert raw != BASE
    assert not _one(raw)


@pytest.mark.parametrize(
    ("old", "new"),
    [
        (b"", b""),
        (b"2026-03-01", b"2024-02-29"),  # a leap day
        (b"2026-03-01", b"2000-02-29"),
        (b"2026-03-01", b"2200-12-31"),
        (b"18:00:00Z", b"18:00:00.123450+05:30"),  # 5 significant digits
        (b"18:00:00Z", b"18:00:00.123457Z"),  # microseconds: 16 significant digits
        (b"2026-03-01T18:00:00Z", b"2200-12-31T23:59:59.999999Z"),  # the largest t
        (b"2026-03-01T18:00:00Z", b"2000-01-01T00:00:00.000001+23:59"),  # the smallest
        (b"18:00:00Z", b"18:00:00.000000-23:59"),
        (b"18:00:00Z", b"23:59:59-00:00"),
        (b'"score": 1', b'"score": 0.5'),
        (b'"score": 1', b'"score": 0.0'),
        (b'"score": 1', b'"score":1.0'),
        (b'{"map": "saltflats", "mode": "duel"}', b"{}"),  # an empty context: key ""
        (b'{"map": "saltflats", "mode": "duel"}', b'{"Map": "x", "map": "y", "_": "~!"}'),
        (b"}}", b"}} \r\n\t"),
        (b'["morvenn"]', b'[ "tuvrenn" ,"morvenn","kelvash2"\n]'),
        (b"kelvash", b"<{[$kel|vash^]}>"),
        (b'"mode"', b'"' + b"m" * MAX_NAME_CHARS + b'"'),  # as long as allowed
        (b"saltflats", b"s" * MAX_CATEGORY_CHARS),
        (b"kelvash", b"k" * MAX_ID_CHARS),
        (b"m-1", b"m" * MAX_ID_CHARS),
        (b'"map": "saltflats", "mode": "duel"', _fields(MAX_CONTEXT_FIELDS)),
        (b'["morvenn"]', _side(MAX_SIDE_SIZE)),
    ],
)
def test_a_common_spelling_is_sure(old: bytes, new: bytes) -> None:
    raw = BASE.replace(old, new, 1)
    assert _one(raw)


def test_an_empty_context_has_the_empty_key() -> None:
    got = _check([BASE.replace(b'{"map": "saltflats", "mode": "duel"}', b"{ }")])
    assert got.context_keys == [""] and context_of("") == {}


def test_the_size_limit() -> None:
    pad = MAX_EVENT_BYTES - len(BASE)
    assert _one(BASE[:-1] + b" " * pad + b"}")
    assert not _one(BASE[:-1] + b" " * (pad + 1) + b"}")


def test_keys_in_every_order() -> None:
    data = json.loads(BASE)
    raws = [json.dumps({k: data[k] for k in keys}).encode() for keys in permutations(data)]
    got = _check(raws)
    assert got.sure.all() and len(set(got.digests)) == 1


def test_context_of_gives_a_fresh_dict() -> None:
    key = _canonical_values({"mode": "duel", "map": "saltflats"})
    first = context_of(key)
    first["map"] = "glasswood"
    assert context_of(key) == {"map": "saltflats", "mode": "duel"}
    assert list(context_of(key)) == ["map", "mode"]


def test_teams_and_an_empty_batch() -> None:
    team = BASE.replace(b'["morvenn"]', b'["morvenn", "tuvrenn", "oskuvar"]')
    got = _check([b"{}", team, BASE, b"", team.replace(b"m-1", b"m-2")])
    assert got.at.tolist() == [1, 2, 4]
    trio = ("morvenn", "tuvrenn", "oskuvar")
    assert got.seconds == [trio, ("morvenn",), trio]
    assert got.firsts == [("kelvash",)] * 3
    assert got.match_ids == ["m-1", "m-1", "m-2"]
    empty = scan_payloads([])
    assert empty.sure.shape == (0,) and empty.match_ids == [] and empty.digests == []


def test_the_warm_up_payload_is_one_the_scan_takes() -> None:
    from streamrate.scan import _WARM, warm_up

    warm_up()
    assert scan_payloads([_WARM]).sure.all()
