"""Copy-on-write snapshots beyond the matchup models: Elo, Glicko-2, TrueSkill, the
Gaussian strengths, and the models made of models (mixture, recalibrated,
challengers, the served default) forwarding to their members. A snapshot taken
while the model goes on learning (rows written, entities added, arrays grown,
season pulls touching every row) reads as the model's state when it was taken."""

from __future__ import annotations

import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import FileCheckpointStore, decode_checkpoint
from streamrate.config import SpaceSettings
from streamrate.dedupe import SeenIds
from streamrate.events import MatchEvent
from streamrate.metrics import ServiceMetrics
from streamrate.models._snapshot import (
    CopyOnWriteRows,
    JoinedSnapshot,
    SnapshotArray,
    snapshot_state,
)
from streamrate.models.base import Model, ModelState
from streamrate.models.registry import build_model, model_from_state
from streamrate.statefile import state_from_bytes, state_to_bytes
from streamrate.stream.apply import LiveModel
from streamrate.stream.checkpoints import Checkpointer, private_arrays

START = datetime(2026, 3, 1, tzinfo=UTC)
SEASONS = ("spring", "autumn", "winter")

SETUPS: dict[str, tuple[str, dict[str, Any]]] = {
    "default": (SpaceSettings(name="d").model, {}),  # the served default
    "mixture": ("mixture", {}),
    "elo": ("elo", {}),
    "elo_plain": ("elo", {"compiled": False}),
    "glicko2": ("glicko2", {"period_s": 3600.0}),
    "trueskill": ("trueskill", {}),
    "bayes_strength": (
        "bayes_strength",
        {"period_field": "season", "period_pull": 0.3, "period_var": 0.05, "newcomer_matches": 3},
    ),
    "margin_strength": (
        "margin_strength",
        {"period_field": "season", "period_pull": 0.3, "period_var": 0.05, "newcomer_matches": 3},
    ),
    "challengers": (
        "challengers",
        {
            "members": {
                "ratings": {"kind": "elo"},
                "styles": {"kind": "blade_chest", "dims": 2, "backend": "numpy"},
                "pairs": {"kind": "head_to_head"},  # copies its state as before
                "served": {"kind": "recalibrated", "base": "glicko2"},
            },
            "active": "ratings",
        },
    ),
}


def _events(
    lo: int, hi: int, n_ent: int, seed: int, teams: bool = False, season: int = 0
) -> list[MatchEvent]:
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
                context={"map": ("saltflats", "glasswood")[k % 2], "season": SEASONS[season]},
            )
        )
    return out


def _build(name: str) -> Model:
    kind, kw = SETUPS[name]
    if kind == "challengers":
        from streamrate.challengers import ChallengerSet

        return ChallengerSet(**kw)
    return build_model(kind, **kw)


def _now(model: Model) -> ModelState:
    """The model's whole state now, every array a copy of its own (``to_state`` may
    hand out live arrays of the shared parameters)."""
    st_ = model.to_state()
    return ModelState(
        st_.kind, st_.version, st_.params, {k: a.copy() for k, a in st_.arrays.items()}
    )


def _taken(model: Model) -> tuple[ModelState, Any]:
    """A snapshot as the writer takes it: the state made private at once."""
    state, snap = snapshot_state(model)
    return private_arrays(state), snap


def _read(state: ModelState, snap: Any) -> ModelState:
    """The state and the snapshot's rows, through the checkpoint file format."""
    sources = {name: SnapshotArray(snap, name) for name in snap.names}
    got, _ = state_from_bytes(state_to_bytes(state, {}, sources))
    return got


def _assert_same(got: ModelState, want: ModelState) -> None:
    assert (got.kind, got.version, got.params) == (want.kind, want.version, want.params)
    assert set(got.arrays) == set(want.arrays)
    for name, arr in want.arrays.items():
        np.testing.assert_array_equal(got.arrays[name], arr, err_msg=name)


def _run_on(model: Model, batch: bool, plan: list[tuple[int, bool, int]], at: int) -> None:
    learn = model.learn_batch if batch else model.learn_many
    for k, (n_ent, teams, season) in enumerate(plan):
        lo = at + 30 * k
        learn(_events(lo, lo + 30, n_ent, seed=lo, teams=teams, season=season))


@pytest.mark.parametrize("name", list(SETUPS))
@pytest.mark.parametrize("batch", [False, True])
def test_a_snapshot_is_the_state_when_it_was_taken(name: str, batch: bool) -> None:
    model = _build(name)
    model.learn_many(_events(0, 60, 20, seed=1, teams=True))
    want = _now(model)
    state, snap = _taken(model)
    assert snap is not None
    assert snap.names, "some member keeps its rows in the snapshot"
    assert not set(snap.names) & set(state.arrays)
    # learning goes on: rows written, newcomers (arrays grow), teams, a new season
    _run_on(model, batch, [(20, False, 0), (300, True, 1), (2000, False, 2)], at=60)
    assert snap.rows_copied > 0
    got = _read(state, snap)
    snap.close()
    _assert_same(got, want)
    again = model_from_state(got)  # and it loads as the model it was
    _assert_same(again.to_state(), want)


@pytest.mark.parametrize("name", ["default", "bayes_strength", "elo", "challengers"])
def test_with_the_hook_off_the_snapshot_would_see_later_writes(
    name: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The test above can fail: without ``before_write`` the rows read are the new ones."""
    monkeypatch.setattr(CopyOnWriteRows, "before_write", lambda self, rows: None)
    model = _build(name)
    model.learn_many(_events(0, 60, 20, seed=1))
    want = _now(model)
    state, snap = _taken(model)
    _run_on(model, False, [(20, False, 1)], at=60)
    got = _read(state, snap)
    snap.close()
    assert any(not np.array_equal(got.arrays[k], want.arrays[k]) for k in snap.names)


def test_a_season_pull_copies_every_row_once() -> None:
    model = build_model("bayes_strength", period_field="season", period_pull=0.5)
    model.learn_many(_events(0, 40, 12, seed=2))
    want = _now(model)
    state, snap = _taken(model)
    n = len(model.entities_)
    model.learn_many(_events(40, 41, 12, seed=3, season=1))  # a pull: every row
    assert snap.rows_copied == n
    model.learn_many(_events(41, 60, 12, seed=4, season=2))
    assert snap.rows_copied == n  # each row once
    _assert_same(_read(state, snap), want)
    snap.close()


def test_the_default_model_joins_its_members_snapshots_and_closes_them_all() -> None:
    model = _build("default")
    model.learn_many(_events(0, 30, 10, seed=5))
    _, snap = snapshot_state(model)
    assert isinstance(snap, JoinedSnapshot)
    # three Gaussian-strength members and blade-chest, each with its own rows
    owners = [m for m in model.model_.models_]  # type: ignore[attr-defined]
    assert all(len(m._snapshots) == 1 for m in owners)
    assert {n.split(".")[1] for n in snap.names} == {f"member{i}" for i in range(4)}
    snap.close()
    assert all(len(m._snapshots) == 0 for m in owners)
    model.learn_many(_events(30, 40, 10, seed=6))
    assert snap.rows_copied == 0


def test_a_failed_composite_snapshot_leaves_no_member_copying(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    model = _build("mixture")
    model.learn_many(_events(0, 30, 10, seed=7))
    members = model.models_  # type: ignore[attr-defined]
    calls = {"n": 0}
    real = type(members[2]).snapshot

    def flaky(self: Any) -> Any:
        calls["n"] += 1
        if calls["n"] == 3:
            raise MemoryError("no room")
        return real(self)

    monkeypatch.setattr(type(members[2]), "snapshot", flaky)
    with pytest.raises(MemoryError):
        snapshot_state(model)
    assert all(not m._snapshots for m in members)


@settings(max_examples=40, deadline=None)
@given(
    name=st.sampled_from(list(SETUPS)),
    batch=st.booleans(),
    before=st.integers(2, 40),
    plan=st.lists(
        st.tuples(st.integers(2, 400), st.booleans(), st.integers(0, 2)), min_size=1, max_size=4
    ),
    reads_first=st.integers(0, 3),
)
def test_any_run_of_writes_leaves_the_snapshot_as_taken(
    name: str,
    batch: bool,
    before: int,
    plan: list[tuple[int, bool, int]],
    reads_first: int,
) -> None:
    model = _build(name)
    model.learn_many(_events(0, 30, max(before, 4), seed=before))
    want = _now(model)
    state, snap = _taken(model)
    assert snap is not None
    names = snap.names
    early = {n: list(snap.slices(n)) for n in names[:reads_first]}  # read, then copied no more
    _run_on(model, batch, [(max(n, 4), t, s) for n, t, s in plan], at=30)
    got = _read(
        ModelState(state.kind, state.version, state.params, dict(state.arrays)), _Rest(snap, early)
    )
    snap.close()
    _assert_same(got, want)


class _Rest:
    """The snapshot's arrays, those read early from what was read then."""

    def __init__(self, snap: Any, early: dict[str, list[np.ndarray]]) -> None:
        self.snap, self.early = snap, early
        self.names = snap.names

    def shape(self, name: str) -> tuple[int, ...]:
        return self.snap.shape(name)  # type: ignore[no-any-return]

    def dtype(self, name: str) -> np.dtype:
        return self.snap.dtype(name)  # type: ignore[no-any-return]

    def slices(self, name: str) -> Any:
        return iter(self.early[name]) if name in self.early else self.snap.slices(name)


# -- through the writer's checkpointer: the default model streamed into a file ------


class _Reader:
    def __init__(self) -> None:
        self.acked: list[bytes] = []

    def ack(self, ids: list[bytes]) -> None:
        self.acked.extend(ids)

    def trim(self, min_id: str) -> None:
        return None


class _Log:
    def promote(self, seq: int, model: str) -> None:
        return None

    def flush(self) -> str:
        return "0-0"

    def trim(self, keep_from: str, min_entries: int) -> None:
        return None


@pytest.mark.parametrize("batch", [False, True])
def test_a_background_checkpoint_of_the_default_model_is_the_model_it_was_taken_from(
    tmp_path: Path, batch: bool
) -> None:
    """The served default, saved in the background by the writer's checkpointer
    while it learns (under the model lock, as the writer does): the stored file
    holds the model as it was when the save began, and is acknowledged."""
    space = SpaceSettings(name="duel", checkpoint_every_events=1, checkpoint_every_s=10**6)
    gate, started = threading.Event(), threading.Event()

    class GatedStore(FileCheckpointStore):
        def save_with(self, write: Any) -> None:
            def gated(fh: Any) -> None:
                started.set()
                assert gate.wait(30), "the test never opened the gate"
                write(fh)

            super().save_with(gated)

    model = _build("default")
    model.learn_many(_events(0, 60, 20, seed=8, teams=True))
    live = LiveModel(model)
    reader = _Reader()
    store = GatedStore(tmp_path, space.name)
    ck = Checkpointer(
        store,
        reader,  # type: ignore[arg-type]
        _Log(),  # type: ignore[arg-type]
        live,
        (),
        ServiceMetrics(CollectorRegistry(), [space.name]),
        space,
        lambda: 0.0,
        0,
        background=True,
    )
    want = _now(model)
    ck.handled([b"60-0"])
    ck.save("60-0", SeenIds(10, 60), {}, wait=False)
    assert ck.in_flight and started.wait(30)
    with live.lock:  # the writer goes on applying while the file is written
        _run_on(model, batch, [(20, True, 1), (500, False, 2)], at=60)
    gate.set()
    ck.settle()
    got = decode_checkpoint(store.path.read_bytes(), 10, 1e12).state
    _assert_same(got, want)
    assert not any(len(m._snapshots) for m in model.model_.models_)  # type: ignore[attr-defined]
    assert model.to_state().arrays["base.loss"].tolist() != want.arrays["base.loss"].tolist()
