"""A whole stack per test: real redis-server, the service in process, the web server."""

from __future__ import annotations

import os
import shutil
import signal
import threading
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry

from streamrate.client import ask, send_events
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    QualitySettings,
    RedisSettings,
    Settings,
    SpaceSettings,
    WebSettings,
)
from streamrate.events import MatchEvent, event_to_json
from streamrate.service import Service, redis_factory
from streamrate.simulate import simulate, world_spec
from streamrate.web.hub import PairKey
from streamrate.web.server import WebServer
from tests.integration.conftest import RedisServer, free_port
from tests.integration.helpers import READY_WAIT_S

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"


class Stack:
    """redis-server + service + web server on free loopback ports; parts stop and start."""

    def __init__(self, redis_server: RedisServer, tmp: Path, metrics: bool, **web: Any) -> None:
        self.redis = redis_server
        space = SpaceSettings(
            name="duel",
            model="elo",
            # A fixed first-side advantage: a learned one moves every pairing a
            # little with every match, while the live feed publishes only the
            # pairings a match touches (the web server re-asks the rest now and then).
            model_settings={"advantage_k": 0.0},
            batch_count=20,
            block_ms=20,
            checkpoint_every_events=200,
            checkpoint_every_s=0.5,
            quality=QualitySettings(
                recent_events=200, reference_events=400, publish_every_s=0.0, drift_fields=("map",)
            ),
        )
        self.metrics_port = free_port()
        self.settings = Settings(
            redis=RedisSettings(url=redis_server.url, reconnect_max_s=0.2),
            checkpoint=CheckpointSettings(dir=tmp / "ckpt"),
            metrics=MetricsSettings(enabled=metrics, port=self.metrics_port),
            spaces=(space,),
        )
        self.keys = self.settings.keys(space)
        self.web_port = free_port()
        web.setdefault("probe_every_s", 0.3)
        web.setdefault("heartbeat_s", 1.0)
        web.setdefault("ask_timeout_s", 1.0)
        if metrics:
            web.setdefault("metrics_url", f"http://127.0.0.1:{self.metrics_port}/metrics")
            web.setdefault("quality_every_s", 0.3)
        self.web_settings = WebSettings(port=self.web_port, **web)
        self.service: Service | None = None
        self.stop_event = threading.Event()
        self.web: WebServer | None = None
        self.pinned: list[PairKey] = []

    # service
    def start_service(self, metrics: bool | None = None) -> None:
        settings = self.settings
        if metrics is False:  # the metrics port of a stopped service stays bound
            settings = settings.model_copy(update={"metrics": MetricsSettings(enabled=False)})
        self.stop_event = threading.Event()
        self.service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
        self.service.start(self.stop_event)
        assert self.service.spaces[0].ready.wait(READY_WAIT_S)
        assert self.service.spaces[0].listening.wait(READY_WAIT_S)

    def stop_service(self) -> None:
        if self.service is not None:
            self.stop_event.set()
            self.service.join()
            self.service = None

    # web server
    def start_web(self) -> None:
        self.web = WebServer(self.web_settings, self.settings, pinned=self.pinned)
        self.web.start()

    def stop_web(self) -> None:
        if self.web is not None:
            self.web.stop()
            self.web = None

    def metrics_url(self) -> str:
        return f"http://127.0.0.1:{self.metrics_port}/metrics"

    def url(self, path: str) -> str:
        return f"http://127.0.0.1:{self.web_port}{path}"

    def get(self, path: str, headers: dict[str, str] | None = None) -> Any:
        req = urllib.request.Request(self.url(path), headers=headers or {})
        return urllib.request.urlopen(req, timeout=10)

    # the stream and the model
    def send(self, events: list[MatchEvent]) -> None:
        send_events(self.redis.client(), self.keys.events, [event_to_json(e) for e in events])

    def ask(self, first: str, second: str, context: dict[str, Any] | None = None) -> Any:
        req = {"kind": "pairing", "first": [first], "second": [second], "context": context or {}}
        return ask(self.redis.client(), self.keys.requests, req)

    def applied(self) -> int:
        assert self.service is not None
        return int(self.service.spaces[0].consumer.live.applied)

    def close(self) -> None:
        self.stop_web()
        self.stop_service()


def world(matches: int, seed: int = 7) -> list[MatchEvent]:
    """The demo world (cyclic Quillrock duels among 40 players)."""
    return list(simulate(world_spec("cyclic", matches=matches, entities=40, seed=seed)).events)


def busiest_pair(events: list[MatchEvent]) -> tuple[str, str]:
    counts: dict[str, int] = {}
    for ev in events:
        for e in ev.entities():
            counts[e] = counts.get(e, 0) + 1
    top = sorted(counts, key=lambda e: (-counts[e], e))
    return top[0], top[1]


@pytest.fixture
def redis_server(tmp_path: Path) -> Iterator[RedisServer]:
    data = tmp_path / "redis"
    data.mkdir()
    server = RedisServer(data)
    server.start()
    try:
        yield server
    finally:
        server.stop(signal.SIGKILL)


@pytest.fixture
def stack(redis_server: RedisServer, tmp_path: Path) -> Iterator[Stack]:
    s = Stack(redis_server, tmp_path, metrics=True)
    try:
        yield s
    finally:
        s.close()


def chromium_or_skip() -> str:
    """Path of Debian's chromium; skip without it (fail under CI=true)."""
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        if os.environ.get("CI") == "true":
            pytest.fail("the playwright package is missing under CI")
        pytest.skip("the playwright package is not installed")
    if not os.path.exists(CHROMIUM):
        if os.environ.get("CI") == "true":
            pytest.fail("chromium is missing under CI (.ci/run installs it)")
        pytest.skip("chromium is not installed")
    return CHROMIUM
