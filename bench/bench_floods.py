"""Query floods against a real redis-server: does the service stay useful? (run by hand)

    python bench/bench_floods.py                  # both floods, 10 s each
    python bench/bench_floods.py --seconds 5 --only pairings

Starts its own ``redis-server`` on a free loopback port in a temporary
directory (no persistence) and stops it by its PID. Per flood, a fresh service
runs in this process over a pre-filled stream (a backlog, so the consumer is
always busy), and:

1. the consumer's idle rate is measured for a few seconds (no questions);
2. two flooding clients (separate processes) publish requests as fast as they
   can for ``--seconds``: valid pairings, or lobbies of 256 players; meanwhile a
   normal client asks one pairing at a time (2 s timeout each);
3. after the flood, the normal client asks until an answer comes back.

Reported: offered flood rate, normal questions answered during the flood and
their latency (p50/p99), busy replies and timeouts, time to the first answer
after the flood, the consumer's rate during the flood as a ratio of its idle
rate in the same run, and the service's shed / resubscribe counters. Every loop
is bounded and stops by itself.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import redis
from prometheus_client import CollectorRegistry

sys.path.insert(0, str(Path(__file__).parent))
from bench_service import event_lines, start_redis

from streamrate.client import ask
from streamrate.config import (
    CheckpointSettings,
    QuerySettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.errors import ServiceError
from streamrate.service import QUERY_SWITCH_INTERVAL_S, Service, redis_factory

Q = "{sr:duel}:q"
STREAM = "{sr:duel}:events"
ENTITIES = 2000


def flood(port: int, kind: str, seconds: float, client: str) -> None:
    """One flooding client (a child process): publish as fast as possible."""
    r = redis.Redis(port=port)
    rng = np.random.default_rng(abs(hash(client)) % 2**32)
    reqs = []
    for n in range(200):
        if kind == "pairings":
            a, b = rng.choice(ENTITIES, 2, replace=False)
            body: dict[str, object] = {"kind": "pairing", "first": [f"p{a}"], "second": [f"p{b}"]}
        else:
            ids = rng.choice(ENTITIES, 256, replace=False)
            body = {"kind": "lobby", "entities": [f"p{i}" for i in ids], "team_sizes": [128, 128]}
        reqs.append(json.dumps({**body, "id": f"{client}-{n}",
                                "reply_to": f"{Q}:reply:{client}:{n}"}))  # fmt: skip
    sent = 0
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        pipe = r.pipeline(transaction=False)
        for raw in reqs[:50] if kind == "lobbies" else reqs:
            pipe.publish(Q, raw)
        sent += len(pipe.execute())
    print(sent)


def percentile(xs: list[float], q: float) -> float:
    return float(np.percentile(xs, q)) if xs else float("nan")


def normal_questions(
    r: redis.Redis, stop: threading.Event, out: dict[str, list[float] | int]
) -> None:
    """A normal client: one pairing at a time until ``stop`` (bounded by the flood)."""
    lat: list[float] = []
    busy = timeouts = 0
    while not stop.is_set():
        t0 = time.perf_counter()
        try:
            rep = ask(r, Q, {"kind": "pairing", "first": ["p1"], "second": ["p2"]}, timeout_s=2.0)
        except ServiceError:  # no reply in 2 s, or no subscriber while it resubscribes
            timeouts += 1
            time.sleep(0.05)
            continue
        if rep.get("ok"):
            lat.append(time.perf_counter() - t0)
            time.sleep(0.05)
        else:
            busy += 1
            time.sleep(0.05)
    out["latency"] = lat
    out["busy"] = busy
    out["timeouts"] = timeouts


def applied_rate(service: Service, seconds: float) -> float:
    live = service.spaces[0].consumer.live
    a0, t0 = live.applied, time.perf_counter()
    time.sleep(seconds)
    return (live.applied - a0) / (time.perf_counter() - t0)


def run_flood(
    port: int, kind: str, seconds: float, backlog: int, tmp: Path, cpu_share: float
) -> dict[str, object]:
    r = redis.Redis(port=port)
    r.delete(STREAM)
    lines = event_lines(backlog, ENTITIES, seed=len(kind))
    pipe = r.pipeline(transaction=False)
    for k, line in enumerate(lines, 1):
        pipe.xadd(STREAM, {"event": line})
        if k % 5000 == 0:
            pipe.execute()
    pipe.execute()
    space = SpaceSettings(
        name="duel", model="blade_chest", model_settings={"dims": 16}, batch_count=200,
        block_ms=50, checkpoint_every_events=20_000, checkpoint_every_s=5.0,
    )  # fmt: skip
    ckpt = tmp / f"ckpt-{kind}"
    settings = Settings(
        redis=RedisSettings(url=f"redis://127.0.0.1:{port}/0"),
        checkpoint=CheckpointSettings(dir=ckpt),
        queries=QuerySettings(cpu_share=cpu_share),
        spaces=(space,),
    )
    registry = CollectorRegistry()
    service = Service(settings, redis_factory(settings.redis), registry)
    stop = threading.Event()
    service.start(stop)
    service.spaces[0].ready.wait(60)
    service.spaces[0].listening.wait(30)
    live = service.spaces[0].consumer.live
    while live.applied < 2000:  # past the first compile
        time.sleep(0.05)
    idle = applied_rate(service, 3.0)

    children = [
        subprocess.Popen(
            [sys.executable, __file__, "--flood-client", str(port), kind, str(seconds), f"fl{k}"],
            stdout=subprocess.PIPE,
            text=True,
        )
        for k in range(2)
    ]
    asked: dict[str, list[float] | int] = {}
    q_stop = threading.Event()
    asker = threading.Thread(target=normal_questions, args=(redis.Redis(port=port), q_stop, asked))
    a0, t0 = live.applied, time.perf_counter()
    asker.start()
    offered = 0
    for child in children:
        out, _ = child.communicate(timeout=seconds + 60)
        offered += int(out.strip() or 0)
    flood_s = time.perf_counter() - t0
    during = (live.applied - a0) / flood_s
    q_stop.set()
    asker.join(10)
    flood_end = time.perf_counter()
    recovered = float("nan")
    deadline = flood_end + 120
    while time.perf_counter() < deadline:
        try:
            rep = ask(r, Q, {"kind": "pairing", "first": ["p1"], "second": ["p2"]}, timeout_s=0.5)
            if rep.get("ok"):
                recovered = time.perf_counter() - flood_end
                break
        except ServiceError:
            pass
    ran_out = live.applied >= backlog - 10
    stop.set()
    service.join()

    def counter(name: str, **labels: str) -> float:
        v = registry.get_sample_value(name, {"space": "duel", **labels})
        return 0.0 if v is None else v

    shed = {
        reason: counter("streamrate_query_shed_total", reason=reason)
        for reason in ("queue_full", "client_queue_full", "expensive", "too_old")
    }
    lat = asked.get("latency", [])
    assert isinstance(lat, list)
    return {
        "flood": kind,
        "offered_per_s": offered / flood_s,
        "answered_during": len(lat),
        "p50_ms": 1000 * percentile(lat, 50),
        "p99_ms": 1000 * percentile(lat, 99),
        "busy_replies_to_normal": asked.get("busy", 0),
        "unanswered_normal": asked.get("timeouts", 0),
        "first_answer_after_flood_s": recovered,
        "consumer_idle_per_s": idle,
        "consumer_during_per_s": during,
        "consumer_ratio": during / idle if idle else float("nan"),
        "backlog_ran_out": ran_out,
        "answered_total": counter(
            "streamrate_query_requests_total",
            kind="pairing" if kind == "pairings" else "lobby",
            outcome="ok",
        ),
        "shed": shed,
        "resubscribes": {
            reason: counter("streamrate_query_resubscribes_total", reason=reason)
            for reason in ("connection_lost", "backlog")
        },
    }


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "--flood-client":
        _, _, port, kind, seconds, client = sys.argv
        flood(int(port), kind, float(seconds), client)
        return
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--backlog", type=int, default=600_000)
    ap.add_argument("--only", choices=["pairings", "lobbies"])
    ap.add_argument("--cpu-share", type=float, default=QuerySettings().cpu_share)
    args = ap.parse_args()
    sys.setswitchinterval(QUERY_SWITCH_INTERVAL_S)  # as `streamrate serve` does
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        proc, port = start_redis(tmp)
        try:
            for kind in ("pairings", "lobbies"):
                if args.only and kind != args.only:
                    continue
                res = run_flood(port, kind, args.seconds, args.backlog, tmp, args.cpu_share)
                print(json.dumps(res, indent=1), flush=True)
        finally:
            os.kill(proc.pid, signal.SIGTERM)
            proc.wait(10)


if __name__ == "__main__":
    main()
