"""Several ``serve --role shared`` processes sharing six spaces, against a real redis-server.

The server runs with the shipped least-privilege ACL (deploy/redis/users.conf):
the processes log in as the ``streamrate`` user and ``ACL LOG`` must stay empty.
Three processes share six spaces (two each); events go to every space; one
process is SIGKILLed and its spaces are taken by the other two (every space
keeps learning); a fourth process joins and gets its share (the others give
spaces back after a final checkpoint). At the end every space's checkpoint
equals an uninterrupted run of its events: nothing lost, nothing applied twice.
"""

from __future__ import annotations

import collections
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import redis

from streamrate.checkpoint import Checkpoint, decode_checkpoint
from streamrate.client import send_events

from .conftest import SecureRedisServer
from .helpers import (
    MODEL,
    READY_WAIT_S,
    assert_same_state,
    reference,
    render_toml,
    wait_for,
    world_lines,
)

pytestmark = [pytest.mark.integration, pytest.mark.slow]
SPACES = [f"mode{i}" for i in range(6)]
LEASE_MS = 2000


def _config(path: Path, server: SecureRedisServer, tmp: Path) -> None:
    tables: dict[str, dict[str, object]] = {
        "redis": {
            "url": server.url,
            "username": "streamrate",
            "password_file": str(server.passwords["streamrate"]),
            "reconnect_max_s": 0.5,
        },
        "checkpoint": {"store": "redis", "dir": str(tmp / "ckpt")},
        "metrics": {"enabled": False},  # on by default; tests must not share a port
        "lease": {"lease_ms": LEASE_MS, "renew_every_ms": 300, "poll_every_ms": 100},
        "pool": {"heartbeat_ms": 300, "member_ttl_ms": LEASE_MS},
    }
    spaces: list[dict[str, object]] = [
        {
            "name": name,
            "model": MODEL,
            "batch_count": 50,
            "block_ms": 100,
            "checkpoint_every_events": 100,
            "checkpoint_every_s": 0.3,
            "dedupe_window_s": 1e9,
            "claim_idle_ms": 1000,
        }
        for name in SPACES
    ]
    path.write_text(render_toml(tables, spaces))


def _serve(cfg: Path, log: Path) -> subprocess.Popen[bytes]:
    with open(log, "ab") as fh:
        return subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg),
             "--role", "shared", "--spaces", "all"],
            stdout=fh,
            stderr=subprocess.STDOUT,
        )  # fmt: skip


def _pid_holding(r: redis.Redis, space: str) -> int | None:
    got = r.get("{sr:" + space + "}:lease")  # "<host>:<pid>:<random> <epoch>"
    return None if got is None else int(got.decode().split()[0].split(":")[-2])


def _holdings(r: redis.Redis) -> collections.Counter[int | None]:
    return collections.Counter(_pid_holding(r, s) for s in SPACES)


def _checkpoint(r: redis.Redis, space: str) -> Checkpoint | None:
    data = r.get("{sr:" + space + "}:ckpt")
    return None if data is None else decode_checkpoint(data, keep=1_000_000, window_s=1e12)


def _covered(r: redis.Redis, space: str) -> bool:
    ck = _checkpoint(r, space)
    events = "{sr:" + space + "}:events"
    try:
        last = r.xinfo_stream(events)["last-generated-id"].decode()
        pending = r.xpending(events, "streamrate")["pending"]
    except redis.ResponseError:  # the writer has not made the group yet
        return False
    return ck is not None and ck.last_id == last and pending == 0


def _applied(r: redis.Redis) -> dict[str, int]:
    got = {s: _checkpoint(r, s) for s in SPACES}
    return {s: (-1 if ck is None else ck.applied) for s, ck in got.items()}


def test_three_processes_share_six_spaces_survive_a_kill_and_make_room_for_a_fourth(
    acl_redis: SecureRedisServer, tmp_path: Path
) -> None:
    cfg = tmp_path / "serve.toml"
    _config(cfg, acl_redis, tmp_path)
    r = acl_redis.client("admin")
    producer = acl_redis.client("producer")
    worlds = {s: world_lines(240, seed=300 + k) for k, s in enumerate(SPACES)}

    def send(phase: int) -> None:  # a third of every space's lines, in order
        for s, (lines, _, _) in worlds.items():
            third = len(lines) // 3
            part = lines[phase * third : (phase + 1) * third if phase < 2 else None]
            send_events(producer, "{sr:" + s + "}:events", part)

    def all_covered() -> bool:
        return all(_covered(r, s) for s in SPACES)

    procs = [_serve(cfg, tmp_path / f"p{i}.log") for i in range(3)]
    pids = [p.pid for p in procs]
    try:
        wait_for(
            lambda: _holdings(r) == collections.Counter(dict.fromkeys(pids, 2)),
            READY_WAIT_S,
            "three processes writing two spaces each",
        )
        send(0)
        wait_for(all_covered, 120, "every space to learn its first events")
        before = _applied(r)
        assert all(n > 0 for n in before.values())

        # SIGKILL one: its spaces are free once their leases lapse, then taken.
        os.kill(procs[0].pid, signal.SIGKILL)
        procs[0].wait()
        send(1)
        wait_for(
            lambda: _holdings(r) == collections.Counter(dict.fromkeys(pids[1:], 3)),
            60,
            "the two others to write three spaces each",
        )
        wait_for(all_covered, 120, "every space to learn after the kill")
        after = _applied(r)
        assert all(after[s] > before[s] for s in SPACES), (before, after)

        # A fourth process joins: the others give one space each back to it.
        procs.append(_serve(cfg, tmp_path / "p3.log"))
        pids.append(procs[-1].pid)
        wait_for(
            lambda: _holdings(r) == collections.Counter(dict.fromkeys(pids[1:], 2)),
            READY_WAIT_S,
            "the newcomer to get its share of two",
        )
        send(2)
        wait_for(all_covered, 120, "every space to learn its last events")
        for p in procs[1:]:
            os.kill(p.pid, signal.SIGTERM)
        assert [p.wait(60) for p in procs[1:]] == [0, 0, 0]
    finally:
        for p in procs:
            if p.poll() is None:
                os.kill(p.pid, signal.SIGKILL)
                p.wait()
    logs = "".join((tmp_path / f"p{i}.log").read_text() for i in (1, 2))
    assert "giving it back" in logs
    for s, (_, events, junk) in worlds.items():
        ck = _checkpoint(r, s)
        assert ck is not None
        assert ck.applied == len(events), s  # each unique event once
        assert ck.counters["dead_lettered"] == junk, s
        assert_same_state(ck, reference(events))
    assert all(r.get("{sr:" + s + "}:lease") is None for s in SPACES)  # given back on SIGTERM
    assert r.zcard("{sr}:pool:main") == 0  # every member left
    assert r.acl_log() == []  # nothing refused: the users are sufficient
