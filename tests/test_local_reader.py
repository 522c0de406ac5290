"""The in-process reader on fakeredis: answers equal the writer's model, the fast
paths equal ``predict``, and it follows a writer restart and a checkpoint reload."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import fakeredis
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings

from streamrate.checkpoint import FileCheckpointStore
from streamrate.config import SpaceSettings
from streamrate.consumer import Consumer
from streamrate.events import Matchup, event_to_json
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.replica import fastpath
from streamrate.replica.reader import LocalReader
from streamrate.simulate import simulate, world_spec

WORLD = simulate(world_spec("plain", matches=300, entities=30, seed=7)).events
IDS = sorted({e for ev in WORLD for e in ev.entities()})
SPACE = SpaceSettings(
    name="duel",
    model="elo",
    model_settings={"compiled": False, "first_advantage": 12.5},
    batch_count=40,
    block_ms=1,
    checkpoint_every_events=10**6,
    checkpoint_every_s=10**6,
    claim_idle_ms=0,
    dedupe_window_s=1e9,
)


def _writer(r: Any, tmp_path: Path) -> Consumer:
    s = fake_settings(tmp_path, SPACE)
    return Consumer(
        r,
        SPACE,
        s.keys(SPACE),
        FileCheckpointStore(tmp_path, "duel"),
        ServiceMetrics(CollectorRegistry(), ["duel"]),
        lambda: build_model("elo", **SPACE.model_settings),
    )


def _drain(c: Consumer) -> None:
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return


def _push(r: Any, tmp_path: Path, events: list[Any]) -> None:
    key = fake_settings(tmp_path, SPACE).keys(SPACE).events
    for ev in events:
        r.xadd(key, {"event": event_to_json(ev)})


@pytest.fixture
def world(tmp_path: Path) -> Any:
    server = fakeredis.FakeServer()
    r = fakeredis.FakeRedis(server=server)
    w = _writer(r, tmp_path)
    w.recover()
    reader = LocalReader(
        fake_settings(tmp_path, SPACE), "duel", clients=lambda: fakeredis.FakeRedis(server=server)
    )
    reader.start()
    yield r, w, reader
    reader.close()


def test_answers_equal_the_writers_model_and_carry_its_version(world: Any, tmp_path: Path) -> None:
    r, w, reader = world
    _push(r, tmp_path, WORLD[:150])
    _drain(w)
    assert reader.wait_applied(150, 10)
    a = reader.p_first_wins([IDS[0]], [IDS[1]])
    want = w.live.model.predict(Matchup(first=(IDS[0],), second=(IDS[1],)))
    assert a.p_first_wins == want.p_win
    assert a.applied == 150 and a.model_version == w.live.version
    pairs = [([IDS[i]], [IDS[j]]) for i in range(8) for j in range(8) if i != j]
    b = reader.p_first_wins_many(pairs)
    singles = [reader.p_first_wins(x, y).p_first_wins for x, y in pairs]
    np.testing.assert_allclose(b.p_first_wins, singles, rtol=1e-12)
    lob = reader.lobby(IDS[:6], (3, 3))
    assert sorted(lob["split"]["first"] + lob["split"]["second"]) == sorted(IDS[:6])
    assert lob["applied"] == 150


def test_the_reader_follows_a_writer_restart_and_a_checkpoint_reload(
    world: Any, tmp_path: Path
) -> None:
    r, w, reader = world
    _push(r, tmp_path, WORLD[:100])
    _drain(w)
    w.checkpoint()
    _push(r, tmp_path, WORLD[100:160])
    _drain(w)  # applied, never checkpointed: the writer dies here
    assert reader.wait_applied(160, 10)
    w2 = _writer(r, tmp_path)
    w2.recover()  # back at 100, applies 100..160 again, then more
    _push(r, tmp_path, WORLD[160:240])
    _drain(w2)
    assert reader.wait_applied(240, 10)
    reloads = reader.follower.reloads
    assert reloads["writer_restart"] == 1
    for i in range(5):
        mu = Matchup(first=(IDS[i],), second=(IDS[i + 5],))
        got = reader.p_first_wins(mu.first, mu.second)
        assert got.p_first_wins == pytest.approx(w2.live.model.predict(mu).p_win, rel=1e-12)
        assert got.applied == 240


@settings(max_examples=40, deadline=None)
@given(
    picks=st.lists(
        st.tuples(
            st.lists(st.sampled_from([*IDS[:10], "new-a"]), min_size=1, max_size=3, unique=True),
            st.lists(st.sampled_from([*IDS[10:20], "new-b"]), min_size=1, max_size=3, unique=True),
        ),
        min_size=1,
        max_size=20,
    ),
    kind=st.sampled_from(["elo", "glicko2", "blade_chest", "recalibrated"]),
)
def test_fast_paths_equal_predict(picks: list[Any], kind: str) -> None:
    model: Model = build_model(kind)
    model.learn_many(WORLD[:120])
    one = fastpath.single(model)
    for a, b in picks:
        want = model.predict(Matchup(first=tuple(a), second=tuple(b)))
        assert one(a, b, {}) == want  # the same arithmetic: the same bits
    got = fastpath.many(model, picks, {})
    want_many = [model.predict(Matchup(first=tuple(a), second=tuple(b))).p_win for a, b in picks]
    np.testing.assert_allclose(got, want_many, rtol=1e-12, atol=1e-15)
    solo = [([a[0]], [b[0]]) for a, b in picks]
    got_solo = fastpath.many(model, solo, {})
    want_solo = [model.predict(Matchup(first=tuple(a), second=tuple(b))).p_win for a, b in solo]
    np.testing.assert_allclose(got_solo, want_solo, rtol=1e-9, atol=1e-12)


DRAW_WORLD = simulate(world_spec("plain", matches=300, entities=30, seed=11, draw_rate=0.15)).events
CONTEXTS: list[dict[str, Any]] = [
    {},
    {"map": "glasswood"},
    {"map": "glasswood", "mode": "duel"},
    {"mode": "duel", "map": "unseen-map"},
    {"map": "glasswood", "tier": 3.0},  # a number: the general path
]


@settings(max_examples=60, deadline=None)
@given(
    kind=st.sampled_from(["bradley_terry", "blade_chest", "blade_chest_dist"]),
    dims=st.integers(1, 16),
    uncertainty=st.booleans(),
    vector_uncertainty=st.booleans(),
    draws=st.booleans(),
    context=st.sampled_from(["none", "stacked", "gated"]),
    context_width=st.sampled_from([0, 8]),
    prior_map=st.sampled_from(["identity", "tanh"]),
    forget=st.sampled_from([0.0, 0.3]),
    advantage=st.booleans(),
    trained=st.integers(0, 200),
    picks=st.lists(
        st.tuples(
            st.lists(st.sampled_from([*IDS[:10], "new-a"]), min_size=1, max_size=2, unique=True),
            st.lists(st.sampled_from([*IDS[10:20], "new-b"]), min_size=1, max_size=2, unique=True),
            st.integers(0, len(CONTEXTS) - 1),
        ),
        min_size=1,
        max_size=12,
    ),
)
def test_matchup_fast_path_equals_predict(
    kind: str,
    dims: int,
    uncertainty: bool,
    vector_uncertainty: bool,
    draws: bool,
    context: str,
    context_width: int,
    prior_map: str,
    forget: float,
    advantage: bool,
    trained: int,
    picks: list[Any],
) -> None:
    opts: dict[str, Any] = {
        "uncertainty": uncertainty,
        "draws": draws,
        "context": context if context_width else "none",
        "context_width": context_width,
        "prior_map": prior_map,
        "forget_per_day": forget,
        "advantage": advantage,
    }
    if kind != "bradley_terry":
        opts["dims"] = dims
        opts["vector_uncertainty"] = vector_uncertainty
    model: Model = build_model(kind, **opts)
    world = DRAW_WORLD if draws else WORLD
    model.learn_many(world[:trained])
    one = fastpath.single(model)  # built before more learning: it must see it
    model.learn_many(world[trained : trained + 40])  # rows grow, newcomers arrive
    for a, b, c in picks:
        ctx = CONTEXTS[c]
        want = model.predict(Matchup(first=tuple(a), second=tuple(b), context=ctx))
        compiled = len(a) == len(b) == 1 and all(isinstance(v, str) for v in ctx.values())
        if compiled:  # the direct path must not go through predict
            model.predict = _refuse  # type: ignore[method-assign]
        got = one(a, b, ctx)
        model.__dict__.pop("predict", None)
        assert got.p_win == pytest.approx(want.p_win, rel=1e-12, abs=1e-12)
        assert got.p_draw == pytest.approx(want.p_draw, rel=1e-12, abs=1e-12)
        assert (got.p_draw > 0) == draws


def _refuse(matchup: Matchup) -> Any:
    raise AssertionError(f"the general path answered {matchup}")
