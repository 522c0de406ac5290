"""Per-entity uncertainty of the matchup models' strengths: the update, time, state."""

from __future__ import annotations

import itertools
import math
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import ModelState
from streamrate.models.matchup import BladeChest, BradleyTerry
from streamrate.models.registry import model_from_state

T0 = datetime(2026, 3, 1, tzinfo=UTC)


def _ev(k: int, first: tuple[str, ...], second: tuple[str, ...], score: float,
        days: float = 0.0) -> MatchEvent:  # fmt: skip
    return MatchEvent(match_id=f"m{k}", finished_at=T0 + timedelta(days=days, minutes=k),
                      first=first, second=second, score=score)  # fmt: skip


def _sigmoid(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


@pytest.mark.parametrize("backend", ["numba", "numpy"])
@pytest.mark.parametrize(("first", "second", "score"), [
    (("kelvash",), ("morvenn",), 1.0),
    (("kelvash", "bravik"), ("morvenn",), 0.0),
    (("kelvash", "bravik"), ("morvenn", "tuvrenn", "oskuvar"), 0.5),
])  # fmt: skip
def test_one_update_matches_the_gaussian_posterior_by_matrix_inverse(
    backend: str, first: tuple[str, ...], second: tuple[str, ...], score: float
) -> None:
    # Reference (our derivation in streamrate/models/matchup.py, in the spirit of
    # 'A Bayesian Approximation Method for Online Ranking', JMLR 2011): prior N(0, v0 I),
    # the widened log likelihood l(mu) = y ln p + (1-y) ln(1-p), p = sigmoid(kappa x.mu),
    # replaced by its second-order expansion at the prior mean; the Gaussian posterior is
    # then computed here by inverting the precision matrix (no rank-one formula), and
    # its diagonal must equal the model's variances, its mean the model's strengths.
    v0 = 0.7
    m = BradleyTerry(prior_var=v0, l2=0.0, advantage=False, backend=backend)
    m.learn(_ev(0, first, second, score))
    x = np.array([1 / len(first)] * len(first) + [-1 / len(second)] * len(second))
    kappa = 1.0 / math.sqrt(1.0 + math.pi * v0 * float(x @ x) / 8.0)
    p = _sigmoid(0.0)
    grad = kappa * (score - p) * x
    curv = kappa**2 * p * (1 - p)
    post = np.linalg.inv(np.eye(len(x)) / v0 + curv * np.outer(x, x))
    mean = post @ grad
    names = first + second
    got_v = [m.strength_variance(e) for e in names]
    got_m = [m.vectors(e)[0] for e in names]  # type: ignore[index]
    np.testing.assert_allclose(got_v, np.diag(post), rtol=1e-6)
    np.testing.assert_allclose(got_m, mean, rtol=1e-6, atol=1e-7)


def test_one_entity_against_a_sure_opponent_is_the_conjugate_update() -> None:
    # Against an opponent whose variance is (almost) zero the update is the conjugate
    # Gaussian one with observation precision w = kappa^2 p (1 - p): 1/v' = 1/v + w
    # (common practice: Laplace approximation of one logistic observation).
    m = BradleyTerry(prior_var=2.0, advantage=False, l2=0.0, noise_per_day=0.0)
    m.learn(_ev(0, ("anchor",), ("other",), 1.0))
    m.acc_[m.entities_.get("anchor"), 0] = 0.0  # the anchor is now known for sure
    m.learn(_ev(1, ("kelvash",), ("anchor",), 1.0))
    mu_a = m.vectors("anchor")[0]  # type: ignore[index]
    v, va = 2.0, m.strength_variance("anchor")
    assert va == 0.0
    kappa = 1.0 / math.sqrt(1.0 + math.pi * (v + va) / 8.0)
    p = _sigmoid(kappa * (0.0 - mu_a))
    w = kappa**2 * p * (1 - p)
    assert m.strength_variance("kelvash") == pytest.approx(1.0 / (1.0 / v + w), rel=1e-6)


@pytest.mark.parametrize("backend", ["numba", "numpy"])
def test_an_idle_entity_drifts_toward_even_odds(backend: str) -> None:
    def p_after_idle(days: float, uncertainty: bool) -> float:
        m = BladeChest(dims=2, noise_per_day=1e-3, prior_var=1.0, uncertainty=uncertainty,
                       backend=backend,
                       advantage=False)  # fmt: skip
        for k in range(30):
            m.learn(_ev(k, ("kelvash",), ("morvenn",), 1.0))
        m.learn(_ev(99, ("bravik",), ("tuvrenn",), 1.0, days=days))  # the clock moves on
        return m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win

    ps = [p_after_idle(d, True) for d in (0.0, 10.0, 50.0, 200.0)]
    assert all(a > b > 0.5 for a, b in itertools.pairwise(ps))
    # without uncertainty the idle time changes nothing (so the test can fail)
    flat = [p_after_idle(d, False) for d in (0.0, 200.0)]
    assert flat[0] == flat[1]


def test_a_newcomer_is_humbler_than_a_known_entity() -> None:
    m = BradleyTerry()
    for k in range(40):
        m.learn(_ev(k, ("kelvash",), ("morvenn",), float(k % 4 != 0)))
    m.sc_[0] = 0.0  # no first-side advantage, to compare strengths alone
    known = m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win
    m.own_[m.entities_.get("morvenn"), 0] = 0.0  # a known zero strength ...
    vs_known = m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win
    vs_new = m.predict(Matchup(first=("kelvash",), second=("stranger",))).p_win
    assert known > vs_known > vs_new > 0.5  # ... is surer than an unknown one


def test_a_version_2_state_loads_with_uncertainty_off() -> None:
    old = BladeChest(dims=2, uncertainty=False)
    for k in range(20):
        old.learn(_ev(k, ("kelvash",), ("morvenn",), float(k % 3 != 0)))
    st = old.to_state()
    params = {k: v for k, v in st.params.items()
              if k not in ("uncertainty", "prior_var", "noise_per_day")}  # fmt: skip
    arrays = {k: v for k, v in st.arrays.items() if k != "last_s"}
    back = model_from_state(ModelState(st.kind, 2, params, arrays))
    assert isinstance(back, BladeChest) and not back.uncertainty
    q = Matchup(first=("kelvash",), second=("morvenn",))
    assert back.predict(q) == old.predict(q)
    fresh = model_from_state(BladeChest(dims=2).to_state())
    assert isinstance(fresh, BladeChest) and fresh.uncertainty


# -- vector uncertainty: one variance per blade and per chest --------------------------


def _known_pair(backend: str, v: float, dims: int = 3) -> tuple[BladeChest, int, int]:
    """A model where kelvash and morvenn have rows and random vectors, all variances 0."""
    m = BladeChest(dims=dims, strength=False, uncertainty=False, vector_uncertainty=True,
                   vector_noise_per_day=0.0, advantage=False, l2=0.0, context="none",
                   init_scale=0.8, backend=backend, vector_prior_var=v)  # fmt: skip
    m.learn(_ev(0, ("kelvash",), ("morvenn",), 1.0))
    ra, rb = m.entities_.get("kelvash"), m.entities_.get("morvenn")
    m.acc_[[ra, rb], 0] = 0.0
    m.acc_[[ra, rb], dims] = 0.0
    return m, ra, rb


@pytest.mark.parametrize("backend", ["numba", "numpy"])
@pytest.mark.parametrize("score", [1.0, 0.0, 0.5])
def test_one_uncertain_blade_is_the_laplace_update_of_a_linear_gaussian_model(
    backend: str, score: float
) -> None:
    # With every other vector known for sure, the logit a_A . c_B - a_B . c_A is linear in
    # the first side's blade a_A, so the model is a logistic regression with Gaussian prior
    # N(m, v I) on a_A. Reference (common practice: Laplace approximation of one logistic
    # observation, expanded at the prior mean, with the probit-widened likelihood): the
    # precision P = I / v + w c_B c_B', w = kappa^2 p (1 - p), kappa = 1/sqrt(1 + pi v|c_B|^2/8);
    # the mean m + P^-1 g with g = kappa (y - p) c_B, solved here with numpy. The model keeps
    # one variance for the blade: its precision is the average of P's diagonal, d / tr(P).
    d, v = 3, 0.75  # exact in the float32 state
    m, ra, rb = _known_pair(backend, v, d)
    m.acc_[ra, 0] = v  # only the first side's blade is uncertain
    own = m.own_.astype(np.float64)
    a_a, c_a, a_b, c_b = own[ra, :d], own[ra, d:], own[rb, :d], own[rb, d:]
    theta = float(a_a @ c_b - a_b @ c_a)
    kappa = 1.0 / math.sqrt(1.0 + math.pi * v * float(c_b @ c_b) / 8.0)
    p = _sigmoid(kappa * theta)
    got_p = m.learn(_ev(1, ("kelvash",), ("morvenn",), score)).p_win
    assert got_p == pytest.approx(p, rel=1e-12)
    w = kappa**2 * p * (1 - p)
    prec = np.eye(d) / v + w * np.outer(c_b, c_b)
    mean = a_a + np.linalg.solve(prec, kappa * (score - p) * c_b)
    after = m.own_.astype(np.float64)
    np.testing.assert_allclose(after[ra, :d], mean, rtol=1e-6, atol=1e-7)
    assert m.vector_variances("kelvash") == pytest.approx((d / np.trace(prec), 0.0), rel=1e-6)
    # everything known for sure stays where it was
    np.testing.assert_array_equal(after[ra, d:], own[ra, d:])
    np.testing.assert_array_equal(after[rb], own[rb])
    assert m.vector_variances("morvenn") == (0.0, 0.0)


@pytest.mark.parametrize("backend", ["numba", "numpy"])
def test_the_forecast_variance_is_the_exact_variance_of_the_inner_product(backend: str) -> None:
    # With the first side's blade (variance u) and the second side's chest (variance r)
    # uncertain and independent, a_A . c_B has variance |c_B|^2 u + |a_A|^2 r + d u r
    # ('On the Exact Variance of Products', JASA 1960, summed over d independent terms).
    # The model's p_win = sigmoid(theta / sqrt(1 + pi V / 8)) is inverted for V.
    d, u, r = 4, 0.375, 0.875  # exact in the float32 state
    m, ra, rb = _known_pair(backend, 1.0, d)
    m.acc_[ra, 0], m.acc_[rb, d] = u, r
    own = m.own_.astype(np.float64)
    a_a, c_a, a_b, c_b = own[ra, :d], own[ra, d:], own[rb, :d], own[rb, d:]
    theta = float(a_a @ c_b - a_b @ c_a)
    want_v = float(c_b @ c_b) * u + float(a_a @ a_a) * r + d * u * r
    p = m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win
    kappa = math.log(p / (1 - p)) / theta
    got_v = (1.0 / kappa**2 - 1.0) * 8.0 / math.pi
    assert got_v == pytest.approx(want_v, rel=1e-8)


@pytest.mark.parametrize("backend", ["numba", "numpy"])
def test_an_idle_entity_drifts_toward_even_odds_through_its_vectors(backend: str) -> None:
    def p_after_idle(days: float, noise: float) -> float:
        m = BladeChest(dims=2, strength=False, uncertainty=False, vector_uncertainty=True,
                       vector_noise_per_day=noise, vector_prior_var=1.0, advantage=False,
                       context="none", backend=backend)  # fmt: skip
        for k in range(30):
            m.learn(_ev(k, ("kelvash",), ("morvenn",), 1.0))
        m.learn(_ev(99, ("bravik",), ("tuvrenn",), 1.0, days=days))  # the clock moves on
        return m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win

    ps = [p_after_idle(d, 1e-3) for d in (0.0, 10.0, 50.0, 200.0)]  # under the cap
    assert all(a > b > 0.5 for a, b in itertools.pairwise(ps))
    # without process noise the idle time changes nothing (so the test can fail)
    flat = [p_after_idle(d, 0.0) for d in (0.0, 200.0)]
    assert flat[0] == flat[1]


def test_vector_variances_shrink_with_evidence_and_start_at_the_prior() -> None:
    m = BladeChest(dims=3, vector_uncertainty=True, vector_prior_var=0.5, init_scale=0.5)
    m.learn(_ev(0, ("kelvash",), ("morvenn",), 1.0))
    first = m.vector_variances("kelvash")
    assert first is not None and all(0.0 < x < 0.5 for x in first)
    for k in range(1, 40):
        m.learn(_ev(k, ("kelvash",), ("morvenn",), float(k % 3 != 0)))
    later = m.vector_variances("kelvash")
    assert later is not None and all(b < a for a, b in zip(first, later, strict=True))
    assert m.vector_variances("stranger") is None
    assert BladeChest(dims=3).vector_variances("kelvash") is None


def test_a_version_3_state_loads_with_vector_uncertainty_off() -> None:
    old = BladeChest(dims=2)
    for k in range(20):
        old.learn(_ev(k, ("kelvash",), ("morvenn",), float(k % 3 != 0), days=k))
    st = old.to_state()
    params = {k: v for k, v in st.params.items() if not k.startswith("vector_")}
    back = model_from_state(ModelState(st.kind, 3, params, st.arrays))
    assert isinstance(back, BladeChest) and not back.vector_uncertainty and back.uncertainty
    q = Matchup(first=("kelvash",), second=("morvenn",))
    assert back.predict(q) == old.predict(q)
    on = BladeChest(dims=2, vector_uncertainty=True, vector_prior_var=0.2)
    on.learn(_ev(0, ("kelvash",), ("morvenn",), 1.0))
    again = model_from_state(on.to_state())
    assert isinstance(again, BladeChest) and again.vector_uncertainty
    assert again.vector_variances("kelvash") == on.vector_variances("kelvash")
    assert again.predict(q) == on.predict(q)
