"""Gaussian strengths that learn from margins (streamrate/models/margin_strength.py)."""

from __future__ import annotations

import math
import random
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from streamrate.events import MatchEvent
from streamrate.models.bayes_strength import BayesStrength
from streamrate.models.margin_strength import (
    KNOBS,
    PROBIT,
    MarginStrength,
    _margin_loop,
    _margin_loop_compiled,
)
from streamrate.models.registry import model_from_state

T0 = datetime(2026, 3, 1, tzinfo=UTC)
NAMES = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"]


def stream(seed: int, n: int, margins: bool) -> list[MatchEvent]:
    """Quillrock matches over four seasons: duels and pairs, draws, margins that agree."""
    rng = random.Random(seed)
    out = []
    for i in range(n):
        size = rng.choice([1, 1, 2])
        people = rng.sample(NAMES[: 4 + 2 * (i > n // 3)], 2 * size)  # newcomers arrive
        score = rng.choice([0.0, 0.5, 1.0])
        margin = {0.0: -rng.randint(1, 4), 0.5: 0, 1.0: rng.randint(1, 4)}[score]
        out.append(
            MatchEvent(
                match_id=f"q-{i}",
                finished_at=T0 + timedelta(days=i * rng.uniform(0.0, 3.0)),
                first=tuple(people[:size]),
                second=tuple(people[size:]),
                score=score,
                context={"season": str(i * 4 // n)},
                margin=float(margin) if margins and rng.random() < 0.8 else None,
            )
        )
    return out


SETTINGS = {
    "prior_var": 0.6,
    "noise_per_day": 0.01,
    "period_field": "season",
    "period_pull": 0.2,
    "period_var": 0.05,
    "newcomer_matches": 3,
    "shared_noise_per_day": 0.001,
}


def _knobs(**over: float) -> np.ndarray:
    base = {
        "noise_per_day": 0.0,
        "prior_var": 10.0,
        "newcomer_matches": 0.0,
        "shared_noise_per_day": 0.0,
        "margin_scale": 1.3,
        "margin_var": 2.5,
        "margin_prior_weight": 100.0,
        "margin_memory": 1e9,
        "margin_weight": 0.8,
        "result_with_margin": 0.0,
        "margin_cap": 1e9,
    }
    base.update(over)
    return np.array([base[k] for k in KNOBS])


@pytest.mark.parametrize("loop", [_margin_loop, _margin_loop_compiled])
def test_a_margin_is_the_kalman_update_of_a_gaussian_observation(loop: object) -> None:
    # A team of rows 0 and 1 against row 2, with the advantage: theta = x . z with
    # z = (h, s0, s1, s2), x = (1, 1/2, 1/2, -1). A margin d = c theta + e, e ~ N(0, r / w),
    # observed under the prior N(mu, diag(v)) has the exact Gaussian posterior
    # P' = (P^-1 + c^2 x x' w / r)^-1, z' = P' (P^-1 z + c x d w / r) (linear-Gaussian
    # conditioning, common practice), solved here with numpy. Diagonal prior: the means
    # are exact and the variances are the diagonal of P'.
    mu, var = np.array([0.3, -0.2, 0.5]), np.array([0.4, 0.25, 0.6])
    shared = np.array([0.15, 0.05, 0.0, 0.0, math.nan])
    knobs = _knobs()
    c, r, w, d = 1.3, 2.5, 0.8, 3.0
    z = np.array([shared[0], *mu])
    p_prior = np.diag([shared[1], *var])
    x = np.array([1.0, 0.5, 0.5, -1.0])
    post = np.linalg.inv(np.linalg.inv(p_prior) + np.outer(x, x) * c * c * w / r)
    z_post = post @ (np.linalg.solve(p_prior, z) + x * c * d * w / r)
    out = np.empty(1)
    loop(  # type: ignore[operator]
        np.array([[0, 1]], dtype=np.int32),
        np.array([2], dtype=np.int32),
        np.array([[2, -1]], dtype=np.int32),
        np.array([1], dtype=np.int32),
        np.array([1.0]),
        np.array([d]),
        np.array([100.0]),
        mu,
        var,
        np.full(3, np.nan),
        np.zeros(3),
        shared,
        np.zeros(4),
        knobs,
        out,
    )
    np.testing.assert_allclose([shared[0], *mu], z_post, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose([shared[1], *var], np.diag(post), rtol=1e-12, atol=1e-14)
    m, big_v = float(x @ z), float(x @ p_prior @ x)  # the forecast came first
    assert out[0] == pytest.approx(1.0 / (1.0 + math.exp(-m / math.sqrt(1 + PROBIT * big_v))))


def test_the_margin_scale_and_noise_are_learned_from_the_moments() -> None:
    # Known strengths (variance 0: nothing moves them) so that m is the true logit and
    # V = 0: the running moments give back c (a regression through the origin) and r.
    rng = np.random.default_rng(5)
    n, c_true, r_true = 4000, 1.7, 2.2
    rows = rng.integers(0, 5, size=(n, 2))
    rows[:, 1] = (rows[:, 0] + 1 + rng.integers(0, 4, n)) % 5
    mu = np.array([-1.0, -0.4, 0.0, 0.5, 1.2])
    theta = 0.3 + mu[rows[:, 0]] - mu[rows[:, 1]]
    d = c_true * theta + rng.normal(0.0, math.sqrt(r_true), n)
    score = np.where(d > 0, 1.0, 0.0)
    shared = np.array([0.3, 0.0, 0.0, 0.0, math.nan])
    moments = np.zeros(4)
    _margin_loop_compiled(
        rows[:, :1].astype(np.int32).copy(),
        np.ones(n, dtype=np.int32),
        rows[:, 1:].astype(np.int32).copy(),
        np.ones(n, dtype=np.int32),
        score,
        d,
        np.zeros(n),
        mu.copy(),
        np.zeros(5),
        np.full(5, np.nan),
        np.zeros(5),
        shared,
        moments,
        _knobs(margin_prior_weight=1.0, margin_scale=1.0, margin_var=1.0),
        np.empty(n),
    )
    m = MarginStrength(margin_prior_weight=1.0, margin_scale=1.0, margin_var=1.0)
    m.moments_ = moments
    c, r = m.margin_model()
    assert c == pytest.approx(c_true, rel=0.05)
    assert r == pytest.approx(r_true, rel=0.1)


def test_without_margins_it_is_bayes_strength() -> None:
    evs = stream(1, 300, margins=False)
    a, b = MarginStrength(**SETTINGS), BayesStrength(**SETTINGS)  # type: ignore[arg-type]
    pa, pb = a.learn_many(evs), b.learn_many(evs)
    np.testing.assert_allclose(pa.p_win, pb.p_win, rtol=1e-12)
    n = len(a.entities_)
    np.testing.assert_allclose(a.mu_[:n], b.mu_[:n], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(a.var_[:n], b.var_[:n], rtol=1e-12)
    assert a.moments_.tolist() == [0.0] * 4  # no margin seen, nothing learned about them


def test_margins_change_the_forecasts_and_a_wider_margin_moves_further() -> None:
    def after(margin: float | None, cap: float = 1e9) -> float:
        m = MarginStrength(result_with_margin=False, margin_cap=cap)
        m.learn(
            MatchEvent(
                match_id="q-1",
                finished_at=T0,
                first=("kelvash",),
                second=("morvenn",),
                score=1.0,
                margin=margin,
            )
        )
        return float(m.mu_[m.entities_.get("kelvash")])

    assert 0.0 < after(1.0) < after(3.0) < after(6.0)
    assert after(None) > 0.0  # the result alone
    assert after(6.0, cap=2.0) == after(2.0)


def test_compiled_and_plain_loops_agree_and_the_state_round_trips() -> None:
    evs = stream(2, 400, margins=True)
    fast = MarginStrength(**SETTINGS)  # type: ignore[arg-type]
    slow = MarginStrength(**SETTINGS, compiled=False)  # type: ignore[arg-type]
    pf = fast.learn_many(evs[:300])
    ps = [slow.learn(ev).p_win for ev in evs[:300]]
    np.testing.assert_allclose(pf.p_win, ps, rtol=1e-12)
    np.testing.assert_allclose(fast.moments_, slow.moments_, rtol=1e-12)
    assert fast.moments_[0] > 0
    loaded = model_from_state(fast.to_state())
    assert isinstance(loaded, MarginStrength)
    np.testing.assert_array_equal(
        loaded.learn_many(evs[300:]).p_win, fast.learn_many(evs[300:]).p_win
    )
