"""Queries (pairing, lobby, watch, bad requests) round-trip through a real redis-server."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from streamrate.client import ask, follow, send_events
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.events import Matchup, event_to_json
from streamrate.service import Service, redis_factory
from streamrate.simulate import simulate, world_spec
from tests.integration.helpers import READY_WAIT_S

from .conftest import RedisServer
from .helpers import MODEL, MODEL_SETTINGS, wait_for

pytestmark = pytest.mark.integration
WORLD = simulate(world_spec("cyclic", matches=600, entities=30, seed=4)).events
Q = "{sr:duel}:q"
R = "{sr:duel}:q:reply:tester:R"


@pytest.fixture
def running(redis_server: RedisServer, tmp_path: Path) -> Iterator[tuple[Service, RedisServer]]:
    space = SpaceSettings(
        name="duel", model=MODEL, model_settings=MODEL_SETTINGS, block_ms=50, batch_count=100
    )
    settings = Settings(
        redis=RedisSettings(url=redis_server.url),
        checkpoint=CheckpointSettings(dir=tmp_path),
        metrics=MetricsSettings(enabled=False),
        spaces=(space,),
    )
    service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
    stop = threading.Event()
    service.start(stop)
    assert service.spaces[0].ready.wait(READY_WAIT_S)
    r = redis_server.client()
    wait_for(lambda: r.pubsub_numsub(Q)[0][1] > 0, 10, "the query responder to subscribe")
    yield service, redis_server
    stop.set()
    service.join()


def _entities() -> list[str]:
    return sorted({e for ev in WORLD for e in ev.entities()})


def test_pairing_reply_reports_probability_seen_counts_and_version(
    running: tuple[Service, RedisServer],
) -> None:
    service, server = running
    r = server.client()
    send_events(r, "{sr:duel}:events", [event_to_json(e) for e in WORLD])
    wait_for(lambda: service.spaces[0].consumer.live.applied == len(WORLD), 30, "all applied")
    a, b = WORLD[-1].first[0], WORLD[-1].second[0]
    rep = ask(
        r, Q, {"kind": "pairing", "first": [a], "second": [b], "context": {"map": "glasswood"}}
    )
    assert rep["ok"] is True and rep["kind"] == "pairing"
    assert 0.0 < rep["p_first_wins"] < 1.0
    assert rep["p_draw"] is None  # this model has no draws
    played = {e: sum(e in ev.entities() for ev in WORLD) for e in (a, b)}
    assert rep["seen"] == played
    assert rep["model_version"] == r.xinfo_stream("{sr:duel}:events")["last-generated-id"].decode()
    back = ask(
        r, Q, {"kind": "pairing", "first": [b], "second": [a], "context": {"map": "glasswood"}}
    )
    assert back["p_first_wins"] != rep["p_first_wins"] or rep["p_first_wins"] == 0.5


@pytest.mark.parametrize("size", [6, 24])
def test_lobby_reply_has_matrix_and_split_of_requested_sizes(
    running: tuple[Service, RedisServer], size: int
) -> None:
    service, server = running
    r = server.client()
    send_events(r, "{sr:duel}:events", [event_to_json(e) for e in WORLD])
    wait_for(lambda: service.spaces[0].consumer.live.applied == len(WORLD), 30, "all applied")
    ids = _entities()[:size]
    rep = ask(r, Q, {"kind": "lobby", "entities": ids, "team_sizes": [size // 2, size // 2]})
    assert rep["ok"] is True, rep
    m = rep["matrix"]
    assert len(m) == size and all(len(row) == size for row in m)
    model = service.spaces[0].consumer.live.model
    for i in range(size):
        assert m[i][i] == 0.5
        for j in range(size):
            if i != j:
                p = model.predict(Matchup(first=(ids[i],), second=(ids[j],)))
                assert m[i][j] == pytest.approx(p.p_win, abs=1e-6)
    s = rep["split"]
    assert sorted(s["first"] + s["second"]) == sorted(ids)
    assert len(s["first"]) == len(s["second"]) == size // 2
    assert rep["method"] == ("exact" if size <= 10 else "heuristic")


BAD = [
    ("not json at all", None),
    (json.dumps({"kind": "pairing", "id": "b1", "reply_to": R}), "first"),
    (json.dumps({"kind": "teleport", "id": "b2", "reply_to": R}), "kind"),
    (
        json.dumps({"kind": "pairing", "id": "b3", "reply_to": R, "first": ["kelvash"],
                    "second": ["kelvash"]}),
        "both sides",
    ),
    (
        json.dumps({"kind": "lobby", "id": "b4", "reply_to": R, "entities": ["a", "b", "c"],
                    "team_sizes": [1, 1]}),
        "team_sizes",
    ),
    (
        json.dumps({"kind": "lobby", "id": "b5", "reply_to": R, "entities": ["a", "a"],
                    "team_sizes": [1, 1]}),
        "twice",
    ),
    (json.dumps({"kind": "pairing", "id": "b6", "first": ["a"], "second": ["b"]}), "reply_to"),
    (json.dumps({"kind": "pairing", "id": "b7", "reply_to": "{sr:duel}:live", "first": ["a"],
                 "second": ["b"]}), "reply namespace"),
]  # fmt: skip


def test_bad_requests_get_an_error_naming_the_problem(
    running: tuple[Service, RedisServer],
) -> None:
    _, server = running
    r = server.client()
    ps = r.pubsub(ignore_subscribe_messages=True)
    ps.subscribe(R, "{sr:duel}:q:errors", "{sr:duel}:live")
    for raw, _ in BAD:
        r.publish(Q, raw)
    replies = []
    deadline = time.monotonic() + 10
    while len(replies) < len(BAD) and time.monotonic() < deadline:
        msg = ps.get_message(timeout=0.2)
        if msg and msg["type"] == "message":
            replies.append((msg["channel"], json.loads(msg["data"])))
    assert len(replies) == len(BAD)
    # Replies to different clients may come in another order (the queue is fair
    # between clients): match them by id.
    by_id = {rep["id"]: (channel, rep) for channel, rep in replies}
    for raw, needle in BAD:
        cid = None if raw.startswith("not") else json.loads(raw)["id"]
        channel, rep = by_id[cid]
        assert rep["ok"] is False
        if needle is not None:
            assert needle in rep["error"], (raw, rep)
        refused = raw.startswith("not") or '"b6"' in raw or '"b7"' in raw
        expect = b"{sr:duel}:q:errors" if refused else R.encode()
        assert channel == expect
    ok = ask(r, Q, {"kind": "pairing", "first": ["a"], "second": ["b"]})
    assert ok["ok"] is True  # still answering after the bad ones


def test_watch_list_drives_the_live_feed(running: tuple[Service, RedisServer]) -> None:
    service, server = running
    r = server.client()
    a, b = WORLD[0].first[0], WORLD[0].second[0]
    pairs = [{"first": [a], "second": [b]}]
    rep = ask(r, Q, {"kind": "watch", "action": "set", "watcher": "t1", "pairings": pairs})
    assert rep["ok"] and rep["watching"] == 1 and rep["live_channel"] == "{sr:duel}:live:t1"
    got: list[dict[str, object]] = []
    stop, ready = threading.Event(), threading.Event()
    t = threading.Thread(
        target=follow, args=(server.client(), "{sr:duel}:live:t1", got.append, stop, ready)
    )
    t.start()
    ready.wait(5)
    send_events(r, "{sr:duel}:events", [event_to_json(e) for e in WORLD])
    touching = [e for e in WORLD if a in e.entities() or b in e.entities()]
    wait_for(lambda: len(got) >= len(touching), 30, "live messages")
    stop.set()
    t.join()
    assert [m["match_id"] for m in got] == [e.match_id for e in touching]
    assert [m["seq"] for m in got] == list(range(1, len(got) + 1))
    assert ask(r, Q, {"kind": "watch", "action": "clear", "watcher": "t1"})["watching"] == 0
    assert service.spaces[0].watch.affected([a, b]) == []


def test_ask_says_never_seen_and_strict_makes_it_an_error(
    running: tuple[Service, RedisServer],
) -> None:
    from typer.testing import CliRunner

    from streamrate.cli import app

    service, server = running
    send_events(server.client(), "{sr:duel}:events", [event_to_json(e) for e in WORLD])
    wait_for(lambda: service.spaces[0].consumer.live.applied == len(WORLD), 30, "all applied")
    known = WORLD[0].first[0]
    url = ["--redis-url", server.url]
    res = CliRunner().invoke(app, ["ask", known, "ghost", *url])
    assert res.exit_code == 0, res.output
    assert "never seen: ghost (newcomer estimate)" in res.stdout
    assert f"never seen: {known}" not in res.stdout
    strict = CliRunner().invoke(app, ["ask", known, "ghost", "--strict", *url])
    assert strict.exit_code == 2 and "error: never seen: ghost" in strict.stderr
    even = CliRunner().invoke(app, ["ask", "--lobby", ",".join(_entities()[:4]), *url])
    assert even.exit_code == 0 and "[exact] = exact" in even.stdout, even.output
