"""Glicko-2 against the published worked example, and its online period rules."""

from __future__ import annotations

import itertools
import math
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from streamrate.encode import EntityTable
from streamrate.events import MatchEvent
from streamrate.models.base import ModelState
from streamrate.models.glicko2 import SCALE, Glicko2, g, new_volatility, rate_period
from streamrate.models.registry import model_from_state

T0 = datetime(2026, 3, 1, 18, 0, tzinfo=UTC)

# 'Example of the Glicko-2 system' (the published description of Glicko-2), its
# worked example (numbers from memory, the document not at hand): a player rated
# 1500, RD 200, volatility 0.06, tau = 0.5, plays opponents 1400/30, 1550/100,
# 1700/300 and wins, loses, loses.
OPPONENTS = [(1400.0, 30.0, 1.0), (1550.0, 100.0, 0.0), (1700.0, 300.0, 0.0)]


def match(first: str, second: str, score: float, minutes: float = 0.0) -> MatchEvent:
    return MatchEvent(
        match_id=f"m-{first}-{second}-{minutes}",
        finished_at=T0 + timedelta(minutes=minutes),
        first=(first,),
        second=(second,),
        score=score,
    )


def test_worked_example_step_by_step() -> None:
    mu, phi = 0.0, 200.0 / SCALE
    opp_mu = [(r - 1500.0) / SCALE for r, _, _ in OPPONENTS]
    opp_phi = [rd / SCALE for _, rd, _ in OPPONENTS]
    scores = [s for _, _, s in OPPONENTS]
    # Intermediate quantities printed in the example: g = 0.9955, 0.9531, 0.7242;
    # v = 1.7785; Delta = -0.4834. The example computes them from E values rounded
    # to three decimals (0.639, 0.432, 0.303), so unrounded arithmetic lands within
    # 1e-3 of the printed numbers, not 1e-4.
    assert [round(g(p), 4) for p in opp_phi] == pytest.approx([0.9955, 0.9531, 0.7242])
    es = [1.0 / (1.0 + math.exp(-g(p) * (mu - m))) for m, p in zip(opp_mu, opp_phi, strict=True)]
    v = 1.0 / sum(g(p) ** 2 * e * (1 - e) for p, e in zip(opp_phi, es, strict=True))
    delta = v * sum(g(p) * (s - e) for p, s, e in zip(opp_phi, scores, es, strict=True))
    assert [round(e, 3) for e in es] == [0.639, 0.432, 0.303]
    assert v == pytest.approx(1.7785, abs=1e-3)
    assert delta == pytest.approx(-0.4834, abs=1e-3)
    # New volatility 0.05999 (the example's step 5).
    assert new_volatility(phi, 0.06, delta, v, 0.5) == pytest.approx(0.05999, abs=1e-5)
    # Final result: rating 1464.06, RD 151.52. The example rounds its intermediate
    # values to four decimals; unrounded arithmetic gives 1464.0507, inside 0.01.
    mu2, phi2, sigma2 = rate_period(mu, phi, 0.06, opp_mu, opp_phi, scores, tau=0.5)
    assert 1500.0 + SCALE * mu2 == pytest.approx(1464.06, abs=0.01)
    assert SCALE * phi2 == pytest.approx(151.52, abs=0.01)
    assert sigma2 == pytest.approx(0.05999, abs=1e-5)


def _state_with(ratings: dict[str, tuple[float, float, float]]) -> ModelState:
    table = EntityTable()
    for name in ratings:
        table.row(name)
    arrays = table.to_arrays()
    vals = list(ratings.values())
    arrays["mu"] = np.array([(r - 1500.0) / SCALE for r, _, _ in vals])
    arrays["phi"] = np.array([rd / SCALE for _, rd, _ in vals])
    arrays["sigma"] = np.array([s for _, _, s in vals])
    arrays["last_s"] = np.full(len(vals), np.nan)
    return ModelState("glicko2", 1, Glicko2(tau=0.5).get_params(), arrays)


def test_worked_example_as_one_mini_batch() -> None:
    # The same example through the model: a mini-batch is one rating period.
    names = ["morvenn", "tuvrenn", "oskuvar"]
    state = _state_with(
        {"kelvash": (1500.0, 200.0, 0.06)}
        | {n: (r, rd, 0.06) for n, (r, rd, _) in zip(names, OPPONENTS, strict=True)}
    )
    m = model_from_state(state)
    assert isinstance(m, Glicko2)
    evs = [
        match("kelvash", n, s, i)
        for i, (n, (_, _, s)) in enumerate(zip(names, OPPONENTS, strict=True))
    ]
    m.learn_batch(evs)
    rating, rd, vol = m.rating("kelvash")
    assert rating == pytest.approx(1464.06, abs=0.01)  # same source as above
    assert rd == pytest.approx(151.52, abs=0.01)
    assert vol == pytest.approx(0.05999, abs=1e-5)
    assert m.seen("kelvash") == 3


def test_empty_period_only_grows_the_deviation() -> None:
    # Step 6 of the published description for a player who does not compete:
    # phi' = sqrt(phi^2 + sigma^2), rating and volatility unchanged.
    mu, phi, sigma = rate_period(0.3, 0.5, 0.06, [], [], [])
    assert (mu, sigma) == (0.3, 0.06)
    assert phi == pytest.approx(math.sqrt(0.25 + 0.0036))


def test_idle_time_inflates_the_deviation_up_to_the_prior() -> None:
    day_s = 86_400.0
    m = Glicko2(period_s=day_s)
    m.learn(match("kelvash", "morvenn", 1.0, 0))
    _, rd_after, vol = m.rating("kelvash")
    m.learn(match("kelvash", "tuvrenn", 1.0, 10 * 24 * 60))  # ten idle days later
    # Recompute the pre-match deviation from step 6 applied for ten periods.
    phi_before = math.sqrt((rd_after / SCALE) ** 2 + 10 * vol**2)
    twin = Glicko2()
    twin.learn(match("kelvash", "morvenn", 1.0, 0))
    twin.phi_[twin.entities_.get("kelvash")] = phi_before
    twin.learn(match("kelvash", "tuvrenn", 1.0, 10 * 24 * 60))
    assert m.rating("kelvash") == pytest.approx(twin.rating("kelvash"), rel=1e-12)
    # A long absence never makes anyone less certain than a newcomer.
    m.learn(match("kelvash", "oskuvar", 0.0, 10_000 * 24 * 60))
    assert m.phi_[m.entities_.get("kelvash")] <= 350.0 / SCALE + 1e-12


def test_team_opponent_is_the_mean_with_the_deviation_of_the_mean() -> None:
    m = Glicko2()
    ev = MatchEvent(
        match_id="t-1",
        finished_at=T0,
        first=("kelvash",),
        second=("morvenn", "tuvrenn"),
        score=1.0,
    )
    m.learn(ev)
    # Newcomers 0 +- 350: the side of two has phi = sqrt(2 * phi0^2) / 2.
    phi0 = 350.0 / SCALE
    want = rate_period(0.0, phi0, 0.06, [0.0], [math.sqrt(2) * phi0 / 2], [1.0])
    r, rd, _vol = m.rating("kelvash")
    assert (r - 1500.0) / SCALE == pytest.approx(want[0], rel=1e-12)
    assert rd / SCALE == pytest.approx(want[1], rel=1e-12)
    assert m.rating("morvenn") == m.rating("tuvrenn")


def test_a_player_who_beats_everyone_climbs() -> None:
    m = Glicko2()
    ratings = []
    for i, other in enumerate(["morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"] * 4):
        m.learn(match("kelvash", other, 1.0, i))
        ratings.append(m.rating("kelvash")[0])
    assert all(b > a for a, b in itertools.pairwise(ratings))
    assert m.predict(match("kelvash", "morvenn", 1.0)).p_win > 0.9


def test_team_forecasts_are_not_under_confident() -> None:
    """Members share their side's expected score in the update, as in the forecast.

    On simulated 3-against-3 play, rating each member by its own mu against the
    other side's mean gave a calibration slope of about 2.3 (forecasts far too
    timid); sharing the side's expectation brings it near 1, like Elo.
    """
    from streamrate.calibration import calibration_slope_intercept, log_loss
    from streamrate.models.elo import Elo
    from streamrate.simulate import simulate, world_spec

    world = simulate(world_spec("teams", matches=6000, seed=41)).events
    y = np.array([e.score for e in world])
    g2 = Glicko2().learn_many(world).expected_score
    elo = Elo().learn_many(world).expected_score
    slope, _ = calibration_slope_intercept(g2[2000:], y[2000:])
    assert 0.7 < slope < 1.4
    assert log_loss(g2[2000:], y[2000:]) < log_loss(elo[2000:], y[2000:]) + 0.01
