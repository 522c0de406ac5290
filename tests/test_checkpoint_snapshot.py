"""Copy-on-write snapshots of the per-entity rows: a checkpoint taken while the
model goes on learning (rows written, arrays grown, entities added) holds the
model as it was when the checkpoint was taken, streamed or encoded at once."""

from __future__ import annotations

import io
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import fakeredis
import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import FileCheckpointStore, decode_checkpoint
from streamrate.config import Settings, SpaceSettings
from streamrate.events import MatchEvent, event_to_json
from streamrate.metrics import ServiceMetrics
from streamrate.models._snapshot import RowSnapshot, SnapshotArray, snapshot_state
from streamrate.models.base import Model, ModelState
from streamrate.models.matchup import BladeChest
from streamrate.models.registry import build_model, model_from_state
from streamrate.statefile import state_from_bytes, state_to_bytes, write_state
from streamrate.stream.writer import Writer

START = datetime(2026, 3, 1, tzinfo=UTC)


def _events(lo: int, hi: int, n_ent: int, seed: int, teams: bool = False) -> list[MatchEvent]:
    rng = np.random.default_rng(seed)
    out = []
    for k in range(lo, hi):
        picks = rng.choice(n_ent, 4 if teams else 2, replace=False).tolist()
        a, b = (picks[:2], picks[2:]) if teams else (picks[:1], picks[1:])
        out.append(
            MatchEvent(
                match_id=f"m-{k}",
                finished_at=START + timedelta(hours=k),
                first=tuple(f"quill-{x}" for x in a),
                second=tuple(f"quill-{x}" for x in b),
                score=float(rng.integers(0, 3)) / 2,
                context={"map": ("saltflats", "glasswood")[k % 2]},
                features={} if k % 3 else {f"quill-{a[0]}": {"kit": "ember", "level": k % 7}},
            )
        )
    return out


# -- the snapshot alone --------------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(
    n=st.integers(0, 40),
    slice_rows=st.integers(1, 9),
    plan=st.lists(
        st.one_of(
            st.tuples(st.just("write"), st.lists(st.integers(-3, 50), max_size=12)),
            st.tuples(st.just("all"), st.just([])),
            st.tuples(st.just("grow"), st.just([])),
            st.tuples(st.just("read"), st.sampled_from(["a", "b"])),
        ),
        max_size=25,
    ),
)
def test_a_snapshot_reads_the_rows_as_they_were_whatever_is_written_meanwhile(
    n: int, slice_rows: int, plan: list[tuple[str, Any]]
) -> None:
    rng = np.random.default_rng(n)
    live = {
        "a": rng.normal(size=(n + 3, 3)).astype(np.float32),
        "b": rng.integers(0, 9, size=n + 3).astype(np.int32),
    }
    want = {k: v[:n].copy() for k, v in live.items()}
    snap = RowSnapshot(live, n, slice_rows=slice_rows)
    got: dict[str, np.ndarray] = {}
    readers = {k: snap.slices(k) for k in live}
    for op, arg in plan:
        if op == "write":  # the owner's hook, then its write
            rows = np.array(arg, dtype=np.int64)
            snap.before_write(rows)
            ok = rows[(rows >= 0) & (rows < live["a"].shape[0])]
            live["a"][ok] += 1.0
            live["b"][ok] -= 1
        elif op == "all":
            snap.before_write(None)
            live["a"][:] = -7.0
            live["b"][:] = -7
        elif op == "grow":  # a larger array replaces the live one; the old is written no more
            for k, v in list(live.items()):
                bigger = np.zeros((2 * v.shape[0] + 1, *v.shape[1:]), v.dtype)
                bigger[: v.shape[0]] = v
                live[k] = bigger
        elif arg not in got:  # read one slice of an array (interleaved with writes)
            piece = next(readers[arg], None)
            if piece is None:
                got[arg] = np.zeros((0, *want[arg].shape[1:]), want[arg].dtype)
            else:
                got.setdefault(f"{arg}.parts", []).append(piece)  # type: ignore[arg-type]
    for k in live:
        parts = list(got.pop(f"{k}.parts", [])) + list(readers[k])  # type: ignore[arg-type]
        whole = np.concatenate(parts) if parts else want[k][:0]
        np.testing.assert_array_equal(whole, want[k], err_msg=k)
    snap.close()
    assert not snap.active
    snap.before_write(np.arange(n))  # a closed snapshot copies nothing


def test_a_closed_snapshot_refuses_to_be_read() -> None:
    snap = RowSnapshot({"a": np.zeros((4, 2))}, 4, slice_rows=2)
    it = snap.slices("a")
    next(it)
    snap.close()
    with pytest.raises(RuntimeError):
        next(it)


def test_only_the_rows_written_are_copied() -> None:
    live = np.arange(20.0).reshape(10, 2)
    snap = RowSnapshot({"w": live}, 8)
    snap.before_write(np.array([1, 1, 3, 9, -1]))  # 9 is past the snapshot, -1 padding
    snap.before_write(np.array([3, 5]))
    assert snap.rows_copied == 3  # rows 1, 3 and 5, each once


# -- the matchup models' hook ------------------------------------------------------


@pytest.mark.parametrize(
    "settings_",
    [
        {"dims": 3, "context": "stacked", "backend": "numpy"},
        {"dims": 2, "feature_width": 8, "forget_per_day": 0.1, "backend": "numpy"},
        {"dims": 0, "strength": True, "backend": "numpy", "uncertainty": False},
        {"dims": 4, "context": "gated", "backend": "auto"},
    ],
)
@pytest.mark.parametrize("batch", [False, True])
def test_a_model_snapshot_is_the_state_when_it_was_taken(
    settings_: dict[str, Any], batch: bool
) -> None:
    kind = "bradley_terry" if settings_["dims"] == 0 else "blade_chest"
    if kind == "bradley_terry":
        settings_ = {k: v for k, v in settings_.items() if k != "dims"}
    model = build_model(kind, **settings_)
    model.learn_many(_events(0, 60, 30, seed=1, teams=True))
    want = model.to_state()
    state, snap = snapshot_state(model)
    assert snap is not None and "own" not in state.arrays
    sources = {name: SnapshotArray(snap, name) for name in snap.names}
    # learning goes on: rows written, new entities (the arrays grow), teams
    learn = model.learn_batch if batch else model.learn_many
    for k in range(5):
        learn(_events(60 + 40 * k, 100 + 40 * k, 30 + 400 * k, seed=2 + k, teams=k % 2 == 1))
    assert snap.rows_copied > 0
    blob = state_to_bytes(state, {"at": 1}, sources)
    snap.close()
    got, extra = state_from_bytes(blob)
    assert extra == {"at": 1}
    assert set(got.arrays) == set(want.arrays)
    for name, arr in want.arrays.items():
        np.testing.assert_array_equal(got.arrays[name], arr, err_msg=name)
    # and it loads as the model it was
    again = model_from_state(got)
    assert len(again.entities_) == len(want.arrays["entity_counts"])  # type: ignore[attr-defined]


def test_a_model_with_no_snapshot_copies_nothing_on_write() -> None:
    model = BladeChest(dims=2, backend="numpy")
    _, snap = snapshot_state(model)
    assert snap is not None
    snap.close()
    model.learn_many(_events(0, 20, 10, seed=3))
    assert snap.rows_copied == 0 and len(model._snapshots) == 0


def test_other_models_give_their_state_as_before() -> None:
    model = build_model("head_to_head")  # no per-entity rows to keep
    model.learn_many(_events(0, 10, 6, seed=4))
    state, snap = snapshot_state(model)
    assert snap is None
    assert set(state.arrays) == set(model.to_state().arrays)


def test_streamed_and_encoded_at_once_are_the_same_bytes() -> None:
    arrays = {"w": np.arange(6.0).reshape(3, 2), "n": np.arange(4, dtype=np.int32)}
    state = ModelState("demo", 1, {"k": 1}, {"w": arrays["w"]})
    snap = RowSnapshot({"n": arrays["n"]}, 4, slice_rows=3)
    buf = io.BytesIO()
    write_state(buf, state, {"e": 2}, {"n": SnapshotArray(snap, "n")})
    got, extra = state_from_bytes(buf.getvalue())
    assert extra == {"e": 2}
    np.testing.assert_array_equal(got.arrays["n"], arrays["n"])
    np.testing.assert_array_equal(got.arrays["w"], arrays["w"])


# -- through the writer: a checkpoint file streamed while the writer applies --------

SPACE = SpaceSettings(
    name="duel",
    model="blade_chest",
    model_settings={"dims": 3, "backend": "numpy"},
    batch_count=13,
    block_ms=1,
    checkpoint_every_events=30,
    checkpoint_every_s=10**6,
    claim_idle_ms=0,
    dedupe_window_s=1e9,
)
KEYS = Settings(spaces=(SPACE,)).keys(SPACE)
WAIT_S = 10.0


def _model() -> Model:
    return build_model("blade_chest", dims=3, backend="numpy")


class GatedFileStore(FileCheckpointStore):
    """A file store whose streamed saves wait for ``gate`` after writing their first
    bytes (so the writer applies while a snapshot is being read); then they fail
    (``fail``), are lost (``lose``: the process died first) or land."""

    def __init__(self, directory: Path) -> None:
        super().__init__(directory, SPACE.name)
        self.gate = threading.Event()
        self.started = threading.Event()
        self.fail = 0
        self.lose = False
        self.saved = 0

    def save_with(self, write: Any) -> None:
        def gated(fh: Any) -> None:
            self.started.set()
            assert self.gate.wait(WAIT_S), "the test never opened the gate"
            write(fh)
            if self.fail:
                self.fail -= 1
                raise OSError("the disk is full")

        if self.lose:
            gated(io.BytesIO())
            return
        super().save_with(gated)
        self.saved += 1


def _push(r: Any, events: list[MatchEvent]) -> None:
    for e in events:
        r.xadd(KEYS.events, {"event": event_to_json(e)})


def _pending(r: Any) -> int:
    return int(r.xpending(KEYS.events, "streamrate")["pending"])


def _drain(w: Writer) -> None:
    while True:
        reading_new = w.cursor == ">"
        if w.step() == 0 and reading_new:
            return


def _reference(events: list[MatchEvent]) -> dict[str, np.ndarray]:
    m = _model()
    for e in events:
        m.learn(e)
    return m.to_state().arrays


WORLD = _events(0, 110, 25, seed=9)


@settings(max_examples=30, deadline=None)
@given(
    plan=st.lists(
        st.sampled_from(["step", "save", "finish", "fail", "crash_lost", "crash_landed"]),
        min_size=1,
        max_size=25,
    )
)
@example(plan=["step", "step", "step", "save", "step", "step", "finish"])  # applied in flight
@example(plan=["step", "step", "save", "step", "step", "crash_landed", "step", "save", "fail"])
def test_any_crash_during_a_streamed_snapshot_save_ends_in_the_uninterrupted_state(
    plan: list[str], tmp_path_factory: pytest.TempPathFactory
) -> None:
    """Blade-chest rows in a copy-on-write snapshot streamed into a file: each event
    counts once whether the process dies before or after the save lands, and
    whether saves fail; every stored checkpoint is the model at its own last id."""
    directory = tmp_path_factory.mktemp("ck")
    r = fakeredis.FakeRedis()
    _push(r, WORLD)
    metrics = ServiceMetrics(CollectorRegistry(), [SPACE.name])

    def writer(store: GatedFileStore) -> Writer:
        w = Writer(r, SPACE, KEYS, store, metrics, _model, background=True)
        w.recover()
        return w

    store = GatedFileStore(directory)
    w = writer(store)

    def check_stored() -> None:
        if store.path.exists():
            ck = decode_checkpoint(store.path.read_bytes(), 10**6, 1e12)
            for name, arr in _reference(WORLD[: ck.applied]).items():
                np.testing.assert_allclose(ck.state.arrays[name], arr, rtol=1e-12, err_msg=name)

    for op in plan:
        if op == "step":
            w.step()
        elif op == "save":
            w.checkpoint(wait=False)
        elif op in ("finish", "fail"):
            if w.checkpoints.in_flight:
                store.fail = int(op == "fail")
                store.gate.set()
                thread = w.checkpoints._thread
                if thread is not None:
                    thread.join(WAIT_S)
                w.step()
                store.gate.clear()
                check_stored()
        else:
            store.lose = op == "crash_lost"
            store.gate.set()
            w.checkpoints.settle()
            check_stored()
            store = GatedFileStore(directory)
            w = writer(store)
    store.gate.set()
    store.fail, store.lose = 0, False
    _drain(w)
    w.close()
    check_stored()
    assert w.live.applied == len(WORLD)
    assert _pending(r) == 0
    for name, arr in _reference(WORLD).items():
        np.testing.assert_allclose(
            w.live.model.to_state().arrays[name], arr, rtol=1e-12, err_msg=name
        )
    assert len(w.live.model._snapshots) == 0  # type: ignore[attr-defined]


def test_a_save_that_fails_before_its_thread_starts_leaves_no_snapshot_open(
    tmp_path: Path,
) -> None:
    from streamrate.dedupe import SeenIds
    from streamrate.stream.apply import LiveModel
    from streamrate.stream.checkpoints import Checkpointer

    class BrokenLog:
        def promote(self, seq: int, model: str) -> None:
            return None

        def flush(self) -> str:
            raise ConnectionError("redis went away")

    model = BladeChest(dims=2, backend="numpy")
    model.learn_many(_events(0, 20, 10, seed=5))
    live = LiveModel(model)
    ck = Checkpointer(
        FileCheckpointStore(tmp_path, SPACE.name),
        None,  # type: ignore[arg-type]
        BrokenLog(),  # type: ignore[arg-type]
        live,
        (),
        ServiceMetrics(CollectorRegistry(), [SPACE.name]),
        SPACE,
        lambda: 0.0,
        0,
        background=True,
    )
    ck.handled([b"1-0"])
    with pytest.raises(ConnectionError):
        ck.save("1-0", SeenIds(10, 60), {}, wait=False)
    assert len(model._snapshots) == 0 and not ck.in_flight
    model.learn_many(_events(20, 30, 10, seed=6))  # no copies made for a dead snapshot
