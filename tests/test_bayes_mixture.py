"""Gaussian strengths (variance per entity, idle noise, season pulls) and the
log-loss-weighted mixture of models."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from streamrate.events import MatchEvent, Matchup
from streamrate.models.bayes_strength import (
    PROBIT,
    BayesStrength,
    _strength_loop,
    _strength_loop_compiled,
)
from streamrate.models.mixture import Mixture, member_log_loss
from streamrate.models.registry import model_from_state
from streamrate.simulate import WorldSpec, simulate

T0 = datetime(2026, 3, 1, tzinfo=UTC)


def duel(a: str, b: str, score: float, day: float = 0.0, season: str | None = None) -> MatchEvent:
    return MatchEvent(
        match_id=f"{a}-{b}-{day}-{score}",
        finished_at=T0 + timedelta(days=day),
        first=(a,),
        second=(b,),
        score=score,
        context={} if season is None else {"season": season},
    )


@pytest.mark.parametrize("loop", [_strength_loop, _strength_loop_compiled])
def test_variance_follows_the_conjugate_gaussian_update(loop: object) -> None:
    # One entity (row 0) against a perfectly known opponent (row 1, variance 0) and
    # no advantage: each match is a Gaussian observation of precision w = p (1 - p),
    # so the precision after n matches is 1 / v0 + sum w (conjugate normal update,
    # common practice), and the mean moves by v' g (the posterior variance times
    # the gradient, the Newton step of the Gaussian posterior).
    rng = np.random.default_rng(3)
    n = 40
    first = np.zeros((n, 1), dtype=np.int32)
    second = np.ones((n, 1), dtype=np.int32)
    size = np.ones(n, dtype=np.int32)
    score = rng.choice([0.0, 0.5, 1.0], n)
    mu, var = np.array([0.0, 0.4]), np.array([0.7, 0.0])
    last, adv, out = np.full(2, np.nan), np.zeros(2), np.empty(n)
    v0 = var[0]
    means = []
    mu_before = []
    for i in range(n):  # one event at a time, to see each step
        mu_before.append(mu[0])
        loop(first[i : i + 1], size[:1], second[i : i + 1], size[:1], score[i : i + 1],
             np.zeros(1), mu, var, last, adv, 0.0, 10.0, out[i : i + 1])  # type: ignore[operator]  # fmt: skip
        means.append(mu[0])
    w = out * (1 - out)
    assert var[0] == pytest.approx(1.0 / (1.0 / v0 + w.sum()), rel=1e-12)
    # Widened forecast: sigmoid((mu0 - 0.4) / sqrt(1 + pi v / 8)) with v before the step.
    prec = 1.0 / v0 + np.concatenate([[0.0], np.cumsum(w)[:-1]])
    expect = 1 / (1 + np.exp(-(np.array(mu_before) - 0.4) / np.sqrt(1 + PROBIT / prec)))
    np.testing.assert_allclose(out, expect, rtol=1e-12)
    post = 1.0 / (prec + w)
    np.testing.assert_allclose(np.diff([0.0, *means]), post * (score - out), rtol=1e-9)


def test_compiled_loop_equals_plain_python() -> None:
    world = simulate(WorldSpec(entities=12, matches=600, seasons=3, team_size=2, seed=8))
    fast = BayesStrength(period_field="season", period_pull=0.2, period_var=0.1)
    slow = BayesStrength(period_field="season", period_pull=0.2, period_var=0.1, compiled=False)
    pf, ps = fast.learn_many(world.events), slow.learn_many(world.events)
    np.testing.assert_allclose(pf.p_win, ps.p_win, rtol=0, atol=1e-12)
    np.testing.assert_allclose(fast.var_, slow.var_, rtol=0, atol=1e-12)


def test_idle_entities_drift_toward_one_half() -> None:
    m = BayesStrength(noise_per_day=0.01)
    for k in range(12):
        m.learn(duel("kelvash", "morvenn", 1.0, day=k * 0.5))
    state = m.to_state()
    probs = []
    for idle_days in (1, 10, 50, 200):
        copy = model_from_state(state)
        probs.append(copy.learn(duel("kelvash", "morvenn", 1.0, day=5.5 + idle_days)).p_win)
    assert all(p > 0.5 for p in probs)
    assert probs == sorted(probs, reverse=True) and probs[0] - probs[-1] > 0.02
    # The variance never exceeds the prior, however long the break.
    copy = model_from_state(state)
    copy.learn(duel("kelvash", "morvenn", 1.0, day=10_000.0))
    assert copy.variance("kelvash") <= copy.prior_var


def test_a_new_season_pulls_and_widens_by_hand() -> None:
    m = BayesStrength(period_field="season", period_pull=0.3, period_var=0.1, noise_per_day=0.0)
    m.learn(duel("kelvash", "morvenn", 1.0, season="s01"))
    m.learn(duel("kelvash", "morvenn", 1.0, season="s01"))
    mu = {e: float(m.mu_[m.entities_.get(e)]) for e in ("kelvash", "morvenn")}
    var = {e: m.variance(e) for e in ("kelvash", "morvenn")}
    h, vh = float(m.adv_[0]), float(m.adv_[1])
    got = m.learn(duel("kelvash", "morvenn", 0.0, season="s02")).p_win
    # By hand: means times (1 - 0.3), variances plus 0.1 (below the prior 1.0).
    diff = 0.7 * (mu["kelvash"] - mu["morvenn"]) + h
    spread = var["kelvash"] + 0.1 + var["morvenn"] + 0.1 + vh
    assert got == pytest.approx(1 / (1 + math.exp(-diff / math.sqrt(1 + math.pi / 8 * spread))))
    # The same season again pulls nothing more.
    before = m.mu_.copy()
    m.learn(duel("tuvrenn", "oskuvar", 0.5, season="s02"))
    assert m.mu_[0] == pytest.approx(before[0])


def test_newcomers_get_humbler_probabilities_than_the_settled() -> None:
    m = BayesStrength()
    for k in range(30):
        m.learn(duel("kelvash", f"rookie{k}", 1.0, day=k))
    assert m.variance("kelvash") < 0.3 < m.variance("rookie29")
    settled = m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win
    assert 0.5 < settled < 0.99


def small_mixture() -> Mixture:
    return Mixture(
        members=[
            {"label": "slow", "kind": "elo", "settings": {"k": 8.0}},
            {"label": "fast", "kind": "elo", "settings": {"k": 48.0}},
            {"label": "bayes", "kind": "bayes_strength", "settings": {}},
        ]
    )


@pytest.mark.parametrize("seed", [31, 32])
def test_mixture_is_never_worse_than_its_best_member_by_more_than_ln_n(seed: int) -> None:
    # 'Prediction, Learning, and Games' (2006), chapter 3: exponentially weighted
    # averaging with eta = 1 under an exp-concave loss has regret at most ln N on
    # every prefix of every sequence.
    world = simulate(WorldSpec(entities=30, matches=3000, seasons=3, draw_rate=0.2, seed=seed))
    mix = small_mixture()
    y = world.scores
    mixed, members = [], []
    for chunk in range(0, len(y), 250):
        evs = world.events[chunk : chunk + 250]
        mixed.append(mix.learn_many(evs).expected_score)
        comp = mix.component_predictions(len(evs))
        members.append(np.array([comp[f"mixture.{lb}"].expected_score for lb in mix.labels]))
    e = np.concatenate(mixed)
    member_e = np.concatenate(members, axis=1)
    mix_cum = np.cumsum(member_log_loss(e, y))
    best_cum = np.min(np.cumsum(member_log_loss(member_e, y[None, :]), axis=1), axis=0)
    assert np.all(mix_cum <= best_cum + math.log(3) + 1e-9)
    assert mix.bound_nats == pytest.approx(math.log(3))
    # Weights end on the members that did well.
    totals = member_log_loss(member_e, y[None, :]).sum(axis=1)
    assert int(np.argmax(mix.weights())) == int(np.argmin(totals))


def test_mixture_batch_of_one_and_round_trip() -> None:
    world = simulate(WorldSpec(entities=10, matches=200, seasons=2, seed=33))
    a, b = small_mixture(), small_mixture()
    pa = [a.learn(ev) for ev in world.events[:100]]
    pb = [b.learn_batch([ev])[0] for ev in world.events[:100]]
    np.testing.assert_allclose(np.array(pa), np.array(pb), rtol=1e-12, atol=0)
    copy = model_from_state(a.to_state())
    rest = world.events[100:]
    np.testing.assert_array_equal(a.learn_many(rest).p_win, copy.learn_many(rest).p_win)
    np.testing.assert_array_equal(a.weights(), copy.weights())


def test_mini_batch_predicts_from_the_batch_start_state_without_a_clock() -> None:
    world = simulate(WorldSpec(entities=10, matches=300, team_size=2, seed=34))
    m = BayesStrength(noise_per_day=0.0)
    m.learn_many(world.events[:200])
    evs = world.events[200:260]
    expected = [m.predict(ev).p_win for ev in evs]
    assert list(m.learn_batch(evs).p_win) == expected
