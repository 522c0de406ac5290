"""The client commands against a real redis-server and ``streamrate serve``."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from streamrate.cli import app
from streamrate.events import event_to_json

from .conftest import RedisServer
from .helpers import file_checkpoint, reference, wait_for, write_toml

pytestmark = pytest.mark.integration


def test_send_ask_and_sigterm_drain(redis_server: RedisServer, tmp_path: Path) -> None:
    from streamrate.simulate import simulate, world_spec

    events = simulate(world_spec("plain", matches=300, entities=10, seed=8)).events
    data = tmp_path / "matches.jsonl"
    data.write_text("".join(event_to_json(e) + "\n" for e in events))
    cfg = tmp_path / "serve.toml"
    ckpt = tmp_path / "ckpt"
    # Checkpoints only on shutdown: the final one must come from the SIGTERM drain.
    write_toml(cfg, redis_server.url, ckpt, checkpoint_every_events=10**6,
               checkpoint_every_s=10**6)  # fmt: skip
    proc = subprocess.Popen(
        [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        runner = CliRunner()
        res = runner.invoke(app, ["send", str(data), "--config", str(cfg), "--rate", "3000"])
        assert res.exit_code == 0, res.output
        assert "sent 300 entries" in res.output
        r = redis_server.client()
        wait_for(lambda: r.pubsub_numsub("{sr:duel}:q")[0][1] > 0, 30, "the responder")
        ask = ["ask", "--config", str(cfg), "--json"]
        wait_for(
            lambda: json.loads(runner.invoke(app, [*ask, "x", "y"]).output).get("applied") == 300,
            30,
            "all events applied",
        )
        a, b = events[0].first[0], events[0].second[0]
        rep = json.loads(runner.invoke(app, [*ask, a, b, "--context", "map=glasswood"]).output)
        assert rep["ok"] and 0 < rep["p_first_wins"] < 1
        lobby = sorted({e for ev in events for e in ev.entities()})[:6]
        res = runner.invoke(app, ["ask", "--config", str(cfg), "--lobby", ",".join(lobby),
                                  "--teams", "3,3"])  # fmt: skip
        assert res.exit_code == 0 and " vs " in res.output and "exact" in res.output
        bad = runner.invoke(app, ["ask", "--config", str(cfg), "--lobby", "a,b", "--teams", "2,2"])
        assert bad.exit_code == 2 and "adding up to the 2 ids" in bad.output
        assert file_checkpoint(ckpt, "duel") is None
        os.kill(proc.pid, signal.SIGTERM)
        assert proc.wait(30) == 0
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
    ck = file_checkpoint(ckpt, "duel")
    assert ck is not None and ck.applied == 300
    assert r.xpending("{sr:duel}:events", "streamrate")["pending"] == 0
    want = reference(events).to_state().arrays["entity_counts"]
    assert (ck.state.arrays["entity_counts"] == want).all()
