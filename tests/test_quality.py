"""Rolling quality statistics against independent references and their batch forms."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from sklearn.calibration import calibration_curve
from sklearn.metrics import accuracy_score, brier_score_loss
from sklearn.metrics import log_loss as sk_log_loss

from streamrate import calibration as cal
from streamrate.calibration import calibration_slope_intercept, sigmoid
from streamrate.events import MatchEvent
from streamrate.models.base import Prediction
from streamrate.quality import (
    ALL_GROUP,
    OTHER_GROUP,
    P_CLIP,
    GroupLabels,
    MonitorSettings,
    QualityMonitor,
    RollingQuality,
    WindowPair,
)
from streamrate.quality_metrics import QualityMetrics, QualityObserver
from tests.reliability_bins import assert_bins_equal_batch, exported_bins


def _binary_data(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = rng.normal(0.0, 1.2, n)
    p = sigmoid(z)
    y = (rng.random(n) < sigmoid(0.7 * z + 0.2)).astype(np.float64)
    return p, y


def _filled(p: np.ndarray, y: np.ndarray, window_n: int | None = None) -> RollingQuality:
    rq = RollingQuality(window_n or len(p))
    for a, b in zip(p, y, strict=True):
        rq.add(a, b)
    return rq


def test_scores_match_scikit_learn() -> None:
    # Reference: scikit-learn's log_loss, brier_score_loss and accuracy_score on the
    # same fixed data (binary outcomes, no forecast exactly 0.5).
    p, y = _binary_data(3000, seed=4)
    snap = _filled(p, y).snapshot()
    assert snap.log_loss == pytest.approx(sk_log_loss(y, p, labels=[0, 1]), rel=1e-12)
    assert snap.brier == pytest.approx(brier_score_loss(y, p), rel=1e-12)
    assert snap.accuracy == pytest.approx(accuracy_score(y, p > 0.5), rel=1e-12)
    assert snap.n_events == 3000


def test_ece_and_reliability_match_calibration_curve() -> None:
    # Reference: sklearn.calibration.calibration_curve(strategy="uniform") gives the
    # mean outcome and mean forecast per non-empty equal-width bin. Bin counts are
    # taken here with numpy's histogram on right-closed bins (the same bins).
    p, y = _binary_data(4000, seed=5)
    prob_true, prob_pred = calibration_curve(y, p, n_bins=10, strategy="uniform")
    counts = np.bincount(np.clip(np.ceil(p * 10).astype(int) - 1, 0, 9), minlength=10)
    counts = counts[counts > 0]
    ece_ref = float(np.sum(counts * np.abs(prob_true - prob_pred)) / len(p))
    rel_ref = float(np.sum(counts * (prob_true - prob_pred) ** 2) / len(p))
    snap = _filled(p, y).snapshot()
    assert snap.ece == pytest.approx(ece_ref, rel=1e-9)
    assert snap.reliability == pytest.approx(rel_ref, rel=1e-9)
    assert snap.ece > 0.02  # the data were made miscalibrated on purpose


def test_slope_and_intercept_match_statsmodels() -> None:
    # Reference: statsmodels' maximum-likelihood Logit of y on [1, logit(p)].
    p, y = _binary_data(5000, seed=6)
    x = np.log(p / (1 - p))
    fit = sm.Logit(y, sm.add_constant(x)).fit(disp=0, tol=1e-12)
    snap = _filled(p, y).snapshot()
    assert snap.intercept == pytest.approx(fit.params[0], abs=1e-6)
    assert snap.slope == pytest.approx(fit.params[1], abs=1e-6)
    # The data were drawn with slope 0.7 and intercept 0.2 on the true logit.
    assert snap.slope == pytest.approx(0.7, abs=0.08)


@pytest.mark.parametrize("scale", [0.5, 3.0, 6.0])
def test_slope_fit_matches_statsmodels_on_strongly_miscalibrated_forecasts(scale: float) -> None:
    # Reference: statsmodels' maximum-likelihood Logit. Forecasts sigmoid(scale * z) of
    # outcomes drawn from sigmoid(z): logits reach +-20 at scale 6, where a plain
    # Newton iteration from slope 1 overflows; the fitted slope is about 1 / scale.
    rng = np.random.default_rng(13)
    z = rng.normal(0.0, 1.2, 3000)
    y = (rng.random(3000) < sigmoid(z)).astype(np.float64)
    p = sigmoid(scale * z)
    pc = np.clip(p, P_CLIP, 1 - P_CLIP)  # the fit clips forecasts like every log loss here
    x = np.log(pc / (1 - pc))
    fit = sm.Logit(y, sm.add_constant(x)).fit(disp=0, tol=1e-12)
    slope, intercept = calibration_slope_intercept(p, y)
    assert slope == pytest.approx(fit.params[1], abs=1e-6)
    assert intercept == pytest.approx(fit.params[0], abs=1e-6)
    assert slope == pytest.approx(1 / scale, rel=0.15)


def test_murphy_identity_holds_exactly_with_one_forecast_per_bin() -> None:
    # 'A New Vector Partition of the Probability Score' (Journal of Applied
    # Meteorology 1973): BS = REL - RES + UNC, exact when every forecast in a bin is
    # the same value. Forecasts here are bin centres only; each part is also
    # computed directly from its definition, grouping by forecast value.
    rng = np.random.default_rng(7)
    centres = np.arange(10) / 10 + 0.05
    p = rng.choice(centres, 2000)
    y = (rng.random(2000) < np.clip(p + 0.1, 0, 1)).astype(np.float64)
    snap = _filled(p, y).snapshot()
    n, obar = len(p), y.mean()
    rel = res = 0.0
    for f in np.unique(p):
        sel = p == f
        o = y[sel].mean()
        rel += sel.sum() * (f - o) ** 2 / n
        res += sel.sum() * (o - obar) ** 2 / n
    unc = obar * (1 - obar)
    assert snap.reliability == pytest.approx(rel, rel=1e-10)
    assert snap.resolution == pytest.approx(res, rel=1e-10)
    assert snap.uncertainty == pytest.approx(unc, rel=1e-10)
    assert snap.brier == pytest.approx(rel - res + unc, abs=1e-12)
    assert snap.brier == pytest.approx(brier_score_loss(y, p), rel=1e-12)


def _check_equal_to_batch(rq: RollingQuality, p: np.ndarray, y: np.ndarray) -> None:
    snap = rq.snapshot()
    parts = cal.murphy_decomposition(p, y)
    slope, intercept = calibration_slope_intercept(p, y)
    expected = {
        "log_loss": cal.log_loss(p, y),
        "brier": cal.brier(p, y),
        "accuracy": cal.accuracy(p, y),
        "ece": cal.expected_calibration_error(p, y),
        "reliability": parts.reliability,
        "resolution": parts.resolution,
        "uncertainty": parts.uncertainty,
        "slope": slope,
        "intercept": intercept,
    }
    for name, want in expected.items():
        got = getattr(snap, name)
        if math.isnan(want):
            assert math.isnan(got), name
        else:
            assert got == pytest.approx(want, rel=1e-7, abs=1e-9), name
    assert snap.n_events == len(p)


@settings(max_examples=60, deadline=None)
@given(
    window_n=st.integers(1, 12),
    events=st.lists(
        st.tuples(
            st.one_of(st.floats(0.0, 1.0), st.sampled_from([0.0, 0.1, 0.3, 0.5, 0.7, 1.0])),
            st.sampled_from([0.0, 0.5, 1.0]),
        ),
        min_size=1,
        max_size=40,
    ),
)
def test_rolling_window_equals_batch_on_last_n_after_every_step(
    window_n: int, events: list[tuple[float, float]]
) -> None:
    rq = RollingQuality(window_n)
    p_all = np.array([e[0] for e in events])
    y_all = np.array([e[1] for e in events])
    for i, (p, y) in enumerate(events):
        rq.add(p, y)
        lo = max(0, i + 1 - window_n)
        _check_equal_to_batch(rq, p_all[lo : i + 1], y_all[lo : i + 1])


def test_long_stream_keeps_matching_after_many_refreshes() -> None:
    p, y = _binary_data(5000, seed=8)
    rq = _filled(p, y, window_n=300)
    _check_equal_to_batch(rq, p[-300:], y[-300:])


def test_window_pair_reference_holds_the_events_before_the_recent_ones() -> None:
    p, y = _binary_data(100, seed=9)
    pair = WindowPair(recent_n=10, reference_n=30)
    for a, b in zip(p, y, strict=True):
        pair.add(a, b)
    np.testing.assert_array_equal(pair.recent.values()[0], p[-10:])
    np.testing.assert_array_equal(pair.reference.values()[0], p[-40:-10])


def test_rejects_values_outside_unit_interval() -> None:
    rq = RollingQuality(5)
    with pytest.raises(ValueError):
        rq.add(1.2, 1.0)
    with pytest.raises(ValueError):
        rq.add(0.5, -1.0)


def test_empty_window_reports_nan() -> None:
    snap = RollingQuality(5).snapshot()
    assert snap.n_events == 0 and math.isnan(snap.log_loss) and math.isnan(snap.ece)


def test_group_labels_keep_top_k_and_fold_the_rest() -> None:
    labels = GroupLabels(top_k=2, warmup_n=10)
    warm = ["saltflats"] * 5 + ["glasswood"] * 3 + ["ember-quarry", "sunken-bell"]
    assert [labels.label(v) for v in warm] == [None] * 10
    assert labels.labels == ("glasswood", "saltflats", OTHER_GROUP)
    assert labels.label("saltflats") == "saltflats"
    assert labels.label("sunken-bell") == OTHER_GROUP
    assert labels.label("never-seen") == OTHER_GROUP
    fixed = GroupLabels(top_k=2, values=["all", "glasswood"])
    assert fixed.label("all") == "all (value)" != ALL_GROUP
    assert fixed.label("other") == OTHER_GROUP


def test_monitor_groups_equal_batch_on_each_groups_events() -> None:
    rng = np.random.default_rng(10)
    maps = rng.choice(["saltflats", "glasswood", "ember-quarry", "sunken-bell"], 600)
    p, y = _binary_data(600, seed=11)
    mon = QualityMonitor(
        MonitorSettings(recent_n=50, reference_n=100, group_field="map", group_top_k=2)
    )
    mon.groups_ = GroupLabels(top_k=2, values=["saltflats", "glasswood"])
    for m, a, b in zip(maps, p, y, strict=True):
        mon.add("elo", a, b, {"map": str(m)})
    windows = mon.models_["elo"].windows_
    assert set(windows) == {ALL_GROUP, "saltflats", "glasswood", OTHER_GROUP}
    for group in ("saltflats", OTHER_GROUP):
        sel = (
            np.isin(maps, ["saltflats"])
            if group == "saltflats"
            else ~np.isin(maps, ["saltflats", "glasswood"])
        )
        _check_equal_to_batch(windows[group].recent, p[sel][-50:], y[sel][-50:])
    _check_equal_to_batch(windows[ALL_GROUP].recent, p[-50:], y[-50:])


def _event(i: int, score: float, game_map: str) -> MatchEvent:
    return MatchEvent(
        match_id=f"q-{i}",
        finished_at=datetime(2026, 3, 1, tzinfo=UTC) + timedelta(minutes=i),
        first=("kelvash",),
        second=("morvenn",),
        score=score,
        context={"map": game_map},
    )


def test_observer_publishes_gauges_equal_to_the_window_statistics() -> None:
    reg = CollectorRegistry()
    settings = MonitorSettings(
        recent_n=40, reference_n=80, group_field="map", group_top_k=1, group_warmup_n=20,
        drift_fields=("map",),
    )  # fmt: skip
    mon = QualityMonitor(settings)
    clock = iter(range(10_000)).__next__  # one "second" per call
    obs = QualityObserver(mon, QualityMetrics(reg), "duel", publish_every_s=30, clock=clock)
    rng = np.random.default_rng(12)
    maps = ["saltflats", "glasswood", "sunken-bell"]
    for i in range(200):
        p = float(rng.uniform(0.2, 0.8))
        y = float(rng.random() < p)
        obs(_event(i, y, maps[i % 3] if i % 2 else "saltflats"), Prediction(p, 0.0), "elo")
    # Published when 30 clock seconds had passed: after events 30, 60, ..., 180.
    assert obs._published_at == 180
    obs.publish()
    snap = mon.models_["elo"].windows_["all"].recent.snapshot()
    labels = {"space": "duel", "model": "elo", "window": "recent", "group": "all"}
    assert reg.get_sample_value("streamrate_quality_log_loss", labels) == snap.log_loss
    assert reg.get_sample_value("streamrate_quality_ece", labels) == snap.ece
    assert reg.get_sample_value("streamrate_quality_calibration_slope", labels) == snap.slope
    psi_labels = {"space": "duel", "model": "elo", "feature": "map"}
    assert reg.get_sample_value("streamrate_drift_psi", psi_labels) == pytest.approx(
        mon.models_["elo"].drift_.psi()["map"]
    )
    # Bounded labels: "all", the top-1 map and "other" only.
    groups = {
        s.labels["group"]
        for fam in reg.collect()
        for s in fam.samples
        if fam.name == "streamrate_quality_ece"
    }
    assert groups == {ALL_GROUP, "saltflats", OTHER_GROUP}
    for fam in reg.collect():
        assert fam.documentation.strip(), fam.name


def _series_of(reg: CollectorRegistry, space: str) -> int:
    return sum(
        1
        for fam in reg.collect()
        for s in fam.samples
        if s.labels.get("space") == space and not s.name.endswith("_created")
    )


def test_a_non_exporting_observer_keeps_its_windows_and_publishes_only_once_on() -> None:
    reg = CollectorRegistry()
    qm = QualityMetrics(reg)
    settings = MonitorSettings(recent_n=20, reference_n=40, drift_fields=("map",))
    obs = QualityObserver(QualityMonitor(settings), qm, "duel", publish_every_s=0, exporting=False)
    other = QualityObserver(QualityMonitor(settings), qm, "trio", publish_every_s=0)
    rng = np.random.default_rng(3)
    for i in range(120):
        p = float(rng.uniform(0.2, 0.8))
        for o in (obs, other):
            o(_event(i, float(rng.random() < p), "saltflats"), Prediction(p, 0.0), "elo")
    obs.tick()
    obs.publish()
    assert _series_of(reg, "duel") == 0  # a standby: windows kept, nothing exported
    assert obs.monitor.models_["elo"].windows_["all"].recent.snapshot().n_events == 20
    obs.export(True)  # it became the writer
    n = _series_of(reg, "duel")
    assert n > 0 and n == _series_of(reg, "trio")
    labels = {"space": "duel", "model": "elo", "window": "recent", "group": "all"}
    assert reg.get_sample_value("streamrate_quality_window_events", labels) == 20
    obs.export(False)  # it stopped writing: its series go, the other space's stay
    assert _series_of(reg, "duel") == 0 and _series_of(reg, "trio") == n
    obs(_event(999, 1.0, "saltflats"), Prediction(0.6, 0.0), "elo")
    assert _series_of(reg, "duel") == 0


@settings(max_examples=40, deadline=None)
@given(
    window_n=st.integers(1, 30),
    events=st.lists(
        st.tuples(
            # bin edges and both ends on purpose: (a, b] bins, the first closed at 0
            st.one_of(st.floats(0.0, 1.0), st.sampled_from([0.0, 0.1, 0.2, 0.5, 0.9, 1.0])),
            st.sampled_from([0.0, 0.5, 1.0]),
            st.sampled_from(["saltflats", "glasswood"]),
        ),
        min_size=1,
        max_size=60,
    ),
)
def test_observer_exports_the_recent_windows_bins_as_the_batch_reliability_curve(
    window_n: int, events: list[tuple[float, float, str]]
) -> None:
    reg = CollectorRegistry()
    settings = MonitorSettings(
        recent_n=window_n, reference_n=5, group_field="map", group_top_k=1, group_warmup_n=1
    )
    obs = QualityObserver(QualityMonitor(settings), QualityMetrics(reg), "duel", publish_every_s=0)
    for i, (p, y, game_map) in enumerate(events):
        obs(_event(i, y, game_map), Prediction(p, 0.0), "elo")
    labels = {"space": "duel", "model": "elo", "window": "recent"}
    p_all = np.array([e[0] for e in events])
    y_all = np.array([e[1] for e in events])
    assert_bins_equal_batch(reg, {**labels, "group": "all"}, p_all[-window_n:], y_all[-window_n:])
    # the first event chose the group; it is counted in "all" only
    top = events[0][2]
    mine = np.array([k for k, e in enumerate(events) if k > 0 and e[2] == top], dtype=int)
    if mine.size:
        last = mine[-window_n:]
        assert_bins_equal_batch(reg, {**labels, "group": top}, p_all[last], y_all[last])
    # only the recent window is binned
    assert (
        reg.get_sample_value(
            "streamrate_quality_bin_events",
            {**labels, "window": "reference", "group": "all", "bin": "0"},
        )
        is None
    )


def test_bins_of_an_emptied_group_stay_exported_and_fill_in_order() -> None:
    reg = CollectorRegistry()
    obs = QualityObserver(
        QualityMonitor(MonitorSettings(recent_n=4)), QualityMetrics(reg), "duel", 0
    )
    labels = {"space": "duel", "model": "elo", "window": "recent", "group": "all"}
    for i, p in enumerate([0.05, 0.95, 0.95, 0.55]):
        obs(_event(i, 1.0, "saltflats"), Prediction(p, 0.0), "elo")
    rows = exported_bins(reg, labels)
    assert [r[2] for r in rows] == [1, 0, 0, 0, 0, 1, 0, 0, 0, 2]
    assert rows[9][:2] == (pytest.approx(0.95), 1.0)
    for p in [0.35] * 4:  # the window moves on: the old bins empty out, still exported
        obs(_event(9, 0.0, "saltflats"), Prediction(p, 0.0), "elo")
    rows = exported_bins(reg, labels)
    assert [r[2] for r in rows] == [0, 0, 0, 4, 0, 0, 0, 0, 0, 0]
    assert rows[3][:2] == (pytest.approx(0.35), 0.0)
    assert all(math.isnan(r[0]) and math.isnan(r[1]) for i, r in enumerate(rows) if i != 3)


def test_observer_counts_change_detections_at_once() -> None:
    reg = CollectorRegistry()
    mon = QualityMonitor(MonitorSettings(change_threshold=3.0, change_min_events=5))
    obs = QualityObserver(mon, QualityMetrics(reg), "duel", publish_every_s=1e9)
    for i in range(60):  # confident and right, then confident and wrong
        right = i < 40
        obs(_event(i, 1.0 if right else 0.0, "saltflats"), Prediction(0.9, 0.0), "elo")
    up = {"space": "duel", "model": "elo", "direction": "up"}
    fired = reg.get_sample_value("streamrate_drift_change_detected_total", up)
    assert fired == mon.models_["elo"].change_["up"].n_alarms >= 1
