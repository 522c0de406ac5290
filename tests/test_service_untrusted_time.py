"""Event time is untrusted: the retry record runs on the stream's clock; reused ids conflict."""

from __future__ import annotations

import json
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import fakeredis
import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import FileCheckpointStore, RedisCheckpointStore, decode_checkpoint
from streamrate.config import Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import ModelState
from streamrate.models.registry import build_model
from streamrate.statefile import state_to_bytes

SPACE = SpaceSettings(
    name="duel",
    model="elo",
    model_settings={"compiled": False},
    batch_count=50,
    block_ms=1,
    checkpoint_every_events=10**6,
    checkpoint_every_s=10**6,
    claim_idle_ms=0,
)
KEYS = Settings(spaces=(SPACE,)).keys(SPACE)
NAMES = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor", "quill", "ember"]


def _consumer(r: Any, store: Any, space: SpaceSettings = SPACE) -> Consumer:
    metrics = ServiceMetrics(CollectorRegistry(), [space.name])
    return Consumer(r, space, KEYS, store, metrics, lambda: build_model("elo", compiled=False))


def _drain(c: Consumer) -> None:
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return


def _event(i: int, when: datetime, score: float = 1.0) -> str:
    return json.dumps(
        {
            "match_id": f"m-{i}",
            "finished_at": when.isoformat(),
            "first": [NAMES[i % 8]],
            "second": [NAMES[(i + 1 + (i // 8) % 7) % 8]],
            "score": score,
        }
    )


def _push(r: Any, lines: list[str]) -> None:
    for line in lines:
        r.xadd(KEYS.events, {"event": line})


def _recent() -> datetime:
    return datetime.now(UTC) - timedelta(hours=1)


def _dead(r: Any) -> list[dict[bytes, bytes]]:
    return [fields for _, fields in r.xrange(KEYS.dead)]


def _far_future_then_retries(space: SpaceSettings) -> tuple[Consumer, Any]:
    r = fakeredis.FakeRedis()
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt), space)
    c.recover()
    originals = [_event(i, _recent()) for i in range(200)]
    _push(r, originals)
    _push(r, [_event(999, datetime(9999, 12, 31, tzinfo=UTC))])
    _push(r, originals)  # producer retries of every recent match
    _drain(c)
    return c, r


def test_a_far_future_event_is_dead_lettered_and_retries_stay_recognised() -> None:
    c, r = _far_future_then_retries(SPACE)
    assert c.counters == {"applied": 200, "dead_lettered": 1, "duplicate": 200}
    (dead,) = _dead(r)
    assert dead[b"dead.reason"].startswith(b"finished_at: 9999-12-31")
    assert b"86400 s after the entry was received" in dead[b"dead.reason"]


def test_even_an_accepted_far_future_event_cannot_switch_the_retry_record_off() -> None:
    # With the future limit opened wide the event is applied, yet the record's clock
    # is the stream id's, so the 200 retries are still recognised.
    c, _ = _far_future_then_retries(SPACE.model_copy(update={"future_limit_s": 1e12}))
    assert c.counters == {"applied": 201, "dead_lettered": 0, "duplicate": 200}


def test_times_before_2000_and_past_the_future_limit_are_dead_letters() -> None:
    r = fakeredis.FakeRedis()
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt))
    c.recover()
    now = datetime.now(UTC)
    _push(
        r,
        [
            _event(1, datetime(1999, 12, 31, 23, 59, tzinfo=UTC)),
            _event(2, now + timedelta(days=2)),
            _event(3, now + timedelta(hours=1)),  # within the day allowed for clock skew
            _event(4, datetime(2000, 1, 1, tzinfo=UTC)),
        ],
    )
    _drain(c)
    assert c.counters["applied"] == 2
    reasons = [d[b"dead.reason"].decode() for d in _dead(r)]
    assert reasons[0] == "finished_at: 1999-12-31T23:59:00+00:00 is before 2000-01-01"
    assert reasons[1].startswith("finished_at: ") and "after the entry was received" in reasons[1]


def test_a_reused_match_id_with_other_content_is_a_conflict_even_after_a_restart(
    tmp_path: Path,
) -> None:
    r = fakeredis.FakeRedis()
    when = _recent()
    first, changed = _event(1, when, score=1.0), _event(1, when, score=0.0)
    c = _consumer(r, FileCheckpointStore(tmp_path, "duel"))
    c.recover()
    _push(r, [first, changed, first])
    _drain(c)
    assert c.counters == {"applied": 1, "dead_lettered": 1, "duplicate": 1}
    c.close()
    # A new process from the checkpoint: the digest was saved with the record.
    c2 = _consumer(r, FileCheckpointStore(tmp_path, "duel"))
    c2.recover()
    respelled = json.dumps(dict(reversed(list(json.loads(first).items()))), indent=1)
    _push(r, [changed, respelled])
    _drain(c2)
    assert c2.counters == {"applied": 1, "dead_lettered": 2, "duplicate": 2}
    reasons = [d[b"dead.reason"] for d in _dead(r)]
    assert len(reasons) == 2
    assert all(
        x.startswith(b"match_id: 'm-1' was applied before with other content") for x in reasons
    )


@settings(max_examples=30)
@given(st.lists(st.tuples(st.integers(0, 5), st.integers(0, 2)), min_size=1, max_size=40))
def test_each_id_is_applied_once_then_retried_or_refused_by_content(
    plan: list[tuple[int, int]],
) -> None:
    r = fakeredis.FakeRedis()
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt))
    c.recover()
    when = _recent()
    _push(r, [_event(i, when, score=[0.0, 0.5, 1.0][v]) for i, v in plan])
    _drain(c)
    first: dict[int, int] = {}
    expect = {"applied": 0, "dead_lettered": 0, "duplicate": 0}
    for i, v in plan:
        if i not in first:
            first[i] = v
            expect["applied"] += 1
        elif first[i] == v:
            expect["duplicate"] += 1
        else:
            expect["dead_lettered"] += 1
    assert c.counters == expect


def test_a_version_1_checkpoint_still_loads_and_its_ids_count_as_retries() -> None:
    r = fakeredis.FakeRedis()
    model = build_model("elo", compiled=False)
    st_ = model.to_state()
    now_ms = int(time.time() * 1000)
    ids = b"m-1\nm-2"
    arrays = dict(st_.arrays)
    arrays["_ckpt_ids"] = np.frombuffer(ids, dtype=np.uint8).copy()
    arrays["_ckpt_finished_s"] = np.array([1.0e9, 1.0e9])  # old: the events' own times
    extra = {"last_id": f"{now_ms - 1000}-0", "applied": 2, "counters": {}, "written_at_s": 1.0}
    blob = state_to_bytes(ModelState(st_.kind, st_.version, st_.params, arrays), extra)
    ck = decode_checkpoint(blob, keep=100, window_s=3600)
    assert ck.seen.ids() == ["m-1", "m-2"] and ck.seen.digest("m-1") is None
    r.set(KEYS.ckpt, blob)
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt))
    c.recover()
    _push(r, [_event(1, _recent(), score=0.0), _event(3, _recent())])
    _drain(c)
    assert c.counters == {"applied": 3, "dead_lettered": 0, "duplicate": 1}


@settings(max_examples=20)
@given(
    st.lists(
        st.datetimes(min_value=datetime(2000, 1, 1), max_value=datetime(9999, 12, 30)).map(
            lambda d: d.replace(tzinfo=UTC)
        ),
        min_size=1,
        max_size=30,
    )
)
def test_no_finish_time_switches_the_retry_record_off(times: list[datetime]) -> None:
    # Every finish time accepted (limit opened wide): retries are still all recognised.
    r = fakeredis.FakeRedis()
    space = SPACE.model_copy(update={"future_limit_s": 1e12})
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt), space)
    c.recover()
    originals = [_event(i, t) for i, t in enumerate(times)]
    _push(r, originals)
    _push(r, originals)
    _drain(c)
    assert c.counters == {"applied": len(times), "dead_lettered": 0, "duplicate": len(times)}
