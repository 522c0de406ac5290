"""TrueSkill: truncated-Gaussian corrections and updates against independent references."""

from __future__ import annotations

import itertools
import math
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm, truncnorm

from streamrate.events import MatchEvent, Matchup
from streamrate.models.trueskill import TrueSkill, draw_margin, v_draw, v_win, w_draw, w_win

T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)
# The model as published, without the first-side advantage it learns by default.
OFF: dict[str, Any] = {"advantage_sigma": 0.0}
GRID_T = np.linspace(-4.0, 4.0, 17)
GRID_EPS = [0.0, 0.05, 0.3, 1.0]


def match(first: tuple[str, ...], second: tuple[str, ...], score: float, i: int = 0) -> MatchEvent:
    return MatchEvent(
        match_id=f"m-{i}",
        finished_at=T0 + timedelta(minutes=i),
        first=first,
        second=second,
        score=score,
    )


# The corrections of the NIPS 2006 paper 'TrueSkill™: A Bayesian Skill Rating
# System' (the v and w functions of its approximate message passing; from memory)
# are the moments of a standard normal X truncated to the outcome's region of the
# standardised performance difference t + X: a win means t + X > eps, i.e.
# X > eps - t; a draw means |t + X| <= eps, i.e. -eps - t <= X <= eps - t. Then
# v = E[X | region] and w = 1 - Var[X | region]; scipy.stats.truncnorm gives both.
@pytest.mark.parametrize("eps", GRID_EPS)
def test_win_corrections_are_truncated_normal_moments(eps: float) -> None:
    for t in GRID_T:
        ref = truncnorm(eps - t, np.inf)
        assert v_win(t, eps) == pytest.approx(ref.mean(), rel=1e-9, abs=1e-12)
        assert w_win(t, eps) == pytest.approx(1.0 - ref.var(), rel=1e-8, abs=1e-10)


@pytest.mark.parametrize("eps", [e for e in GRID_EPS if e > 0])
def test_draw_corrections_are_two_sided_truncated_moments(eps: float) -> None:
    for t in GRID_T:
        ref = truncnorm(-eps - t, eps - t)
        assert v_draw(t, eps) == pytest.approx(ref.mean(), rel=1e-8, abs=1e-10)
        assert w_draw(t, eps) == pytest.approx(1.0 - ref.var(), rel=1e-7, abs=1e-9)


@settings(max_examples=200, deadline=None)
@given(t=st.floats(-60.0, 60.0), eps=st.floats(0.0, 5.0))
def test_corrections_stay_finite_and_in_range_far_in_the_tails(t: float, eps: float) -> None:
    for v, w in ((v_win(t, eps), w_win(t, eps)), (v_draw(t, eps), w_draw(t, eps))):
        assert math.isfinite(v) and 0.0 <= w <= 1.0
    # A very surprising win moves the mean by about the surprise itself (v ~ eps - t).
    if t - eps < -8:
        assert v_win(t, eps) == pytest.approx(eps - t, rel=0.02)


def test_draw_margin_gives_the_draw_probability_between_equals() -> None:
    # Same paper (draw margin; from memory): for equal skills
    # P(draw) = 2 Phi(eps / (sqrt(n1 + n2) beta)) - 1.
    eps = draw_margin(0.1, 2, 25.0 / 6.0)
    assert 2.0 * norm.cdf(eps / (math.sqrt(2) * 25.0 / 6.0)) - 1.0 == pytest.approx(0.1)
    # The model's prediction for two perfectly known equals reproduces it.
    m = TrueSkill(sigma=1e-9, **OFF)
    p = m.predict(Matchup(first=("kelvash",), second=("morvenn",)))
    assert p.p_draw == pytest.approx(0.1, abs=1e-9)
    assert p.p_win == pytest.approx(0.45, abs=1e-9)


def _reference_one_on_one(
    mu1: float,
    s1: float,
    mu2: float,
    s2: float,
    outcome: str,
    beta: float,
    tau: float,
    p_draw: float,
) -> tuple[float, float, float, float]:
    """Update equations of the NIPS 2006 TrueSkill paper for one player against one,
    written out independently of the model: tau added first, then
    mu += sigma^2 / c * v, sigma^2 *= 1 - sigma^2 / c^2 * w with c^2 = 2 beta^2 + sum sigma^2.
    The corrections come from scipy's truncated normal moments."""
    v1, v2 = s1**2 + tau**2, s2**2 + tau**2
    c = math.sqrt(2 * beta**2 + v1 + v2)
    eps = norm.ppf((p_draw + 1) / 2) * math.sqrt(2) * beta / c
    if outcome == "draw":
        t = (mu1 - mu2) / c
        ref = truncnorm(-eps - t, eps - t)
        sign1 = 1.0
    else:
        winner_first = outcome == "first"
        t = (mu1 - mu2) / c if winner_first else (mu2 - mu1) / c
        ref = truncnorm(eps - t, np.inf)
        sign1 = 1.0 if winner_first else -1.0
    v, w = ref.mean(), 1.0 - ref.var()
    return (
        mu1 + sign1 * v1 / c * v,
        v1 * (1 - v1 / c**2 * w),
        mu2 - sign1 * v2 / c * v,
        v2 * (1 - v2 / c**2 * w),
    )


@pytest.mark.parametrize(("outcome", "score"), [("first", 1.0), ("second", 0.0), ("draw", 0.5)])
def test_one_on_one_update_matches_the_paper_equations(outcome: str, score: float) -> None:
    m = TrueSkill(**OFF)
    m.learn(match(("kelvash",), ("oskuvar",), 1.0, 0))  # make kelvash and morvenn differ
    m.learn(match(("morvenn",), ("bravik",), 0.0, 1))
    (mu1, s1), (mu2, s2) = m.belief("kelvash"), m.belief("morvenn")
    m.learn(match(("kelvash",), ("morvenn",), score, 2))
    want = _reference_one_on_one(mu1, s1, mu2, s2, outcome, 25 / 6, 25 / 300, 0.1)
    got = (
        m.belief("kelvash")[0],
        m.belief("kelvash")[1] ** 2,
        m.belief("morvenn")[0],
        m.belief("morvenn")[1] ** 2,
    )
    assert got == pytest.approx(want, rel=1e-9)


def test_teams_share_the_performance_variance() -> None:
    # Two against one: c^2 = 3 beta^2 + sum of all three variances (same paper:
    # a team's performance is the sum of its members' performances).
    m = TrueSkill(tau=0.0, **OFF)
    m.learn(match(("kelvash", "tuvrenn"), ("morvenn",), 1.0))
    c = math.sqrt(3 * (25 / 6) ** 2 + 3 * (25 / 3) ** 2)
    eps = norm.ppf(0.55) * math.sqrt(3) * 25 / 6 / c
    t = (50.0 - 25.0) / c
    ref = truncnorm(eps - t, np.inf)
    assert m.belief("kelvash")[0] == pytest.approx(25 + (25 / 3) ** 2 / c * ref.mean(), rel=1e-9)
    assert m.belief("morvenn")[0] == pytest.approx(25 - (25 / 3) ** 2 / c * ref.mean(), rel=1e-9)
    assert m.belief("kelvash") == m.belief("tuvrenn")


def test_mini_batch_of_separate_matches_equals_learning_them_one_by_one() -> None:
    # With the advantage off: a learned advantage joins every match, so the second
    # match of a batch sees the batch-start advantage, not the one after the first.
    evs = [match(("kelvash",), ("morvenn",), 1.0, 0), match(("tuvrenn",), ("oskuvar",), 0.5, 1)]
    a, b = TrueSkill(**OFF), TrueSkill(**OFF)
    a.learn_batch(evs)
    for ev in evs:
        b.learn(ev)
    for name in ("kelvash", "morvenn", "tuvrenn", "oskuvar"):
        assert a.belief(name) == pytest.approx(b.belief(name), rel=1e-12)


def test_a_player_who_beats_everyone_climbs() -> None:
    m = TrueSkill()
    mus = []
    for i, other in enumerate(["morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"] * 4):
        m.learn(match(("kelvash",), (other,), 1.0, i))
        mus.append(m.belief("kelvash")[0])
    assert all(b > a for a, b in itertools.pairwise(mus))
    assert m.belief("kelvash")[1] < 25 / 3
    assert m.predict(Matchup(first=("kelvash",), second=("sable",))).p_win > 0.8
