"""Scores and calibration statistics against general-purpose reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss
from sklearn.metrics import log_loss as sk_log_loss

from streamrate import calibration as cal

RNG = np.random.default_rng(20260301)
E = RNG.uniform(0.02, 0.98, 600)
Y_BIN = (RNG.random(600) < E).astype(float)
Y_DRAW = np.where(RNG.random(600) < 0.15, 0.5, Y_BIN)


def test_log_loss_matches_sklearn_on_binary_outcomes() -> None:
    # Reference: scikit-learn sklearn.metrics.log_loss (natural log, mean over samples).
    assert cal.log_loss(E, Y_BIN) == pytest.approx(sk_log_loss(Y_BIN, E), rel=1e-12)


def test_log_loss_with_draws_is_sklearn_with_half_weights() -> None:
    # A draw scored as y = 0.5 equals one win and one loss of weight 1/2 each; sklearn's
    # weighted log_loss divides by the weight total, which is again the number of matches.
    y2 = np.concatenate([np.ones_like(E), np.zeros_like(E)])
    p2 = np.concatenate([E, E])
    w2 = np.concatenate([Y_DRAW, 1.0 - Y_DRAW])
    ref = sk_log_loss(y2, p2, sample_weight=w2)
    assert cal.log_loss(E, Y_DRAW) == pytest.approx(ref, rel=1e-12)


def test_brier_matches_sklearn() -> None:
    # Reference: sklearn.metrics.brier_score_loss (mean squared difference).
    assert cal.brier(E, Y_BIN) == pytest.approx(brier_score_loss(Y_BIN, E), rel=1e-12)


def test_reliability_curve_matches_sklearn_uniform_bins() -> None:
    # Reference: sklearn.calibration.calibration_curve(strategy="uniform", n_bins=10).
    # Forecasts that sit exactly on bin edges check the (a, b] convention as well.
    e = np.concatenate([E, [0.0, 0.1, 0.2, 0.5, 0.9, 1.0]])
    y = np.concatenate([Y_BIN, [0.0, 1.0, 0.0, 1.0, 1.0, 1.0]])
    prob_true, prob_pred = calibration_curve(y, e, n_bins=10, strategy="uniform")
    curve = cal.reliability_curve(e, y, bins=10)
    np.testing.assert_allclose(curve.mean_outcome, prob_true, rtol=1e-12)
    np.testing.assert_allclose(curve.mean_forecast, prob_pred, rtol=1e-12)
    assert curve.count.sum() == e.size


def test_ece_by_hand() -> None:
    # Hand computation, 10 equal-width bins:
    # bin (0.1, 0.2]: forecasts 0.15, 0.15 -> mean 0.15, outcomes 0, 1 -> 0.5, gap 0.35
    # bin (0.7, 0.8]: forecasts 0.75, 0.8, 0.8 -> 0.78333, outcomes 1, 1, 0 -> 0.66667,
    #                 gap 0.11667
    # ECE = (2 * 0.35 + 3 * 0.116667) / 5 = 0.21
    e = np.array([0.15, 0.15, 0.75, 0.8, 0.8])
    y = np.array([0.0, 1.0, 1.0, 1.0, 0.0])
    assert cal.expected_calibration_error(e, y) == pytest.approx(0.21, abs=1e-12)


def test_accuracy_over_decisive_matches() -> None:
    e = np.array([0.7, 0.4, 0.5, 0.9, 0.2])
    y = np.array([1.0, 1.0, 0.0, 0.5, 0.0])
    # decisive: right, wrong, half (0.5 forecast), [draw skipped], right -> 2.5 / 4
    assert cal.accuracy(e, y) == pytest.approx(0.625)
    assert np.isnan(cal.accuracy(np.array([0.6]), np.array([0.5])))


def test_calibration_slope_intercept_matches_statsmodels_logit() -> None:
    # Reference: statsmodels Logit (maximum likelihood) of y on [1, logit(e)].
    rng = np.random.default_rng(7)
    e = rng.uniform(0.05, 0.95, 3000)
    true_p = 1.0 / (1.0 + np.exp(-(0.3 + 0.6 * cal.logit(e))))
    y = (rng.random(3000) < true_p).astype(float)
    fit = sm.Logit(y, sm.add_constant(cal.logit(e))).fit(disp=0)
    slope, intercept = cal.calibration_slope_intercept(e, y)
    assert intercept == pytest.approx(fit.params[0], abs=1e-7)
    assert slope == pytest.approx(fit.params[1], abs=1e-7)
    # The generating values are recovered within sampling error.
    assert slope == pytest.approx(0.6, abs=0.12) and intercept == pytest.approx(0.3, abs=0.12)


def test_calibration_slope_undefined_cases_are_nan() -> None:
    assert np.isnan(cal.calibration_slope_intercept([0.6, 0.6, 0.6], [1.0, 0.0, 1.0])[0])
    assert np.isnan(cal.calibration_slope_intercept([0.2, 0.6, 0.7], [1.0, 1.0, 1.0])[0])


def test_murphy_decomposition_exact_for_binned_forecasts() -> None:
    # Murphy decomposition, "A New Vector Partition of the Probability Score", Journal of
    # Applied Meteorology 1973: Brier = reliability - resolution + uncertainty, exactly
    # when forecasts take one value per bin.
    rng = np.random.default_rng(3)
    e = rng.choice([0.05, 0.25, 0.45, 0.65, 0.85], 2000)
    y = (rng.random(2000) < e).astype(float)
    parts = cal.murphy_decomposition(e, y)
    assert parts.within_bin == pytest.approx(0.0, abs=1e-12)
    assert parts.reliability - parts.resolution + parts.uncertainty == pytest.approx(
        brier_score_loss(y, e), rel=1e-12
    )


def test_binary_entropy_is_least_expected_log_loss() -> None:
    # For E[y] = p the expected log loss of forecast q, -(p ln q + (1-p) ln(1-q)), is
    # smallest at q = p, where it equals the binary entropy.
    p = 0.3
    qs = np.linspace(0.01, 0.99, 99)
    expected = -(p * np.log(qs) + (1 - p) * np.log(1 - qs))
    assert expected.min() >= cal.binary_entropy(p) - 1e-12
    assert cal.binary_entropy(0.5) == pytest.approx(np.log(2.0))


forecasts = hnp.arrays(np.float64, st.integers(1, 60), elements=st.floats(0.0, 1.0))


@settings(max_examples=60, deadline=None)
@given(forecasts, st.data())
def test_metrics_are_bounded_and_finite(e: np.ndarray, data: st.DataObject) -> None:
    y = data.draw(hnp.arrays(np.float64, e.shape, elements=st.sampled_from([0.0, 0.5, 1.0])))
    ll = cal.pointwise_log_loss(e, y)
    assert np.all(np.isfinite(ll)) and np.all(ll >= 0.0)
    assert 0.0 <= cal.brier(e, y) <= 1.0
    assert 0.0 <= cal.expected_calibration_error(e, y) <= 1.0
    curve = cal.reliability_curve(e, y)
    assert curve.count.sum() == e.size
    assert np.all((curve.mean_forecast >= 0) & (curve.mean_forecast <= 1))
    acc = cal.accuracy(e, y)
    assert np.isnan(acc) or 0.0 <= acc <= 1.0
