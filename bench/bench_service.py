"""Service throughput and query latency against a real redis-server (run by hand).

    python bench/bench_service.py                 # throughput, query latency, lobby
    python bench/bench_service.py --memory        # also: one million entities at d=16
    python bench/bench_service.py --model default --lock-chunk 64   # the served default

Starts its own ``redis-server`` on a free loopback port in a temporary directory
(no persistence) and stops it by its PID. Every number is reported next to a
baseline measured in the same run against the same server:

* throughput: the real consumer (validation, blade-chest d=16 updates,
  checkpoints to a file, acks, every write fenced by the writer lease, the
  garbage collector tuned as the service tunes it: ``--gc default`` leaves it)
  as a ratio to an empty consumer that only reads and acks (the ack of one
  batch pipelined with the next read), both over the same pre-filled stream
  (two consumer groups), for batch sizes 100 and 1000;
* query latency: sequential pairing queries through ``streamrate serve`` (a
  subprocess, applying events meanwhile) next to a plain GET round trip;
* lobby of 100: the in-process answer time (matrix + split), and round trip.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import signal
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import redis
from _common import fill_stream, run_to_end, start_redis
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import FileCheckpointStore
from streamrate.config import (
    CheckpointSettings,
    LeaseSettings,
    QualitySettings,
    Settings,
    SpaceSettings,
)
from streamrate.consumer import Consumer, LiveModel
from streamrate.metrics import ServiceMetrics
from streamrate.models.registry import build_model
from streamrate.queries import Answerer, LobbyRequest
from streamrate.stream.lease import Lease
from streamrate.watch.quality_metrics import QualityMetrics, quality_observers

MODEL_SETTINGS = {"dims": 16}
STREAM = "{sr:duel}:events"


def event_lines(n: int, entities: int, seed: int) -> list[str]:
    rng = np.random.default_rng(seed)
    a = rng.integers(0, entities, n)
    b = (a + rng.integers(1, entities, n)) % entities
    score = rng.integers(0, 2, n)
    maps = ("saltflats", "ember-quarry", "glasswood", "sunken-bell")
    return [
        json.dumps({
            "match_id": f"b{seed}-{i}", "finished_at": f"2026-03-01T{(i // 3600) % 24:02d}:"
            f"{(i // 60) % 60:02d}:{i % 60:02d}Z", "first": [f"p{a[i]}"], "second": [f"p{b[i]}"],
            "score": int(score[i]), "context": {"map": maps[i % 4], "mode": "duel"},
        })
        for i in range(n)
    ]  # fmt: skip


def fill(r: redis.Redis, lines: list[str]) -> None:
    fill_stream(r, STREAM, lines)


def empty_consumer(r: redis.Redis, group: str, batch: int) -> float:
    """Read + ack only; the ack of a batch rides with the next read. Returns events/s."""
    r.xgroup_create(STREAM, group, id="0")
    t0 = time.perf_counter()
    n = 0
    prev: list[bytes] = []
    while True:
        pipe = r.pipeline(transaction=False)
        if prev:
            pipe.xack(STREAM, group, *prev)
        pipe.xreadgroup(group, "c", {STREAM: ">"}, count=batch)
        resp = pipe.execute()[-1]
        rows = resp[0][1] if resp else []
        if not rows:
            break
        prev = [sid for sid, _ in rows]
        n += len(rows)
    return n / (time.perf_counter() - t0)


BACKGROUND = CheckpointSettings().background
"""Whether checkpoints are written in a thread of their own: the service's default
unless ``--checkpoint inline`` is given."""


QUALITY = "off"
"""The service's quality observers on the writer: ``off`` (the figures of the issue's
aim), ``chunks`` (as ``serve`` runs them: a chunk per call) or ``events`` (the same
observers called event by event, as before chunks)."""


class _EventByEvent:
    """An observer seen without its ``observe_chunk``: called event by event."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner

    def __call__(self, event: Any, prediction: Any, kind: str) -> None:
        self.inner(event, prediction, kind)


def _observers() -> list[Any]:
    if QUALITY == "off":
        return []
    got = quality_observers("duel", QualitySettings(), QualityMetrics(CollectorRegistry()))
    return got if QUALITY == "chunks" else [_EventByEvent(o) for o in got]


WRITER_MODEL: tuple[str, dict[str, Any]] = ("blade_chest", MODEL_SETTINGS)
"""The model of :func:`make_writer` and of the served queries: blade-chest d=16 (the
aim's setting) unless ``--model default`` (the served default) is given."""

LOCK_CHUNK: int | None = None
"""``--lock-chunk``: events applied per hold of the model lock (None: the default)."""


def make_writer(r: redis.Redis, group: str, batch: int, ckpt_dir: str) -> Consumer:
    """The service's writer for one space, its settings as a service would have them
    (default validation, retry record and checkpoint cadence; checkpoints to a file,
    in the background as the service does by default: see :data:`BACKGROUND`; the
    writer lease fencing the applied log, the checkpoint and the acks)."""
    space = SpaceSettings(
        name="duel", model=WRITER_MODEL[0], model_settings=WRITER_MODEL[1], group=group,
        batch_count=batch, block_ms=1, checkpoint_every_events=10_000, checkpoint_every_s=5.0,
        **({"lock_chunk": LOCK_CHUNK} if LOCK_CHUNK else {}),
    )  # fmt: skip
    keys = Settings(spaces=(space,)).keys(space)
    # Renewed every second as in the service (here by the writer's own check before
    # each read, no renewal thread); long, so that compiling kernels at the start
    # does not let it lapse. One lease per group: each run is a writer of its own.
    lease = Lease(r, f"{keys.lease}:{group}", keys.epoch, LeaseSettings(lease_ms=600_000))
    return Consumer(
        r, space, keys, FileCheckpointStore(ckpt_dir, group, lease),
        ServiceMetrics(CollectorRegistry(), ["duel"]),
        lambda: build_model(WRITER_MODEL[0], **WRITER_MODEL[1]), background=BACKGROUND,
        lease=lease, observers=_observers(),
    )  # fmt: skip


def real_consumer(r: redis.Redis, group: str, batch: int, ckpt_dir: str) -> tuple[float, int]:
    c = make_writer(r, group, batch, ckpt_dir)
    c.recover()
    t0 = time.perf_counter()
    run_to_end(c)
    return c.live.applied / (time.perf_counter() - t0), c.live.applied


def percentiles(xs: list[float]) -> str:
    a = np.array(xs) * 1e6
    return f"p50 {np.percentile(a, 50):7.0f} us  p99 {np.percentile(a, 99):7.0f} us"


def reply(ps: redis.client.PubSub, log: Path, timeout_s: float = 30.0) -> dict[str, object]:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        m = ps.get_message(timeout=1.0)
        if m and m["type"] == "message":
            return m  # type: ignore[no-any-return]
    raise RuntimeError(f"no reply in {timeout_s} s; service log:\n{log.read_text()[-3000:]}")


def query_latency(
    port: int, tmp: Path, n_queries: int, entities: int, r_fill: threading.Thread
) -> None:
    cfg = tmp / "serve.toml"
    cfg.write_text(
        f'[redis]\nurl = "redis://127.0.0.1:{port}/0"\n[metrics]\nenabled = false\n'
        f'[checkpoint]\ndir = "{tmp / "ck"}"\n'
        f'[[spaces]]\nname = "duel"\nmodel = "{WRITER_MODEL[0]}"\ngroup = "served"\n'
        "batch_count = 200\ncheckpoint_every_events = 20000\n"
        + (f"lock_chunk = {LOCK_CHUNK}\n" if LOCK_CHUNK else "")
        + "[spaces.model_settings]\n"
        + "".join(f"{k} = {v!r}\n" for k, v in WRITER_MODEL[1].items())
    )
    log = tmp / "serve.log"
    with open(log, "wb") as fh:
        proc = subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg)],
            stdout=fh, stderr=subprocess.STDOUT,
        )  # fmt: skip
    r = redis.Redis(port=port)
    try:
        while r.pubsub_numsub("{sr:duel}:q")[0][1] == 0:
            time.sleep(0.05)
        reply_to = f"{{sr:duel}}:q:reply:bench-{uuid.uuid4().hex}"  # the reply namespace
        ps = r.pubsub(ignore_subscribe_messages=True)
        ps.subscribe(reply_to)
        ps.get_message(timeout=1)
        rng = np.random.default_rng(1)

        def pairings(n: int) -> tuple[list[float], list[int]]:
            lat: list[float] = []
            applied: list[int] = []
            for i in range(n):
                a, b = rng.choice(entities, 2, replace=False)
                req = json.dumps({"kind": "pairing", "id": str(i), "reply_to": reply_to,
                                  "first": [f"p{a}"], "second": [f"p{b}"]})  # fmt: skip
                t0 = time.perf_counter()
                r.publish("{sr:duel}:q", req)
                m = reply(ps, log)
                lat.append(time.perf_counter() - t0)
                applied.append(int(json.loads(m["data"]).get("applied", -1)))  # -1: not ready
            return lat, applied

        while pairings(1)[1][-1] < 0:  # the service answers "not ready" until it has loaded
            time.sleep(0.2)
        r_fill.start()
        lat, applied_during = pairings(n_queries)
        r_fill.join()
        total = r.xlen(STREAM)
        while pairings(1)[1][-1] < total:  # wait until the service has caught up
            time.sleep(0.2)
        idle, _ = pairings(n_queries)
        gets: list[float] = []
        r.set("bench:k", "v")
        for _ in range(n_queries):
            t0 = time.perf_counter()
            r.get("bench:k")
            gets.append(time.perf_counter() - t0)
        lobby_rt: list[float] = []
        for i in range(50):
            ids = [f"p{x}" for x in rng.choice(entities, 100, replace=False)]
            req = json.dumps({"kind": "lobby", "id": f"L{i}", "reply_to": reply_to,
                              "entities": ids, "team_sizes": [50, 50]})  # fmt: skip
            t0 = time.perf_counter()
            r.publish("{sr:duel}:q", req)
            reply(ps, log)
            lobby_rt.append(time.perf_counter() - t0)
        print(
            f"pairing query round trip ({n_queries}, service applying events meanwhile: "
            f"applied {applied_during[0]} -> {applied_during[-1]}): {percentiles(lat)}"
        )
        print(f"pairing query round trip ({n_queries}, service idle): {percentiles(idle)}")
        print(
            f"plain GET round trip ({n_queries}):                                "
            f"{percentiles(gets)}"
        )
        print(f"  ratio p50 query/GET: busy {np.median(lat) / np.median(gets):.1f}x, "
              f"idle {np.median(idle) / np.median(gets):.1f}x")  # fmt: skip
        print(f"lobby of 100 round trip (50, service idle):   {percentiles(lobby_rt)}")
    finally:
        os.kill(proc.pid, signal.SIGTERM)
        try:
            proc.wait(60)
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()


def lobby_in_process(entities: int) -> None:
    model = build_model(WRITER_MODEL[0], **WRITER_MODEL[1])
    from streamrate.events import parse_event

    model.learn_many([parse_event(x) for x in event_lines(50_000, entities, 7)])
    ans = Answerer(LiveModel(model), lobby_exact_max=10, lobby_max=256)
    rng = np.random.default_rng(3)
    times = []
    for i in range(200):
        ids = [f"p{x}" for x in rng.choice(entities, 100, replace=False)]
        req = LobbyRequest(kind="lobby", id=str(i), reply_to="r", entities=ids,
                           team_sizes=(50, 50))  # fmt: skip
        t0 = time.perf_counter()
        rep = ans.lobby(req)
        times.append(time.perf_counter() - t0)
    print(
        f"lobby of 100 answered in process (200 lobbies): {percentiles(times)}  "
        f"[method {rep['method']}, gap {rep['surrogate_gap']:.4f} <= bound {rep['gap_bound']:.4f}]"
    )
    ids = [f"p{x}" for x in range(10)]
    req = LobbyRequest(kind="lobby", id="x", reply_to="r", entities=ids, team_sizes=(5, 5))
    t0 = time.perf_counter()
    ans.lobby(req)
    print(f"lobby of 10 (exact, 126 splits) in process: {(time.perf_counter() - t0) * 1e3:.1f} ms")


def rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def memory_million(tmp: Path) -> None:
    from streamrate.checkpoint import Checkpoint, encode_checkpoint
    from streamrate.dedupe import SeenIds
    from streamrate.events import parse_event

    base = rss_mb()
    model = build_model("blade_chest", **MODEL_SETTINGS)
    n_ent = 1_000_000
    rng = np.random.default_rng(5)
    perm = rng.permutation(n_ent)
    done = 0
    t0 = time.perf_counter()
    while done < n_ent:
        chunk = []
        for k in range(0, 20_000, 2):
            i = done + k
            if i + 1 >= n_ent:
                break
            chunk.append(parse_event(json.dumps({
                "match_id": f"m{i}", "finished_at": "2026-03-01T00:00:00Z",
                "first": [f"p{perm[i]}"], "second": [f"p{perm[i + 1]}"], "score": 1})))  # fmt: skip
        if not chunk:
            break
        model.learn_many(chunk)
        done += 2 * len(chunk)
    learn_s = time.perf_counter() - t0
    live = rss_mb()
    t0 = time.perf_counter()
    blob = encode_checkpoint(Checkpoint(model.to_state(), "1-0", done // 2, SeenIds(200_000, 1e9)))
    FileCheckpointStore(tmp, "mem").save(blob)
    ck_s = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"one million entities at d=16: RSS {live - base:.0f} MB above the empty process")
    print(f"  ({live:.0f} MB total, peak {peak:.0f} MB); learning took {learn_s:.0f} s")
    print(f"  checkpoint {len(blob) / 1e6:.0f} MB written in {ck_s:.2f} s")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=int, default=100_000)
    ap.add_argument("--entities", type=int, default=5_000)
    ap.add_argument("--queries", type=int, default=3_000)
    ap.add_argument("--memory", action="store_true")
    ap.add_argument(
        "--only", choices=("throughput",), help="only the throughput ratios (no queries, lobby)"
    )
    ap.add_argument(
        "--checkpoint", choices=("background", "inline"), help="how the writer stores its "
        "checkpoints (default: as the service does, background unless configured otherwise)",
    )  # fmt: skip
    ap.add_argument(
        "--gc", choices=("tuned", "default"), default="tuned",
        help="the garbage collector as the service sets it at start (tuned) or Python's default",
    )  # fmt: skip
    ap.add_argument(
        "--model", choices=("blade_chest", "default"), default="blade_chest",
        help="the writer's and the served queries' model: blade-chest d=16 (the aim's "
        "setting) or the served default (recalibrated mixture)",
    )  # fmt: skip
    ap.add_argument(
        "--lock-chunk", type=int, help="events applied per hold of the model lock "
        "(default: the service's)",
    )  # fmt: skip
    args = ap.parse_args()
    global BACKGROUND, WRITER_MODEL, LOCK_CHUNK
    if args.checkpoint:
        BACKGROUND = args.checkpoint == "background"
    if args.model == "default":
        WRITER_MODEL = ("recalibrated", {})
    LOCK_CHUNK = args.lock_chunk
    print(
        f"CPUs available to this process: {sorted(os.sched_getaffinity(0))} of {os.cpu_count()} "
        "(redis-server, service and bench share them; no pinning); checkpoints "
        + ("in the background" if BACKGROUND else "inline")
        + f"; garbage collector {args.gc}; model {args.model}"
        + (f"; lock_chunk {LOCK_CHUNK}" if LOCK_CHUNK else "")
    )
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        proc, port = start_redis(tmp)
        try:
            r = redis.Redis(port=port)
            lines = event_lines(args.events, args.entities, 0)
            fill(r, lines)
            print(f"stream pre-filled with {args.events} events among {args.entities} entities")
            real_consumer(r, "warmup", 1000, str(tmp / "ck"))  # numba caches, page cache
            if args.gc == "tuned":
                from streamrate.service import tune_gc

                tune_gc()  # as the service does once it has started
            for batch in (100, 1000):
                bases, fulls = [], []
                for rep in range(3):  # alternate, report medians: two CPUs are noisy
                    bases.append(empty_consumer(r, f"empty{batch}-{rep}", batch))
                    full, applied = real_consumer(r, f"full{batch}-{rep}", batch, str(tmp / "ck"))
                    assert applied == args.events
                    fulls.append(full)
                base, full = float(np.median(bases)), float(np.median(fulls))
                print(
                    f"batch {batch:4d}: empty consumer {base:9.0f} ev/s   service {full:8.0f} ev/s"
                    f"   ratio {full / base:.3f}   (medians of 3; ratios "
                    f"{', '.join(f'{f / b:.3f}' for f, b in zip(fulls, bases, strict=True))})"
                )
            if args.only == "throughput":
                return
            filler = threading.Thread(
                target=fill, args=(r, event_lines(200_000, args.entities, 9)), daemon=True
            )
            query_latency(port, tmp, args.queries, args.entities, filler)
        finally:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
    lobby_in_process(args.entities)
    if args.memory:
        with tempfile.TemporaryDirectory() as d:
            memory_million(Path(d))


if __name__ == "__main__":
    main()
