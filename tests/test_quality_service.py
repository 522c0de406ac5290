"""The quality gauges of a running service (on fakeredis) match its own predictions."""

from __future__ import annotations

import threading
import time
from pathlib import Path

import fakeredis
import numpy as np
import pytest
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings

from streamrate.calibration import expected_calibration_error, log_loss
from streamrate.client import send_events
from streamrate.config import (
    QualitySettings,
    SpaceSettings,
)
from streamrate.events import MatchEvent, event_to_json
from streamrate.models.base import Prediction
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec
from tests.reliability_bins import assert_bins_equal_batch

WORLD = simulate(world_spec("cyclic", matches=400, entities=20, seed=5)).events


def test_running_service_publishes_quality_of_what_it_predicted(tmp_path: Path) -> None:
    seen: list[tuple[float, float]] = []

    def collect(event: MatchEvent, pred: Prediction, kind: str) -> None:
        seen.append((pred.expected_score, event.score))

    space = SpaceSettings(
        name="duel",
        model="elo",
        model_settings={"compiled": False},
        batch_count=40,
        block_ms=5,
        quality=QualitySettings(
            recent_events=100,
            reference_events=200,
            group_field="map",
            group_top_k=2,
            drift_fields=("map",),
            publish_every_s=0.0,
        ),
    )
    settings = fake_settings(tmp_path, space)
    server = fakeredis.FakeServer()
    registry = CollectorRegistry()
    svc = Service(settings, lambda: fakeredis.FakeRedis(server=server), registry, [collect])
    stop = threading.Event()
    svc.start(stop)
    try:
        send_events(
            fakeredis.FakeRedis(server=server),
            "{sr:duel}:events",
            [event_to_json(e) for e in WORLD],
        )
        deadline = time.monotonic() + 30
        while len(seen) < len(WORLD):
            assert time.monotonic() < deadline, "service did not apply every event"
            time.sleep(0.01)
    finally:
        stop.set()
        svc.join()
    p, y = np.array(seen).T
    labels = {"space": "duel", "model": "elo", "window": "recent", "group": "all"}
    get = registry.get_sample_value
    assert get("streamrate_quality_window_events", labels) == 100
    assert get("streamrate_quality_log_loss", labels) == pytest.approx(log_loss(p[-100:], y[-100:]))
    ece = expected_calibration_error(p[-100:], y[-100:])
    assert get("streamrate_quality_ece", labels) == pytest.approx(ece)
    ref = {**labels, "window": "reference"}
    assert get("streamrate_quality_log_loss", ref) == pytest.approx(
        log_loss(p[-300:-100], y[-300:-100])
    )
    assert_bins_equal_batch(registry, labels, p[-100:], y[-100:])
    psi = get("streamrate_drift_psi", {"space": "duel", "model": "elo", "feature": "map"})
    assert psi is not None and 0.0 <= psi < 0.25  # maps are drawn uniformly
    counter = {"space": "duel", "model": "elo", "direction": "up"}
    assert get("streamrate_drift_change_detected_total", counter) is not None


def test_recalibrated_model_is_scored_raw_and_served_and_its_correction_published(
    tmp_path: Path,
) -> None:
    """The raw model keeps its own quality series (alerts fire on it) while the
    recalibrated numbers are served, and the correction itself is a gauge."""
    from streamrate.models.elo import Elo
    from streamrate.models.registry import build_model

    base_settings = {"k": 120.0, "compiled": False}  # an over-confident Elo
    space = SpaceSettings(
        name="duel",
        model="recalibrated",
        model_settings={"base": "elo", "base_settings": base_settings},
        batch_count=40,
        block_ms=5,
        quality=QualitySettings(recent_events=100, reference_events=200, publish_every_s=0.0),
    )
    settings = fake_settings(tmp_path, space)
    server = fakeredis.FakeServer()
    registry = CollectorRegistry()
    svc = Service(settings, lambda: fakeredis.FakeRedis(server=server), registry)
    stop = threading.Event()
    svc.start(stop)
    live = svc.spaces[0].consumer.live
    try:
        send_events(
            fakeredis.FakeRedis(server=server),
            "{sr:duel}:events",
            [event_to_json(e) for e in WORLD],
        )
        deadline = time.monotonic() + 30
        while live.applied < len(WORLD):
            assert time.monotonic() < deadline, "service did not apply every event"
            time.sleep(0.01)
        svc.spaces[0].consumer.observers[0].publish()  # type: ignore[attr-defined]
    finally:
        stop.set()
        svc.join()
    get = registry.get_sample_value
    y = np.array([e.score for e in WORLD])
    raw = Elo(**base_settings).learn_many(WORLD).expected_score
    served = (
        build_model("recalibrated", base="elo", base_settings=base_settings)
        .learn_many(WORLD)
        .expected_score
    )
    labels = {"space": "duel", "window": "recent", "group": "all"}
    raw_ll = get("streamrate_quality_log_loss", {**labels, "model": "elo.raw"})
    served_ll = get("streamrate_quality_log_loss", {**labels, "model": "recalibrated"})
    assert raw_ll == pytest.approx(log_loss(raw[-100:], y[-100:]))
    assert served_ll == pytest.approx(log_loss(served[-100:], y[-100:]))
    assert served_ll < raw_ll  # the correction helps an over-confident model
    slope = get("streamrate_recalibration_slope", {"space": "duel", "model": "recalibrated"})
    assert slope == pytest.approx(live.model.recalibrator_.slope)  # type: ignore[attr-defined]
    assert 0.0 < slope < 1.0  # it shrinks the over-confident logit
