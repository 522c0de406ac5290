"""deploy/redis/redis.conf, started for real with the shipped ACL, runs the service.

Only the port, the data directory, the log file and the ACL file's path are
overridden on the command line; everything else is the shipped file.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import redis

from streamrate.client import send_events

from .conftest import DEPLOY_REDIS, REDIS_BIN, SecureRedisServer, render_users
from .helpers import file_checkpoint, wait_for, world_lines

pytestmark = pytest.mark.integration
CONF = DEPLOY_REDIS / "redis.conf"
EVENTS = "{sr:duel}:events"


class ShippedRedis(SecureRedisServer):
    """redis-server started from deploy/redis/redis.conf."""

    def start(self) -> None:
        args = [REDIS_BIN, str(CONF), "--port", str(self.port), "--bind", "127.0.0.1",
                "--dir", str(self.dir), "--logfile", str(self.dir / "redis.log"),
                "--aclfile", str(self.acl)]  # fmt: skip
        self.launch(args)


@pytest.fixture
def shipped(tmp_path: Path) -> object:
    data = tmp_path / "redis"
    data.mkdir()
    acl, passwords = render_users(tmp_path / "secrets")
    server = ShippedRedis(data, acl, passwords)
    server.start()
    try:
        yield server
    finally:
        server.stop(signal.SIGKILL)


def _config(server: ShippedRedis, tmp_path: Path) -> Path:
    cfg = tmp_path / "serve.toml"
    pw = json.dumps(str(server.passwords["streamrate"]))
    cfg.write_text(
        f'log_format = "json"\n[redis]\nurl = "redis://127.0.0.1:{server.port}/0"\n'
        f'username = "streamrate"\npassword_file = {pw}\n'
        f"[checkpoint]\ndir = {json.dumps(str(tmp_path / 'ckpt'))}\n"
        '[[spaces]]\nname = "duel"\nmodel = "elo"\nbatch_count = 50\nblock_ms = 20\n'
        "checkpoint_every_s = 0.2\ndedupe_window_s = 1e9\n"
    )
    return cfg


def test_the_shipped_config_is_what_the_comments_say(shipped: ShippedRedis) -> None:
    admin = shipped.client("admin")
    got = admin.config_get("*")
    assert got["appendonly"] == "yes" and got["appendfsync"] == "always"
    assert got["maxmemory-policy"] == "noeviction"
    assert int(got["maxmemory"]) == 2 << 30
    assert got["save"] == ""
    assert "default" in {u["name"] if isinstance(u, dict) else u for u in admin.acl_users()}
    with pytest.raises(redis.AuthenticationError):
        redis.Redis(port=shipped.port).ping()  # the default user is off


def test_the_service_runs_against_the_shipped_config_with_json_logs(
    shipped: ShippedRedis, tmp_path: Path
) -> None:
    lines, events, junk = world_lines(400, seed=31)
    log_path = tmp_path / "serve.log"
    with open(log_path, "wb") as fh:
        proc = subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config",
             str(_config(shipped, tmp_path)), "--log-format", "json"],
            stdout=fh, stderr=subprocess.STDOUT,
        )  # fmt: skip
    try:
        send_events(shipped.client("producer"), EVENTS, lines)

        def applied() -> int:
            ck = file_checkpoint(tmp_path / "ckpt", "duel")
            return -1 if ck is None else ck.applied

        wait_for(lambda: applied() == len(events) or proc.poll() is not None, 60, "events")
        assert shipped.client("admin").xlen("{sr:duel}:dead") == junk
    finally:
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(30)
    assert code == 0, log_path.read_text()[-2000:]
    records = [json.loads(x) for x in log_path.read_text().splitlines()]
    assert records, "the service logged nothing"
    assert all({"time", "level", "logger", "message", "space"} <= set(r) for r in records)
    assert any(r["space"] == "duel" and "entries to read" in r["message"] for r in records)


def test_a_full_server_refuses_writes_and_evicts_nothing(shipped: ShippedRedis) -> None:
    admin = shipped.client("admin")
    admin.set("{sr:duel}:ckpt", b"x" * 10_000)
    admin.xadd(EVENTS, {"event": "{}"})
    used = int(admin.info("memory")["used_memory"])
    admin.config_set("maxmemory", used + 200_000)  # a little room left
    producer = shipped.client("producer")
    with pytest.raises(redis.ResponseError, match="maxmemory"):
        for _ in range(100_000):
            producer.xadd(EVENTS, {"event": "y" * 500})
    assert admin.get("{sr:duel}:ckpt") == b"x" * 10_000  # nothing was evicted
    assert int(admin.info("stats")["evicted_keys"]) == 0
