"""A model space that names no model: ``streamrate serve`` runs the served default
(the recalibrated mixture) against a real redis-server, checkpoints it, and a
restart answers from the checkpoint as the uninterrupted model would."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from streamrate.client import ask, send_events
from streamrate.config import SpaceSettings
from streamrate.events import Matchup, event_to_json
from streamrate.models.registry import build_model
from streamrate.simulate import simulate, world_spec

from .conftest import RedisServer
from .helpers import READY_WAIT_S, file_checkpoint, wait_for

pytestmark = pytest.mark.integration

# A world with seasons, moved into the past: an event may not finish after its entry
# reached the stream (beyond ``future_limit_s``).
_WORLD = simulate(world_spec("seasons", matches=400, entities=16, seed=23)).events
_SHIFT = _WORLD[-1].finished_at - (datetime.now(UTC) - timedelta(days=1))
EVENTS = [ev.model_copy(update={"finished_at": ev.finished_at - _SHIFT}) for ev in _WORLD]


def _toml(path: Path, url: str, ckpt: Path) -> None:
    path.write_text(
        f"[redis]\nurl = {json.dumps(url)}\nreconnect_max_s = 0.5\n"
        f'[checkpoint]\nstore = "file"\ndir = {json.dumps(str(ckpt))}\n'
        "[metrics]\nenabled = false\n"  # tests must not share a port
        '[[spaces]]\nname = "duel"\nbatch_count = 50\nblock_ms = 100\n'
        "checkpoint_every_events = 100\ncheckpoint_every_s = 0.3\ndedupe_window_s = 1e9\n"
    )


def _serve(cfg: Path, log: Path) -> subprocess.Popen[bytes]:
    with log.open("a") as out:
        return subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
            stdout=out,
            stderr=subprocess.STDOUT,
        )


def _stop(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)
        try:
            assert proc.wait(60) == 0
        finally:
            if proc.poll() is None:
                os.kill(proc.pid, signal.SIGKILL)
                proc.wait()


def test_the_default_model_is_served_checkpointed_and_restored(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    r = redis_server.client()
    cfg, ckpt, log = tmp_path / "serve.toml", tmp_path / "ckpt", tmp_path / "serve.log"
    _toml(cfg, redis_server.url, ckpt)
    send_events(r, "{sr:duel}:events", [event_to_json(e) for e in EVENTS])
    space = SpaceSettings()
    want = build_model(space.model, **space.model_settings)
    want.learn_many(EVENTS)
    a, b = EVENTS[-1].first, EVENTS[-1].second
    expect = want.predict(Matchup(first=a, second=b)).p_win
    question = {"kind": "pairing", "first": list(a), "second": list(b)}

    def answer() -> dict[str, object]:
        got: dict[str, object] = ask(r, "{sr:duel}:q", question)
        return got

    proc = _serve(cfg, log)
    try:
        wait_for(lambda: r.pubsub_numsub("{sr:duel}:q")[0][1] > 0, READY_WAIT_S, "the responder")
        wait_for(lambda: answer().get("applied") == len(EVENTS), 120, "every event applied")
        first = answer()
        assert first["ok"] is True
        assert first["p_first_wins"] == pytest.approx(expect, rel=1e-9)
    finally:
        _stop(proc)
    ck = file_checkpoint(ckpt, "duel")
    assert ck is not None and ck.state.kind == "recalibrated" and ck.applied == len(EVENTS)
    # A restart reads the checkpoint back and answers as before.
    proc = _serve(cfg, log)
    try:
        wait_for(lambda: r.pubsub_numsub("{sr:duel}:q")[0][1] > 0, READY_WAIT_S, "the restart")
        wait_for(lambda: answer().get("applied") == len(EVENTS), 120, "the checkpoint loaded")
        again = answer()
        assert again["p_first_wins"] == pytest.approx(expect, rel=1e-9)
    finally:
        _stop(proc)
    assert "Traceback" not in log.read_text()
