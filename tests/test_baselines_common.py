"""Contracts every baseline model keeps: persistence, batch of one, pure predict, sane outputs."""

from __future__ import annotations

import math
import random
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import Model
from streamrate.models.registry import build_model, model_from_state
from streamrate.statefile import load_state, save_state

PLAYERS = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor", "quill", "sable"]
MAPS = ["saltflats", "ember-quarry", "glasswood", "sunken-bell"]
T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)

# (kind, settings); logistic_batch refits often so that its fitted state is exercised.
MODELS: list[tuple[str, dict[str, Any]]] = [
    ("elo", {}),
    ("elo", {"first_advantage": 35.0, "compiled": False}),
    ("elo", {"advantage_k": 0.0}),
    ("bayes_strength", {"period_field": "map", "period_pull": 0.2, "period_var": 0.1}),
    ("bayes_strength", {"newcomer_matches": 2, "shared_noise_per_day": 0.01}),
    ("kalman_strength", {"period_field": "map", "period_pull": 0.2, "period_var": 0.1}),
    ("kalman_strength", {"newcomer_matches": 2, "shared_noise_per_day": 0.01, "max_active": 7}),
    ("margin_strength", {"period_field": "map", "period_pull": 0.2, "newcomer_matches": 2}),
    (
        "mixture",
        {
            "members": [
                {"kind": "elo", "settings": {"k": 8.0}},
                {"kind": "bayes_strength", "settings": {"compiled": False}},
            ]
        },
    ),
    ("recalibrated", {}),  # the served default: the default mixture, recalibrated
    ("glicko2", {}),
    ("glicko2", {"period_s": 3600.0}),
    ("glicko2", {"advantage_k": 0.0}),
    ("trueskill", {}),
    ("trueskill", {"advantage_sigma": 0.0, "first_advantage": 0.0}),
    ("head_to_head", {}),
    ("head_to_head", {"advantage": False}),
    ("logistic_batch", {"refit_every": 7}),
]
IDS = [f"{k}-{i}" for i, (k, _) in enumerate(MODELS)]
# Models without a first-side term, where swapping sides must mirror the prediction.
SYMMETRIC = [
    (k, s)
    for k, s in MODELS
    if k
    not in (
        "logistic_batch",
        "bayes_strength",
        "kalman_strength",
        "margin_strength",
        "mixture",
        "recalibrated",
    )  # learn an edge
    and not s.get("first_advantage")
    and (k != "elo" or s.get("advantage_k") == 0.0)  # Elo learns a first-side edge by default
    and (k != "glicko2" or s.get("advantage_k") == 0.0)  # so does Glicko-2
    and (k != "trueskill" or s.get("advantage_sigma") == 0.0)  # so does TrueSkill
    and (k != "head_to_head" or s.get("advantage") is False)  # so does head-to-head's prior
]


def stream(seed: int, n: int, start: int = 0) -> list[MatchEvent]:
    """Random Quillrock matches: duels and small teams, some draws, context, features."""
    rng = random.Random(seed)
    out = []
    for i in range(start, start + n):
        k = rng.choice([1, 1, 2, 3])
        who = rng.sample(PLAYERS, 2 * k)
        features = {who[0]: {"heat": rng.random(), "role": rng.choice(["scout", "tank"])}}
        out.append(
            MatchEvent(
                match_id=f"m-{seed}-{i}",
                finished_at=T0 + timedelta(minutes=37 * i),
                first=tuple(who[:k]),
                second=tuple(who[k:]),
                score=rng.choice([0.0, 0.5, 1.0, 1.0]),
                context={"map": rng.choice(MAPS), "mode": "duel" if k == 1 else "trio"},
                features=features if rng.random() < 0.3 else {},
            )
        )
    return out


QUERIES = [
    Matchup(first=("kelvash",), second=("morvenn",), context={"map": "glasswood"}),
    Matchup(first=("tuvrenn", "oskuvar"), second=("bravik", "vantor")),
    Matchup(first=("kelvash",), second=("newcomer",)),
    Matchup(first=("ghost-a", "morvenn"), second=("ghost-b",), context={"map": "saltflats"}),
]


def trained(kind: str, settings_: dict[str, Any], n: int = 30, seed: int = 3) -> Model:
    m = build_model(kind, **settings_)
    for ev in stream(seed, n):
        m.learn(ev)
    return m


def arrays_equal(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> bool:
    return a.keys() == b.keys() and all(
        np.array_equal(a[k], b[k], equal_nan=a[k].dtype.kind == "f") for k in a
    )


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_state_round_trip_is_exact(kind: str, settings_: dict[str, Any], tmp_path: Path) -> None:
    m = trained(kind, settings_)
    path = tmp_path / "state.npz"
    save_state(path, m.to_state())
    back = model_from_state(load_state(path))
    assert type(back) is type(m) and back.get_params() == m.get_params()
    assert [back.predict(q) for q in QUERIES] == [m.predict(q) for q in QUERIES]
    for name in PLAYERS:
        assert back.seen(name) == m.seen(name)
    # The next updates are the same too (refits included for the logistic model).
    nxt = stream(9, 10, start=100)
    assert list(back.learn_many(nxt).p_win) == list(m.learn_many(nxt).p_win)
    assert arrays_equal(back._state_arrays(), m._state_arrays())


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_batch_of_one_equals_learn(kind: str, settings_: dict[str, Any]) -> None:
    a, b = trained(kind, settings_), trained(kind, settings_)
    for ev in stream(5, 12, start=200):
        pa = a.learn(ev)
        pb = b.learn_batch([ev])
        assert tuple(pa) == (pb.p_win[0], pb.p_draw[0])
        assert arrays_equal(a._state_arrays(), b._state_arrays())


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_learn_returns_the_prediction_made_before_the_update(
    kind: str, settings_: dict[str, Any]
) -> None:
    m = trained(kind, settings_)
    for ev in stream(6, 10, start=300):
        before = m.predict(ev)
        got = m.learn(ev)
        if settings_.get("period_s") or kind in (
            "bayes_strength",
            "kalman_strength",
            "margin_strength",
            "mixture",
            "recalibrated",
        ):
            # learn first inflates idle deviations (and may start a new period),
            # which predict (no clock) cannot.
            assert got.p_win == pytest.approx(before.p_win, abs=0.05)
        else:
            assert got == before


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_learn_many_equals_learn_in_a_loop(kind: str, settings_: dict[str, Any]) -> None:
    a, b = trained(kind, settings_), trained(kind, settings_)
    evs = stream(7, 25, start=400)
    many = a.learn_many(evs)
    loop = [b.learn(ev) for ev in evs]
    assert list(many.p_win) == [p.p_win for p in loop]
    assert list(many.p_draw) == [p.p_draw for p in loop]
    assert arrays_equal(a._state_arrays(), b._state_arrays())


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_learn_batch_predicts_from_the_batch_start_state(
    kind: str, settings_: dict[str, Any]
) -> None:
    m = trained(kind, settings_)
    evs = stream(8, 6, start=500)
    # Every prediction of a batch comes from the state at the batch start, which
    # is what predict() sees beforehand (idle-time inflation aside).
    if settings_.get("period_s") or kind in (
        "bayes_strength",
        "kalman_strength",
        "margin_strength",
        "mixture",
        "recalibrated",
    ):
        pytest.skip("predict() does not know the clock; covered by the model's own tests")
    expected = [m.predict(ev) for ev in evs]
    got = m.learn_batch(evs)
    assert [got[i] for i in range(len(evs))] == expected
    for name in PLAYERS:
        assert m.seen(name) == sum(name in ev.entities() for ev in stream(3, 30) + evs)


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_predict_changes_nothing(kind: str, settings_: dict[str, Any]) -> None:
    m = trained(kind, settings_)
    before = m._state_arrays()
    for q in QUERIES:
        m.predict(q)
    assert arrays_equal(before, m._state_arrays())
    assert m.seen("newcomer") == 0 and "newcomer" not in m.entities_


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_unknown_entities_get_the_prior(kind: str, settings_: dict[str, Any]) -> None:
    fresh = build_model(kind, **settings_)
    m = trained(kind, settings_)
    q = Matchup(first=("ghost-a",), second=("ghost-b",))
    if kind in (
        "logistic_batch",
        "bayes_strength",
        "kalman_strength",
        "margin_strength",
        "mixture",
        "recalibrated",
    ):
        # Only the learned first-side term separates two unknowns.
        assert fresh.predict(q).p_win == 0.5
    elif kind == "elo":
        # Two unknowns differ only by the (learned) first-side advantage.
        prior = build_model(kind, **{**settings_, "first_advantage": float(m.advantage_[0])})
        assert m.predict(q) == prior.predict(q)
    elif kind == "glicko2":
        # The same: the learned advantage (internal scale) set on a fresh model.
        fresh.advantage_[:] = m.advantage_  # type: ignore[attr-defined]
        assert m.predict(q) == fresh.predict(q)
    elif kind == "trueskill":
        # Two unknowns differ only by the learned advantage (its mean and variance).
        fresh.advantage_[:] = m.advantage_  # type: ignore[attr-defined]
        assert m.predict(q) == fresh.predict(q)
    elif kind == "head_to_head" and settings_.get("advantage", True):
        # Two unknowns get the first side's smoothed rate over the stream so far.
        scores = [ev.score for ev in stream(3, 30)]
        assert m.predict(q).p_win == pytest.approx((sum(scores) + 1) / (len(scores) + 2))
    else:
        assert m.predict(q) == fresh.predict(q)


matchups = st.builds(
    lambda who, k1, k2: Matchup(first=tuple(who[:k1]), second=tuple(who[k1 : k1 + k2])),
    st.permutations([*PLAYERS, "ghost-a", "ghost-b"]),
    st.integers(1, 4),
    st.integers(1, 4),
)
_FAST = settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
_TRAINED = {i: trained(k, s, n=60, seed=11) for i, (k, s) in zip(IDS, MODELS, strict=True)}


@pytest.mark.parametrize("model_id", IDS)
@_FAST
@given(q=matchups)
def test_probabilities_are_valid(model_id: str, q: Matchup) -> None:
    p = _TRAINED[model_id].predict(q)
    assert math.isfinite(p.p_win) and math.isfinite(p.p_draw)
    assert 0.0 <= p.p_win <= 1.0 and 0.0 <= p.p_draw <= 1.0
    assert p.p_win + p.p_draw <= 1.0 + 1e-12


@pytest.mark.parametrize(("kind", "settings_"), SYMMETRIC, ids=[k for k, _ in SYMMETRIC])
@_FAST
@given(q=matchups)
def test_swapping_sides_mirrors_the_prediction(
    kind: str, settings_: dict[str, Any], q: Matchup
) -> None:
    # Without a first-side advantage: P(second wins) = 1 - P(first wins) - P(draw).
    m = _TRAINED[IDS[MODELS.index((kind, settings_))]]
    p = m.predict(q)
    swapped = m.predict(Matchup(first=q.second, second=q.first))
    assert swapped.p_win == pytest.approx(1.0 - p.p_win - p.p_draw, abs=1e-12)
    assert swapped.p_draw == pytest.approx(p.p_draw, abs=1e-12)


@pytest.mark.parametrize(("kind", "settings_"), MODELS, ids=IDS)
def test_empty_batches_are_harmless(kind: str, settings_: dict[str, Any]) -> None:
    m = trained(kind, settings_)
    before = m._state_arrays()
    assert len(m.learn_batch([]).p_win) == 0 and len(m.learn_many([]).p_win) == 0
    assert arrays_equal(before, m._state_arrays())


@pytest.mark.parametrize("model_id", IDS)
@_FAST
@given(qs=st.lists(matchups, min_size=0, max_size=12), solo=st.booleans())
def test_many_pairings_at_once_are_each_pairing_alone(
    model_id: str, qs: list[Matchup], solo: bool
) -> None:
    # predict_many (a lobby's matrix) against predict one pairing at a time; one
    # against one takes the array paths. 1e-12: numpy's exp and sqrt may differ
    # from math's in the last bit.
    m = _TRAINED[model_id]
    if solo:
        ctx = {"map": "glasswood", "tier": 2.0}
        qs = [Matchup(first=q.first[:1], second=q.second[:1], context=ctx) for q in qs]
    before = {k: v.copy() for k, v in m._state_arrays().items()}
    got = m.predict_many(qs)
    one = [m.predict(q) for q in qs]
    np.testing.assert_allclose(got.p_win, [p.p_win for p in one], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(got.p_draw, [p.p_draw for p in one], rtol=1e-12, atol=1e-15)
    assert arrays_equal(before, m._state_arrays())
