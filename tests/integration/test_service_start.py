"""Starting the service against a real redis-server: questions while the checkpoint
loads, a checkpoint of another model, and a first start on a stream with history."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import Checkpoint, FileCheckpointStore, encode_checkpoint
from streamrate.client import ask, send_events
from streamrate.config import load_settings
from streamrate.dedupe import SeenIds
from streamrate.events import event_to_json
from streamrate.models.registry import build_model
from streamrate.service import Service, redis_factory
from streamrate.simulate import simulate, world_spec
from tests.integration.helpers import READY_WAIT_S

from .conftest import RedisServer
from .helpers import MODEL, file_checkpoint, reference, wait_for, write_toml

pytestmark = pytest.mark.integration

EVENTS = simulate(world_spec("plain", matches=400, entities=20, seed=21)).events


class _SlowStore(FileCheckpointStore):
    """Loading waits until the test lets it go: a checkpoint that takes long to read."""

    def __init__(self, directory: Path) -> None:
        super().__init__(directory, "duel")
        self.release = threading.Event()

    def load(self) -> bytes | None:
        self.release.wait(60)
        return super().load()


def test_a_question_while_the_checkpoint_loads_gets_not_ready(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    cfg, ckpt = tmp_path / "serve.toml", tmp_path / "ckpt"
    write_toml(cfg, redis_server.url, ckpt)
    settings = load_settings(cfg)
    trained = build_model(MODEL, **settings.spaces[0].model_settings)
    trained.learn_many(EVENTS[:200])
    ckpt.mkdir()
    blob = encode_checkpoint(Checkpoint(trained.to_state(), "1-0", 200, SeenIds(10, 60.0)))
    (ckpt / "duel.ckpt.npz").write_bytes(blob)
    service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
    slow = _SlowStore(ckpt)
    service.spaces[0].consumer.store = slow
    stop = threading.Event()
    service.start(stop)
    r = redis_server.client()
    try:
        assert service.spaces[0].listening.wait(READY_WAIT_S)
        a, b = EVENTS[0].first, EVENTS[0].second
        question = {"kind": "pairing", "first": list(a), "second": list(b)}
        rep = ask(r, "{sr:duel}:q", question)
        assert rep["ok"] is False and rep["status"] == "loading"
        assert rep["error"].startswith("not ready")
        assert "p_first_wins" not in rep
        slow.release.set()
        assert service.spaces[0].ready.wait(READY_WAIT_S)
        rep = ask(r, "{sr:duel}:q", question)
        assert rep["ok"] is True and rep["applied"] == 200
        assert rep["p_first_wins"] != 0.5
    finally:
        slow.release.set()
        stop.set()
        service.join()


def test_a_checkpoint_of_another_model_makes_serve_exit_2_with_one_line(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    cfg, ckpt = tmp_path / "serve.toml", tmp_path / "ckpt"
    write_toml(cfg, redis_server.url, ckpt)
    ckpt.mkdir()
    other = build_model("elo", k=16.0)
    other.learn_many(EVENTS[:50])
    blob = encode_checkpoint(Checkpoint(other.to_state(), "1-0", 50, SeenIds(10, 60.0)))
    (ckpt / "duel.ckpt.npz").write_bytes(blob)
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[2])}
    res = subprocess.run(
        [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
        capture_output=True,
        text=True,
        timeout=120,
        env=env,
    )
    assert res.returncode == 2, res.stderr
    # Log lines of the start (INFO, e.g. where Redis is) may precede it; the
    # refusal itself is one line.
    lines = [ln for ln in res.stderr.strip().splitlines() if " INFO " not in ln]
    assert len(lines) == 1, res.stderr
    line = lines[0]
    assert str(ckpt / "duel.ckpt.npz") in line
    assert "holds model 'elo'" in line and f"ask for {MODEL!r}" in line
    assert "another checkpoint" in line and "move the file aside" in line
    assert "Traceback" not in res.stderr + res.stdout


def test_a_first_start_learns_the_entries_already_in_the_stream(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    r = redis_server.client()
    events = EVENTS[:300]
    send_events(r, "{sr:duel}:events", [event_to_json(e) for e in events])
    # A consumer group left by an earlier run that read everything; no checkpoint.
    r.xgroup_create("{sr:duel}:events", "streamrate", id="$")
    cfg, ckpt = tmp_path / "serve.toml", tmp_path / "ckpt"
    write_toml(cfg, redis_server.url, ckpt)
    log = tmp_path / "serve.log"
    with log.open("w") as out:
        proc = subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
            stdout=out,
            stderr=subprocess.STDOUT,
        )
    try:

        def applied() -> int:
            ck = file_checkpoint(ckpt, "duel")
            return -1 if ck is None else ck.applied

        wait_for(lambda: applied() == len(events), 60, "the history to be learned")
        os.kill(proc.pid, signal.SIGTERM)
        assert proc.wait(30) == 0
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
    text = log.read_text()
    assert "no checkpoint; starting at the stream's first entry" in text
    assert f"{len(events)} entries to read" in text
    ck = file_checkpoint(ckpt, "duel")
    assert ck is not None
    want = reference(events).to_state().arrays["entity_counts"]
    assert (ck.state.arrays["entity_counts"] == want).all()
