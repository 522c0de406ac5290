"""Crash safety against a real redis-server.

``python -m streamrate serve`` is killed with SIGKILL at random moments while an
event file streams in, restarted each time; the final checkpoint must equal an
uninterrupted run and count every event exactly once. Then Redis itself is
killed and restarted under a running service.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest
import redis
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import decode_checkpoint
from streamrate.client import send_events
from streamrate.config import load_settings
from streamrate.service import Service, redis_factory

from .conftest import RedisServer
from .helpers import (
    assert_same_state,
    file_checkpoint,
    reference,
    wait_for,
    world_lines,
    write_toml,
)

pytestmark = [pytest.mark.integration, pytest.mark.slow]
EVENTS = "{sr:duel}:events"


def _serve(cfg: Path, log: Path) -> subprocess.Popen[bytes]:
    with open(log, "ab") as fh:
        return subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
            stdout=fh,
            stderr=subprocess.STDOUT,
        )


def _resumes(log: Path) -> int:
    return log.read_text().count("entries to read") if log.exists() else 0


def _wait_started(proc: subprocess.Popen[bytes], log: Path, before: int) -> None:
    wait_for(lambda: _resumes(log) > before or proc.poll() is not None, 60, "service start")


def _all_covered(r: redis.Redis, ckpt_last: str | None) -> bool:
    last = r.xinfo_stream(EVENTS)["last-generated-id"]
    pending = r.xpending(EVENTS, "streamrate")["pending"]
    return ckpt_last == last.decode() and pending == 0


def test_sigkill_at_random_moments_loses_nothing_and_applies_nothing_twice(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    lines, events, junk = world_lines(3000, seed=11)
    ckpt_dir = tmp_path / "ckpt"
    cfg = tmp_path / "serve.toml"
    write_toml(cfg, redis_server.url, ckpt_dir)
    log = tmp_path / "serve.log"
    r = redis_server.client()
    sender = threading.Thread(
        target=send_events,
        args=(redis_server.client(), EVENTS, lines),
        kwargs={"rate_per_s": 500.0, "chunk": 20},
    )
    sender.start()
    rng = random.Random(20260301)
    kills = 0
    while sender.is_alive() or kills < 4:
        starts = _resumes(log)
        proc = _serve(cfg, log)
        # Kill at a random moment after the service has begun consuming.
        _wait_started(proc, log, starts)
        try:
            proc.wait(rng.uniform(0.02, 0.8))
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
            kills += 1
        else:
            pytest.fail(f"serve exited early with {proc.returncode}: {log.read_text()[-2000:]}")
    sender.join()
    assert kills >= 4
    before = _resumes(log)
    proc = _serve(cfg, log)
    try:
        # Its signal handlers are installed before it logs that it resumes.
        _wait_started(proc, log, before)

        def done() -> bool:
            ck = file_checkpoint(ckpt_dir, "duel")
            return _all_covered(r, None if ck is None else ck.last_id)

        wait_for(done, 90, "the restarted service to cover the whole stream")
        os.kill(proc.pid, signal.SIGTERM)
        assert proc.wait(30) == 0
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
    assert _resumes(log) >= 5  # every run got to consume before its end
    ck = file_checkpoint(ckpt_dir, "duel")
    assert ck is not None
    assert ck.applied == len(events)
    assert ck.counters["dead_lettered"] == junk
    assert_same_state(ck, reference(events))
    dead = r.xrange("{sr:duel}:dead")
    assert len(dead) == junk
    assert len({f[b"dead.source_id"] for _, f in dead}) == junk
    assert all(f[b"dead.reason"] for _, f in dead)


def test_redis_restart_under_running_service_loses_nothing(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    lines, events, _ = world_lines(2000, seed=5)
    cfg = tmp_path / "serve.toml"
    write_toml(cfg, redis_server.url, tmp_path / "ckpt", store="redis")
    settings = load_settings(cfg)
    clients = redis_factory(settings.redis)
    service = Service(settings, clients, CollectorRegistry())
    stop = threading.Event()
    service.start(stop)
    sent = threading.Event()

    def producer() -> None:
        # A producer that retries a chunk whose reply it lost: retries re-send
        # entries with the same match id, which the service must skip.
        i = 0
        while i < len(lines):
            try:
                send_events(
                    redis_server.client(), EVENTS, lines[i : i + 50], rate_per_s=1000, chunk=50
                )
                i += 50
            except redis.RedisError:
                stop.wait(0.1)
        sent.set()

    t = threading.Thread(target=producer)
    t.start()
    try:
        wait_for(lambda: service.spaces[0].consumer.live.applied > 300, 60, "first events")
        redis_server.stop(signal.SIGKILL)
        stop.wait(0.5)
        redis_server.start()
        t.join(60)
        assert sent.is_set()
        r = redis_server.client()

        def done() -> bool:
            raw = r.get("{sr:duel}:ckpt")
            if raw is None:
                return False
            return _all_covered(r, decode_checkpoint(raw, 10**6, 1e12).last_id)

        wait_for(done, 60, "the service to cover the whole stream after the restart")
    finally:
        stop.set()
        service.join()
    ck = decode_checkpoint(redis_server.client().get("{sr:duel}:ckpt"), 10**6, 1e12)
    assert ck.applied == len(events)
    assert_same_state(ck, reference(events))
    outages = service.registry.get_sample_value(
        "streamrate_redis_outages_total", {"space": "duel", "role": "consumer"}
    )
    assert outages is not None and outages >= 1
