"""The web server over plain HTTP against a real Redis and the running service."""

from __future__ import annotations

import json
import time
import urllib.error

import pytest

from streamrate.web.hub import version_order
from tests.integration.helpers import wait_for

from .conftest import Stack, busiest_pair, world
from .sse import SSEReader

pytestmark = pytest.mark.integration


def _path(a: str, b: str) -> str:
    return f"/api/watch?p={a}:{b}"


def test_sse_sends_the_current_value_then_every_change_as_the_service_computes_it(
    stack: Stack,
) -> None:
    events = world(900)
    a, b = busiest_pair(events)
    stack.start_service()
    stack.send(events[:300])
    wait_for(lambda: stack.applied() == 300, 30, "the first events")
    stack.start_web()
    sse = SSEReader(stack.web_port, _path(a, b))
    assert sse.status == 200
    first = sse.next_of("p").json()
    want = stack.ask(a, b)
    assert first["p_first_wins"] == want["p_first_wins"]
    assert version_order(first["model_version"]) <= version_order(want["model_version"])
    # every later change: compare each with a replay of the service's own answer
    touching = [e for e in events[300:] if {a, b} & set(e.entities())]
    stack.send(events[300:])
    got = []
    while len(got) < len(touching):
        got.append(sse.next_of("p").json())
    assert [g["match_id"] for g in got] == [e.match_id for e in touching]
    wait_for(lambda: stack.applied() == 900, 30, "all events")
    assert got[-1]["p_first_wins"] == stack.ask(a, b)["p_first_wins"]
    sse.close()


def test_reconnecting_with_last_event_id_resumes_without_a_gap(stack: Stack) -> None:
    events = world(800)
    a, b = busiest_pair(events)
    stack.start_service()
    stack.start_web()
    first = SSEReader(stack.web_port, _path(a, b))
    first.next_of("p")
    stack.send(events[:300])
    touching = [e.match_id for e in events[:800] if {a, b} & set(e.entities())]
    seen = [first.next_of("p").json()["match_id"] for _ in range(5)]
    last_id = first.last_id
    first.close()  # the browser drops; the server keeps the pairing for linger_s
    stack.send(events[300:])
    wait_for(lambda: stack.applied() == 800, 30, "all events")
    second = SSEReader(stack.web_port, _path(a, b), {"Last-Event-ID": str(last_id)})
    resumed = []
    while len(seen) + len(resumed) < len(touching) + 1:
        msg = second.next_of("p").json()
        if msg["match_id"] in seen:  # the event at Last-Event-ID itself comes again
            continue
        resumed.append(msg["match_id"])
        if resumed[-1] == touching[-1]:
            break
    assert seen + resumed == touching
    second.close()


def test_snapshot_answers_watched_and_unwatched_pairings(stack: Stack) -> None:
    events = world(400)
    a, b = busiest_pair(events)
    stack.start_service()
    stack.send(events)
    wait_for(lambda: stack.applied() == 400, 30, "all events")
    stack.start_web()
    # 503 means the service did not answer within the web server's ask timeout
    # (a busy machine): ask again until a deadline rather than race one timeout.
    deadline = time.monotonic() + 60
    while True:
        try:
            with stack.get(f"/api/snapshot?p={a}:{b}&p={b}:{a}&ctx=map=saltflats") as resp:
                body = json.loads(resp.read())
            break
        except urllib.error.HTTPError as exc:
            if exc.code != 503 or time.monotonic() > deadline:
                raise
            time.sleep(0.5)
    ctx = {"map": "saltflats"}
    assert [p["p_first_wins"] for p in body["pairings"]] == [
        stack.ask(a, b, ctx)["p_first_wins"],
        stack.ask(b, a, ctx)["p_first_wins"],
    ]


def test_limits_read_only_and_no_cors_by_default(redis_server, tmp_path) -> None:  # type: ignore[no-untyped-def]
    stack = Stack(redis_server, tmp_path, metrics=False, max_clients=1, max_pairings_per_client=2)
    try:
        stack.start_service()
        stack.start_web()
        one = SSEReader(stack.web_port, "/api/watch?p=a:b")
        assert one.status == 200
        two = SSEReader(stack.web_port, "/api/watch?p=c:d")
        assert two.status == 503  # the client cap
        three = SSEReader(stack.web_port, "/api/watch?p=a:b&p=c:d&p=e:f")
        assert three.status == 400  # pairings per client
        bad = SSEReader(stack.web_port, "/api/watch?p=a:a")
        assert bad.status == 400  # one entity on both sides
        for r in (two, three, bad):
            r.close()
        req = urllib.request.Request(stack.url("/api/watch?p=a:b"), method="POST", data=b"")
        with pytest.raises(urllib.error.HTTPError) as err:
            urllib.request.urlopen(req, timeout=5)
        assert err.value.code == 405
        with stack.get("/api/config", {"Origin": "http://elsewhere.example"}) as resp:
            assert resp.headers.get("access-control-allow-origin") is None
        one.close()
    finally:
        stack.close()


def test_a_token_is_required_when_set(redis_server, tmp_path) -> None:  # type: ignore[no-untyped-def]
    token = "t" * 24
    stack = Stack(
        redis_server, tmp_path, metrics=False, token=token, cors_origins=("http://x.test",)
    )
    try:
        stack.start_service()
        stack.start_web()
        with pytest.raises(urllib.error.HTTPError) as err:
            stack.get("/api/config")
        assert err.value.code == 401
        with stack.get("/api/config", {"Authorization": f"Bearer {token}"}) as resp:
            assert json.loads(resp.read())["space"] == "duel"
        with stack.get(f"/overlay?p=a:b&token={token}") as resp:
            assert resp.status == 200
        with stack.get("/static/overlay.css") as resp:  # no data in the assets
            assert resp.status == 200
        hdr = {"Authorization": f"Bearer {token}", "Origin": "http://x.test"}
        with stack.get("/api/config", hdr) as resp:
            assert resp.headers.get("access-control-allow-origin") == "http://x.test"
    finally:
        stack.close()
