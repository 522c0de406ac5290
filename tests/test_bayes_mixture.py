"""Gaussian strengths (variance per entity, idle noise, season pulls) and the
log-loss-weighted mixture of models."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from streamrate.config import SpaceSettings
from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import ModelState, warm_up
from streamrate.models.bayes_strength import (
    PROBIT,
    BayesStrength,
    _strength_loop,
    _strength_loop_compiled,
)
from streamrate.models.mixture import DEFAULT_MEMBERS, Mixture, member_log_loss
from streamrate.models.registry import build_model, model_from_state
from streamrate.recalibrate import Recalibrated
from streamrate.replica import fastpath
from streamrate.simulate import WorldSpec, simulate
from streamrate.statefile import state_from_bytes, state_to_bytes

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
             np.zeros(1), mu, var, last, adv, 0.0, 10.0, out[i : i + 1],
             np.zeros(2), np.zeros(2), 0.0, np.full(1, np.nan), 0.0)  # type: ignore[operator]  # fmt: skip
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


def test_a_newcomer_offset_is_learned_and_taken_in_by_hand() -> None:
    # Newcomers share one offset b ~ N(mu_b, v_b) for their first n matches; the
    # update is the same diagonal Gaussian step as the entities' (module docstring).
    m = BayesStrength(newcomer_matches=2, newcomer_var=0.5, advantage_var=0.0, noise_per_day=0.0)
    m.learn(duel("kelvash", "morvenn", 1.0))  # both new: x_b = 1 - 1 = 0, b untouched
    assert m.newcomer_.tolist() == [0.0, 0.5]
    mu_k, v_k = float(m.mu_[0]), m.variance("kelvash")
    # kelvash (one match, still new) against the brand-new tuvrenn, kelvash winning.
    got = m.learn(duel("kelvash", "tuvrenn", 1.0)).p_win
    # By hand: x_b = 1 - 1 = 0 again: both are new. Then a settled one against a new one.
    assert got == pytest.approx(1 / (1 + math.exp(-mu_k / math.sqrt(1 + PROBIT * (v_k + 1.0)))))
    assert m.newcomer_.tolist() == [0.0, 0.5]
    # kelvash has now played 2 matches: it took the offset in (0 so far), so it is settled.
    mu_k, v_k = float(m.mu_[0]), m.variance("kelvash")
    m_big_v = v_k + 1.0 + 0.5  # kelvash, the newcomer oskuvar (prior 1.0), and b (x_b = -1)
    theta = mu_k - 0.0 - 0.0
    p = 1 / (1 + math.exp(-theta / math.sqrt(1 + PROBIT * m_big_v)))
    assert m.learn(duel("kelvash", "oskuvar", 0.0)).p_win == pytest.approx(p)
    g, w = 0.0 - p, p * (1 - p)
    denom = 1 + w * m_big_v
    assert m.newcomer_[0] == pytest.approx(0.5 * -1.0 * g / denom)  # newcomers win: b > 0
    assert m.newcomer_[1] == pytest.approx(0.5 * (1 - w * 0.5 / denom))
    assert m.mu_[m.entities_.get("oskuvar")] == pytest.approx(-1.0 * g / denom)
    # oskuvar's second match, against tuvrenn (also new: x_b = 0, b keeps still);
    # afterwards oskuvar takes the offset in: mean plus mu_b, variance plus v_b.
    mb, vb = float(m.newcomer_[0]), float(m.newcomer_[1])
    o, t = m.entities_.get("oskuvar"), m.entities_.get("tuvrenn")
    mu_o, v_o, mu_t, v_t = float(m.mu_[o]), float(m.var_[o]), float(m.mu_[t]), float(m.var_[t])
    big_v = v_t + v_o
    p = 1 / (1 + math.exp(-(mu_t - mu_o) / math.sqrt(1 + PROBIT * big_v)))
    assert m.learn(duel("tuvrenn", "oskuvar", 0.5)).p_win == pytest.approx(p)
    g, w = 0.5 - p, p * (1 - p)
    denom = 1 + w * big_v
    assert m.newcomer_.tolist() == [mb, vb]
    assert m.age_[o] == 2.0
    assert m.mu_[o] == pytest.approx(mu_o - v_o * g / denom + mb)
    assert m.var_[o] == pytest.approx(min(v_o * (1 - w * v_o / denom) + vb, 1.0))


def test_the_shared_parameters_drift_with_the_days_between_events() -> None:
    m = BayesStrength(shared_noise_per_day=0.01, newcomer_matches=3, noise_per_day=0.0)
    m.learn(duel("kelvash", "morvenn", 1.0, day=0.0))
    adv_v, new_v = float(m.adv_[1]), float(m.newcomer_[1])
    # Seven days later the shared variances have grown by 7 x 0.01 before the step.
    m.learn(duel("tuvrenn", "oskuvar", 0.5, day=7.0))
    v_h = adv_v + 0.07
    assert m.newcomer_[1] == pytest.approx(new_v + 0.07)  # x_b = 0: only the drift
    big_v = 1.0 + 1.0 + v_h  # two newcomers at the prior, and the advantage
    m0 = BayesStrength(noise_per_day=0.0, shared_noise_per_day=0.01, newcomer_matches=3)
    m0.learn(duel("kelvash", "morvenn", 1.0, day=0.0))
    p = 1 / (1 + math.exp(-float(m0.adv_[0]) / math.sqrt(1 + PROBIT * big_v)))
    assert m0.learn(duel("tuvrenn", "oskuvar", 0.5, day=7.0)).p_win == pytest.approx(p)
    w = p * (1 - p)
    assert m0.adv_[1] == pytest.approx(v_h * (1 - w * v_h / (1 + w * big_v)))
    # An event at the same instant adds no noise; a later one adds noise times days.
    m2 = model_from_state(m.to_state())
    before = float(m2.newcomer_[1])
    m2.learn(duel("tuvrenn", "oskuvar", 0.5, day=7.0))
    assert float(m2.newcomer_[1]) == pytest.approx(before)


def test_newcomers_and_drift_keep_compiled_plain_and_batch_of_one_equal() -> None:
    world = simulate(WorldSpec(entities=16, matches=500, seasons=3, team_size=2, seed=9))
    settings = {"period_field": "season", "period_pull": 0.2, "newcomer_matches": 4,
                "shared_noise_per_day": 0.001}  # fmt: skip
    fast = BayesStrength(**settings)  # type: ignore[arg-type]
    slow = BayesStrength(**settings, compiled=False)  # type: ignore[arg-type]
    one = BayesStrength(**settings)  # type: ignore[arg-type]
    pf, ps = fast.learn_many(world.events), slow.learn_many(world.events)
    p1 = [one.learn_batch([ev]).p_win[0] for ev in world.events]
    np.testing.assert_allclose(pf.p_win, ps.p_win, rtol=0, atol=1e-12)
    np.testing.assert_allclose(pf.p_win, p1, rtol=0, atol=1e-12)
    np.testing.assert_allclose(fast.newcomer_, one.newcomer_, rtol=0, atol=1e-12)
    assert fast.newcomer_[0] != 0.0


def test_a_version_1_state_loads_with_newcomers_and_drift_off() -> None:
    m = BayesStrength(noise_per_day=0.01)
    m.learn_many([duel("kelvash", "morvenn", 1.0, day=k) for k in range(5)])
    state = m.to_state()
    arrays = {k: v for k, v in state.arrays.items() if k not in ("age", "newcomer", "clock")}
    params = {k: v for k, v in state.params.items()
              if k not in ("newcomer_matches", "newcomer_var", "shared_noise_per_day")}  # fmt: skip
    old = ModelState(state.kind, 1, params, arrays)
    copy = model_from_state(old)
    assert isinstance(copy, BayesStrength)
    assert copy.newcomer_matches == 0 and copy.shared_noise_per_day == 0.0
    ev = duel("kelvash", "morvenn", 0.0, day=9.0)
    assert copy.learn(ev).p_win == pytest.approx(m.learn(ev).p_win, rel=1e-12)


def test_mixture_weights_are_those_of_the_losses_before_each_event() -> None:
    # The vectorised mixing against its definition, event by event.
    world = simulate(WorldSpec(entities=10, matches=300, seasons=2, draw_rate=0.2, seed=35))
    mix = small_mixture()
    got = mix.learn_many(world.events)
    comp = mix.component_predictions(len(world.events))
    e = np.array([comp[f"mixture.{lb}"].expected_score for lb in mix.labels])
    losses = member_log_loss(e, world.scores[None, :])
    cum = np.zeros(3)
    for i in range(len(world.events)):
        w = np.exp(-(cum - cum.min()))
        w /= w.sum()
        assert got.expected_score[i] == pytest.approx(float(w @ np.clip(e[:, i], 1e-9, 1 - 1e-9)))
        cum += losses[:, i]


def test_the_served_default_works_through_the_service_paths() -> None:
    # The default of a model space is the default mixture under a recalibration.
    space = SpaceSettings()
    model = build_model(space.model, **space.model_settings)
    assert isinstance(model, Recalibrated) and isinstance(model.model_, Mixture)
    assert model.model_.members == [dict(m) for m in DEFAULT_MEMBERS]
    warm_up(model)  # every path once on a throwaway copy (kernels compiled)
    world = simulate(WorldSpec(entities=20, matches=900, seasons=3, draw_rate=0.2, seed=36))
    model.learn_many(world.events[:600])
    # The checkpoint blob round trip: the same forecasts afterwards, bit for bit,
    # and the Gaussian members still share one id table (one count per match).
    state, _ = state_from_bytes(state_to_bytes(model.to_state()))
    clone = model_from_state(state)
    assert isinstance(clone, Recalibrated) and isinstance(clone.model_, Mixture)
    tables = {id(m.entities_) for m in clone.model_.models_ if isinstance(m, BayesStrength)}
    assert len(tables) == 1
    rest = world.events[600:]
    np.testing.assert_array_equal(model.learn_many(rest).p_win, clone.learn_many(rest).p_win)
    who = world.events[0].first[0]
    assert clone.seen(who) == model.seen(who) == sum(who in ev.entities() for ev in world.events)
    # In-process readers take the general path for it: the same numbers as predict.
    one = fastpath.single(clone)
    ev = world.events[-1]
    assert one(ev.first, ev.second, {}) == clone.predict(Matchup(first=ev.first, second=ev.second))


@pytest.mark.parametrize("n", [0, 3])
def test_predict_of_unknowns_counts_the_newcomer_offset_only_when_it_is_on(n: int) -> None:
    m = BayesStrength(newcomer_matches=n, newcomer_var=0.4, advantage_var=0.0)
    m.learn(duel("kelvash", "morvenn", 1.0))
    mu = float(m.mu_[m.entities_.get("kelvash")])
    var = m.variance("kelvash")
    # kelvash (new while n > 0, one match) against an unknown: x_b = 1 - 1 = 0 when on.
    got = m.predict(Matchup(first=("kelvash",), second=("ghost",))).p_win
    want = 1 / (1 + math.exp(-mu / math.sqrt(1 + PROBIT * (var + m.prior_var))))
    assert got == pytest.approx(want, rel=1e-12)
    # A settled entity (never new when n = 0) against an unknown: x_b = -1 when on.
    m2 = BayesStrength(newcomer_matches=n, newcomer_var=0.4, advantage_var=0.0)
    for k in range(4):
        m2.learn(duel("kelvash", f"rookie{k}", 1.0))
    mu, var = float(m2.mu_[0]), m2.variance("kelvash")
    b_mu, b_var = (float(m2.newcomer_[0]), float(m2.newcomer_[1])) if n else (0.0, 0.0)
    got = m2.predict(Matchup(first=("kelvash",), second=("ghost",))).p_win
    spread = var + m2.prior_var + b_var
    want = 1 / (1 + math.exp(-(mu - b_mu) / math.sqrt(1 + PROBIT * spread)))
    assert got == pytest.approx(want, rel=1e-12)


def test_the_default_mixture_keeps_its_bound_over_its_members() -> None:
    # The same bound ('Prediction, Learning, and Games', 2006, chapter 3) for the
    # default members, whose Gaussian ones share one id table and one encoding.
    world = simulate(WorldSpec(entities=24, matches=2400, seasons=4, draw_rate=0.25,
                               first_edge=0.35, turnover=0.15, seed=37))  # fmt: skip
    mix = Mixture()
    y = world.scores
    mixed, members = [], []
    for start in range(0, len(y), 64):
        evs = world.events[start : start + 64]
        mixed.append(mix.learn_many(evs).expected_score)
        comp = mix.component_predictions(len(evs))
        members.append(np.array([comp[f"mixture.{lb}"].expected_score for lb in mix.labels]))
    member_e = np.concatenate(members, axis=1)
    mix_cum = np.cumsum(member_log_loss(np.concatenate(mixed), y))
    best_cum = np.min(np.cumsum(member_log_loss(member_e, y[None, :]), axis=1), axis=0)
    assert np.all(mix_cum <= best_cum + mix.bound_nats + 1e-9)
    # Each Gaussian member is what it would be on its own (sharing changes nothing).
    alone = BayesStrength(**DEFAULT_MEMBERS[1]["settings"])
    np.testing.assert_array_equal(alone.learn_many(world.events).p_win, member_e[1])
