"""Checkpoint blobs, stores and the bounded retry record."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import fakeredis
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from streamrate.checkpoint import (
    Checkpoint,
    FileCheckpointStore,
    RedisCheckpointStore,
    decode_checkpoint,
    encode_checkpoint,
)
from streamrate.dedupe import SeenIds
from streamrate.errors import StateError
from streamrate.events import MatchEvent
from streamrate.models.registry import build_model, model_from_state


def _events(n: int) -> list[MatchEvent]:
    names = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"]
    return [
        MatchEvent(
            match_id=f"m-{i}",
            finished_at=datetime(2026, 3, 1, tzinfo=UTC),
            first=(names[i % 6],),
            second=(names[(i + 1 + i // 6 % 5) % 6],),
            score=float(i % 3 == 0),
        )
        for i in range(n)
    ]


def test_checkpoint_round_trip_keeps_model_position_and_retry_record() -> None:
    model = build_model("elo", compiled=False)
    model.learn_many(_events(30))
    seen = SeenIds(keep=100, window_s=3600)
    for i in range(30):
        seen.add(f"m-{i}", 1000.0 + i)
    blob = encode_checkpoint(Checkpoint(model.to_state(), "1700-3", 30, seen, {"dead_lettered": 2}))
    back = decode_checkpoint(blob, keep=100, window_s=3600)
    assert back.last_id == "1700-3" and back.applied == 30
    assert back.counters == {"dead_lettered": 2}
    assert [f"m-{i}" in back.seen for i in range(30)] == [True] * 30
    again = model_from_state(back.state)
    for name, arr in model.to_state().arrays.items():
        np.testing.assert_array_equal(again.to_state().arrays[name], arr)


def test_a_blob_that_is_not_a_checkpoint_is_a_state_error() -> None:
    with pytest.raises(StateError):
        decode_checkpoint(b"PK\x03\x04 not really", keep=10, window_s=10)


@given(
    ops=st.lists(st.tuples(st.integers(0, 50), st.floats(0, 1e6)), max_size=200),
    keep=st.integers(0, 20),
    window=st.floats(0, 1e5),
)
def test_retry_record_is_bounded_by_count_and_window(
    ops: list[tuple[int, float]], keep: int, window: float
) -> None:
    s = SeenIds(keep=keep, window_s=window)
    arrivals: dict[str, float] = {}
    for i, t in ops:
        s.add(f"m-{i}", t)
        arrivals.pop(f"m-{i}", None)
        arrivals[f"m-{i}"] = t  # re-adding moves an id to the back, as in the record
        assert len(s) <= keep
    # The promise: among the last `keep` distinct arrivals, every id that finished
    # within `window` of the newest finish is remembered.
    newest = max((t for _, t in ops), default=0.0)
    recent = list(arrivals.items())[-keep:] if keep else []
    for mid, t in recent:
        if t >= newest - window:
            assert mid in s
    back = SeenIds.from_arrays(keep, window, s.to_arrays())
    assert back.ids() == s.ids()


def test_file_store_is_atomic_and_missing_means_none(tmp_path: Path) -> None:
    store = FileCheckpointStore(tmp_path / "ck", "duel")
    assert store.load() is None
    store.save(b"one")
    store.save(b"two")
    assert store.load() == b"two"
    assert [p.name for p in (tmp_path / "ck").iterdir()] == ["duel.ckpt.npz"]


def test_redis_store_round_trip() -> None:
    store = RedisCheckpointStore(fakeredis.FakeRedis(), "{sr:duel}:ckpt")
    assert store.load() is None
    store.save(b"\x00blob")
    assert store.load() == b"\x00blob"
