"""Writer lease and failover against a real redis-server.

A writer (``serve --role both``) and a standby (``serve --role standby``) share
one space while events stream in. The writer is SIGKILLed (or SIGSTOPped past
its lease and then continued); the standby takes the lease within the lease
time plus one second (the bound the failover design promises), and the final
model equals an uninterrupted run: nothing lost, nothing applied twice. The
standby becomes the writer from its own replica: it loads the checkpoint only
once, when it starts following. A writer woken after losing its lease stops
without writing, follows the new writer as a standby and takes the space back
when that one leaves.
"""

from __future__ import annotations

import os
import signal
import subprocess
import threading
import time
from pathlib import Path

import pytest
import redis

from streamrate.checkpoint import Checkpoint, decode_checkpoint
from streamrate.client import send_events
from streamrate.stream.applied_log import parse_entry

from .conftest import RedisServer
from .helpers import assert_same_state, reference, serve, wait_for, world_lines, write_toml

pytestmark = [pytest.mark.integration, pytest.mark.slow]
EVENTS = "{sr:duel}:events"
LEASE = "{sr:duel}:lease"
CKPT = "{sr:duel}:ckpt"
APPLIED = "{sr:duel}:applied"
LEASE_MS = 2000


def _config(path: Path, server: RedisServer, tmp: Path) -> None:
    write_toml(path, server.url, tmp / "ckpt", store="redis")
    with open(path, "a") as fh:  # top-level tables may follow the spaces' arrays
        fh.write(f"[lease]\nlease_ms = {LEASE_MS}\nrenew_every_ms = 300\npoll_every_ms = 100\n")


def _holder(r: redis.Redis) -> str | None:
    got = r.get(LEASE)
    return None if got is None else got.decode()


def _checkpoint(r: redis.Redis) -> Checkpoint | None:
    data = r.get(CKPT)
    return None if data is None else decode_checkpoint(data, keep=1_000_000, window_s=1e12)


def _all_covered(r: redis.Redis) -> bool:
    ck = _checkpoint(r)
    last = r.xinfo_stream(EVENTS)["last-generated-id"].decode()
    pending = r.xpending(EVENTS, "streamrate")["pending"]
    return ck is not None and ck.last_id == last and pending == 0


def _start_pair(
    server: RedisServer, tmp: Path
) -> tuple[subprocess.Popen[bytes], subprocess.Popen[bytes], Path, Path, str]:
    cfg = tmp / "serve.toml"
    _config(cfg, server, tmp)
    r = server.client()
    wlog, slog = tmp / "writer.log", tmp / "standby.log"
    writer = serve(cfg, wlog, "both")
    wait_for(lambda: wlog.exists() and "entries to read" in wlog.read_text(), 60, "writer")
    holder = _holder(r)
    assert holder is not None
    standby = serve(cfg, slog, "standby")
    wait_for(lambda: slog.exists() and "replica loaded" in slog.read_text(), 60, "standby")
    return writer, standby, wlog, slog, holder


def _stop_all(*procs: subprocess.Popen[bytes]) -> None:
    for p in procs:
        if p.poll() is None:
            os.kill(p.pid, signal.SIGKILL)
            p.wait()


def _taken_over(r: redis.Redis, old: str, since: float) -> float:
    """Seconds from ``since`` until the lease names another holder."""
    wait_for(lambda: (_holder(r) or old) != old, 30, "the standby to take the lease")
    return time.monotonic() - since


def _assert_promoted_without_reload(slog: Path) -> None:
    """The standby became the writer from its own replica: the checkpoint was
    loaded once, when the replica started, and never by the writer."""
    text = slog.read_text()
    assert "becomes the writer" in text
    assert "without reloading the checkpoint" in text
    assert text.count("replica loaded") == 1
    assert "resuming from the" not in text  # the writer's load of the checkpoint


def test_sigkill_of_the_writer_a_standby_takes_over_and_loses_nothing(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    lines, events, junk = world_lines(2000, seed=23)
    r = redis_server.client()
    writer, standby, _, slog, old = _start_pair(redis_server, tmp_path)
    sender = threading.Thread(
        target=send_events,
        args=(redis_server.client(), EVENTS, lines),
        kwargs={"rate_per_s": 600.0, "chunk": 20},
    )
    try:
        sender.start()
        wait_for(lambda: r.xlen(EVENTS) > len(lines) // 3, 60, "a third of the events")
        os.kill(writer.pid, signal.SIGKILL)
        killed_at = time.monotonic()
        writer.wait()
        assert _taken_over(r, old, killed_at) < LEASE_MS / 1000 + 1.0
        sender.join()
        wait_for(lambda: _all_covered(r), 90, "the new writer to cover the whole stream")
        os.kill(standby.pid, signal.SIGTERM)
        assert standby.wait(30) == 0
    finally:
        _stop_all(writer, standby)
    _assert_promoted_without_reload(slog)
    ck = _checkpoint(r)
    assert ck is not None
    assert ck.applied == len(events)  # each unique event once
    assert ck.counters["dead_lettered"] == junk
    assert_same_state(ck, reference(events))
    assert r.xlen("{sr:duel}:dead") == junk


def test_a_writer_woken_after_losing_its_lease_stops_writing_and_follows_as_a_standby(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    lines, events, _ = world_lines(1500, seed=29)
    r = redis_server.client()
    writer, standby, wlog, slog, old = _start_pair(redis_server, tmp_path)
    old_epoch = int(old.split()[1])
    sender = threading.Thread(
        target=send_events,
        args=(redis_server.client(), EVENTS, lines),
        kwargs={"rate_per_s": 600.0, "chunk": 20},
    )
    try:
        sender.start()
        wait_for(lambda: r.xlen(EVENTS) > len(lines) // 3, 60, "a third of the events")
        os.kill(writer.pid, signal.SIGSTOP)
        stopped_at = time.monotonic()
        assert _taken_over(r, old, stopped_at) < LEASE_MS / 1000 + 1.0
        new_epoch = int((_holder(r) or "").split()[1])
        assert new_epoch > old_epoch
        sender.join()
        wait_for(lambda: _all_covered(r), 90, "the new writer to cover the whole stream")
        ckpt_before = r.get(CKPT)
        log_len = r.xlen(APPLIED)
        os.kill(writer.pid, signal.SIGCONT)
        # It stops writing (one line), then follows the new writer as a standby.
        wait_for(lambda: "replica loaded" in wlog.read_text(), 30, "the woken writer to follow")
        assert r.get(CKPT) == ckpt_before  # nothing written by the woken writer
        assert r.xlen(APPLIED) == log_len
        assert writer.poll() is None
        assert wlog.read_text().count("lost (") == 1
        os.kill(standby.pid, signal.SIGTERM)  # the new writer leaves: the old one takes over
        assert standby.wait(30) == 0
        wait_for(lambda: "becomes the writer" in wlog.read_text(), 30, "the old writer to return")
        wait_for(lambda: (_holder(r) or "").split(":")[1:2] == [str(writer.pid)], 30, "its lease")
        wait_for(lambda: _all_covered(r), 30, "its checkpoint")
        os.kill(writer.pid, signal.SIGTERM)
        assert writer.wait(30) == 0
    finally:
        _stop_all(writer, standby)
    _assert_promoted_without_reload(slog)
    ck = _checkpoint(r)
    assert ck is not None
    # The token: the checkpoint's applied-log position is an entry of the new epoch,
    # and no entry of the old epoch follows the new writer's start.
    rows = [parse_entry(sid, f) for sid, f in r.xrange(APPLIED)]
    at = next(e for e in rows if e.id == ck.log_id)
    assert at.epoch >= new_epoch
    # Epochs never go back along the log (the new writer's entries may be trimmed
    # by now, once the old one took the space back and checkpointed past them).
    epochs = [e.epoch for e in rows]
    assert epochs == sorted(epochs)
    assert ck.applied == len(events)
    assert_same_state(ck, reference(events))
