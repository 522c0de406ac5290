"""Admission control and supervision of the query side (fakeredis, injected clocks)."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, cast

import fakeredis
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from service_fakes import fake_settings

from streamrate.client import ask, follow
from streamrate.config import SpaceSettings
from streamrate.consumer import LiveModel
from streamrate.models.registry import build_model
from streamrate.queries import Answerer, LobbyRequest, pair_matrix
from streamrate.responder import CpuBudget, FairQueue, Item, Responder, client_of
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec

PREFIX = "{sr:duel}:q:reply:"
WORLD = simulate(world_spec("cyclic", matches=400, entities=40, seed=3)).events


def _item(client: str, kind: str = "pairing", n: int = 0) -> Item:
    return Item(b"{}", 0.0, f"{client}-{n}", f"{PREFIX}{client}:{n}", kind, client)


def _wait(cond: Callable[[], bool], what: str, timeout_s: float = 20) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.02)


def test_the_fairness_key_is_the_client_part_of_the_reply_channel() -> None:
    assert client_of(f"{PREFIX}tab-7:abc", PREFIX) == "tab-7"
    assert client_of(f"{PREFIX}abc", PREFIX) == "abc"  # older clients: one key per request
    assert client_of("elsewhere", PREFIX) == "" and client_of(None, PREFIX) == ""


def test_a_quiet_client_is_served_before_a_flooders_backlog() -> None:
    q = FairQueue(max_total=100, max_per_client=50)
    for n in range(40):
        assert q.offer(_item("flood", n=n)) == []
    q.offer(_item("quiet"))
    order = [q.take(0) for _ in range(3)]
    assert [i.client for i in order if i is not None] == ["flood", "quiet", "flood"]


@given(offers=st.lists(st.tuples(st.sampled_from("abc"), st.sampled_from(["pairing", "lobby"]))))
def test_the_queue_stays_bounded_and_sheds_rather_than_loses(offers: list[tuple[str, str]]) -> None:
    q = FairQueue(max_total=6, max_per_client=4)
    kept: set[str] = set()
    shed: set[str] = set()
    for n, (client, kind) in enumerate(offers):
        item = _item(client, kind, n)
        kept.add(str(item.cid))
        for s, reason in q.offer(item):
            assert reason in {"queue_full", "client_queue_full", "expensive"}
            shed.add(str(s.cid))
        assert len(q) <= 6
        assert all(len(d) <= 4 for d in q._queues.values())
    taken = set()
    while (i := q.take(0)) is not None:
        taken.add(str(i.cid))
    assert taken | shed == kept and not taken & shed  # every request: answered or shed


def test_expensive_kinds_are_shed_first() -> None:
    q = FairQueue(max_total=4, max_per_client=4)
    q.offer(_item("a", n=1))
    q.offer(_item("b", n=2))
    assert [r for _, r in q.offer(_item("c", "lobby", 3))] == ["expensive"]
    assert q.offer(_item("c", "pairing", 4)) == []


def test_the_cpu_budget_makes_the_query_side_wait_in_proportion() -> None:
    now = [0.0]
    budget = CpuBudget(share=0.25, burst_s=0.0, clock=lambda: now[0])
    stop = threading.Event()
    stop.set()  # do not really sleep: the returned wait is what is checked
    assert budget.charge(0.01, stop) == pytest.approx(0.04)  # 10 ms of CPU at a quarter core
    now[0] += 0.04
    assert budget.charge(0.0, stop) == pytest.approx(0.0, abs=1e-12)


def test_a_large_lobby_holds_the_model_lock_in_bounded_slices() -> None:
    model = build_model("blade_chest", dims=8)
    model.learn_many(WORLD)
    ids = sorted({e for ev in WORLD for e in ev.entities()})
    sizes: list[int] = []
    held = threading.Lock()
    inner = model.predict_encoded

    def predict_encoded(batch: Any) -> Any:
        assert held.locked()
        sizes.append(len(batch.first))
        return inner(batch)

    model.predict_encoded = predict_encoded  # type: ignore[method-assign]
    ans = Answerer(LiveModel(model, "9-0", 1, held), 8, 256, pairs_per_lock=100)
    req = LobbyRequest(
        kind="lobby", id="L", reply_to=PREFIX + "x", entities=ids, team_sizes=(20, 20)
    )
    rep = ans.lobby(req)
    assert max(sizes) <= 100 and sum(sizes) >= len(ids) * (len(ids) - 1)
    model.predict_encoded = inner  # type: ignore[method-assign]
    np.testing.assert_allclose(rep["matrix"], pair_matrix(model, ids, {}).round(6))


def _service(tmp_path: Path, server: fakeredis.FakeServer) -> Service:
    settings = fake_settings(tmp_path, SpaceSettings(name="duel", model="elo", block_ms=20))
    return Service(settings, lambda: fakeredis.FakeRedis(server=server), CollectorRegistry())


def test_a_query_loop_that_dies_is_restarted_and_counted(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    server = fakeredis.FakeServer()
    service = _service(tmp_path, server)
    responder: Responder = service.spaces[0].responder
    real = responder.intake
    calls = {"n": 0}

    def flaky(raw: bytes) -> None:
        calls["n"] += 1
        if calls["n"] == 1:
            raise RuntimeError("a bug in the subscriber loop")
        real(raw)

    monkeypatch.setattr(responder, "intake", flaky)
    stop = threading.Event()
    service.start(stop)
    try:
        r = fakeredis.FakeRedis(server=server)
        _wait(lambda: r.pubsub_numsub("{sr:duel}:q")[0][1] > 0, "the responder to subscribe")
        r.publish("{sr:duel}:q", "{}")  # the message that meets the bug
        _wait(
            lambda: (
                service.registry.get_sample_value(
                    "streamrate_query_loop_restarts_total", {"space": "duel", "loop": "subscriber"}
                )
                == 1
            ),
            "the restart to be counted",
        )
        _wait(lambda: r.pubsub_numsub("{sr:duel}:q")[0][1] > 0, "the responder to subscribe")
        rep = ask(r, "{sr:duel}:q", {"kind": "pairing", "first": ["a"], "second": ["b"]})
        assert rep["ok"] is True
    finally:
        stop.set()
        service.join()


def test_follow_skips_what_is_not_a_live_message() -> None:
    server = fakeredis.FakeServer()
    r = fakeredis.FakeRedis(server=server)
    got: list[dict[str, Any]] = []
    stop, ready = threading.Event(), threading.Event()
    t = threading.Thread(target=follow, args=(r, "{sr:duel}:live:t", got.append, stop, ready))
    t.start()
    assert ready.wait(5)
    good = {"first": ["a"], "second": ["b"], "p_first_wins": 0.6, "match_id": "m",
            "model_version": "1-0", "p_draw": None, "context": {}, "seq": 1}  # fmt: skip
    for junk in ["not json", "[]", json.dumps({"id": "x", "ok": False, "error": "e"}),
                 json.dumps({**good, "p_first_wins": "high"}), json.dumps(good)]:  # fmt: skip
        r.publish("{sr:duel}:live:t", junk)
    _wait(lambda: len(got) >= 1, "the one good message")
    time.sleep(0.3)
    stop.set()
    t.join()
    assert got == [good]


def test_a_stream_request_is_aged_at_its_turn_not_at_the_read(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    """Answering the start of a batch can outlast the age limit: what waited behind
    it then gets "busy", not a late answer."""
    import streamrate.replica.request_stream as rs
    from streamrate.config import ReplicaSettings
    from streamrate.metrics import ServiceMetrics

    now = [1_000_000]
    monkeypatch.setattr(rs, "now_ms", lambda: now[0])
    r = fakeredis.FakeRedis()
    settings = fake_settings(tmp_path, SpaceSettings(name="duel", model="elo"))
    space = settings.spaces[0]
    keys = settings.keys(space)

    class SlowAnswers:
        def __init__(self) -> None:
            self.answered: list[str] = []

        def answer(self, raw: bytes) -> tuple[str, str]:
            now[0] += 2000  # each answer takes 2 s of the (fake) clock
            req = json.loads(raw)
            self.answered.append(req["id"])
            return req["reply_to"], json.dumps({"id": req["id"], "ok": True})

    slow = SlowAnswers()
    metrics = ServiceMetrics(CollectorRegistry(), [space.name])
    replica = ReplicaSettings(request_max_age_s=3.0)
    sr = rs.StreamResponder(space, keys, replica, cast(Responder, slow), metrics, name="t")
    sr.ensure_group(r)
    for n in range(3):
        req = {"kind": "pairing", "id": f"q{n}", "reply_to": f"{keys.reply_prefix}c:{n}"}
        r.xadd(keys.request_stream, {"request": json.dumps(req)}, id=f"{now[0]}-{n}")
    assert sr.step(r, block_ms=1) == 3
    assert slow.answered == ["q0", "q1"]  # q2 would have been answered 4 s after it was asked
    assert sr.dropped == 1


def test_stream_answers_in_the_writers_process_count_against_the_cpu_share(
    tmp_path: Path,
) -> None:
    """Role "both": the request stream's answers are charged to the query side's
    CPU budget (which pauses the query threads when spent), like pub/sub answers."""
    import streamrate.replica.request_stream as rs
    from streamrate.config import ReplicaSettings
    from streamrate.metrics import ServiceMetrics

    r = fakeredis.FakeRedis()
    settings = fake_settings(tmp_path, SpaceSettings(name="duel", model="elo"))
    space = settings.spaces[0]
    keys = settings.keys(space)

    class Budget:
        def __init__(self) -> None:
            self.charged_s = 0.0

        def charge(self, cpu_s: float, stop: threading.Event) -> float:
            self.charged_s += cpu_s
            return 0.0

    class Busy:
        def __init__(self) -> None:
            self.budget = Budget()
            self.answerer = Answerer(LiveModel(build_model("elo")), 10, 256)
            self.answerer.view.status = "ready"  # type: ignore[misc]
            self.burned_s = 0.0

        def answer(self, raw: bytes) -> tuple[str, str]:
            t0 = time.thread_time()
            while time.thread_time() - t0 < 0.01:  # 10 ms of CPU per answer
                pass
            self.burned_s += time.thread_time() - t0
            req = json.loads(raw)
            return req["reply_to"], json.dumps({"id": req["id"], "ok": True})

    busy = Busy()
    metrics = ServiceMetrics(CollectorRegistry(), [space.name])
    sr = rs.StreamResponder(
        space, keys, ReplicaSettings(), cast(Responder, busy), metrics, share_cpu=True
    )
    sr.ensure_group(r)
    for n in range(10):
        req = {"kind": "pairing", "id": f"q{n}", "reply_to": f"{keys.reply_prefix}c:{n}"}
        r.xadd(keys.request_stream, {"request": json.dumps(req)})
    stop = threading.Event()
    t = threading.Thread(target=sr.run, args=(stop, lambda: r, 0.01, 0.05), daemon=True)
    t.start()
    _wait(lambda: busy.burned_s >= 0.09, "ten answers")
    stop.set()
    t.join(10)
    assert busy.budget.charged_s >= busy.burned_s
