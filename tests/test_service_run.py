"""The running service on fakeredis: loop-boundary errors, outages, the demo."""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, ClassVar

import fakeredis
import numpy as np
import pytest
import redis
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings

from streamrate.client import ask, send_events
from streamrate.config import SpaceSettings
from streamrate.demo import run_demo
from streamrate.events import MatchEvent, event_to_json
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Prediction
from streamrate.models.elo import Elo
from streamrate.models.registry import build_model
from streamrate.service import Service, SpaceService
from streamrate.simulate import simulate, world_spec

WORLD = simulate(world_spec("plain", matches=400, entities=20, seed=3)).events


def _wait(cond: Callable[[], bool], what: str, timeout_s: float = 30) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.01)


def _service(tmp_path: Path, server: fakeredis.FakeServer, observers: Any = ()) -> Service:
    space = SpaceSettings(
        name="duel",
        model="elo",
        model_settings={"compiled": False},
        batch_count=40,
        block_ms=5,
        checkpoint_every_events=100,
        dedupe_window_s=1e9,
    )
    settings = fake_settings(tmp_path, space)
    return Service(
        settings, lambda: fakeredis.FakeRedis(server=server), CollectorRegistry(), observers
    )


def _reference_ratings(events: list[MatchEvent]) -> np.ndarray:
    m = build_model("elo", compiled=False)
    for ev in events:
        m.learn(ev)
    return m.to_state().arrays["ratings"]


def test_an_error_inside_the_loop_is_counted_and_the_state_rebuilt(tmp_path: Path) -> None:
    calls = {"n": 0}

    def flaky(event: MatchEvent, pred: Prediction, kind: str) -> None:
        calls["n"] += 1
        if calls["n"] == 150:
            raise RuntimeError("observer bug")

    server = fakeredis.FakeServer()
    svc = _service(tmp_path, server, [flaky])
    stop = threading.Event()
    svc.start(stop)
    try:
        send_events(fakeredis.FakeRedis(server=server), "{sr:duel}:events",
                    [event_to_json(e) for e in WORLD])  # fmt: skip
        c = svc.spaces[0].consumer
        _wait(lambda: c.live.applied == len(WORLD), "all events")
    finally:
        stop.set()
        svc.join()
    errors = svc.registry.get_sample_value(
        "streamrate_consumer_loop_errors_total", {"space": "duel"}
    )
    assert errors == 1
    np.testing.assert_allclose(
        c.live.model.to_state().arrays["ratings"], _reference_ratings(WORLD), rtol=1e-12
    )


def test_an_outage_is_logged_once_and_the_service_resumes(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    server = fakeredis.FakeServer()
    svc = _service(tmp_path, server)
    stop = threading.Event()
    svc.start(stop)
    r = fakeredis.FakeRedis(server=server)
    c = svc.spaces[0].consumer
    try:
        send_events(r, "{sr:duel}:events", [event_to_json(e) for e in WORLD[:200]])
        _wait(lambda: c.live.applied == 200, "first half")
        with caplog.at_level("WARNING", logger="streamrate.service"):
            server.connected = False
            time.sleep(0.3)  # several failed attempts inside one outage
            server.connected = True
            send_events(r, "{sr:duel}:events", [event_to_json(e) for e in WORLD[200:]])
            _wait(lambda: c.live.applied == len(WORLD), "second half")
        # The responder re-subscribes after the outage on its own back-off.
        _wait(lambda: r.pubsub_numsub("{sr:duel}:q")[0][1] > 0, "the responder")
        rep = ask(r, "{sr:duel}:q", {"kind": "pairing", "first": ["a"], "second": ["b"]})
        assert rep["ok"]
    finally:
        stop.set()
        svc.join()
    outages = [m for m in caplog.messages if "unreachable" in m and "consumer" in m]
    assert len(outages) == 1
    assert (
        svc.registry.get_sample_value(
            "streamrate_redis_outages_total", {"space": "duel", "role": "consumer"}
        )
        == 1
    )
    np.testing.assert_allclose(
        c.live.model.to_state().arrays["ratings"], _reference_ratings(WORLD), rtol=1e-12
    )


def test_demo_runs_end_to_end_and_scores_its_predictions() -> None:
    lines: list[str] = []
    summary = run_demo(matches=1500, entities=20, rate_per_s=20_000, model="elo", out=lines.append)
    assert summary["applied"] == 1500
    assert summary["dead_lettered"] == 4 and summary["duplicates"] == 3
    # A model that learns beats a coin on this world (log loss of 0.5 is ln 2 = 0.693).
    assert summary["log_loss"] < np.log(2)
    assert any(line.startswith("[summary]") for line in lines)


class _ChokesOn(Elo):
    """An Elo that raises on one match id: a stand-in for an event that passes
    validation but that the model cannot learn from."""

    bad_id = "q-000250"

    def _check(self, events: Any) -> None:
        if any(e.match_id == self.bad_id for e in events):
            raise FloatingPointError("cannot learn from this one")

    def learn(self, event: MatchEvent) -> Prediction:
        self._check([event])
        return super().learn(event)

    def learn_many(self, events: Any) -> Any:
        self._check(events)
        return super().learn_many(events)


def test_an_event_the_model_cannot_learn_is_set_aside_and_the_stream_goes_on(
    tmp_path: Path,
) -> None:
    space = SpaceSettings(
        name="duel",
        model="elo",
        model_settings={"compiled": False},
        batch_count=40,
        block_ms=5,
        checkpoint_every_events=100_000,  # no checkpoint: recovery rebuilds from scratch
        checkpoint_every_s=1e6,
    )
    settings = fake_settings(tmp_path, space)
    server = fakeredis.FakeServer()
    registry = CollectorRegistry()
    metrics = ServiceMetrics(registry, ["duel"])
    sp = SpaceService(
        settings,
        space,
        lambda: fakeredis.FakeRedis(server=server),
        metrics,
        model_builder=lambda: _ChokesOn(compiled=False),
    )
    assert any(e.match_id == _ChokesOn.bad_id for e in WORLD)
    stop = threading.Event()
    worker = threading.Thread(target=sp.consume, args=(stop,))
    worker.start()
    try:
        send_events(fakeredis.FakeRedis(server=server), "{sr:duel}:events",
                    [event_to_json(e) for e in WORLD])  # fmt: skip
        c = sp.consumer
        _wait(lambda: c.live.applied == len(WORLD) - 1 and not c.careful, "the rest")
    finally:
        stop.set()
        worker.join()
    dead = fakeredis.FakeRedis(server=server).xrange("{sr:duel}:dead")
    assert len(dead) == 1
    fields = dead[0][1]
    assert b"could not learn" in fields[b"dead.reason"]
    assert _ChokesOn.bad_id.encode() in fields[b"event"]
    errors = registry.get_sample_value("streamrate_consumer_loop_errors_total", {"space": "duel"})
    assert errors == 2  # once in a whole batch, once when applied alone
    rest = [e for e in WORLD if e.match_id != _ChokesOn.bad_id]
    np.testing.assert_allclose(
        c.live.model.to_state().arrays["ratings"], _reference_ratings(rest), rtol=1e-12
    )


class _CutOnce(fakeredis.FakeRedis):
    """A client whose next blocked read of an armed stream is cut off by the server,
    as when a cluster slot moves (``UNBLOCKED the stream key no longer exists``)."""

    armed: ClassVar[set[str]] = set()

    def xreadgroup(
        self, groupname: Any, consumername: Any, streams: Any, *a: Any, **kw: Any
    ) -> Any:
        if kw.get("block") is not None:
            for key in streams:
                if key in _CutOnce.armed:
                    _CutOnce.armed.discard(key)
                    raise redis.ResponseError("UNBLOCKED the stream key no longer exists")
        return super().xreadgroup(groupname, consumername, streams, *a, **kw)


def test_a_blocked_read_cut_by_a_slot_move_is_counted_and_read_again(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    server = fakeredis.FakeServer()
    r = fakeredis.FakeRedis(server=server)
    space = SpaceSettings(
        name="duel", model="elo", model_settings={"compiled": False}, batch_count=40, block_ms=5
    )
    svc = Service(
        fake_settings(tmp_path, space), lambda: _CutOnce(server=server), CollectorRegistry()
    )
    events = [event_to_json(e) for e in WORLD[:200]]
    stop = threading.Event()
    sp = svc.spaces[0]
    assert sp.stream is not None
    svc.start(stop)

    def sample(name: str, **labels: str) -> float | None:
        return svc.registry.get_sample_value(name, {"space": "duel", **labels})

    try:
        send_events(r, "{sr:duel}:events", events[:100])
        _wait(lambda: sp.consumer.live.applied == 100 and sp.stream.ready.is_set(), "ready")
        caplog.clear()
        _CutOnce.armed |= {"{sr:duel}:events", "{sr:duel}:q:stream"}
        _wait(lambda: not _CutOnce.armed, "both reads cut")
        send_events(r, "{sr:duel}:events", events[100:])
        _wait(lambda: sp.consumer.live.applied == 200, "the rest applied")
        req = {"kind": "pairing", "first": list(WORLD[0].first), "second": list(WORLD[0].second)}
        rep = ask(r, "{sr:duel}:q", req, 10.0, stream="{sr:duel}:q:stream")
        assert rep["ok"], rep
    finally:
        stop.set()
        svc.join()
    for reader in ("consumer", "responder"):
        assert sample("streamrate_stream_reads_cut_total", reader=reader) == 1
    assert sample("streamrate_consumer_loop_errors_total") == 0
    assert sample("streamrate_query_loop_restarts_total", loop="answerer") == 0
    assert sample("streamrate_writer_starts_total", source="checkpoint") == 1  # no reload
    cut = [rec for rec in caplog.records if "cut off" in rec.getMessage()]
    assert len(cut) == 2
    assert all(rec.levelname == "WARNING" and rec.exc_info is None for rec in cut)
    assert not [rec for rec in caplog.records if rec.levelno >= logging.ERROR]
    assert np.allclose(
        sp.consumer.live.model.to_state().arrays["ratings"], _reference_ratings(WORLD[:200])
    )
