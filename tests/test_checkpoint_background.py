"""Checkpoints stored in the background: the writer goes on applying while a
checkpoint is encoded and stored, and acknowledges what it covers only once it
is durable; a failed save acknowledges nothing and is tried again."""

from __future__ import annotations

import threading
from typing import Any

import fakeredis
import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import Checkpoint, RedisCheckpointStore, decode_checkpoint
from streamrate.config import Settings, SpaceSettings
from streamrate.encode import EntityTable
from streamrate.errors import StateError
from streamrate.events import MatchEvent, event_to_json
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Model, ModelState
from streamrate.models.registry import build_model
from streamrate.simulate import simulate, world_spec
from streamrate.stream.checkpoints import private_arrays
from streamrate.stream.writer import Writer

WORLD = simulate(world_spec("plain", matches=200, entities=20, seed=4)).events
SPACE = SpaceSettings(
    name="duel",
    model="elo",
    model_settings={"compiled": False},
    batch_count=17,
    block_ms=1,
    checkpoint_every_events=40,
    checkpoint_every_s=10**6,
    claim_idle_ms=0,
    dedupe_window_s=1e9,
)
KEYS = Settings(spaces=(SPACE,)).keys(SPACE)
WAIT_S = 10.0  # a test that hangs fails instead


def _model() -> Model:
    return build_model("elo", compiled=False)


class GatedStore:
    """A Redis checkpoint store whose saves wait for ``gate``; then they fail
    (``fail`` > 0, counted down), are lost (``lose``: the process died first)
    or land."""

    def __init__(self, r: Any) -> None:
        self.inner = RedisCheckpointStore(r, KEYS.ckpt)
        self.gate = threading.Event()
        self.started = threading.Event()
        self.fail = 0
        self.lose = False
        self.saved = 0

    def load(self) -> bytes | None:
        return self.inner.load()

    def save(self, data: bytes) -> None:
        self.started.set()
        assert self.gate.wait(WAIT_S), "the test never opened the gate"
        if self.fail:
            self.fail -= 1
            raise StateError("the disk is full")
        if not self.lose:
            self.inner.save(data)
            self.saved += 1


def _writer(r: Any, store: Any, clock: Any = None) -> Writer:
    metrics = ServiceMetrics(CollectorRegistry(), [SPACE.name])
    kw = {"clock": clock} if clock is not None else {}
    return Writer(r, SPACE, KEYS, store, metrics, _model, background=True, **kw)


def _pending(r: Any) -> int:
    return int(r.xpending(KEYS.events, "streamrate")["pending"])


def _push(r: Any, events: list[MatchEvent]) -> None:
    for e in events:
        r.xadd(KEYS.events, {"event": event_to_json(e)})


def _drain(w: Writer) -> None:
    while True:
        reading_new = w.cursor == ">"
        if w.step() == 0 and reading_new:
            return


def _stored(r: Any) -> Checkpoint:
    data = r.get(KEYS.ckpt)
    assert isinstance(data, bytes)
    return decode_checkpoint(data, SPACE.dedupe_keep_ids, SPACE.dedupe_window_s)


def _finish(w: Writer) -> None:
    """Let the save in flight end, then one step of the loop (which collects it)."""
    thread = w.checkpoints._thread
    if thread is not None:
        thread.join(WAIT_S)
    w.step()


def _reference(events: list[MatchEvent]) -> dict[str, np.ndarray]:
    m = _model()
    for e in events:
        m.learn(e)
    return m.to_state().arrays


def _saving_at_40() -> tuple[Any, GatedStore, Writer]:
    """A writer that applied 51 events, its checkpoint due at 40 held in the store."""
    r = fakeredis.FakeRedis()
    store = GatedStore(r)
    w = _writer(r, store)
    w.recover()
    _push(r, WORLD[:51])
    while w.live.applied < 51:
        w.step()  # the checkpoint due at 40 entries starts, in the background
    assert store.started.wait(WAIT_S)
    return r, store, w


def test_acks_wait_until_the_checkpoint_is_durable() -> None:
    r, store, w = _saving_at_40()
    assert w.checkpoints.in_flight
    covered = w.checkpoints.ckpt_id
    _push(r, WORLD[51:80])
    _drain(w)  # the writer goes on applying meanwhile
    assert w.live.applied == 80
    assert _pending(r) == 80  # nothing acknowledged: the checkpoint is not durable
    assert r.get(KEYS.ckpt) is None and w.checkpoints.ckpt_id == covered
    store.gate.set()
    _finish(w)  # completes the save: acknowledges what it covers, nothing more
    ck = _stored(r)
    assert 40 <= ck.applied < 80
    assert _pending(r) == 80 - ck.applied
    assert w.checkpoints.ckpt_id == ck.last_id
    # The stored model is the one at its last id, not the one learned on since.
    for name, arr in _reference(WORLD[: ck.applied]).items():
        np.testing.assert_allclose(ck.state.arrays[name], arr, rtol=1e-12, err_msg=name)
    w.close()  # the final checkpoint covers the rest
    assert _pending(r) == 0


def test_a_failed_save_acknowledges_nothing_and_is_tried_again() -> None:
    r = fakeredis.FakeRedis()
    now = [0.0]
    store = GatedStore(r)
    store.fail = 1
    w = _writer(r, store, clock=lambda: now[0])
    w.recover()
    _push(r, WORLD[:60])
    _drain(w)
    assert w.checkpoints.in_flight
    store.gate.set()
    _finish(w)  # the failure is collected
    assert not w.checkpoints.in_flight and w.checkpoints.failures == 1
    assert _pending(r) == 60 and r.get(KEYS.ckpt) is None
    assert w.checkpoints.ckpt_id == "0-0"
    assert not w.checkpoints.due()  # not at once: after the retry delay
    now[0] += 5.0
    assert w.checkpoints.due()
    w.step()  # the retry: a new checkpoint covering everything applied
    _finish(w)
    assert store.saved == 1 and w.checkpoints.failures == 0
    assert _pending(r) == 0
    ck = _stored(r)
    assert ck.applied == 60


def test_the_final_checkpoint_waits_for_the_save_in_flight() -> None:
    r = fakeredis.FakeRedis()
    store = GatedStore(r)
    w = _writer(r, store)
    w.recover()
    _push(r, WORLD[:45])
    _drain(w)
    assert store.started.wait(WAIT_S) and w.checkpoints.in_flight
    _push(r, WORLD[45:50])
    _drain(w)
    threading.Timer(0.05, store.gate.set).start()
    w.close()  # waits for the save in flight, then stores the last five too
    assert not w.checkpoints.in_flight and _pending(r) == 0
    ck = _stored(r)
    assert ck.applied == 50 and store.saved == 2


def test_private_arrays_copies_what_another_object_holds() -> None:
    live = np.ones(4)
    fresh = np.zeros(3)
    state = ModelState("demo", 1, {"k": [1]}, {"live": live, "view": live[:2], "fresh": fresh})
    del fresh
    got = private_arrays(state)
    assert not np.shares_memory(got.arrays["live"], live)
    assert not np.shares_memory(got.arrays["view"], live)
    live[:] = 7.0
    assert got.arrays["live"].tolist() == [1.0] * 4 and got.arrays["view"].tolist() == [1.0] * 2


@settings(max_examples=25, deadline=None)
@given(
    plan=st.lists(
        st.sampled_from(["step", "save", "finish", "fail", "crash_lost", "crash_landed"]),
        min_size=1,
        max_size=30,
    )
)
def test_any_crash_during_a_background_save_ends_in_the_uninterrupted_state(
    plan: list[str],
) -> None:
    """Each event counts once whether the process dies before or after a save in
    flight lands, and whether saves fail."""
    r = fakeredis.FakeRedis()
    _push(r, WORLD[:120])
    store = GatedStore(r)
    w = _writer(r, store)
    w.recover()

    for op in plan:
        if op == "step":
            w.step()
        elif op == "save":
            w.checkpoint(wait=False)
        elif op in ("finish", "fail"):
            if w.checkpoints.in_flight:
                store.fail = int(op == "fail")
                store.gate.set()
                _finish(w)
                store.gate.clear()
        else:  # the process dies, the save in flight lost or landed, nothing acked after
            store.lose = op == "crash_lost"
            store.gate.set()
            w.checkpoints.settle()
            store = GatedStore(r)
            w = _writer(r, store)
            w.recover()
    store.gate.set()
    store.fail, store.lose = 0, False
    _drain(w)
    w.close()
    assert w.live.applied == 120
    assert _pending(r) == 0
    for name, arr in _reference(WORLD[:120]).items():
        np.testing.assert_allclose(
            w.live.model.to_state().arrays[name], arr, rtol=1e-12, err_msg=name
        )


@settings(max_examples=50, deadline=None)
@given(
    batches=st.lists(
        st.lists(st.text(alphabet="abcé-_0", min_size=1, max_size=6), max_size=8), max_size=6
    )
)
def test_entity_ids_saved_piecewise_equal_the_ids_joined_at_once(
    batches: list[list[str]],
) -> None:
    """A checkpoint encodes only the ids added since the last one; the saved
    bytes are those of all ids joined at once, and they load back."""
    table = EntityTable()
    for batch in batches:
        table.rows(batch)
        got = bytes(table.to_arrays()["entity_ids"])
        assert got == "\n".join(table.ids).encode("utf-8")
        assert EntityTable.from_arrays(table.to_arrays()).ids == table.ids


def _sample(w: Writer, name: str) -> float:
    got = w.metrics.registry.get_sample_value(name, {"space": SPACE.name})
    assert got is not None, name
    return got


def test_the_pause_metric_counts_the_loops_stop_not_the_write() -> None:
    r, store, w = _saving_at_40()
    # Observed once, while the store is still held: the write is not in the pause.
    assert _sample(w, "streamrate_checkpoint_pause_seconds_count") == 1
    assert w.checkpoints.in_flight
    assert _sample(w, "streamrate_checkpoint_write_seconds_count") == 0
    store.gate.set()
    _finish(w)
    assert _sample(w, "streamrate_checkpoint_write_seconds_count") == 1
    # An inline checkpoint (the final one) stops the loop for its whole write.
    _push(r, WORLD[51:60])
    _drain(w)
    pause0 = _sample(w, "streamrate_checkpoint_pause_seconds_sum")
    write0 = _sample(w, "streamrate_checkpoint_write_seconds_sum")
    w.close()
    assert _sample(w, "streamrate_checkpoint_pause_seconds_count") == 2
    assert _sample(w, "streamrate_checkpoint_write_seconds_count") == 2
    pause = _sample(w, "streamrate_checkpoint_pause_seconds_sum") - pause0
    assert pause >= _sample(w, "streamrate_checkpoint_write_seconds_sum") - write0 > 0
