"""Entity features, context modes and forgetting of the matchup models."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from streamrate.batch import encode_events
from streamrate.encode import EntityTable, FeatureHasher
from streamrate.events import MatchEvent, Matchup
from streamrate.models.matchup import BladeChest, BradleyTerry

T0 = datetime(2026, 3, 1, tzinfo=UTC)
STYLES = ["rush", "hold", "roam"]


def _ev(k: int, a: str, b: str, score: float, **extra: object) -> MatchEvent:
    return MatchEvent(
        match_id=f"m{k}",
        finished_at=T0 + timedelta(hours=k),
        first=(a,),
        second=(b,),
        score=score,
        **extra,  # type: ignore[arg-type]
    )


def log_loss(p: np.ndarray, y: np.ndarray) -> float:
    p = np.clip(p, 1e-12, 1 - 1e-12)
    return float(np.mean(-(y * np.log(p) + (1 - y) * np.log(1 - p))))


def test_unknown_entity_gets_a_prior_from_its_features() -> None:
    # "rush" players beat "hold" players 85% of the time; a newcomer described as
    # "rush" should be expected to beat a known "hold" player before playing at all.
    rng = np.random.default_rng(0)
    styles = {f"bravik-{i}": STYLES[i % 2] for i in range(40)}
    evs = []
    for k in range(3000):
        i, j = rng.choice(40, 2, replace=False)
        a, b = f"bravik-{i}", f"bravik-{j}"
        p = {("rush", "hold"): 0.85, ("hold", "rush"): 0.15}.get((styles[a], styles[b]), 0.5)
        feats = {a: {"style": styles[a]}, b: {"style": styles[b]}}
        evs.append(_ev(k, a, b, float(rng.random() < p), features=feats))
    # the prior's mean is what is checked: the newcomer's uncertainty would widen it
    m = BradleyTerry(feature_width=16, advantage=False, uncertainty=False)
    m.learn_many(evs)
    plain = m.predict(Matchup(first=("newcomer",), second=("stranger",))).p_win
    rush = m.predict(
        Matchup(
            first=("newcomer",),
            second=("stranger",),
            features={"newcomer": {"style": "rush"}, "stranger": {"style": "hold"}},
        )
    ).p_win
    assert plain == 0.5  # no features, no advantage: nothing to tell them apart
    assert rush > 0.6
    hold = "bravik-1"  # a known "hold" player
    # a known entity's stored features are used when a query gives none
    known = "bravik-0"
    given = m.predict(
        Matchup(first=(known,), second=(hold,), features={known: {"style": "rush"}})
    ).p_win
    assert m.predict(Matchup(first=(known,), second=(hold,))).p_win == given
    assert m.seen("newcomer") == 0


def test_feature_prior_lets_newcomers_be_predicted_well() -> None:
    # a stream where most matches involve newcomers: features carry the signal
    rng = np.random.default_rng(1)
    evs = []
    for k in range(2000):
        sa, sb = rng.integers(0, 3, 2)
        p = {0: 0.5, 1: 0.9, 2: 0.1}[int((sa - sb) % 3)]
        a, b = f"tuvrenn-{2 * k}", f"tuvrenn-{2 * k + 1}"
        feats = {a: {"style": STYLES[sa]}, b: {"style": STYLES[sb]}}
        evs.append(_ev(k, a, b, float(rng.random() < p), features=feats))
    y = np.array([e.score for e in evs])
    with_f = BladeChest(dims=4, feature_width=16).learn_many(evs).p_win
    without = BladeChest(dims=4).learn_many(evs).p_win
    assert log_loss(with_f[1000:], y[1000:]) < 0.55 < log_loss(without[1000:], y[1000:])


def _map_world(flip: bool, seed: int = 2) -> list[MatchEvent]:
    """Play styles whose matchups depend on the map.

    ``flip``: two styles; on saltflats style 0 beats style 1 (p = 0.85), on
    glasswood the reverse, so without context it averages to a coin flip.
    Otherwise three cyclic styles, strong on saltflats (p = 0.95) and weak on
    glasswood (p = 0.6).
    """
    rng = np.random.default_rng(seed)
    style = rng.integers(0, 2 if flip else 3, 30)
    evs = []
    for k in range(4000):
        i, j = rng.choice(30, 2, replace=False)
        salt = k % 2 == 1
        strong = (0.85 if salt else 0.15) if flip else (0.95 if salt else 0.6)
        p = {0: 0.5, 1: strong, 2: 1.0 - strong}[int((style[i] - style[j]) % 3)]
        mp = "saltflats" if salt else "glasswood"
        evs.append(_ev(k, f"vantor-{i}", f"vantor-{j}", float(rng.random() < p),
                       context={"map": mp}))  # fmt: skip
    return evs


@pytest.mark.parametrize(("mode", "flip"), [("stacked", True), ("gated", False)])
def test_context_modes_learn_map_dependent_matchups(mode: str, flip: bool) -> None:
    # "stacked" shifts every entity's vectors by a map-dependent amount, so it can turn
    # a matchup around; "gated" rescales each vector dimension per map, so it can make
    # a matchup matter more or less (passing through zero to flip it is hard for it).
    evs = _map_world(flip)
    y = np.array([e.score for e in evs])
    half = len(evs) // 2
    ctx = BladeChest(dims=4, context=mode, context_width=16).learn_many(evs).p_win
    none = BladeChest(dims=4, context="none", context_width=16).learn_many(evs).p_win
    assert log_loss(ctx[half:], y[half:]) < log_loss(none[half:], y[half:]) - 0.03


def test_forgetting_pulls_idle_entities_back_to_the_prior() -> None:
    evs = [_ev(k, "kelvash", "morvenn", 1.0) for k in range(50)]
    later = _ev(0, "oskuvar", "tuvrenn", 1.0).model_copy(
        update={"finished_at": T0 + timedelta(days=200), "match_id": "late"}
    )
    q = Matchup(first=("kelvash",), second=("morvenn",))
    keep = BradleyTerry(advantage=False)
    fade = BradleyTerry(advantage=False, forget_per_day=0.05)
    for m in (keep, fade):
        m.learn_many([*evs, later])
    assert keep.predict(q).p_win > 0.9
    assert fade.predict(q).p_win == pytest.approx(0.5, abs=0.01)


def test_encoding_marks_unknown_and_padding_apart() -> None:
    table = EntityTable()
    evs = [
        _ev(0, "kelvash", "morvenn", 1.0),
        MatchEvent(
            match_id="m1",
            finished_at=T0,
            first=("tuvrenn", "oskuvar"),
            second=("bravik",),
            score=0.5,
            context={"map": "glasswood", "heat": 0.5},
            features={"oskuvar": {"style": "roam"}},
        ),
    ]
    b = encode_events(evs, table, FeatureHasher(8), FeatureHasher(8))
    assert table.ids == ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik"]
    assert b.first.tolist() == [[0, -1], [2, 3]] and b.first_size.tolist() == [1, 2]
    assert b.ctx_idx.shape == (2, 2) and b.ctx_idx[0].tolist() == [-1, -1]
    assert b.feat_idx.shape == (2, 3, 1) and b.feat_idx[1, 1, 0] >= 0 and b.feat_idx[0, 0, 0] == -1
    assert b.time_s[0] == T0.timestamp() and b.score.tolist() == [1.0, 0.5]
    q = encode_events([Matchup(first=("kelvash", "ghost"), second=("morvenn",))], table, add=False)
    assert q.first.tolist() == [[0, -1]] and q.first_size.tolist() == [2]
    assert np.isnan(q.score[0]) and np.isnan(q.time_s[0]) and len(table) == 5
