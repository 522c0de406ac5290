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
    m = HeadToHead()
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
    m = HeadToHead()
    evs = [match(("bravik",), ("vantor",), 1.0, i) for i in range(3)]
    assert list(m.learn_batch(evs).p_win) == [0.5, 0.5, 0.5]
    assert m.predict(evs[0]).p_win == pytest.approx(4 / 5)
    assert m.predict(Matchup(first=("vantor",), second=("bravik",))).p_win == pytest.approx(1 / 5)
