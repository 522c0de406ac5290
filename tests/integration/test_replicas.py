"""Writer, replicas and responders in their own processes, against a real redis-server.

* a replica (in this process) equals the writer at several model versions while
  the writer (``serve --role writer``) is SIGKILLed and restarted under another
  consumer name (entries claimed from the dead one), junk is dead-lettered and
  producer retries are skipped;
* three ``serve --role responder`` processes share a flood of requests: no
  request is answered twice, and the only ones unanswered were in the hands of
  the responder that was SIGKILLed.
"""

from __future__ import annotations

import json
import os
import random
import re
import signal
import subprocess
import threading
import time
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from streamrate.checkpoint import FileCheckpointStore
from streamrate.client import send_events
from streamrate.config import ReplicaSettings, load_settings
from streamrate.events import MatchEvent
from streamrate.models.registry import build_model
from streamrate.replica.follower import Follower

from .conftest import RedisServer
from .helpers import (
    MODEL,
    MODEL_SETTINGS,
    file_checkpoint,
    reference,
    serve,
    wait_for,
    world_lines,
    write_toml,
)

pytestmark = [pytest.mark.integration, pytest.mark.slow]
EVENTS = "{sr:duel}:events"
QSTREAM = "{sr:duel}:q:stream"


def _count(log: Path, text: str) -> int:
    return log.read_text().count(text) if log.exists() else 0


def _stop(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()


def _wait_started(proc: subprocess.Popen[bytes], log: Path, before: int) -> None:
    def started() -> bool:
        return _count(log, "entries to read") > before or proc.poll() is not None

    wait_for(started, 60, "writer start")


def _same_as_reference(state: dict[str, np.ndarray], events: list[MatchEvent]) -> None:
    want = reference(events).to_state().arrays
    assert set(state) == set(want)
    for name, arr in want.items():
        if arr.dtype.kind in "iub":
            np.testing.assert_array_equal(state[name], arr, err_msg=name)
        else:
            np.testing.assert_allclose(state[name], arr, rtol=1e-9, atol=1e-12, err_msg=name)


def test_replica_equals_writer_while_the_writer_is_killed_and_claimed_from(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    lines, events, junk = world_lines(2400, seed=23)
    ckpt_dir = tmp_path / "ckpt"
    cfg = tmp_path / "writer.toml"
    log = tmp_path / "writer.log"
    settings_of: dict[str, Any] = {"claim_idle_ms": 300}
    write_toml(cfg, redis_server.url, ckpt_dir, consumer="writer-0", **settings_of)
    settings = load_settings(cfg)
    sp = settings.spaces[0]
    follower = Follower(
        redis_server.client(),
        sp,
        settings.keys(sp),
        FileCheckpointStore(ckpt_dir, "duel"),
        lambda: build_model(MODEL, **MODEL_SETTINGS),
        ReplicaSettings(block_ms=50),
    )
    stop = threading.Event()
    snapshots: list[tuple[int, dict[str, np.ndarray]]] = []

    def follow() -> None:
        follower.run(stop, 0.05, 0.5)

    def snap() -> None:
        with follower.live.lock:  # copies: some state arrays are the model's own
            arrays = follower.live.model.to_state().arrays
            snapshots.append((follower.live.applied, {k: v.copy() for k, v in arrays.items()}))

    def snap_often() -> None:
        while not stop.wait(0.25):
            snap()

    t = threading.Thread(target=follow, daemon=True)
    snapper = threading.Thread(target=snap_often, daemon=True)
    snapper.start()
    sender = threading.Thread(
        target=send_events,
        args=(redis_server.client(), EVENTS, lines),
        kwargs={"rate_per_s": 600.0, "chunk": 20},
    )
    sender.start()
    t.start()
    rng = random.Random(7)
    kills = 0
    try:
        while sender.is_alive() or kills < 3:
            # Another consumer name each time: the new writer claims what the dead one held.
            write_toml(cfg, redis_server.url, ckpt_dir, consumer=f"writer-{kills}", **settings_of)
            before = _count(log, "entries to read")
            proc = serve(cfg, log, "writer")
            _wait_started(proc, log, before)
            try:
                proc.wait(rng.uniform(0.3, 1.2))
            except subprocess.TimeoutExpired:
                os.kill(proc.pid, signal.SIGKILL)
                proc.wait()
                kills += 1
                snap()
            else:
                pytest.fail(f"writer exited early: {log.read_text()[-2000:]}")
        sender.join()
        write_toml(cfg, redis_server.url, ckpt_dir, consumer="writer-last", **settings_of)
        proc = serve(cfg, log, "writer")
        try:
            wait_for(lambda: follower.live.applied == len(events), 120, "the replica to catch up")
            snap()
        finally:
            _stop(proc)
    finally:
        stop.set()
        t.join(10)
        snapper.join(10)
    assert kills >= 3
    assert sum(follower.reloads.values()) >= 2 and follower.reloads["writer_restart"] >= 1
    assert _count(log, "orphaned entries") + _count(log, "late entries") >= 1  # claims happened
    ck = file_checkpoint(ckpt_dir, "duel")
    assert ck is not None and ck.applied == len(events)
    assert ck.counters["dead_lettered"] == junk
    versions = {n for n, _ in snapshots}
    assert len(versions) >= 5
    bad = []
    for n, state in sorted({n: state for n, state in snapshots}.items()):
        try:  # each snapshot equals the writer's model at that count
            _same_as_reference(state, events[:n])
        except AssertionError:
            bad.append(n)
    assert bad == [], (bad, sorted(versions), log.read_text()[-3000:])


def _responder_name(log: Path) -> str:
    m = re.search(r"responder (\S+) following the writer", log.read_text())
    assert m is not None
    return m.group(1)


def test_three_responders_answer_each_request_once_when_one_is_killed(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    lines, events, _ = world_lines(600, seed=3)
    cfg = tmp_path / "serve.toml"
    write_toml(cfg, redis_server.url, tmp_path / "ckpt", store="redis")
    r = redis_server.client()
    writer_log = tmp_path / "writer.log"
    writer = serve(cfg, writer_log, "writer")
    responders: list[tuple[subprocess.Popen[bytes], Path]] = []
    try:
        send_events(r, EVENTS, lines)
        wait_for(lambda: _count(writer_log, "entries to read") > 0, 60, "writer start")
        for i in range(3):
            log = tmp_path / f"responder-{i}.log"
            responders.append((serve(cfg, log, "responder"), log))
        for _, log in responders:
            wait_for(lambda: _count(log, "answering from the request") > 0, 60, "responder")  # noqa: B023
        wait_for(lambda: r.exists(QSTREAM) == 1 and len(r.xinfo_groups(QSTREAM)) == 1, 30, "group")
        ids = sorted({e for ev in events for e in ev.entities()})
        replies: dict[str, list[dict[str, Any]]] = {}
        pubsub = r.pubsub(ignore_subscribe_messages=True)
        pubsub.psubscribe("{sr:duel}:q:reply:flood:*")
        done = threading.Event()

        def listen() -> None:
            while not done.is_set():
                msg = pubsub.get_message(timeout=0.1)
                if msg and msg["type"] == "pmessage":
                    body = json.loads(msg["data"])
                    replies.setdefault(body["id"], []).append(body)

        listener = threading.Thread(target=listen, daemon=True)
        listener.start()
        time.sleep(0.2)
        sent: dict[bytes, str] = {}
        producer = redis_server.client()
        victim, victim_log = responders[0]
        victim_name = _responder_name(victim_log)
        killed_at = 600
        for k in range(1500):
            cid = f"q{k}-{uuid.uuid4().hex[:6]}"
            req = {
                "kind": "pairing",
                "id": cid,
                "reply_to": f"{{sr:duel}}:q:reply:flood:{k % 7}",
                "first": [ids[k % len(ids)]],
                "second": [ids[(k * 7 + 1) % len(ids)]],
            }
            sid = producer.xadd(QSTREAM, {"request": json.dumps(req)})
            sent[sid] = cid
            if k == killed_at:
                os.kill(victim.pid, signal.SIGKILL)
                victim.wait()
                in_hand = {
                    row["message_id"]
                    for row in r.xpending_range(
                        QSTREAM, "responders", "-", "+", 10_000, victim_name
                    )
                }
            if k % 50 == 0:
                time.sleep(0.01)
        wait_for(lambda: len(replies) >= len(sent) - len(in_hand), 60, "the replies")
        time.sleep(0.5)  # any second reply would arrive now
        done.set()
        listener.join(5)
        twice = [cid for cid, got in replies.items() if len(got) > 1]
        assert twice == []
        unanswered = {sid for sid, cid in sent.items() if cid not in replies}
        assert unanswered <= in_hand
        oks = [got[0] for got in replies.values() if got[0].get("ok")]
        errors = {str(got[0].get("error"))[:60] for got in replies.values() if not got[0].get("ok")}
        assert len(oks) == len(replies), errors
        assert all(b["model_version"] and b["applied"] == len(events) for b in oks)
    finally:
        for proc, _ in responders:
            _stop(proc)
        _stop(writer)
