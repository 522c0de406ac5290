"""Head-to-head frequency: the add-one smoothed record of each exact pairing."""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta

import pytest

from streamrate.events import MatchEvent, Matchup
from streamrate.models.head_to_head import HeadToHead

T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)


def match(first: tuple[str, ...], second: tuple[str, ...], score: float, i: int) -> MatchEvent:
    return MatchEvent(
        match_id=f"m-{i}",
        finished_at=T0 + timedelta(minutes=i),
        first=first,
        second=second,
        score=score,
    )


def test_laplace_smoothed_record_of_the_exact_pairing() -> None:
    # Add-one (Laplace) smoothing, rule of succession: (wins + 1) / (games + 2),
    # draws counted as half a win (common practice).
    rng = random.Random(4)
    m = HeadToHead(advantage=False)
    wins = draws = games = 0  # from the side (kelvash, tuvrenn)
    for i in range(40):
        score = rng.choice([0.0, 0.5, 1.0, 1.0])
        p_forward = (wins + 0.5 * draws + 1) / (games + 2)
        # The pairing in either order, members in any order, is the same pairing.
        if rng.random() < 0.5:
            got = m.learn(match(("kelvash", "tuvrenn"), ("morvenn",), score, i)).p_win
            assert got == pytest.approx(p_forward)
        else:
            got = m.learn(match(("morvenn",), ("tuvrenn", "kelvash"), 1.0 - score, i)).p_win
            assert got == pytest.approx(1.0 - p_forward)
        wins += score == 1.0
        draws += score == 0.5
        games += 1
    q = Matchup(first=("tuvrenn", "kelvash"), second=("morvenn",))
    assert m.predict(q).p_win == pytest.approx((wins + 0.5 * draws + 1) / (games + 2))
    # Other pairings, even overlapping ones, know nothing.
    assert m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win == 0.5
    assert m.predict(Matchup(first=("kelvash", "tuvrenn"), second=("oskuvar",))).p_win == 0.5
    assert m.seen("kelvash") == 40 and m.seen("oskuvar") == 0


def test_mini_batch_counts_after_predicting() -> None:
    m = HeadToHead(advantage=False)
    evs = [match(("bravik",), ("vantor",), 1.0, i) for i in range(3)]
    assert list(m.learn_batch(evs).p_win) == [0.5, 0.5, 0.5]
    assert m.predict(evs[0]).p_win == pytest.approx(4 / 5)
    assert m.predict(Matchup(first=("vantor",), second=("bravik",))).p_win == pytest.approx(1 / 5)


def test_the_prior_of_a_pairing_is_the_first_sides_rate_so_far() -> None:
    # The two imagined games of add-one smoothing split by the first side's smoothed
    # rate over every match: m = (S + 1) / (N + 2), P = (w + d/2 + 2 m) / (n + 2),
    # computed here by hand.
    m = HeadToHead()
    scores = [1.0, 1.0, 0.5, 0.0, 1.0]
    for i, s in enumerate(scores):  # every match a new pairing: each starts at the prior
        first_rate = (sum(scores[:i]) + 1) / (i + 2)
        got = m.learn(match((f"home-{i}",), (f"away-{i}",), s, i)).p_win
        assert got == pytest.approx(first_rate)
    rate = (sum(scores) + 1) / (len(scores) + 2)  # 4.5 + 1 over 7
    assert m.predict(Matchup(first=("home-0",), second=("away-0",))).p_win == pytest.approx(
        (1.0 + 2 * rate) / (1 + 2)
    )
    # Met the other way round, the home side keeps the edge: no longer exactly 1 - P.
    back = m.predict(Matchup(first=("away-0",), second=("home-0",))).p_win
    assert back == pytest.approx((0.0 + 2 * rate) / (1 + 2))
    assert m.predict(Matchup(first=("stranger",), second=("home-1",))).p_win == pytest.approx(rate)


def test_a_state_without_the_advantage_loads_and_predicts_as_before() -> None:
    from streamrate.models.base import ModelState

    old = HeadToHead(advantage=False)
    for i in range(6):
        old.learn(match(("bravik",), ("vantor",), float(i % 2), i))
    st = old.to_state()
    v1 = ModelState(st.kind, 1, {}, {k: v for k, v in st.arrays.items() if k != "first_score"})
    back = HeadToHead.from_state(v1)
    q = Matchup(first=("vantor",), second=("bravik",))
    assert back.get_params() == {"advantage": False}
    assert back.predict(q).p_win == old.predict(q).p_win
    assert HeadToHead.from_state(HeadToHead().to_state()).get_params() == {"advantage": True}
