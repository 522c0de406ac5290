"""Numbers in context and features enter the matchup models as running standard scores."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.encode import RunningScale
from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import ModelState
from streamrate.models.matchup import BladeChest
from streamrate.models.registry import model_from_state
from streamrate.statefile import load_state, save_state

T0 = datetime(2026, 3, 1, tzinfo=UTC)
PLAYERS = [f"quill-{i}" for i in range(16)]


def world(n: int, seed: int, unit: float = 1.0, offset: float = 0.0) -> list[MatchEvent]:
    """Matches where a long match (``length``, minutes) favours the first side and
    an entity's ``reach`` feature helps it; both given as ``unit * x + offset``."""
    rng = np.random.default_rng(seed)
    reach = rng.normal(50.0, 10.0, len(PLAYERS))
    out = []
    for k in range(n):
        i, j = rng.choice(len(PLAYERS), 2, replace=False)
        length = rng.uniform(10.0, 40.0)
        theta = 0.08 * (length - 25.0) + 0.05 * (reach[i] - reach[j])
        won = rng.random() < 1.0 / (1.0 + math.exp(-theta))
        a, b = PLAYERS[i], PLAYERS[j]
        out.append(
            MatchEvent(
                match_id=f"m-{k}",
                finished_at=T0 + timedelta(minutes=k),
                first=(a,),
                second=(b,),
                score=float(won),
                context={"arena": "glasswood", "length": unit * length + offset},
                features={
                    a: {"reach": unit * reach[i] + offset},
                    b: {"reach": unit * reach[j] + offset},
                },
            )
        )
    return out


def model(**kw: object) -> BladeChest:
    return BladeChest(dims=4, context="stacked", feature_width=16, backend="numpy", **kw)  # type: ignore[arg-type]


def queries(unit: float, offset: float) -> list[Matchup]:
    return [
        Matchup(
            first=(PLAYERS[k],),
            second=(PLAYERS[k + 1],),
            context={"arena": "glasswood", "length": unit * length + offset},
            features={PLAYERS[k]: {"reach": unit * 65.0 + offset}},
        )
        for k, length in zip(range(0, 12, 2), (12.0, 20.0, 25.0, 31.0, 38.0, 45.0), strict=True)
    ]


# minutes -> seconds; and an affine change like degrees Celsius -> Fahrenheit
UNITS = [(60.0, 0.0), (1.8, 32.0)]


@pytest.mark.parametrize(("unit", "offset"), UNITS, ids=["seconds", "affine"])
def test_units_of_a_number_do_not_change_the_predictions(unit: float, offset: float) -> None:
    base, other = model(), model()
    p_base = base.learn_many(world(600, seed=4)).p_win
    p_other = other.learn_many(world(600, seed=4, unit=unit, offset=offset)).p_win
    # Same standard scores up to round-off, so the same model: stated tolerance 1e-9.
    np.testing.assert_allclose(p_other, p_base, rtol=0, atol=1e-9)
    got = [other.predict(q).p_win for q in queries(unit, offset)]
    want = [base.predict(q).p_win for q in queries(1.0, 0.0)]
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)
    # Raw numbers: the units do matter (this is what the scaling removes).
    raw, raw_other = model(scale_numbers=False), model(scale_numbers=False)
    raw.learn_many(world(600, seed=4))
    raw_other.learn_many(world(600, seed=4, unit=unit, offset=offset))
    diff = [
        abs(raw_other.predict(a).p_win - raw.predict(b).p_win)
        for a, b in zip(queries(unit, offset), queries(1.0, 0.0), strict=True)
    ]
    assert max(diff) > 0.01


def test_a_number_like_a_year_does_not_swamp_the_model() -> None:
    """A year (2004..2020) that says nothing: scaled, the model does about as well as
    without it; raw, values in the thousands swamp the logit."""

    def with_year(evs: list[MatchEvent]) -> list[MatchEvent]:
        return [
            e.model_copy(update={"context": {**e.context, "year": 2004.0 + (k % 17)}})
            for k, e in enumerate(evs)
        ]

    evs = world(1500, seed=5)
    y = np.array([e.score for e in evs])

    def loss(m: BladeChest, stream: list[MatchEvent]) -> float:
        p = np.clip(m.learn_many(stream).p_win[500:], 1e-12, 1 - 1e-12)
        return float(np.mean(-(y[500:] * np.log(p) + (1 - y[500:]) * np.log(1 - p))))

    plain = loss(model(), evs)
    scaled = loss(model(), with_year(evs))
    raw = loss(model(scale_numbers=False), with_year(evs))
    assert scaled < plain + 0.01
    assert raw > scaled + 0.05


def test_batches_and_single_events_scale_alike() -> None:
    evs = world(120, seed=6)
    a, b, c = model(), model(), model()
    many = a.learn_many(evs)
    loop = [b.learn(e) for e in evs]
    assert list(many.p_win) == [p.p_win for p in loop]
    assert [c.learn_batch([e]).p_win[0] for e in evs] == [p.p_win for p in loop]
    state_a, state_b = a._state_arrays(), b._state_arrays()
    assert state_a.keys() == state_b.keys()
    for k in state_a:
        assert np.array_equal(state_a[k], state_b[k], equal_nan=True), k
    assert a.context_scale_.stats("length") == pytest.approx((120.0, 25.0, 8.66), abs=1.5)


def test_running_statistics_round_trip_exactly(tmp_path: Path) -> None:
    m = model()
    m.learn_many(world(200, seed=7))
    save_state(tmp_path / "s.npz", m.to_state())
    back = model_from_state(load_state(tmp_path / "s.npz"))
    assert isinstance(back, BladeChest)
    for name, scale in (("length", "context_scale_"), ("reach", "feature_scale_")):
        assert getattr(back, scale).stats(name) == getattr(m, scale).stats(name)
    nxt = world(50, seed=8)
    assert list(back.learn_many(nxt).p_win) == list(m.learn_many(nxt).p_win)


def test_a_version_1_state_reads_its_numbers_raw() -> None:
    raw = model(scale_numbers=False, uncertainty=False)
    raw.learn_many(world(200, seed=9))
    st1 = raw.to_state()
    arrays = {k: v for k, v in st1.arrays.items() if "_scale_" not in k and k != "last_s"}
    newer = ("scale_numbers", "uncertainty", "prior_var", "noise_per_day")
    params = {k: v for k, v in st1.params.items() if k not in newer}
    old = model_from_state(ModelState(st1.kind, 1, params, arrays))
    assert isinstance(old, BladeChest) and not old.scale_numbers
    for q in queries(1.0, 0.0):
        assert old.predict(q) == raw.predict(q)


finite = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False),
    st.integers(min_value=-(10**400), max_value=10**400),
)


@settings(max_examples=500)
@given(values=st.lists(finite, min_size=1, max_size=40))
def test_scores_are_finite_and_bounded_for_any_finite_input(values: list[float]) -> None:
    s = RunningScale()
    for v in values:
        z = s.observe("heat", v)
        assert math.isfinite(z) and abs(z) <= s.clip
        q = s.score("heat", v)
        assert math.isfinite(q) and abs(q) <= s.clip
    n, mean, sd = s.stats("heat")
    assert n == len(values) and math.isfinite(mean) and math.isfinite(sd)


@settings(max_examples=300)
@given(
    values=st.lists(st.integers(-1000, 1000), min_size=1, max_size=30),
    unit=st.floats(1e-3, 1e3),
    offset=st.floats(-1e4, 1e4),
)
def test_scores_do_not_depend_on_units(values: list[int], unit: float, offset: float) -> None:
    a, b = RunningScale(), RunningScale()
    for v in values:
        assert b.observe("x", unit * v + offset) == pytest.approx(a.observe("x", v), abs=1e-6)


def test_learning_predicts_what_predict_gave_before() -> None:
    # The scores of an event's numbers come from the statistics before it. (Entities
    # are known first: a new entity's seeded start is only drawn when it is learned.)
    m = model()
    m.learn_many(world(200, seed=12))
    for e in world(80, seed=10):
        before = m.predict(e)
        assert m.learn(e) == before


@pytest.mark.parametrize(("unit", "offset"), UNITS, ids=["seconds", "affine"])
def test_the_batch_logistic_reference_scales_numbers_too(unit: float, offset: float) -> None:
    from streamrate.models.logistic_batch import LogisticBatch

    base, other = LogisticBatch(refit_every=200), LogisticBatch(refit_every=200)
    p_base = base.learn_many(world(600, seed=11)).p_win
    p_other = other.learn_many(world(600, seed=11, unit=unit, offset=offset)).p_win
    # L-BFGS stops at its own tolerance on each design: a looser stated tolerance.
    np.testing.assert_allclose(p_other, p_base, rtol=0, atol=1e-5)
    raw = LogisticBatch(refit_every=200, scale_numbers=False)
    p_raw = raw.learn_many(world(600, seed=11, unit=unit, offset=offset)).p_win
    assert np.max(np.abs(p_raw - p_base)) > 0.01
