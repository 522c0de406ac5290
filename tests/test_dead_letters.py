"""Dead letters are bounded (count, payload size) and can be listed and re-sent."""

from __future__ import annotations

import hashlib
import json
from typing import Any

import fakeredis
from hypothesis import given
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import RedisCheckpointStore
from streamrate.config import Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.deadletters import (
    MAX_DEAD_FIELDS,
    MAX_FIELD_NAME_BYTES,
    dead_fields,
    list_dead,
    read_letter,
    resend,
)
from streamrate.metrics import ServiceMetrics
from streamrate.models.registry import build_model

SPACE = SpaceSettings(
    name="duel",
    model="elo",
    model_settings={"compiled": False},
    batch_count=200,
    block_ms=1,
    dead_max_entries=100,
    dead_max_payload_bytes=4096,
)
KEYS = Settings(spaces=(SPACE,)).keys(SPACE)


def _run(r: Any, entries: list[dict[bytes, bytes]]) -> Consumer:
    c = Consumer(
        r,
        SPACE,
        KEYS,
        RedisCheckpointStore(r, KEYS.ckpt),
        ServiceMetrics(CollectorRegistry(), [SPACE.name]),
        lambda: build_model("elo", compiled=False),
    )
    c.recover()
    for f in entries:
        r.xadd(KEYS.events, f)
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return c


def test_the_dead_letter_stream_is_trimmed_by_count() -> None:
    r = fakeredis.FakeRedis()
    c = _run(r, [{b"event": f"junk {i}".encode()} for i in range(1000)])
    assert c.counters["dead_lettered"] == 1000
    # XADD MAXLEN ~ trims whole nodes (100 entries by default): about the limit.
    assert r.xlen(KEYS.dead) <= 2 * SPACE.dead_max_entries
    newest = r.xrevrange(KEYS.dead, count=1)[0][1]
    assert newest[b"event"] == b"junk 999"


def test_a_long_payload_is_kept_truncated_with_its_length_and_digest() -> None:
    r = fakeredis.FakeRedis()
    payload = b'{"pad": "' + b"x" * 20_000 + b'"}'
    _run(r, [{b"event": payload, b"note": b"short"}])
    ((_, f),) = r.xrange(KEYS.dead)
    assert f[b"event"] == payload[:4096]
    assert f[b"note"] == b"short"
    assert f[b"dead.length.event"] == str(len(payload)).encode()
    assert f[b"dead.blake2b.event"] == hashlib.blake2b(payload, digest_size=16).hexdigest().encode()
    assert f[b"dead.truncated"] == b"1"
    assert f[b"dead.reason"].startswith(b"event: ")


field_names = st.binary(min_size=1, max_size=300).filter(lambda b: not b.startswith(b"dead."))


@given(
    fields=st.dictionaries(field_names, st.binary(max_size=6000), max_size=60),
    cap=st.integers(64, 5000),
)
def test_a_dead_letter_is_bounded_and_keeps_what_fits_exactly(
    fields: dict[bytes, bytes], cap: int
) -> None:
    out = dead_fields(fields, "7-0", "r" * 5000, max_payload_bytes=cap)
    size = sum(len(k) + len(v) for k, v in out.items())
    assert size <= MAX_DEAD_FIELDS * (3 * (MAX_FIELD_NAME_BYTES + 20) + cap + 40) + 1100
    letter = read_letter(b"7-0", out)
    kept = [k for k in fields if len(k) <= MAX_FIELD_NAME_BYTES][:MAX_DEAD_FIELDS]
    cut = any(len(fields[k]) > cap for k in kept) or len(kept) < len(fields)
    assert letter.truncated == cut
    for k in kept:
        assert letter.fields[k] == fields[k][:cap]
    assert set(letter.fields) == set(kept)
    if not cut:
        assert letter.fields == fields  # whole: safe to re-send


def test_list_and_resend_chosen_whole_ones_only() -> None:
    r = fakeredis.FakeRedis()
    good_later = json.dumps(
        {
            "match_id": "m-1",
            "finished_at": "2026-03-01T18:00:00Z",
            "first": ["kelvash"],
            "second": ["morvenn"],
            "score": 1,
        }
    ).encode()
    _run(r, [{b"event": b"not json"}, {b"payload": good_later}, {b"event": b"y" * 5000}])
    letters = list_dead(r, KEYS.dead, 10)
    assert [bool(x.truncated) for x in letters] == [True, False, False]  # newest first
    assert letters[1].reason == "entry has no 'event' field"
    before = r.xlen(KEYS.events)
    ids = [x.id for x in letters]
    report = resend(r, KEYS.dead, KEYS.events, [ids[1], "1-1"])
    assert list(report.resent) == [ids[1]] and report.missing == ["1-1"]
    assert r.xlen(KEYS.events) == before + 1
    new_id = report.resent[ids[1]]
    assert r.xrange(KEYS.events, min=new_id, max=new_id)[0][1] == {b"payload": good_later}
    report = resend(r, KEYS.dead, KEYS.events, None)
    assert list(report.resent) == [ids[2]] and report.truncated == [ids[0]]
    assert [x.id for x in list_dead(r, KEYS.dead, 10)] == [ids[0]]
