"""Readiness, refusal of a foreign checkpoint, loop-error back-off and the start
position of a space with no checkpoint (fakeredis; the real-server versions are in
tests/integration/test_service_start.py)."""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import fakeredis
import numpy as np
import pytest
from prometheus_client import CollectorRegistry, generate_latest
from service_fakes import fake_settings

from streamrate.checkpoint import Checkpoint, FileCheckpointStore, encode_checkpoint
from streamrate.config import Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.dedupe import SeenIds
from streamrate.errors import CheckpointRefusedError
from streamrate.events import MatchEvent, Matchup, event_to_json
from streamrate.health import BAD, from_metrics_text, worst
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Model, Prediction
from streamrate.models.registry import build_model
from streamrate.quality import MonitorSettings, QualityMonitor
from streamrate.quality_metrics import QualityMetrics, QualityObserver
from streamrate.service import LoopErrors, Service, SpaceService
from streamrate.simulate import simulate, world_spec

WORLD = simulate(world_spec("plain", matches=200, entities=16, seed=4)).events
ELO = {"compiled": False}
SPACE = SpaceSettings(
    name="duel",
    model="elo",
    model_settings=ELO,
    batch_count=30,
    block_ms=5,
    checkpoint_every_events=10**6,
    checkpoint_every_s=10**6,
    claim_idle_ms=0,
    dedupe_window_s=1e9,
)
KEYS = Settings(spaces=(SPACE,)).keys(SPACE)
PAIRING = {"kind": "pairing", "first": ["a"], "second": ["b"]}


def _wait(cond: Callable[[], bool], what: str, timeout_s: float = 30) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.01)


def _ask(sp: SpaceService, request: dict[str, Any]) -> dict[str, Any]:
    body = {"id": "x", "reply_to": f"{KEYS.requests}:reply:t", **request}
    _, reply = sp.responder.answer(json.dumps(body).encode())
    out: dict[str, Any] = json.loads(reply)
    return out


def _space_service(
    tmp_path: Path, server: fakeredis.FakeServer, space: SpaceSettings = SPACE, **kw: Any
) -> SpaceService:
    return SpaceService(
        fake_settings(tmp_path, space),
        space,
        lambda: fakeredis.FakeRedis(server=server),
        ServiceMetrics(CollectorRegistry(), [space.name]),
        **kw,
    )


def _checkpoint_file(tmp_path: Path, model: Model, last_id: str = "1-0") -> Path:
    blob = encode_checkpoint(Checkpoint(model.to_state(), last_id, 50, SeenIds(10, 60.0)))
    path = tmp_path / "duel.ckpt.npz"
    path.write_bytes(blob)
    return path


def _push(r: Any, events: list[MatchEvent]) -> list[bytes]:
    return [r.xadd(KEYS.events, {"event": event_to_json(e)}) for e in events]


# -- readiness -------------------------------------------------------------------------
class _SlowStore(FileCheckpointStore):
    """A checkpoint store whose load waits until the test lets it go."""

    def __init__(self, directory: Path) -> None:
        super().__init__(directory, "duel")
        self.entered = threading.Event()
        self.release = threading.Event()

    def load(self) -> bytes | None:
        self.entered.set()
        self.release.wait(30)
        return super().load()


def test_questions_before_the_checkpoint_is_loaded_get_not_ready(tmp_path: Path) -> None:
    trained = build_model("elo", **ELO)
    trained.learn_many(WORLD[:50])
    _checkpoint_file(tmp_path, trained)
    server = fakeredis.FakeServer()
    sp = _space_service(tmp_path, server)
    slow = _SlowStore(tmp_path)
    sp.consumer.store = slow
    stop = threading.Event()
    worker = threading.Thread(target=sp.consume, args=(stop,))
    worker.start()
    try:
        assert slow.entered.wait(10)
        for request in (PAIRING, {"kind": "lobby", "entities": ["a", "b"], "team_sizes": [1, 1]}):
            rep = _ask(sp, request)
            assert rep["ok"] is False and rep["status"] == "loading", rep
            assert rep["error"].startswith("not ready: loading")
        slow.release.set()
        _wait(lambda: sp.consumer.live.status == "ready", "ready")
        a, b = WORLD[0].first, WORLD[0].second
        rep = _ask(sp, {"kind": "pairing", "first": list(a), "second": list(b)})
        assert rep["ok"] is True
        assert rep["applied"] == 50 and "behind" in rep
        assert rep["p_first_wins"] == pytest.approx(
            trained.predict(Matchup(first=a, second=b)).p_win
        )
    finally:
        slow.release.set()
        stop.set()
        worker.join()


def test_answers_while_catching_up_say_how_far_behind(tmp_path: Path) -> None:
    server = fakeredis.FakeServer()
    r = fakeredis.FakeRedis(server=server)
    _push(r, WORLD[:150])
    c = _space_service(tmp_path, server).consumer
    c.recover()
    c.mark("ready", "applying events")
    assert c.live.behind == 150  # nothing read yet
    while c.live.applied < 30:
        c.step()  # one batch of 30
    c.behind_at = -1e9  # the refresh is due
    c.tick()
    assert c.live.behind == 120


# -- a checkpoint that does not fit -----------------------------------------------------
@pytest.mark.parametrize(
    ("written", "asked", "words"),
    [
        (build_model("bradley_terry"), SPACE, ["holds model 'bradley_terry'", "ask for 'elo'"]),
        (
            build_model("elo", k=16.0, compiled=False),
            SPACE.model_copy(update={"model_settings": {"k": 40.0, "compiled": False}}),
            ["other settings", "k: 16.0 in the checkpoint, 40.0 asked"],
        ),
        (None, SPACE, ["is not a checkpoint this version reads"]),
    ],
)
def test_a_checkpoint_that_does_not_fit_stops_the_start(
    tmp_path: Path, written: Model | None, asked: SpaceSettings, words: list[str]
) -> None:
    if written is None:
        (tmp_path / "duel.ckpt.npz").write_bytes(b"not a checkpoint at all")
    else:
        _checkpoint_file(tmp_path, written)
    server = fakeredis.FakeServer()
    svc = Service(
        fake_settings(tmp_path, asked),
        lambda: fakeredis.FakeRedis(server=server),
        CollectorRegistry(),
    )
    stop = threading.Event()
    with pytest.raises(CheckpointRefusedError) as info:
        svc.run(stop)
    text = str(info.value)
    assert "\n" not in text
    assert f"checkpoint file {tmp_path / 'duel.ckpt.npz'}" in text
    assert "point space 'duel' at another checkpoint" in text and "move the file aside" in text
    for w in words:
        assert w in text, text
    assert svc.spaces[0].consumer.live.status != "ready"


def test_a_checkpoint_differing_only_in_how_kernels_run_is_accepted(tmp_path: Path) -> None:
    written = build_model("elo", compiled=True)
    written.learn_many(WORLD[:20])
    _checkpoint_file(tmp_path, written)
    server = fakeredis.FakeServer()
    c = _space_service(tmp_path, server).consumer
    c.recover()
    assert c.live.model.seen(WORLD[0].first[0]) > 0


# -- loop errors ----------------------------------------------------------------------------
def test_loop_errors_back_off_and_each_kind_is_logged_once(
    caplog: pytest.LogCaptureFixture,
) -> None:
    now = [0.0]
    errors = LoopErrors("space duel", 0.05, 1.0, clock=lambda: now[0])
    delays = []
    with caplog.at_level(logging.INFO, logger="streamrate.service"):
        for _ in range(8):
            errors.failed(RuntimeError("observer bug"))
            delays.append(errors.delay)
            now[0] += 1.0
        errors.failed(KeyError("other"))
        now[0] += 100.0
        errors.failed(RuntimeError("observer bug"))
        errors.ok()
    assert delays == [0.05, 0.1, 0.2, 0.4, 0.8, 1.0, 1.0, 1.0]
    tracebacks = [r for r in caplog.records if r.exc_info]
    assert [str(r.exc_info[1]) for r in tracebacks if r.exc_info] == ["observer bug", "'other'"]
    again = [r.getMessage() for r in caplog.records if "loop again" in r.getMessage()]
    assert len(again) == 1 and "9 times so far" in again[0]
    assert "after 10 errors" in caplog.records[-1].getMessage()
    assert errors.delay == 0.05


def test_a_failing_consumer_is_stalled_answers_not_ready_and_health_says_bad(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    broken = {"on": True}

    def observer(event: MatchEvent, pred: Prediction, kind: str) -> None:
        if broken["on"]:
            raise RuntimeError("observer bug")

    server = fakeredis.FakeServer()
    registry = CollectorRegistry()
    space = SPACE.model_copy(update={"checkpoint_every_events": 50})
    settings = fake_settings(tmp_path, space)
    svc = Service(settings, lambda: fakeredis.FakeRedis(server=server), registry, [observer])
    sp = svc.spaces[0]
    stop = threading.Event()
    with caplog.at_level(logging.INFO, logger="streamrate.service"):
        svc.start(stop)
        try:
            _push(fakeredis.FakeRedis(server=server), WORLD[:100])
            errors = "streamrate_consumer_loop_errors_total"
            _wait(lambda: (registry.get_sample_value(errors, {"space": "duel"}) or 0) >= 4, "errs")
            assert sp.consumer.live.status == "stalled"
            rep = _ask(sp, PAIRING)
            assert rep["ok"] is False and rep["status"] == "stalled"
            assert "observer bug" in rep["error"]
            lines = from_metrics_text(generate_latest(registry).decode())
            assert worst(lines) == BAD
            verdicts = {x.what: x.verdict for x in lines}
            assert verdicts["consumer stalled"] == BAD
            assert verdicts["loop errors in a row"] == BAD
            broken["on"] = False
            _wait(lambda: sp.consumer.live.applied == 100, "all events")
            _wait(lambda: sp.consumer.live.status == "ready", "ready again")
            assert _ask(sp, PAIRING)["ok"] is True
        finally:
            stop.set()
            svc.join()
    tracebacks = [r for r in caplog.records if r.exc_info]
    assert len(tracebacks) == 1  # one kind of error: one traceback, then counts
    lines = from_metrics_text(generate_latest(registry).decode())
    assert {x.what: x.verdict for x in lines}["loop errors in a row"] != BAD


def test_health_says_bad_while_redis_is_unreachable() -> None:
    reg = CollectorRegistry()
    m = ServiceMetrics(reg, ["duel"])
    m.state.labels(space="duel", state="loading").set(0)
    m.state.labels(space="duel", state="ready").set(1)
    assert worst(from_metrics_text(generate_latest(reg).decode())) != BAD
    m.redis_connected.labels(space="duel").set(0)
    lines = from_metrics_text(generate_latest(reg).decode())
    assert {x.what: x.verdict for x in lines}["Redis connected"] == BAD


# -- where a space with no checkpoint starts ---------------------------------------------------
def _consumer(r: Any, tmp_path: Path, space: SpaceSettings = SPACE, **kw: Any) -> Consumer:
    metrics = ServiceMetrics(CollectorRegistry(), [space.name])
    store = FileCheckpointStore(tmp_path, space.name)
    return Consumer(r, space, KEYS, store, metrics, lambda: build_model("elo", **ELO), **kw)


def _drain(c: Consumer) -> None:
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return


def _reference(events: list[MatchEvent]) -> np.ndarray:
    m = build_model("elo", **ELO)
    m.learn_many(events)
    return np.asarray(m.to_state().arrays["ratings"])


def test_no_checkpoint_learns_the_history_already_in_the_stream(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    r = fakeredis.FakeRedis()
    _push(r, WORLD[:120])
    # A group left from an earlier run has read everything; its checkpoint is gone.
    r.xgroup_create(KEYS.events, SPACE.group, id="$")
    c = _consumer(r, tmp_path)
    with caplog.at_level(logging.INFO, logger="streamrate.consumer"):
        c.recover()
    assert any("first entry" in m and "120 entries to read" in m for m in caplog.messages)
    _drain(c)
    assert c.live.applied == 120
    np.testing.assert_allclose(
        c.live.model.to_state().arrays["ratings"], _reference(WORLD[:120]), rtol=1e-12
    )


@pytest.mark.parametrize("start_from", ["now", "id"])
def test_start_from_now_or_an_id_skips_earlier_entries_durably(
    tmp_path: Path, start_from: str
) -> None:
    r = fakeredis.FakeRedis()
    ids = _push(r, WORLD[:100])
    how = ids[60].decode() if start_from == "id" else "now"
    first = 60 if start_from == "id" else 100  # the id given is the first entry read
    space = SPACE.model_copy(update={"start_from": how})
    c = _consumer(r, tmp_path, space)
    c.recover()
    _push(r, WORLD[100:130])
    c.step()
    c.step()  # part of it, then the process dies before any checkpoint of events
    c = _consumer(r, tmp_path, space)
    c.recover()
    _drain(c)
    assert c.live.applied == 130 - first
    np.testing.assert_allclose(
        c.live.model.to_state().arrays["ratings"], _reference(WORLD[first:130]), rtol=1e-12
    )


def test_start_from_is_checked() -> None:
    for ok in ("first", "now", "1700000000000", "1700000000000-3"):
        assert SpaceSettings(start_from=ok).start_from == ok
    with pytest.raises(ValueError, match="start_from"):
        SpaceSettings(start_from="yesterday")


# -- quality gauges on a timer ------------------------------------------------------------------
def test_quality_gauges_show_a_burst_while_the_stream_is_idle(tmp_path: Path) -> None:
    now = [0.0]
    registry = CollectorRegistry()
    obs = QualityObserver(
        QualityMonitor(MonitorSettings(recent_n=1000, reference_n=1000)),
        QualityMetrics(registry),
        "duel",
        publish_every_s=5.0,
        clock=lambda: now[0],
    )
    r = fakeredis.FakeRedis()
    c = _consumer(r, tmp_path, observers=[obs], clock=lambda: now[0])
    c.recover()
    now[0] = 4.0
    _push(r, WORLD[:90])
    _drain(c)  # the whole burst within 5 s of the start: nothing published yet
    labels = {"space": "duel", "model": "elo", "window": "recent", "group": "all"}
    before = registry.get_sample_value("streamrate_quality_window_events", labels)
    assert before is None
    now[0] = 9.5  # no more events; the loop keeps turning
    c.tick()
    assert registry.get_sample_value("streamrate_quality_window_events", labels) == 90


# -- models inside a model: every path reports them ---------------------------------------------
@pytest.mark.parametrize("watched", [False, True])
def test_raw_and_served_series_get_every_event_on_both_paths(tmp_path: Path, watched: bool) -> None:
    space = SPACE.model_copy(
        update={
            "model": "recalibrated",
            "model_settings": {"base": "elo", "base_settings": {"compiled": False}},
        }
    )
    counts: dict[str, int] = {}

    def count(event: MatchEvent, pred: Prediction, label: str) -> None:
        counts[label] = counts.get(label, 0) + 1

    server = fakeredis.FakeServer()
    sp = _space_service(tmp_path, server, space, observers=[count])
    c = sp.consumer
    c.recover()
    if watched:
        c.watch.set("t", [(WORLD[0].first, WORLD[0].second, {})], 60.0)
        assert c.watch.touches(WORLD[0].entities())
    _push(fakeredis.FakeRedis(server=server), WORLD)
    _drain(c)
    assert counts == {"recalibrated": len(WORLD), "elo.raw": len(WORLD)}


# -- what the log says ------------------------------------------------------------------------
def test_progress_and_promotions_are_logged(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    from streamrate.challengers import ChallengerSet
    from streamrate.consumer import LiveModel
    from streamrate.queries import Answerer, PromoteRequest

    now = [0.0]
    r = fakeredis.FakeRedis()
    c = _consumer(r, tmp_path, clock=lambda: now[0])
    c.recover()
    _push(r, WORLD[:40])
    _drain(c)
    with caplog.at_level(logging.INFO):
        now[0] = 31.0
        c.tick()
        cs = ChallengerSet({"quick": {"kind": "elo", "k": 32.0}, "calm": {"kind": "elo"}})
        Answerer(LiveModel(cs), 10, 256).promote(
            PromoteRequest(kind="promote", id="p", reply_to="r", model="calm")
        )
    assert any("40 events applied (+40 in 31 s)" in m for m in caplog.messages), caplog.messages
    assert any("calm answers now (was quick)" in m for m in caplog.messages)


def test_the_shipped_configs_never_share_a_stream_or_a_checkpoint() -> None:
    # Following the README top to bottom serves configs/service.toml, then
    # configs/challengers.toml against the same Redis and working directory.
    from streamrate.config import load_settings

    root = Path(__file__).resolve().parent.parent / "configs"
    seen: dict[str, str] = {}
    for name in ("service.toml", "challengers.toml"):
        s = load_settings(root / name)
        for sp in s.spaces:
            for where in (s.keys(sp).events, str(Path(s.checkpoint.dir) / sp.name)):
                assert where not in seen, f"{name} shares {where} with {seen[where]}"
                seen[where] = name
