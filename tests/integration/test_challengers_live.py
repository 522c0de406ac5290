"""Challenger models in a running service on a real redis-server: promotion under load."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry
from typer.testing import CliRunner

from streamrate.challengers import ChallengerSet
from streamrate.cli import app
from streamrate.client import ask, send_events
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.events import event_to_json
from streamrate.models.registry import build_model, model_from_state
from streamrate.service import Service, redis_factory
from streamrate.simulate import simulate, world_spec
from tests.integration.helpers import READY_WAIT_S

from .conftest import RedisServer
from .helpers import file_checkpoint, wait_for

pytestmark = pytest.mark.integration
MEMBERS: dict[str, dict[str, Any]] = {
    "elo": {"kind": "elo", "k": 16.0},
    "bt": {"kind": "bradley_terry"},
    "bc": {"kind": "blade_chest", "dims": 4, "context": "stacked"},
}
WORLD = simulate(world_spec("cyclic", matches=1500, entities=30, seed=21)).events
WINDOW = 1000
Q = "{sr:duel}:q"


@pytest.fixture
def running(redis_server: RedisServer, tmp_path: Path) -> Iterator[tuple[Service, Path]]:
    space = SpaceSettings(
        name="duel",
        model="challengers",
        model_settings={"members": MEMBERS, "window_events": WINDOW},
        block_ms=50,
        batch_count=50,
        checkpoint_every_s=0.3,
    )
    settings = Settings(
        redis=RedisSettings(url=redis_server.url),
        checkpoint=CheckpointSettings(dir=tmp_path / "ckpt"),
        metrics=MetricsSettings(enabled=False),
        spaces=(space,),
    )
    service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
    stop = threading.Event()
    service.start(stop)
    try:
        assert service.spaces[0].ready.wait(READY_WAIT_S)
        r = redis_server.client()
        wait_for(lambda: r.pubsub_numsub(Q)[0][1] > 0, 10, "the query responder to subscribe")
        yield service, tmp_path / "ckpt"
    finally:
        stop.set()
        service.join()


def _alone(label: str) -> Any:
    spec = MEMBERS[label]
    model = build_model(spec["kind"], **{k: v for k, v in spec.items() if k != "kind"})
    model.learn_many(WORLD)
    return model


def _active_in_checkpoint(ckpt_dir: Path) -> str | None:
    ck = file_checkpoint(ckpt_dir, "duel")
    return None if ck is None else str(ck.state.params["active"])


def test_promotion_under_load_answers_every_query_and_keeps_every_state(
    running: tuple[Service, Path], redis_server: RedisServer
) -> None:
    service, ckpt_dir = running
    live = service.spaces[0].consumer.live
    url = ["--redis-url", redis_server.url]
    runner = CliRunner()
    a, b = WORLD[0].first[0], WORLD[0].second[0]
    replies: list[dict[str, Any]] = []
    failures: list[BaseException] = []
    shed: list[dict[str, Any]] = []
    asked = 0
    done = threading.Event()

    def keep_asking() -> None:  # bounded in count and time, stops by itself
        nonlocal asked
        client = redis_server.client()
        deadline = time.monotonic() + 120
        while not done.is_set() and asked < 5000 and time.monotonic() < deadline:
            asked += 1
            try:
                rep = ask(client, Q, {"kind": "pairing", "first": [a], "second": [b]}, 10.0)
            except Exception as exc:  # every failure is reported below
                failures.append(exc)
                continue
            if rep.get("busy"):  # shed by admission control on a busy machine: ask again
                shed.append(rep)
            else:
                replies.append(rep)
        client.close()

    lines = [event_to_json(e) for e in WORLD]
    sender = threading.Thread(
        target=send_events, args=(redis_server.client(), "{sr:duel}:events", lines, "event", 500.0)
    )
    asker = threading.Thread(target=keep_asking)
    asker.start()
    sender.start()
    try:
        wait_for(lambda: live.applied >= 200, 60, "the first events to be applied")
        res = runner.invoke(app, ["promote", "bc", *url, "--json"])
        assert res.exit_code == 0, res.output
        promoted = json.loads(res.output)
        assert promoted["ok"] and promoted["previous"] == "elo" and promoted["answered_by"] == "bc"
        assert 200 <= promoted["applied"] < len(WORLD)  # switched while events streamed in
        wait_for(lambda: live.applied == len(WORLD), 60, "every event to be applied")
        wait_for(lambda: sum(r.get("answered_by") == "bc" for r in replies) >= 5, 30, "replies")
    finally:
        done.set()
        asker.join()
        sender.join()

    assert not failures, failures[:3]
    # Every question got an answer or an explicit "busy" (never silence, never an error).
    assert len(replies) + len(shed) == asked and all(r["ok"] for r in replies)
    assert len(replies) > len(shed)
    who = [r["answered_by"] for r in replies]
    switch = who.index("bc")
    assert switch > 0 and set(who[:switch]) == {"elo"} and set(who[switch:]) == {"bc"}
    applied = [r["applied"] for r in replies]
    assert applied == sorted(applied)  # each reply read one consistent model state
    assert applied[switch - 1] <= promoted["applied"] <= applied[switch]

    # The live table: every member scored over the last WINDOW events.
    res = runner.invoke(app, ["compare", *url, "--json"])
    assert res.exit_code == 0, res.output
    table = json.loads(res.output)
    assert table["active"] == "bc" and table["reference"] == "bc"
    assert {k: v["n"] for k, v in table["members"].items()} == dict.fromkeys(MEMBERS, WINDOW)
    assert table["members"]["elo"]["log_loss_diff_ci"]["versus"] == "bc"
    text = runner.invoke(app, ["compare", *url])
    assert text.exit_code == 0 and "* bc" in text.output and "diff vs bc" in text.output

    # A promotion with no new event is saved too; a bad label changes nothing.
    bad = runner.invoke(app, ["promote", "nope", *url])
    assert bad.exit_code == 1 and "no member 'nope'" in bad.output
    back = runner.invoke(app, ["promote", "elo", *url])
    assert back.exit_code == 0 and "elo answers now (was bc)" in back.output
    wait_for(lambda: _active_in_checkpoint(ckpt_dir) == "elo", 30, "the promotion checkpoint")

    ck = file_checkpoint(ckpt_dir, "duel")
    assert ck is not None and ck.applied == len(WORLD)
    restored = model_from_state(ck.state)
    assert isinstance(restored, ChallengerSet) and restored.active == "elo"
    with live.lock:
        running_model = live.model
        assert isinstance(running_model, ChallengerSet)
        states = {k: m.to_state() for k, m in running_model.models_.items()}
    for label in MEMBERS:
        want = _alone(label).to_state()
        for got in (states[label], restored.models_[label].to_state()):
            assert got.params == want.params and set(got.arrays) == set(want.arrays)
            for name, arr in want.arrays.items():
                if arr.dtype.kind in "iub":
                    np.testing.assert_array_equal(got.arrays[name], arr, err_msg=name)
                else:
                    np.testing.assert_allclose(got.arrays[name], arr, rtol=1e-9, atol=1e-12)
