"""Glicko-2 and TrueSkill: compiled loops, their uncompiled run and the former
plain-Python models (tests/rating_reference.py) give the same numbers."""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rating_reference import ReferenceGlicko2, ReferenceTrueSkill, log_ndtr

from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import Model
from streamrate.models.glicko2 import Glicko2
from streamrate.models.trueskill import TrueSkill
from streamrate.simulate import simulate, world_spec

T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)
TOL = 1e-9

# (model, former model, shared settings, settings of the model alone). The former
# TrueSkill and Glicko-2 had no first-side advantage: the models are held to them
# with the advantage off (their defaults learn one, tested in
# test_baselines_trueskill.py and test_baselines_glicko2.py).
OFF: dict[str, Any] = {"advantage_sigma": 0.0}
G_OFF: dict[str, Any] = {"advantage_k": 0.0}
CASES: list[tuple[type[Model], type[Model], dict[str, Any], dict[str, Any]]] = [
    (Glicko2, ReferenceGlicko2, {}, G_OFF),
    (Glicko2, ReferenceGlicko2, {"period_s": 3600.0}, G_OFF),
    (TrueSkill, ReferenceTrueSkill, {}, OFF),
    (TrueSkill, ReferenceTrueSkill, {"draw_probability": 0.0, "tau": 0.0}, OFF),
]
IDS = ["glicko2", "glicko2-idle", "trueskill", "trueskill-nodraw"]


def mixed_stream(seed: int, n: int, players: int = 30) -> list[MatchEvent]:
    """Duels and teams of up to four, uneven sides, wins, losses and draws,
    with gaps of minutes to days (idle inflation)."""
    rng = random.Random(seed)
    names = [f"quill-{i}" for i in range(players)]
    t = T0
    out = []
    for i in range(n):
        k1, k2 = rng.choice([1, 1, 2, 3, 4]), rng.choice([1, 1, 2, 3, 4])
        who = rng.sample(names, k1 + k2)
        t += timedelta(minutes=rng.choice([1, 7, 90, 3000]))
        out.append(
            MatchEvent(
                match_id=f"m-{seed}-{i}",
                finished_at=t,
                first=tuple(who[:k1]),
                second=tuple(who[k1:]),
                score=rng.choice([0.0, 0.5, 1.0, 1.0]),
            )
        )
    return out


def team_world(n: int) -> list[MatchEvent]:
    # Three against three with draws, from the simulator's 'teams' preset.
    return simulate(world_spec("teams", matches=n, seed=7)).events


def assert_states_close(got: Model, want: Model, exact: bool = False) -> None:
    a, b = got._state_arrays(), want._state_arrays()
    if "advantage" in a and "advantage" not in b:  # the advantage off: still at 0
        assert np.all(a.pop("advantage") == 0.0)
    assert a.keys() == b.keys()
    for name in a:
        if exact:
            assert np.array_equal(a[name], b[name], equal_nan=True), name
        else:
            np.testing.assert_allclose(a[name], b[name], rtol=TOL, atol=TOL, err_msg=name)


@pytest.mark.parametrize(("cls", "ref_cls", "kw", "own"), CASES, ids=IDS)
def test_sequential_path_matches_the_plain_python_model(
    cls: type[Model], ref_cls: type[Model], kw: dict[str, Any], own: dict[str, Any]
) -> None:
    events = mixed_stream(1, 600) + team_world(400)
    ref = ref_cls(**kw)
    want = [ref.learn(ev) for ev in events]
    fast = cls(**kw, **own)
    slow = cls(compiled=False, **kw, **own)
    got_fast = fast.learn_many(events)
    got_slow = slow.learn_many(events)
    np.testing.assert_allclose(got_fast.p_win, [p.p_win for p in want], rtol=TOL, atol=TOL)
    np.testing.assert_allclose(got_fast.p_draw, [p.p_draw for p in want], rtol=TOL, atol=TOL)
    assert_states_close(fast, ref)
    # The uncompiled run of the same loops is the same to the last bit.
    assert np.array_equal(got_fast.p_win, got_slow.p_win)
    assert np.array_equal(got_fast.p_draw, got_slow.p_draw)
    assert_states_close(fast, slow, exact=True)
    queries = [Matchup(first=ev.first, second=ev.second) for ev in events[:50]]
    queries.append(Matchup(first=("ghost-a", "quill-1"), second=("ghost-b",)))
    for q in queries:
        p, r, s = fast.predict(q), ref.predict(q), slow.predict(q)
        assert p == pytest.approx(r, rel=TOL, abs=TOL)
        assert p == s


@pytest.mark.parametrize(("cls", "ref_cls", "kw", "own"), CASES, ids=IDS)
@pytest.mark.parametrize("size", [2, 7, 50])
def test_mini_batch_path_matches_the_plain_python_model(
    cls: type[Model], ref_cls: type[Model], kw: dict[str, Any], own: dict[str, Any], size: int
) -> None:
    events = mixed_stream(2, 300) + team_world(200)
    ref, fast, slow = ref_cls(**kw), cls(**kw, **own), cls(compiled=False, **kw, **own)
    for k in range(0, len(events), size):
        chunk = events[k : k + size]
        want = ref.learn_batch(chunk)
        got = fast.learn_batch(chunk)
        np.testing.assert_allclose(got.p_win, want.p_win, rtol=TOL, atol=TOL)
        np.testing.assert_allclose(got.p_draw, want.p_draw, rtol=TOL, atol=TOL)
        other = slow.learn_batch(chunk)
        assert np.array_equal(got.p_win, other.p_win)
        assert np.array_equal(got.p_draw, other.p_draw)
    assert_states_close(fast, ref)
    assert_states_close(fast, slow, exact=True)


@settings(max_examples=300)
@given(x=st.floats(-80.0, 40.0))
def test_log_normal_distribution_function_matches_scipy(x: float) -> None:
    from streamrate.models._kernels_trueskill import log_ndtr as own

    # scipy.special.log_ndtr (as used by the reference model) is the independent check.
    assert own(x) == pytest.approx(log_ndtr(x), rel=1e-12, abs=1e-15)


@pytest.mark.parametrize("cls", [Glicko2, TrueSkill])
def test_an_encoded_batch_with_unknown_entities_is_refused(cls: type[Model]) -> None:
    from streamrate.batch import encode_events

    m = cls()
    m.learn_many(mixed_stream(3, 5))
    b = encode_events(mixed_stream(4, 5, players=60), m.entities_, add=False)
    with pytest.raises(ValueError, match="unknown"):
        m.learn_encoded(b)  # type: ignore[attr-defined]
