"""A SIGTERM and a restart of ``python -m streamrate serve`` keep the quality series going.

The restarted process's scraped quality, drift and recalibration gauges must
equal those of one uninterrupted run over the same events.
"""

from __future__ import annotations

import json
import math
import signal
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import fakeredis
import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from streamrate.client import send_events
from streamrate.config import CheckpointSettings, MetricsSettings, load_settings
from streamrate.events import event_to_json
from streamrate.service import Service
from streamrate.simulate import simulate, world_spec

from .conftest import RedisServer, free_port
from .helpers import file_checkpoint, wait_for

pytestmark = [pytest.mark.integration, pytest.mark.slow]
EVENTS = "{sr:duel}:events"
WATCHED = (
    "streamrate_quality_",
    "streamrate_drift_psi",
    "streamrate_drift_change_statistic",
    "streamrate_recalibration_",
)
Samples = dict[tuple[str, frozenset[tuple[str, str]]], float]


def _config(path: Path, url: str, ckpt: Path, port: int) -> None:
    path.write_text(
        f"[redis]\nurl = {json.dumps(url)}\n"
        f"[checkpoint]\ndir = {json.dumps(str(ckpt))}\n"
        f'[metrics]\nenabled = true\nbind = "127.0.0.1"\nport = {port}\n'
        '[[spaces]]\nname = "duel"\nmodel = "recalibrated"\nbatch_count = 50\nblock_ms = 20\n'
        "checkpoint_every_s = 0.2\n"
        '[spaces.model_settings]\nbase = "elo"\n'
        "[spaces.quality]\nrecent_events = 100\nreference_events = 150\n"
        'group_field = "map"\ngroup_top_k = 2\ndrift_fields = ["map"]\npublish_every_s = 0.0\n'
    )


def _watched(samples: Samples) -> Samples:
    return {k: v for k, v in samples.items() if k[0].startswith(WATCHED)}


def _scrape(port: int) -> Samples:
    body = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read()
    return {
        (s.name, frozenset(s.labels.items())): s.value
        for fam in text_string_to_metric_families(body.decode())
        for s in fam.samples
    }


def _serve(cfg: Path, log: Path) -> subprocess.Popen[bytes]:
    with open(log, "ab") as fh:
        return subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
            stdout=fh,
            stderr=subprocess.STDOUT,
        )


def _applied(ckpt: Path) -> int:
    ck = file_checkpoint(ckpt, "duel")
    return -1 if ck is None else ck.applied


def _stop(proc: subprocess.Popen[bytes]) -> int:
    proc.send_signal(signal.SIGTERM)
    try:
        return proc.wait(30)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)
        raise


def _uninterrupted(cfg: Path, lines: list[str], ckpt: Path) -> Samples:
    base = load_settings(cfg)
    settings = base.model_copy(
        update={
            "checkpoint": CheckpointSettings(dir=ckpt),
            "metrics": MetricsSettings(enabled=False),
        }
    )
    server = fakeredis.FakeServer()
    registry = CollectorRegistry()
    svc = Service(settings, lambda: fakeredis.FakeRedis(server=server), registry)
    stop = threading.Event()
    svc.start(stop)
    try:
        send_events(fakeredis.FakeRedis(server=server), EVENTS, lines)
        live = svc.spaces[0].consumer.live
        wait_for(lambda: live.applied >= len(lines), 60, "the uninterrupted run")
    finally:
        stop.set()
        svc.join()
    return _watched(
        {
            (s.name, frozenset(s.labels.items())): s.value
            for fam in registry.collect()
            for s in fam.samples
        }
    )


def test_sigterm_and_restart_continue_the_same_quality_series(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    events = simulate(world_spec("cyclic", matches=600, entities=20, seed=8)).events
    lines = [event_to_json(e) for e in events]
    split = 450
    ckpt = tmp_path / "ckpt"
    port = free_port()
    cfg = tmp_path / "serve.toml"
    _config(cfg, redis_server.url, ckpt, port)
    log = tmp_path / "serve.log"
    r = redis_server.client()

    send_events(r, EVENTS, lines[:split])
    proc = _serve(cfg, log)
    try:
        wait_for(lambda: _applied(ckpt) == split or proc.poll() is not None, 60, "first part")
    finally:
        assert _stop(proc) == 0, log.read_text()[-2000:]
    send_events(r, EVENTS, lines[split:])
    proc = _serve(cfg, log)
    try:
        wait_for(lambda: _applied(ckpt) == len(lines) or proc.poll() is not None, 60, "the rest")
        deadline = time.monotonic() + 10
        while True:  # the metrics endpoint is up once the process answers
            try:
                got = _watched(_scrape(port))
                break
            except OSError:
                assert time.monotonic() < deadline, log.read_text()[-2000:]
                time.sleep(0.1)
    finally:
        assert _stop(proc) == 0, log.read_text()[-2000:]

    want = _uninterrupted(cfg, lines, tmp_path / "whole")
    assert got.keys() == want.keys()
    for key, value in want.items():
        assert (math.isnan(value) and math.isnan(got[key])) or got[key] == value, key
    n_ref = ("streamrate_quality_window_events", frozenset(
        {"space": "duel", "model": "recalibrated", "window": "reference", "group": "all"}.items()
    ))  # fmt: skip
    assert got[n_ref] == 150  # a restart without the state would hold 0 + 50 here
