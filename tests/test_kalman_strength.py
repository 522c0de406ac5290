"""Gaussian strengths with a full covariance over the active entities."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from scipy import linalg

from streamrate.errors import ConfigError
from streamrate.events import MatchEvent, Matchup
from streamrate.models.bayes_strength import BayesStrength
from streamrate.models.kalman_strength import HEAD, KalmanStrength
from streamrate.models.registry import model_from_state
from streamrate.simulate import WorldSpec, simulate
from streamrate.statefile import state_from_bytes, state_to_bytes

T0 = datetime(2026, 3, 1, tzinfo=UTC)


def duel(a: str, b: str, score: float, day: float = 0.0, **ctx: str) -> MatchEvent:
    return MatchEvent(
        match_id=f"{a}-{b}-{day}-{score}",
        finished_at=T0 + timedelta(days=day),
        first=(a,),
        second=(b,),
        score=score,
        context=dict(ctx),
    )


def _x_of(m: KalmanStrength, ev: MatchEvent) -> np.ndarray:
    x = np.zeros(len(m.z_))
    x[0] = 1.0
    for side, sign in ((ev.first, 1.0), (ev.second, -1.0)):
        for e in side:
            x[HEAD + int(m.slot_of_[m.entities_.get(e)])] += sign / len(side)
    return x


@pytest.mark.parametrize("compiled", [True, False])
def test_one_update_is_the_gaussian_posterior_of_the_quadratic_likelihood(compiled: bool) -> None:
    """Prior N(z, P) times exp(g t - w t^2 / 2), t = x . (s - z): the posterior precision
    is P^-1 + w x x' and its mean z + (P^-1 + w x x')^-1 x g, solved directly here
    (scipy) against the rank-one form the filter uses (derivation in the module)."""
    m = KalmanStrength(noise_per_day=0.0, compiled=compiled)
    names = ["kelvash", "morvenn", "tuvrenn", "oskuvar"]
    rng = np.random.default_rng(3)
    for k in range(30):  # a correlated prior
        a, b = rng.choice(4, size=2, replace=False)
        m.learn(duel(names[a], names[b], float(rng.integers(0, 3)) / 2, day=k))
    ev = duel("kelvash", "tuvrenn", 1.0, day=30)
    z0, p0 = m.z_.copy(), m.cov_.copy()
    used = np.r_[0, 1, HEAD + np.flatnonzero(m.row_of_ >= 0)]
    assert abs(p0[HEAD, HEAD + 1]) > 1e-3  # the prior really has covariances
    x = _x_of(m, ev)
    p = m.learn(ev).p_win
    g, w = 1.0 - p, p * (1.0 - p)
    sub = np.ix_(used, used)
    prec = linalg.inv(p0[sub]) + w * np.outer(x[used], x[used])
    post_cov = linalg.inv(prec)
    post_mean = z0[used] + post_cov @ (x[used] * g)
    np.testing.assert_allclose(m.cov_[sub], post_cov, rtol=0, atol=1e-10)
    np.testing.assert_allclose(m.z_[used], post_mean, rtol=0, atol=1e-10)
    # and the forecast was the probit-widened one of that prior
    m_, v_ = float(z0 @ x), float(x @ p0 @ x)
    assert p == pytest.approx(1.0 / (1.0 + np.exp(-m_ / np.sqrt(1.0 + np.pi * v_ / 8.0))))


def test_a_result_reaches_the_entities_correlated_with_its_sides() -> None:
    """B's loss to C moves A, who met B before: the covariance carries it. The
    diagonal filter cannot (A's mean stays put)."""
    full, diag = KalmanStrength(noise_per_day=0.0), BayesStrength(noise_per_day=0.0)
    for k in range(6):
        for m in (full, diag):
            m.learn(duel("kelvash", "morvenn", 0.5, day=k))
    a_full, a_diag = full.mean_cov(["kelvash"])[0][0], diag.mu_[diag.entities_.get("kelvash")]
    for m in (full, diag):
        m.learn(duel("morvenn", "tuvrenn", 0.0, day=7))  # B loses to a newcomer C
    assert diag.mu_[diag.entities_.get("kelvash")] == a_diag
    assert full.mean_cov(["kelvash"])[0][0] < a_full - 1e-3  # A's draws with B now say less


def test_newcomer_offset_is_taken_in_by_the_linear_map() -> None:
    m = KalmanStrength(newcomer_matches=2, noise_per_day=0.0)
    m.learn(duel("kelvash", "morvenn", 1.0, day=0))
    z0, p0 = m.z_.copy(), m.cov_.copy()
    ev = duel("kelvash", "morvenn", 1.0, day=1)
    x = _x_of(m, ev)
    x[1] = 0.0  # both are new: their offsets cancel in a duel
    p = m.learn(ev).p_win
    g, w = 1.0 - p, p * (1.0 - p)
    u = p0 @ x
    z1 = z0 + u * g / (1 + w * (u @ x))
    p1 = p0 - w * np.outer(u, u) / (1 + w * (u @ x))
    t = np.eye(len(z0))
    for e in ("kelvash", "morvenn"):  # s_j <- s_j + b for both
        t[HEAD + int(m.slot_of_[m.entities_.get(e)]), 1] = 1.0
    np.testing.assert_allclose(m.z_, t @ z1, atol=1e-12)
    np.testing.assert_allclose(m.cov_, t @ p1 @ t.T, atol=1e-12)


def test_compiled_and_plain_agree_with_seasons_newcomers_and_evictions() -> None:
    world = simulate(WorldSpec(entities=30, matches=800, seasons=4, team_size=2, seed=9))
    settings = {"period_field": "season", "period_pull": 0.2, "period_var": 0.05,
                "newcomer_matches": 4, "shared_noise_per_day": 0.001, "max_active": 9,
                "idle_days": 3.0}  # fmt: skip
    fast = KalmanStrength(**settings)  # type: ignore[arg-type]
    slow = KalmanStrength(**settings, compiled=False)  # type: ignore[arg-type]
    pf, ps = fast.learn_many(world.events), slow.learn_many(world.events)
    np.testing.assert_allclose(pf.p_win, ps.p_win, rtol=0, atol=1e-12)
    np.testing.assert_allclose(fast.cov_, slow.cov_, rtol=0, atol=1e-12)
    assert fast.cov_.shape == (HEAD + 9, HEAD + 9)  # bounded, though 30 entities played
    assert len(fast.entities_) > 30  # newcomers arrived each season
    assert np.all(np.linalg.eigvalsh(fast.cov_) > -1e-12)  # still a covariance


def test_an_idle_entity_leaves_with_its_marginal_and_comes_back_humbler() -> None:
    m = KalmanStrength(noise_per_day=0.001, idle_days=30.0)
    for k in range(10):
        m.learn(duel("kelvash", "morvenn", 1.0, day=k))
        m.learn(duel("tuvrenn", "morvenn", 0.5, day=k))
    mean, cov = m.mean_cov(["kelvash"])
    q = Matchup(first=("kelvash",), second=("morvenn",))
    p_before = m.predict(q).p_win
    m.learn(duel("tuvrenn", "morvenn", 0.5, day=50))  # 40 days later: kelvash leaves
    r = m.entities_.get("kelvash")
    assert m.slot_of_[r] == -1
    assert m.mu_[r] == pytest.approx(mean[0]) and m.var_[r] == pytest.approx(cov[0, 0])
    assert 0.5 < m.predict(q).p_win < p_before  # idle: wider, so nearer 0.5


def test_season_change_scales_the_strength_block() -> None:
    m = KalmanStrength(period_field="season", period_pull=0.25, period_var=0.01, noise_per_day=0.0)
    for k in range(5):
        m.learn(duel("kelvash", "morvenn", 1.0, day=k, season="1"))
    names = ["kelvash", "morvenn"]
    mean, cov = m.mean_cov(names)
    m.new_period()
    mean2, cov2 = m.mean_cov(names)
    np.testing.assert_allclose(mean2, 0.75 * mean)
    np.testing.assert_allclose(cov2, 0.5625 * cov + 0.01 * np.eye(2))


def test_state_round_trip_and_a_too_large_match() -> None:
    world = simulate(WorldSpec(entities=12, matches=200, seasons=2, team_size=1, seed=4))
    m = KalmanStrength(max_active=6, idle_days=2.0)
    m.learn_many(world.events[:150])
    copy = model_from_state(state_from_bytes(state_to_bytes(m.to_state()))[0])
    assert isinstance(copy, KalmanStrength)
    a, b = m.learn_many(world.events[150:]), copy.learn_many(world.events[150:])
    np.testing.assert_array_equal(a.p_win, b.p_win)
    big = MatchEvent(match_id="big", finished_at=T0, first=tuple("abcd"), second=tuple("efg"),
                     score=1.0)  # fmt: skip
    before = m.cov_.copy()
    with pytest.raises(ConfigError, match="max_active"):
        m.learn(big)
    np.testing.assert_array_equal(m.cov_, before)


@pytest.mark.parametrize(
    "bad", [{"max_active": 1}, {"max_active": 1025}, {"idle_days": 0.0}, {"period_pull": 1.5}]
)
def test_bad_settings_are_refused_before_any_allocation(bad: dict[str, float]) -> None:
    with pytest.raises(ConfigError, match="kalman_strength"):
        KalmanStrength(**bad)  # type: ignore[arg-type]
