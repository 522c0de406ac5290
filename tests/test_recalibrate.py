"""Online recalibration: convergence on a known distortion, loss improvement, state."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from prometheus_client import CollectorRegistry

from streamrate.calibration import log_loss, sigmoid
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent
from streamrate.models.base import Prediction
from streamrate.models.elo import Elo
from streamrate.models.registry import build_model, model_from_state
from streamrate.quality import QualityMonitor
from streamrate.quality_metrics import QualityMetrics
from streamrate.recalibrate import OnlineRecalibrator, Recalibrated
from streamrate.simulate import simulate, world_spec
from streamrate.statefile import load_state, save_state


def _overconfident_stream(n: int, seed: int, scale: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
    """Outcomes drawn from sigmoid(z); the model reports sigmoid(scale * z)."""
    rng = np.random.default_rng(seed)
    z = rng.normal(0.0, 1.5, n)
    y = (rng.random(n) < sigmoid(z)).astype(np.float64)
    return sigmoid(scale * z), y


def _run(rc: OnlineRecalibrator, p: np.ndarray, y: np.ndarray) -> np.ndarray:
    return np.array([rc.learn(a, b) for a, b in zip(p, y, strict=True)])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_slope_converges_to_one_half_on_doubled_logits(seed: int) -> None:
    # The model's logit is twice the true one, so the correcting slope is 0.5 and
    # the intercept 0 (by construction of the stream).
    p, y = _overconfident_stream(20000, seed)
    rc = OnlineRecalibrator()
    q = _run(rc, p, y)
    assert rc.slope == pytest.approx(0.5, abs=0.05)
    assert rc.intercept == pytest.approx(0.0, abs=0.06)
    # Prequential log loss (each corrected forecast made before its outcome) is lower.
    assert log_loss(q, y) < log_loss(p, y) - 0.02
    assert log_loss(q[-5000:], y[-5000:]) < log_loss(p[-5000:], y[-5000:]) - 0.03


def test_online_fit_agrees_with_batch_logistic_fit() -> None:
    # Reference: statsmodels' maximum-likelihood Logit of y on [1, logit(p)] over the
    # stream; with no forgetting the online Newton steps approach the same optimum.
    p, y = _overconfident_stream(30000, seed=5, scale=1.6)
    rc = OnlineRecalibrator(forgetting=1.0)
    _run(rc, p, y)
    x = np.log(p / (1 - p))
    fit = sm.Logit(y, sm.add_constant(x)).fit(disp=0)
    assert rc.intercept == pytest.approx(fit.params[0], abs=0.02)
    assert rc.slope == pytest.approx(fit.params[1], abs=0.02)


def test_temperature_method_learns_temperature_two() -> None:
    p, y = _overconfident_stream(20000, seed=3)
    rc = OnlineRecalibrator(method="temperature")
    q = _run(rc, p, y)
    assert rc.temperature == pytest.approx(2.0, rel=0.1)
    assert rc.intercept == 0.0
    assert log_loss(q, y) < log_loss(p, y)


def test_calibrated_stream_stays_near_identity() -> None:
    p, y = _overconfident_stream(20000, seed=4, scale=1.0)
    rc = OnlineRecalibrator()
    q = _run(rc, p, y)
    assert rc.slope == pytest.approx(1.0, abs=0.08)
    assert rc.intercept == pytest.approx(0.0, abs=0.06)
    assert log_loss(q, y) < log_loss(p, y) + 0.005  # costs almost nothing


def test_learn_returns_the_forecast_made_before_the_outcome() -> None:
    rc = OnlineRecalibrator()
    assert rc.learn(0.8, 0.0) == pytest.approx(0.8)  # untrained: identity
    before = rc.transform(0.8)
    assert rc.learn(0.8, 0.0) == pytest.approx(before)
    assert rc.transform(0.8) < before  # moved towards the outcome


def test_state_round_trips_through_json() -> None:
    p, y = _overconfident_stream(3000, seed=6)
    rc = OnlineRecalibrator()
    _run(rc, p[:2000], y[:2000])
    clone = OnlineRecalibrator.from_dict(json.loads(json.dumps(rc.to_dict())))
    np.testing.assert_array_equal(_run(rc, p[2000:], y[2000:]), _run(clone, p[2000:], y[2000:]))
    assert clone.params() == rc.params()


@pytest.mark.parametrize(
    "bad",
    [{}, {"method": "slope_intercept", "forgetting": 1, "prior_events": 5, "theta": [0.0],
          "hess": [[1, 0], [0, 1]], "n_events": 0},
     {"method": "slope_intercept", "forgetting": 1, "prior_events": 5, "theta": [0.0, "x"],
          "hess": [[1, 0], [0, 1]], "n_events": 0}],
)  # fmt: skip
def test_bad_state_is_a_state_error(bad: dict[str, object]) -> None:
    with pytest.raises(StateError):
        OnlineRecalibrator.from_dict(bad)


def test_apply_keeps_draw_probability_and_corrects_expected_score() -> None:
    rc = OnlineRecalibrator()
    rc.slope_ = 0.5
    plain = rc.apply(Prediction(0.9, 0.0))
    assert plain.p_draw == 0.0 and plain.p_win == pytest.approx(float(sigmoid(0.5 * 2.1972246)))
    drawn = rc.apply(Prediction(0.6, 0.2))
    assert drawn.p_draw == 0.2
    assert drawn.expected_score == pytest.approx(rc.transform(0.7))


def _world(matches: int, seed: int) -> list[MatchEvent]:
    return simulate(world_spec("plain", matches=matches, seed=seed)).events


def test_recalibrated_model_repairs_an_overconfident_elo() -> None:
    # Elo with k = 200 (far above the usual 10-40, common practice) chases noise and
    # is over-confident; the wrapped model learns a slope well below 1 and scores a
    # lower prequential log loss on the same stream. Measured on this seed: slope
    # 0.43, log loss 0.686 -> 0.604.
    events = _world(10000, seed=1)
    y = np.array([e.score for e in events])
    raw = Elo(k=200).learn_many(events)
    wrapped = Recalibrated(base="elo", base_settings={"k": 200})
    fixed = wrapped.learn_many(events)
    assert wrapped.recalibrator_.slope < 0.6
    assert log_loss(fixed.expected_score, y) < log_loss(raw.expected_score, y) - 0.05


def test_recalibrated_state_round_trips_through_a_state_file(tmp_path: Path) -> None:
    events = _world(600, seed=2)
    model = build_model("recalibrated", base="elo", base_settings={"k": 40})
    model.learn_many(events[:400])
    save_state(tmp_path / "m.npz", model.to_state())
    clone = model_from_state(load_state(tmp_path / "m.npz"))
    assert isinstance(clone, Recalibrated)
    a, b = model.learn_many(events[400:]), clone.learn_many(events[400:])
    np.testing.assert_array_equal(a.p_win, b.p_win)
    assert clone.recalibrator_.params() == model.recalibrator_.params()
    assert clone.seen("kelvash") == model.seen("kelvash")


def test_recalibrated_batch_of_one_equals_learn() -> None:
    events = _world(300, seed=3)
    one, seq = Recalibrated(), Recalibrated()
    for ev in events:
        p_batch = one.learn_batch([ev])[0]
        p_seq = seq.learn(ev)
        assert p_batch == pytest.approx(p_seq, abs=1e-12)
    assert one.recalibrator_.params() == pytest.approx(seq.recalibrator_.params())


def test_recalibrated_cannot_wrap_itself() -> None:
    with pytest.raises(ConfigError):
        Recalibrated(base="recalibrated")


def test_recalibration_parameters_are_published_as_gauges() -> None:
    reg = CollectorRegistry()
    rc = OnlineRecalibrator()
    p, y = _overconfident_stream(2000, seed=7)
    _run(rc, p, y)
    QualityMetrics(reg).publish("duel", QualityMonitor(), {"elo": rc})
    labels = {"space": "duel", "model": "elo"}
    assert reg.get_sample_value("streamrate_recalibration_slope", labels) == rc.slope
    assert reg.get_sample_value("streamrate_recalibration_intercept", labels) == rc.intercept


# Bases whose saved state gained a version this round, with the settings that make
# them the former model, and the arrays the former version did not have.
OLDER_BASES = [
    ("glicko2", 1, {"advantage_k": 0.0}, ("advantage",)),
    ("trueskill", 1, {"advantage_sigma": 0.0}, ("advantage",)),
    ("head_to_head", 1, {"advantage": False}, ("first_score",)),
    ("blade_chest", 3, {"dims": 4}, ()),
]


@pytest.mark.parametrize(("base", "version", "former", "new_arrays"), OLDER_BASES)
def test_an_older_base_state_inside_recalibrated_loads_as_it_was_trained(
    base: str, version: int, former: dict[str, object], new_arrays: tuple[str, ...]
) -> None:
    # A checkpoint written before the base's state version went up: the base state
    # is upgraded as it would be alone, and the model predicts exactly as before.
    events = _world(300, seed=5)
    old = build_model("recalibrated", base=base, base_settings=former)
    old.learn_many(events[:200])
    st = old.to_state()
    kept = {k: v for k, v in st.arrays.items() if k.removeprefix("base.") not in new_arrays}
    assert len(kept) == len(st.arrays) - len(new_arrays)  # the base's arrays are prefixed
    kept["recal_base_version"] = np.array([version], dtype=np.int64)
    settings = {k: v for k, v in former.items() if k == "dims"}  # what the former code saved
    params = {**st.params, "base_settings": settings}
    back = model_from_state(type(st)(st.kind, st.version, params, kept))
    a, b = old.learn_many(events[200:]), back.learn_many(events[200:])
    np.testing.assert_array_equal(a.p_win, b.p_win)
    # A version this code does not know is still refused, with the base named.
    kept["recal_base_version"] = np.array([99], dtype=np.int64)
    with pytest.raises(StateError, match="inside 'recalibrated' has version 99"):
        model_from_state(type(st)(st.kind, st.version, params, kept))
