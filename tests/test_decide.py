"""The writer's batch decision held to the one-entry-at-a-time decision it replaced:
the same valid events (with raw payloads and digests), dead letters with the same
reasons in stream order, the same retries, and the same retry record after."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

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
        got = d.decide(batch)
        want = reference_decide(ref, d.poison, "event", 86_400.0, batch)
        _same(got, want)
        d.remember(got.valid, got.digests)
        reference_remember(ref, want.valid, want.digests)
        assert d.seen.ids() == ref.ids()
        for name, arr in ref.to_arrays().items():
            np.testing.assert_array_equal(d.seen.to_arrays()[name], arr)


def test_stream_ids_and_their_clock_in_one_pass() -> None:
    assert stream_ids([b"17-3", b"18-0"]) == ["17-3", "18-0"] and stream_ids([]) == []
    assert millis(["17-3", "18-0"]) == [17, 18]
    assert millis(["17", "18-2"]) == [17, 18]  # an id without its sequence part
