"""The writer's batch decision held to the one-entry-at-a-time decision it replaced:
the same valid events (with raw payloads and digests), dead letters with the same
reasons in stream order, the same retries, and the same retry record after."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from streamrate.columns import EventColumns, Pairs
from streamrate.dedupe import SeenIds
from streamrate.events import event_digest
from streamrate.stream.decide import Decider, Decision, millis, stream_ids
from tests.decide_reference import reference_decide, reference_digest, reference_remember
from tests.test_decode import payloads

RECEIVED_MS = 1_780_000_000_000
people = st.sampled_from(["kelvash", "morvenn", "tuvrenn", "oskuvar"])


@st.composite
def plain(draw: st.DrawFn) -> bytes:
    a, b = draw(st.lists(people, min_size=2, max_size=2, unique=True))
    day = draw(st.sampled_from(["2026-05-28", "2026-05-30", "1999-12-31", "9999-01-01"]))
    data: dict[str, Any] = {
        "match_id": f"m-{draw(st.integers(0, 12))}",  # ids repeat: retries and conflicts
        "finished_at": f"{day}T{draw(st.integers(0, 23)):02d}:00:00Z",
        "first": [a],
        "second": [b],
        "score": draw(st.sampled_from([0, 1, 0.5])),
    }
    if draw(st.booleans()):
        data["context"] = {"map": draw(st.sampled_from(["saltflats", "glasswood"])), "year": 2004}
    return json.dumps(data).encode()


@st.composite
def entries(draw: st.DrawFn, start: int) -> list[tuple[bytes, dict[bytes, bytes] | None]]:
    out: list[tuple[bytes, dict[bytes, bytes] | None]] = []
    n = draw(st.integers(0, 12))
    for k in range(n):
        sid = f"{RECEIVED_MS + start * 100 + k * 7}-{k % 3}".encode()
        kind = draw(st.integers(0, 19))
        if kind == 0:
            fields: dict[bytes, bytes] | None = None
        elif kind == 1:
            fields = {b"other": b"x"}
        elif kind == 2:
            fields = {b"event": draw(payloads())}
        else:
            fields = {b"event": draw(plain())}
        out.append((sid, fields))
    return out


def _same(got: Decision, want: Decision) -> None:
    assert [s for s, _ in got.valid] == [s for s, _ in want.valid]
    for (_, a), (_, b) in zip(got.valid, want.valid, strict=True):
        assert a == b and event_digest(a) == reference_digest(b)
    assert got.raws == want.raws and got.digests == want.digests
    assert got.dead == want.dead
    assert got.dupes == want.dupes


def _decide_both(d: Decider, ref: SeenIds, batch: list[tuple[bytes, Any]]) -> None:
    """Decide ``batch`` with the writer's decider and with the reference, remember
    what each applied, and compare the decisions and the retry records."""
    got = d.decide(batch)
    want = reference_decide(ref, d.poison, "event", 86_400.0, batch)
    _same(got, want)
    d.remember(got.valid, got.digests)
    reference_remember(ref, want.valid, want.digests)
    assert d.seen.ids() == ref.ids()
    for name, arr in ref.to_arrays().items():
        np.testing.assert_array_equal(d.seen.to_arrays()[name], arr)


@settings(max_examples=300, suppress_health_check=[HealthCheck.too_slow])
@given(st.data(), st.integers(1, 4), st.booleans())
def test_the_batch_decision_equals_the_entry_by_entry_decision(
    data: st.DataObject, batches: int, poisoned: bool
) -> None:
    d = Decider(SeenIds(8, 3600.0), "event", 86_400.0)
    ref = SeenIds(8, 3600.0)
    for b in range(batches):
        batch = data.draw(entries(b))
        if poisoned and batch:
            d.poison[batch[0][0].decode()] = "the model could not learn from this event"
        _decide_both(d, ref, batch)


@st.composite
def lane(
    draw: st.DrawFn, start: int, ids: list[int]
) -> list[tuple[bytes, dict[bytes, bytes] | None]]:
    """A batch the compiled scan is mostly sure of (spellings of the common shape, new
    match ids), now and then with what sends it to the object path: a time before
    2000 or past the future limit, a retry, a reused id, a number in the context, a
    payload the model refuses, a deleted entry."""
    out: list[tuple[bytes, dict[bytes, bytes] | None]] = []
    for k in range(draw(st.integers(1, 12))):
        sid = f"{RECEIVED_MS + start * 100 + k * 7}-0".encode()
        a, b = draw(st.lists(people, min_size=2, max_size=2, unique=True))
        odd = draw(st.integers(0, 39))
        if odd == 0:
            out.append((sid, None))
            continue
        if odd == 1:
            out.append((sid, {b"event": draw(payloads())}))
            continue
        ids.append(len(ids))
        mid = draw(st.sampled_from(ids)) if odd in (2, 3) else ids[-1]  # a retry or reuse
        day = {4: "1999-12-31", 5: "2027-01-01"}.get(odd, "2026-05-28")  # received 05-28 20:26
        data: dict[str, Any] = {
            "match_id": f"n-{mid}",
            "finished_at": f"{day}T{draw(st.integers(0, 19)):02d}:00:0{k % 10}"
            f"{draw(st.sampled_from(['Z', '.5Z', '+02:00']))}",
            "first": [a],
            "second": [b],
            "score": draw(st.sampled_from([0, 1, 0.5, 1.0])) if odd != 3 else 0,
        }
        if draw(st.booleans()):
            data["context"] = {
                "mode": "duel",
                "map": draw(st.sampled_from(["saltflats", "glasswood"])),
            }
        if odd == 6:
            data["context"] = {"tier": 3}
        if odd == 7:  # a year 2000 the scan is sure of, before 2000 in UTC
            data["finished_at"] = "2000-01-01T00:30:00+01:00"
        out.append((sid, {b"event": json.dumps(data).encode()}))
    return out


@settings(max_examples=300, suppress_health_check=[HealthCheck.too_slow])
@given(st.data(), st.integers(1, 4))
def test_batches_of_the_common_shape_are_decided_as_entry_by_entry(
    data: st.DataObject, batches: int
) -> None:
    """The fast lane (columns from the compiled scan) and the mixed batches decide as
    the one-entry-at-a-time reference: events, dead letters, retries, the record."""
    d = Decider(SeenIds(8, 3600.0), "event", 86_400.0)
    ref = SeenIds(8, 3600.0)
    ids: list[int] = []
    for b in range(batches):
        batch = data.draw(lane(b, ids))
        _decide_both(d, ref, batch)


def test_the_common_batch_takes_the_fast_lane() -> None:
    """A batch of plain new events comes back as columns (the lane cannot go silent)."""
    batch = [
        (
            f"{RECEIVED_MS + k}-0".encode(),
            {b"event": json.dumps({
                "match_id": f"p-{k}", "finished_at": "2026-05-28T10:00:00Z",
                "first": ["kelvash"], "second": ["morvenn"], "score": 1,
                "context": {"map": "saltflats"},
            }).encode()},
        )
        for k in range(5)
    ]  # fmt: skip
    got = Decider(SeenIds(8, 3600.0), "event", 86_400.0).decide(batch)
    assert isinstance(got.valid, Pairs) and isinstance(got.valid.events, EventColumns)
    assert len(got.valid) == 5 and not got.dead and not got.dupes


def test_stream_ids_and_their_clock_in_one_pass() -> None:
    assert stream_ids([b"17-3", b"18-0"]) == ["17-3", "18-0"] and stream_ids([]) == []
    assert millis(["17-3", "18-0"]) == [17, 18]
    assert millis(["17", "18-2"]) == [17, 18]  # an id without its sequence part
