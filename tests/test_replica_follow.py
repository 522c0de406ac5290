"""A replica following the writer's applied log (fakeredis): equal models at every
applied count, across writer restarts, trimmed logs, junk, retries and promotions."""

from __future__ import annotations

import itertools
import json
from typing import Any

import fakeredis
import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import RedisCheckpointStore
from streamrate.config import ReplicaSettings, Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.events import event_to_json
from streamrate.metrics import ReplicaMetrics, ServiceMetrics
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.replica.follower import Follower
from streamrate.simulate import simulate, world_spec
from streamrate.stream.applied_log import parse_entry

WORLD = simulate(world_spec("plain", matches=400, entities=25, seed=4)).events
SPACE = SpaceSettings(
    name="duel",
    model="elo",
    model_settings={"compiled": False},
    batch_count=37,
    block_ms=1,
    lock_chunk=8,
    checkpoint_every_events=10**6,
    checkpoint_every_s=10**6,
    claim_idle_ms=0,
    dedupe_window_s=1e9,
)
KEYS = Settings(spaces=(SPACE,)).keys(SPACE)
JUNK = ["{not json", '{"match_id": "x"}', "[]"]


def _model() -> Model:
    return build_model("elo", compiled=False)


def _writer(r: Any) -> Consumer:
    store = RedisCheckpointStore(r, KEYS.ckpt)
    return Consumer(r, SPACE, KEYS, store, ServiceMetrics(CollectorRegistry(), ["duel"]), _model)


def _follower(r: Any, **kw: Any) -> Follower:
    return Follower(
        r,
        SPACE,
        KEYS,
        RedisCheckpointStore(r, KEYS.ckpt),
        _model,
        ReplicaSettings(**kw),
        ReplicaMetrics(CollectorRegistry(), ["duel"]),
    )


def _drain_writer(c: Consumer) -> None:
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return


def _drain(f: Follower) -> None:
    while f.step(block_ms=1):
        pass


def _same(a: Model, b: Model) -> None:
    sa, sb = a.to_state().arrays, b.to_state().arrays
    assert set(sa) == set(sb)
    for k in sa:
        if sa[k].dtype.kind in "iub":
            np.testing.assert_array_equal(sa[k], sb[k], err_msg=k)
        else:
            np.testing.assert_allclose(sa[k], sb[k], rtol=1e-9, atol=1e-12, err_msg=k)


def _lines(events: list[Any], every: int = 9) -> list[str]:
    """Events with junk and retries of earlier events in between."""
    out: list[str] = []
    for i, ev in enumerate(events):
        out.append(event_to_json(ev))
        if i % every == 3:
            out.append(JUNK[i % len(JUNK)])
        if i % every == 5:
            out.append(event_to_json(events[i // 2]))
    return out


def _push(r: Any, lines: list[str]) -> None:
    for line in lines:
        r.xadd(KEYS.events, {"event": line})


def test_the_log_holds_only_applied_events_in_the_writers_order() -> None:
    r = fakeredis.FakeRedis()
    w = _writer(r)
    w.recover()
    _push(r, _lines(WORLD[:60]))
    _drain_writer(w)
    entries = [parse_entry(sid, f) for sid, f in r.xrange(KEYS.applied)]
    assert entries[0].kind == "start" and entries[0].seq == 0
    chunks = [e for e in entries if e.kind == "chunk"]
    ids = [json.loads(raw)["match_id"] for e in chunks for raw in e.events]
    assert ids == [ev.match_id for ev in WORLD[:60]]  # no junk, no retries, in order
    seqs = [e.seq for e in chunks]
    assert seqs == sorted(seqs) and seqs[0] == 0
    assert all(b.seq == a.seq + len(a.ids) for a, b in itertools.pairwise(chunks))
    assert w.counters["dead_lettered"] > 0 and w.counters["duplicate"] > 0


def test_replica_equals_writer_at_every_batch() -> None:
    r = fakeredis.FakeRedis()
    w = _writer(r)
    w.recover()
    f = _follower(r)
    lines = _lines(WORLD[:200])
    for lo in range(0, len(lines), 41):
        _push(r, lines[lo : lo + 41])
        _drain_writer(w)
        _drain(f)
        assert f.live.applied == w.live.applied
        _same(f.live.model, w.live.model)
    assert f.reloads == {"initial": 1}


def test_a_writer_restart_below_the_replica_makes_it_reload_and_stay_equal() -> None:
    r = fakeredis.FakeRedis()
    w = _writer(r)
    w.recover()
    f = _follower(r)
    _push(r, _lines(WORLD[:100]))
    _drain_writer(w)
    w.checkpoint()  # durable at 100 events
    _push(r, _lines(WORLD[100:180]))
    _drain_writer(w)  # applied and logged, never checkpointed: then the writer dies
    _drain(f)
    assert f.live.applied == w.live.applied > 100
    w2 = _writer(r)  # restarts from the checkpoint and applies the same events again
    w2.recover()
    _push(r, _lines(WORLD[180:260]))
    _drain_writer(w2)
    _drain(f)
    assert f.reloads["writer_restart"] == 1
    assert f.live.applied == w2.live.applied == 260
    _same(f.live.model, w2.live.model)
    # A fresh replica starting now follows from the newest checkpoint position too.
    g = _follower(r)
    _drain(g)
    assert g.live.applied == 260
    _same(g.live.model, w2.live.model)


def test_a_trimmed_position_or_a_long_lag_reloads_the_checkpoint() -> None:
    r = fakeredis.FakeRedis()
    w = _writer(r)
    w.log_min_entries = 0
    w.recover()
    f = _follower(r)
    _drain(f)
    _push(r, _lines(WORLD[:150]))
    _drain_writer(w)
    w.checkpoint()
    _push(r, _lines(WORLD[150:300]))
    _drain_writer(w)
    w.checkpoint()  # the log is now kept back to the first checkpoint only
    r.xtrim(KEYS.applied, minid=w.prev_ckpt_log_id)
    _drain(f)
    assert f.reloads["gap"] == 1
    assert f.live.applied == 300
    _same(f.live.model, w.live.model)
    lagging = _follower(r, max_behind_events=10)
    lagging.reload("initial")
    lagging.live.applied = 0  # as if it had fallen far behind
    lagging.check_lag()
    assert lagging.reloads["behind"] == 1 and lagging.live.applied == 300


def test_promotions_reach_the_replica_between_the_same_chunks() -> None:
    r = fakeredis.FakeRedis()
    space = SPACE.model_copy(
        update={
            "model": "challengers",
            "model_settings": {
                "members": {"a": {"kind": "elo"}, "b": {"kind": "glicko2"}},
                "active": "a",
            },
        }
    )
    store = RedisCheckpointStore(r, KEYS.ckpt)

    def build() -> Model:
        return build_model(space.model, **space.model_settings)

    w = Consumer(r, space, KEYS, store, ServiceMetrics(CollectorRegistry(), ["duel"]), build)
    w.recover()
    f = Follower(r, space, KEYS, store, build, ReplicaSettings())
    _push(r, _lines(WORLD[:50]))
    _drain_writer(w)
    with w.live.lock:  # what Answerer.promote does
        w.live.model.promote("b")  # type: ignore[attr-defined]
        w.live.promoted.append("b")
        w.live.changed = True
    _push(r, _lines(WORLD[50:90]))
    _drain_writer(w)
    _drain(f)
    assert f.live.model.active == "b"  # type: ignore[attr-defined]
    kinds = [parse_entry(sid, fl).kind for sid, fl in r.xrange(KEYS.applied)]
    assert kinds.count("promote") == 1
    _same(f.live.model, w.live.model)


@settings(max_examples=12, deadline=None)
@given(
    cuts=st.lists(st.integers(1, 120), min_size=1, max_size=6),
    restarts=st.lists(st.booleans(), min_size=6, max_size=6),
)
def test_any_interleaving_of_batches_restarts_and_reads_ends_equal(
    cuts: list[int], restarts: list[bool]
) -> None:
    r = fakeredis.FakeRedis()
    w = _writer(r)
    w.recover()
    f = _follower(r)
    lines = _lines(WORLD[:250])
    at = 0
    for i, n in enumerate(cuts):
        _push(r, lines[at : at + n])
        at += n
        _drain_writer(w)
        if i % 2:
            w.checkpoint()
        if restarts[i]:
            w = _writer(r)
            w.recover()
            _drain_writer(w)
        if i % 3 != 2:
            _drain(f)
    _push(r, lines[at:])
    _drain_writer(w)
    _drain(f)
    assert f.live.applied == w.live.applied
    _same(f.live.model, w.live.model)
