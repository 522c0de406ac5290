"""Properties of the matchup models that hold for any data (hypothesis)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.events import MatchEvent, Matchup
from streamrate.models.matchup import BladeChest, BladeChestDistance, BradleyTerry, MatchupModel

T0 = datetime(2026, 3, 1, tzinfo=UTC)
NAMES = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor", "quill", "sorrel"]


@st.composite
def pairings(draw: st.DrawFn) -> tuple[tuple[str, ...], tuple[str, ...]]:
    ids = draw(st.permutations(NAMES))
    k1 = draw(st.integers(1, 3))
    k2 = draw(st.integers(1, 3))
    return tuple(ids[:k1]), tuple(ids[k1 : k1 + k2])


@st.composite
def models(draw: st.DrawFn) -> MatchupModel:
    kind = draw(st.sampled_from([BradleyTerry, BladeChest, BladeChestDistance]))
    settings_: dict = {
        "draws": draw(st.booleans()),
        "advantage": False,
        "lr": draw(st.sampled_from([0.05, 0.3, 2.0])),
        "lr_strength": draw(st.sampled_from([0.1, 1.0, 5.0])),
        "seed": draw(st.integers(0, 5)),
        "context": draw(st.sampled_from(["none", "stacked", "gated"])),
        "context_width": 8,
    }
    if kind is not BradleyTerry:
        settings_["dims"] = draw(st.integers(1, 4))
        settings_["vector_uncertainty"] = draw(st.booleans())
        settings_["vector_prior_var"] = draw(st.sampled_from([1e-3, 0.1, 10.0]))
    m = kind(**settings_)
    n = draw(st.integers(0, 25))
    evs = []
    for k in range(n):
        a, b = draw(pairings())
        score = draw(st.sampled_from([0.0, 0.5, 1.0]))
        mp = draw(st.sampled_from(["saltflats", "glasswood"]))
        evs.append(
            MatchEvent(
                match_id=f"m{k}",
                finished_at=T0 + timedelta(hours=k),
                first=a,
                second=b,
                score=score,
                context={"map": mp},
            )
        )
    m.learn_many(evs)
    return m


@settings(max_examples=40)
@given(models(), pairings(), st.sampled_from(["saltflats", "glasswood", "sunken-bell"]))
def test_probabilities_are_proper_and_antisymmetric(
    m: MatchupModel, pair: tuple[tuple[str, ...], tuple[str, ...]], mp: str
) -> None:
    a, b = pair
    p = m.predict(Matchup(first=a, second=b, context={"map": mp}))
    q = m.predict(Matchup(first=b, second=a, context={"map": mp}))
    for x in (p, q):
        assert np.isfinite(x.p_win) and np.isfinite(x.p_draw)
        assert 0.0 < x.p_win < 1.0 and 0.0 <= x.p_draw < 1.0
        assert x.p_win + x.p_draw < 1.0
        if not m.draws:
            assert x.p_draw == 0.0
    # with no first-side advantage, swapping sides swaps win and loss
    assert q.p_win == pytest.approx(1.0 - p.p_win - p.p_draw, abs=1e-12)
    assert q.p_draw == pytest.approx(p.p_draw, abs=1e-12)
    assert p.expected_score + q.expected_score == pytest.approx(1.0, abs=1e-12)


@settings(max_examples=25)
@given(models(), pairings())
def test_padding_in_a_batch_changes_nothing(
    m: MatchupModel, pair: tuple[tuple[str, ...], tuple[str, ...]]
) -> None:
    # a solo pairing predicted alone equals the same pairing padded inside a team batch
    solo = Matchup(first=(pair[0][0],), second=(pair[1][0],))
    alone = m.predict(solo)
    mixed = m.predict_encoded(m.encode([Matchup(first=pair[0], second=pair[1]), solo], add=False))
    assert mixed[1] == alone


@settings(max_examples=25)
@given(st.integers(1, 4), st.lists(st.sampled_from([0.0, 0.5, 1.0]), min_size=1, max_size=20))
def test_a_team_of_one_is_the_entity(dims: int, scores: list[float]) -> None:
    # the side's parameters are the mean over members, so one member is the entity itself;
    # learned from padded (mixed-size) batches or one by one, the state is the same
    evs = []
    for k, s in enumerate(scores):
        first = ("kelvash",) if k % 2 else ("kelvash", "bravik")
        evs.append(
            MatchEvent(
                match_id=f"m{k}",
                finished_at=T0 + timedelta(hours=k),
                first=first,
                second=("morvenn",),
                score=s,
            )
        )
    one, many = BladeChest(dims=dims), BladeChest(dims=dims)
    for ev in evs:
        one.learn(ev)
    many.learn_many(evs)
    np.testing.assert_array_equal(one.own_, many.own_)
    v_k, v_m = one.vectors("kelvash"), one.vectors("morvenn")
    assert v_k is not None and v_m is not None
    a_k, c_k = v_k[1 : 1 + dims], v_k[1 + dims :]
    a_m, c_m = v_m[1 : 1 + dims], v_m[1 + dims :]
    theta = (v_k[0] - v_m[0]) + a_k @ c_m - a_m @ c_k + one.sc_[0]
    # both played the last match, so no idle time: the logit is widened by the stored
    # variances (probit approximation, kappa = 1 / sqrt(1 + pi V / 8))
    var = one.strength_variance("kelvash") + one.strength_variance("morvenn")  # type: ignore[operator]
    theta /= np.sqrt(1.0 + np.pi * var / 8.0)
    p = one.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win
    assert p == pytest.approx(1.0 / (1.0 + np.exp(-theta)), rel=1e-9)
