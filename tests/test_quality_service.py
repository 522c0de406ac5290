"""The quality gauges of a running service (on fakeredis) match its own predictions."""

from __future__ import annotations

import threading
import time
from pathlib import Path

import fakeredis
import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from streamrate.calibration import expected_calibration_error, log_loss
from streamrate.client import send_events
from streamrate.config import (
    CheckpointSettings,
    QualitySettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.events import MatchEvent, event_to_json
from streamrate.models.base import Prediction
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec

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
    settings = Settings(
        redis=RedisSettings(reconnect_min_s=0.01, reconnect_max_s=0.05),
        checkpoint=CheckpointSettings(dir=tmp_path),
        spaces=(space,),
    )
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
    psi = get("streamrate_drift_psi", {"space": "duel", "model": "elo", "feature": "map"})
    assert psi is not None and 0.0 <= psi < 0.25  # maps are drawn uniformly
    counter = {"space": "duel", "model": "elo", "direction": "up"}
    assert get("streamrate_drift_change_detected_total", counter) is not None
