"""A Redis outage is counted for each thread that lost its connection."""

from __future__ import annotations

import signal
import threading
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from streamrate.client import ask
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.service import Service, redis_factory
from tests.integration.helpers import READY_WAIT_S

from .conftest import RedisServer
from .helpers import wait_for

pytestmark = pytest.mark.integration


def test_the_query_sides_outage_is_counted_beside_the_consumers(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    settings = Settings(
        redis=RedisSettings(url=redis_server.url, reconnect_min_s=0.02, reconnect_max_s=0.2),
        checkpoint=CheckpointSettings(dir=tmp_path),
        metrics=MetricsSettings(enabled=False),  # on by default; tests must not share a port
        spaces=(SpaceSettings(name="duel", model="elo", block_ms=50),),
    )
    service = Service(settings, redis_factory(settings.redis), CollectorRegistry())

    def outages(role: str) -> float:
        got = service.registry.get_sample_value(
            "streamrate_redis_outages_total", {"space": "duel", "role": role}
        )
        assert got is not None  # pre-initialised for both roles
        return got

    stop = threading.Event()
    service.start(stop)
    try:
        assert service.spaces[0].ready.wait(READY_WAIT_S)
        wait_for(service.spaces[0].listening.is_set, 30, "the responder")
        assert outages("consumer") == outages("queries") == 0
        redis_server.stop(signal.SIGKILL)
        wait_for(lambda: outages("queries") >= 1 and outages("consumer") >= 1, 30, "both counted")
        redis_server.start()
        r = redis_server.client()
        wait_for(lambda: r.pubsub_numsub("{sr:duel}:q")[0][1] > 0, 30, "re-subscription")
        # Until the consumer is back too, questions are answered "not ready: stalled".
        live = service.spaces[0].consumer.live
        wait_for(lambda: live.status == "ready", 30, "the consumer to be ready again")
        assert ask(r, "{sr:duel}:q", {"kind": "pairing", "first": ["a"], "second": ["b"]})["ok"]
    finally:
        stop.set()
        service.join()
    assert outages("queries") == 1  # one outage, however many attempts inside it
