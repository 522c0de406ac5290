"""Elo: the expected-score curve against the chess standard, teams, and the compiled loop."""

from __future__ import annotations

import math
import random
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from scipy.stats import norm

from streamrate.batch import encode_events
from streamrate.encode import EntityTable
from streamrate.events import MatchEvent, Matchup
from streamrate.models.elo import Elo
from streamrate.simulate import WorldSpec, simulate

T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)
PLAYERS = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"]


def match(first: tuple[str, ...], second: tuple[str, ...], score: float, i: int = 0) -> MatchEvent:
    return MatchEvent(
        match_id=f"m-{i}",
        finished_at=T0 + timedelta(minutes=i),
        first=first,
        second=second,
        score=score,
    )


def stream(seed: int, n: int) -> list[MatchEvent]:
    rng = random.Random(seed)
    out = []
    for i in range(n):
        k = rng.choice([1, 2, 3])
        who = rng.sample(PLAYERS, 2 * k)
        out.append(match(tuple(who[:k]), tuple(who[k:]), rng.choice([0.0, 0.5, 1.0]), i))
    return out


def expected_score(diff: float) -> float:
    model = Elo()
    model.ratings_[:2] = [1500.0 + diff, 1500.0]
    model.entities_.rows(["kelvash", "morvenn"])
    return model.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win


# FIDE Handbook, Rating Regulations (B.02), table 8.1(b): rating difference D ->
# expected score PD of the higher-rated player. Rows entered from memory (the
# document was not at hand); each is (lowest D, highest D, PD).
FIDE_8_1_B = [
    (0, 3, 0.50),
    (4, 10, 0.51),
    (11, 17, 0.52),
    (92, 98, 0.63),
    (99, 106, 0.64),
    (198, 206, 0.76),
    (345, 357, 0.89),
    (392, 411, 0.92),
    (620, 735, 0.99),
    (736, 1200, 1.00),
]


@pytest.mark.parametrize(("lo", "hi", "pd"), FIDE_8_1_B)
def test_expected_score_follows_the_fide_table(lo: int, hi: int, pd: float) -> None:
    # The FIDE table is built from a normal curve (PD = Phi(D / (200 * sqrt 2))),
    # Elo here uses the logistic curve with scale 400; the two differ by up to
    # about 0.015 in the tails, so the check allows 0.02 rather than the table's
    # rounding of 0.005.
    for d in (lo, hi):
        assert expected_score(d) == pytest.approx(pd, abs=0.02)
        assert expected_score(-d) == pytest.approx(1.0 - pd, abs=0.02)


@pytest.mark.parametrize(("lo", "hi", "pd"), FIDE_8_1_B[:-2])
def test_recalled_fide_rows_match_their_normal_construction(lo: int, hi: int, pd: float) -> None:
    # Guards the rows above (entered from memory): the table is Phi(D / (200 * sqrt 2))
    # rounded to two decimals (FIDE Handbook B.02, 8.1(b); from memory). Row ends
    # sit on rounding boundaries, so the row midpoint is checked; the top rows are
    # left out as their cut-offs were set by hand.
    mid = (lo + hi) / 2.0
    assert norm.cdf(mid / (200.0 * math.sqrt(2.0))) == pytest.approx(pd, abs=0.005)


def test_update_moves_each_member_by_the_team_delta() -> None:
    m = Elo(k=20.0, advantage_k=0.0)
    m.learn(match(("kelvash",), ("morvenn",), 1.0, 0))  # kelvash 1510, morvenn 1490
    assert m.rating("kelvash") == pytest.approx(1510.0)
    ev = match(("kelvash", "tuvrenn"), ("morvenn", "oskuvar"), 0.5, 1)
    p = m.learn(ev).p_win
    # Side means 1505 vs 1495: E = 1 / (1 + 10^(-10/400)).
    assert p == pytest.approx(1.0 / (1.0 + 10.0 ** (-10.0 / 400.0)), rel=1e-15)
    delta = 20.0 * (0.5 - p)
    assert m.rating("kelvash") == pytest.approx(1510.0 + delta)
    assert m.rating("tuvrenn") == pytest.approx(1500.0 + delta)
    assert m.rating("morvenn") == pytest.approx(1490.0 - delta)
    assert m.rating("oskuvar") == pytest.approx(1500.0 - delta)
    assert m.seen("kelvash") == 2 and m.seen("oskuvar") == 1


def test_first_side_advantage_is_in_rating_points() -> None:
    m = Elo(first_advantage=100.0)
    p = m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win
    assert p == pytest.approx(1.0 / (1.0 + 10.0 ** (-100.0 / 400.0)))


def test_first_side_advantage_is_learned_by_its_own_step() -> None:
    m = Elo(k=20.0, advantage_k=4.0)
    m.learn(match(("kelvash",), ("morvenn",), 1.0, 0))  # E = 0.5: advantage 0 + 4 * 0.5
    assert m.advantage_[0] == pytest.approx(2.0)
    p = m.predict(Matchup(first=("tuvrenn",), second=("oskuvar",))).p_win
    assert p == pytest.approx(1.0 / (1.0 + 10.0 ** (-2.0 / 400.0)))


@pytest.mark.parametrize(("edge_logit", "lo", "hi"), [(0.0, -25.0, 25.0), (0.5, 55.0, 120.0)])
def test_learned_advantage_finds_the_simulated_edge(
    edge_logit: float, lo: float, hi: float
) -> None:
    # A logit edge x is x * 400 / ln 10 rating points (0.5 -> 87); strengths spread
    # around it bias a logistic fit toward 0 a little, hence the wide window.
    world = simulate(
        WorldSpec(entities=20, matches=6000, seasons=2, first_edge=edge_logit, seed=21)
    )
    m = Elo()
    m.learn_many(world.events)
    assert lo < m.advantage_[0] < hi


def test_compiled_loop_gives_the_same_numbers_as_plain_python() -> None:
    evs = stream(1, 800)
    fast, slow = Elo(compiled=True), Elo(compiled=False)
    pf, ps = fast.learn_many(evs), slow.learn_many(evs)
    np.testing.assert_array_equal(pf.p_win, ps.p_win)
    np.testing.assert_array_equal(fast.ratings_, slow.ratings_)
    np.testing.assert_array_equal(fast.advantage_, slow.advantage_)
    one = Elo()
    p1 = [one.learn(ev).p_win for ev in evs]
    np.testing.assert_array_equal(pf.p_win, p1)


def test_learn_encoded_needs_known_entities() -> None:
    m = Elo()
    batch = encode_events(stream(2, 5), m.entities_)
    got = m.learn_encoded(batch)
    assert got.p_win.shape == (5,) and m.seen("kelvash") + m.seen("morvenn") > 0
    with pytest.raises(ValueError, match="unknown"):
        m.learn_encoded(encode_events(stream(3, 5), EntityTable(), add=False))


def test_mini_batch_adds_up_the_deltas() -> None:
    m = Elo(k=10.0)
    evs = [match(("kelvash",), ("morvenn",), 1.0, 0), match(("kelvash",), ("tuvrenn",), 1.0, 1)]
    p = m.learn_batch(evs)
    assert list(p.p_win) == [0.5, 0.5]
    assert m.rating("kelvash") == pytest.approx(1510.0)
    assert m.rating("morvenn") == pytest.approx(1495.0)
