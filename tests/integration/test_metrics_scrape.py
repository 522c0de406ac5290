"""The Prometheus endpoint of a running service, scraped over HTTP, against a real Redis."""

from __future__ import annotations

import threading
import urllib.request
from pathlib import Path

import numpy as np
import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from streamrate.calibration import log_loss
from streamrate.client import ask, send_events
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    QualitySettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.models.registry import build_model
from streamrate.service import Service, redis_factory
from tests.integration.helpers import READY_WAIT_S

from .conftest import RedisServer, free_port
from .helpers import MODEL, MODEL_SETTINGS, wait_for, world_lines

pytestmark = pytest.mark.integration
EVENTS = "{sr:duel}:events"
Q = "{sr:duel}:q"


def _scrape(port: int) -> dict[tuple[str, frozenset[tuple[str, str]]], float]:
    body = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read()
    return {
        (s.name, frozenset(s.labels.items())): s.value
        for fam in text_string_to_metric_families(body.decode())
        for s in fam.samples
    }


def test_scraped_metrics_match_what_the_service_did(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    lines, events, junk = world_lines(1500, seed=23)
    retries = len(lines) - len(events) - junk
    recent = 400
    space = SpaceSettings(
        name="duel",
        model=MODEL,
        model_settings=MODEL_SETTINGS,
        batch_count=100,
        block_ms=20,
        dedupe_window_s=1e9,
        quality=QualitySettings(recent_events=recent, reference_events=800, publish_every_s=0.0),
    )
    port = free_port()
    settings = Settings(
        redis=RedisSettings(url=redis_server.url),
        checkpoint=CheckpointSettings(dir=tmp_path),
        metrics=MetricsSettings(enabled=True, bind="127.0.0.1", port=port),
        spaces=(space,),
    )
    service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
    stop = threading.Event()
    service.start(stop)
    try:
        assert service.spaces[0].ready.wait(READY_WAIT_S)
        r = redis_server.client()
        send_events(r, EVENTS, lines)

        def handled() -> float:
            return sum(
                v
                for (name, _), v in _scrape(port).items()
                if name == "streamrate_consumer_events_total"
            )

        # Counters move once a whole batch is handled: wait on the endpoint itself,
        # until every stream entry (valid, junk or retry) has been counted.
        wait_for(lambda: handled() == len(lines), 60, "every entry counted")
        wait_for(lambda: r.pubsub_numsub(Q)[0][1] > 0, 10, "the query responder")
        e = events[-1]
        ok = ask(r, Q, {"kind": "pairing", "first": list(e.first), "second": list(e.second)})
        bad = ask(r, Q, {"kind": "pairing", "first": [], "second": ["x"]})
        assert ok["ok"] and not bad["ok"]
        got = _scrape(port)
    finally:
        stop.set()
        service.join()

    def value(name: str, **labels: str) -> float:
        return got[(name, frozenset(labels.items()))]

    applied = value("streamrate_consumer_events_total", space="duel", outcome="applied")
    assert applied == len(events)
    dead = value("streamrate_consumer_events_total", space="duel", outcome="dead_lettered")
    assert dead == junk
    dupes = value("streamrate_consumer_events_total", space="duel", outcome="duplicate")
    assert dupes == retries
    pairing = value("streamrate_query_requests_total", space="duel", kind="pairing", outcome="ok")
    assert pairing == 1
    errors = sum(
        v
        for (name, labels), v in got.items()
        if name == "streamrate_query_requests_total" and ("outcome", "error") in labels
    )
    assert errors == 1
    # The quality gauge equals the log loss of the same model, run alone on the
    # same events, over the last `recent` events (each predicted before learning).
    alone = build_model(MODEL, **MODEL_SETTINGS)
    preds = alone.learn_many(events)
    y = np.array([ev.score for ev in events])
    want = log_loss(preds.expected_score[-recent:], y[-recent:])
    gauge = value(
        "streamrate_quality_log_loss", space="duel", model=MODEL, window="recent", group="all"
    )
    assert gauge == pytest.approx(want, rel=1e-9)
