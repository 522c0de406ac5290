"""The consumer on fakeredis: ack after checkpoint, crash replay, claims, lost replies."""

from __future__ import annotations

import tempfile
from typing import Any

import fakeredis
import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import FileCheckpointStore, RedisCheckpointStore
from streamrate.config import Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.events import MatchEvent, event_to_json
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Model, Prediction
from streamrate.models.registry import build_model
from streamrate.simulate import simulate, world_spec

WORLD = simulate(world_spec("plain", matches=300, entities=20, seed=9)).events
SPACE = SpaceSettings(
    name="duel",
    model="elo",
    model_settings={"compiled": False},
    batch_count=23,
    block_ms=1,
    checkpoint_every_events=10**6,
    checkpoint_every_s=10**6,
    claim_idle_ms=0,
    dedupe_window_s=1e9,
)
KEYS = Settings(spaces=(SPACE,)).keys(SPACE)


def _model() -> Model:
    return build_model("elo", compiled=False)


def _consumer(r: Any, store: Any, space: SpaceSettings = SPACE, **kw: Any) -> Consumer:
    metrics = ServiceMetrics(CollectorRegistry(), [space.name])
    return Consumer(r, space, KEYS, store, metrics, _model, **kw)


def _drain(c: Consumer) -> None:
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return


def _reference(events: list[MatchEvent]) -> Model:
    m = _model()
    for ev in events:
        m.learn(ev)
    return m


def _same(a: Model, b: Model) -> None:
    sa, sb = a.to_state().arrays, b.to_state().arrays
    assert set(sa) == set(sb)
    for k in sa:
        np.testing.assert_allclose(sa[k], sb[k], rtol=1e-12, err_msg=k)


def _push(r: Any, lines: list[str]) -> list[bytes]:
    return [r.xadd(KEYS.events, {"event": line}) for line in lines]


def test_entries_are_acknowledged_only_after_a_checkpoint() -> None:
    r = fakeredis.FakeRedis()
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt))
    c.recover()
    _push(r, [event_to_json(e) for e in WORLD[:50]])
    _drain(c)
    assert c.live.applied == 50
    assert r.xpending(KEYS.events, "streamrate")["pending"] == 50
    assert r.get(KEYS.ckpt) is None
    c.checkpoint()
    assert r.xpending(KEYS.events, "streamrate")["pending"] == 0
    assert r.get(KEYS.ckpt) is not None


@settings(max_examples=30)
@given(plan=st.lists(st.sampled_from(["step", "checkpoint", "crash"]), min_size=1, max_size=40))
def test_any_crash_schedule_ends_in_the_uninterrupted_state(plan: list[str]) -> None:
    """Whatever the order of batches, checkpoints and crashes, each event counts once."""
    r = fakeredis.FakeRedis()
    lines = [event_to_json(e) for e in WORLD[:120]]
    lines.insert(60, lines[10])  # a producer retry
    lines.insert(30, "{broken")
    _push(r, lines)
    with tempfile.TemporaryDirectory() as d:
        store = FileCheckpointStore(d, "duel")
        c = _consumer(r, store)
        c.recover()
        for op in plan:
            if op == "step":
                c.step()
            elif op == "checkpoint":
                c.checkpoint()
            else:  # the process dies: everything in memory is gone
                c = _consumer(r, store)
                c.recover()
        _drain(c)
        c.checkpoint()
        assert c.live.applied == 120
        assert c.counters["dead_lettered"] == 1 and c.counters["duplicate"] == 1
        assert len(r.xrange(KEYS.dead)) == 1  # replays do not write it twice
        _same(c.live.model, _reference(WORLD[:120]))


def test_entries_delivered_but_never_seen_are_read_after_a_reconnect() -> None:
    r = fakeredis.FakeRedis()
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt))
    c.recover()
    _push(r, [event_to_json(e) for e in WORLD[:40]])
    _drain(c)
    _push(r, [event_to_json(e) for e in WORLD[40:70]])
    # The server delivered these to our consumer name, but the reply was lost.
    r.xreadgroup("streamrate", SPACE.consumer, {KEYS.events: ">"}, count=30)
    c.resync()
    _drain(c)
    assert c.live.applied == 70
    _same(c.live.model, _reference(WORLD[:70]))


def test_orphans_of_a_dead_consumer_are_claimed_in_stream_order() -> None:
    r = fakeredis.FakeRedis()
    store = RedisCheckpointStore(r, KEYS.ckpt)
    old = _consumer(r, store, SPACE.model_copy(update={"consumer": "old-host"}))
    old.recover()
    _push(r, [event_to_json(e) for e in WORLD[:60]])
    _drain(old)
    old.checkpoint()
    _push(r, [event_to_json(e) for e in WORLD[60:100]])
    r.xreadgroup("streamrate", "old-host", {KEYS.events: ">"}, count=25)  # then it died
    new = _consumer(r, store)
    new.recover()
    _drain(new)
    new.checkpoint()
    assert new.live.applied == 100
    assert r.xpending(KEYS.events, "streamrate")["pending"] == 0
    _same(new.live.model, _reference(WORLD[:100]))
    assert (
        new.metrics.registry.get_sample_value(
            "streamrate_consumer_claimed_entries_total", {"space": "duel"}
        )
        == 25
    )


def test_observers_see_each_event_with_the_prediction_made_before_learning() -> None:
    r = fakeredis.FakeRedis()
    seen: list[tuple[str, Prediction, str]] = []
    c = _consumer(
        r,
        RedisCheckpointStore(r, KEYS.ckpt),
        observers=[lambda e, p, k: seen.append((e.match_id, p, k))],
    )
    c.recover()
    _push(r, [event_to_json(e) for e in WORLD[:50]])
    _drain(c)
    ref = _model()
    want = [(e.match_id, ref.learn(e), "elo") for e in WORLD[:50]]
    assert [(m, k) for m, _, k in seen] == [(m, k) for m, _, k in want]
    np.testing.assert_allclose([p.p_win for _, p, _ in seen], [p.p_win for _, p, _ in want])


def test_retention_trim_never_passes_the_checkpoint() -> None:
    r = fakeredis.FakeRedis()
    space = SPACE.model_copy(update={"retention_s": 1e-3})
    c = _consumer(r, RedisCheckpointStore(r, KEYS.ckpt), space)
    c.recover()
    ids = _push(r, [event_to_json(e) for e in WORLD[:80]])
    c.step()
    c.step()
    c.checkpoint()
    kept = [sid for sid, _ in r.xrange(KEYS.events)]
    ck = c.ckpt_id.encode()
    assert all(sid in kept for sid in ids if sid >= ck)
    _drain(c)
    c.checkpoint()
    assert c.live.applied == 80
