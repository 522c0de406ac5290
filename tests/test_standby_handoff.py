"""A standby's replica becomes the writer without loading the checkpoint (fakeredis).

The replica keeps what the writer keeps beside the model (the retry record, the
counters of dead letters and retries, carried by the applied log); a writer
that adopts it at any point of the stream ends exactly where an uninterrupted
writer ends: same model, same counters, same retry record, same dead letters.
"""

from __future__ import annotations

from typing import Any

import fakeredis
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from test_replica_follow import KEYS, SPACE, WORLD, _lines, _model, _push, _same

from streamrate.checkpoint import RedisCheckpointStore
from streamrate.config import ReplicaSettings
from streamrate.consumer import Consumer
from streamrate.events import event_to_json
from streamrate.metrics import ReplicaMetrics, ServiceMetrics
from streamrate.replica.follower import Follower
from streamrate.stream.applied_log import chunk_fields, parse_entry


def _writer(r: Any) -> Consumer:
    store = RedisCheckpointStore(r, KEYS.ckpt)
    return Consumer(r, SPACE, KEYS, store, ServiceMetrics(CollectorRegistry(), ["duel"]), _model)


def _standby(r: Any) -> Follower:
    return Follower(
        r,
        SPACE,
        KEYS,
        RedisCheckpointStore(r, KEYS.ckpt),
        _model,
        ReplicaSettings(),
        ReplicaMetrics(CollectorRegistry(), ["duel"]),
        writer_state=True,
    )


def _run(c: Consumer) -> None:
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return


def _uninterrupted(lines: list[str]) -> tuple[Consumer, Any]:
    r = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    w = _writer(r)
    w.recover()
    _push(r, lines)
    _run(w)
    w.checkpoint()
    return w, r


def test_chunks_carry_the_writers_counters_and_old_entries_parse_without() -> None:
    new = chunk_fields(3, 10, ["5-0", "7-0"], [b"{}", b"{}"], (4, 2))
    old = chunk_fields(3, 10, ["5-0", "7-0"], [b"{}", b"{}"])
    enc = {k.encode(): str(v).encode() if not isinstance(v, bytes) else v for k, v in new.items()}
    got = parse_entry(b"9-0", enc)
    assert (got.dead, got.dupes) == (4, 2)
    enc_old = {k.encode(): v if isinstance(v, bytes) else str(v).encode() for k, v in old.items()}
    assert (parse_entry(b"9-0", enc_old).dead, parse_entry(b"9-0", enc_old).dupes) == (-1, -1)


@settings(max_examples=12, deadline=None)
@given(st.integers(1, 250), st.integers(0, 3))
def test_a_writer_adopting_the_standby_ends_as_the_uninterrupted_writer(
    cut: int, checkpoints: int
) -> None:
    lines = _lines(WORLD[:160])
    cut = min(cut, len(lines) - 1)
    want, want_r = _uninterrupted(lines)
    r = fakeredis.FakeRedis(server=fakeredis.FakeServer())
    old = _writer(r)
    old.recover()
    standby = _standby(r)
    step = max(cut // (checkpoints + 1), 1)
    for lo in range(0, cut, step):  # some checkpoints on the way (the replica loads one)
        _push(r, lines[lo : min(lo + step, cut)])
        _run(old)
        if lo:
            old.checkpoint()
    while standby.step(block_ms=1):
        pass
    # The old writer dies here: entries it read stay pending under the shared name.
    got = standby.followed()
    if got is None:  # nothing applied yet: the checkpoint path
        assert standby.live.applied == 0
        return
    assert standby.reloads == {"initial": 1}
    new = _writer(r)
    new.adopt(got)
    assert (
        new.metrics.registry.get_sample_value(
            "streamrate_writer_starts_total", {"space": "duel", "source": "replica"}
        )
        == 1.0
    )
    _push(r, lines[cut:])
    _run(new)
    new.checkpoint()
    assert new.live.applied == want.live.applied
    _same(new.live.model, want.live.model)
    assert new.counters == want.counters
    assert new.decider.seen.ids() == want.decider.seen.ids()
    assert all(new.decider.seen.digest(i) == want.decider.seen.digest(i) for i in got.seen.ids())
    assert r.xlen(KEYS.dead) == want_r.xlen(KEYS.dead)  # no dead letter written twice
    assert r.xpending(KEYS.events, SPACE.group)["pending"] == 0


def test_a_chunk_from_a_writer_of_an_older_version_makes_the_standby_use_the_checkpoint() -> None:
    r = fakeredis.FakeRedis()
    w = _writer(r)
    w.recover()
    standby = _standby(r)
    _push(r, _lines(WORLD[:40]))
    _run(w)
    while standby.step(block_ms=1):
        pass
    assert standby.followed() is not None
    # A chunk without the counters, as a writer of an older version writes it.
    raw = event_to_json(WORLD[40]).encode()
    r.xadd(KEYS.applied, chunk_fields(w.log.epoch, w.live.applied, ["99999999999-0"], [raw]))
    assert standby.step(block_ms=1) == 1
    assert standby.live.applied == w.live.applied + 1
    assert standby.followed() is None  # the counters are not known: load the checkpoint
