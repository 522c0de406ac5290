"""Query floods against a real redis-server: does the service stay useful? (run by hand)

    python bench/bench_floods.py                  # every configuration, both floods, 10 s each
    python bench/bench_floods.py --seconds 5 --only pairings --configs both-pubsub split-stream

Starts its own ``redis-server`` on a free loopback port in a temporary
directory (no persistence) and stops it by its PID. Per flood and
configuration, a fresh writer runs in this process over the same pre-filled
stream (a backlog, so the consumer is always busy), and:

1. the consumer's idle rate is measured for a few seconds (no questions);
2. two flooding clients (separate processes) send requests as fast as they
   can for ``--seconds``: valid pairings, or lobbies of 256 players; meanwhile a
   normal client asks one pairing at a time (2 s timeout each);
3. after the flood, the normal client asks until an answer comes back.

Configurations (``--configs``), by who listens and how the floods are sent:

* ``none-pubsub``: a writer (``--role writer``) and floods PUBLISHed on a
  channel nobody subscribes to: the baseline for pub/sub, i.e. what the
  flooding processes and Redis alone cost the consumer;
* ``none-stream``: a writer and floods added to the request stream
  ``{sr:duel}:q:stream`` that no responder reads: the baseline for the stream;
* ``both-pubsub``: one process (``--role both``), floods on pub/sub ``{sr:duel}:q``;
* ``both-stream``: one process, floods on the request stream (it answers both);
* ``split-stream``: a writer in this process plus one ``streamrate serve
  --role responder`` process; floods on the request stream, which only
  responders read (the writer's pub/sub channel hears nothing of the flood).

The baselines have nobody answering, so only the consumer's ratio is reported.

Reported: offered flood rate, normal questions answered during the flood and
their latency (p50/p99), busy replies and timeouts, time to the first answer
after the flood, the consumer's rate during the flood as a ratio of its idle
rate in the same run, and the shed / resubscribe counters of whoever answered.
Every loop is bounded and stops by itself.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

import numpy as np
import redis
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

sys.path.insert(0, str(Path(__file__).parent))
from _common import fill_stream, start_redis
from bench_service import event_lines

from streamrate.client import ask
from streamrate.config import QuerySettings, load_settings
from streamrate.errors import ServiceError
from streamrate.service import QUERY_SWITCH_INTERVAL_S, Role, Service, redis_factory

Q = "{sr:duel}:q"
QSTREAM = "{sr:duel}:q:stream"
UNHEARD = "{sr:duel}:q:unheard"  # a channel nobody subscribes to (the pub/sub baseline)
STREAM = "{sr:duel}:events"
TEMPLATE = "bench:events-template"  # the backlog, copied to STREAM for every run
ENTITIES = 2000
STREAM_MAX = 10_000  # as streamrate.client.ask caps the request stream
CONFIGS = ("none-pubsub", "none-stream", "both-pubsub", "both-stream", "split-stream")


def flood(port: int, kind: str, seconds: float, client: str, target: str, cpus: str) -> None:
    """One flooding client (a child process): send as fast as possible."""
    if cpus:  # --flooders-cpu: keep the flooders off the service's core
        os.sched_setaffinity(0, {int(c) for c in cpus.split(",")})
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
    batch = reqs[:50] if kind == "lobbies" else reqs
    sent = 0
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        pipe = r.pipeline(transaction=False)
        for raw in batch:
            if target == QSTREAM:
                pipe.xadd(QSTREAM, {"request": raw}, maxlen=STREAM_MAX, approximate=True)
            else:
                pipe.publish(target, raw)
        sent += len(pipe.execute())
    print(sent)


def percentile(xs: list[float], q: float) -> float:
    return float(np.percentile(xs, q)) if xs else float("nan")


def normal_question(r: redis.Redis, stream: bool, timeout_s: float) -> dict[str, object]:
    req = {"kind": "pairing", "first": ["p1"], "second": ["p2"]}
    reply: dict[str, object] = ask(
        r, Q, req, timeout_s=timeout_s, stream=QSTREAM if stream else None
    )
    return reply


def normal_questions(
    r: redis.Redis, stream: bool, stop: threading.Event, out: dict[str, list[float] | int]
) -> None:
    """A normal client: one pairing at a time until ``stop`` (bounded by the flood)."""
    lat: list[float] = []
    busy = timeouts = 0
    while not stop.is_set():
        t0 = time.perf_counter()
        try:
            rep = normal_question(r, stream, 2.0)
        except ServiceError:  # no reply in 2 s, or no subscriber while it resubscribes
            timeouts += 1
            time.sleep(0.05)
            continue
        if rep.get("ok"):
            lat.append(time.perf_counter() - t0)
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


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def write_config(path: Path, port: int, ckpt: Path, cpu_share: float, metrics_port: int) -> None:
    """One config for the writer (here, metrics off) and the responder process."""
    path.write_text(
        f'[redis]\nurl = "redis://127.0.0.1:{port}/0"\n'
        f'[checkpoint]\ndir = "{ckpt}"\n'
        f"[queries]\ncpu_share = {cpu_share}\n"
        f'[metrics]\nbind = "127.0.0.1"\nport = {metrics_port}\n'
        '[[spaces]]\nname = "duel"\nmodel = "blade_chest"\nbatch_count = 200\nblock_ms = 50\n'
        "checkpoint_every_events = 20000\ncheckpoint_every_s = 5.0\n"
        "[spaces.model_settings]\ndims = 16\n"
    )


def start_responder(cfg: Path, log: Path) -> subprocess.Popen[bytes]:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    with open(log, "ab") as fh:
        proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "streamrate",
                "serve",
                "--config",
                str(cfg),
                "--role",
                "responder",
            ],
            stdout=fh,
            stderr=subprocess.STDOUT,
            env=env,
        )
    deadline = time.monotonic() + 120
    while "answering from the request stream" not in log.read_text():
        if time.monotonic() > deadline or proc.poll() is not None:
            stop_process(proc)
            raise RuntimeError(f"the responder did not start; see its log:\n{log.read_text()}")
        time.sleep(0.1)
    return proc


def stop_process(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(10)


def scrape(metrics_port: int) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """(sample name, labels) -> value of space duel from a responder process's /metrics."""
    with urllib.request.urlopen(f"http://127.0.0.1:{metrics_port}/metrics", timeout=5) as resp:
        text = resp.read().decode()
    out: dict[tuple[str, tuple[tuple[str, str], ...]], float] = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            if s.labels.get("space") == "duel":
                out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def fill_backlog(r: redis.Redis, backlog: int) -> None:
    lines = event_lines(backlog, ENTITIES, seed=7)
    fill_stream(r, TEMPLATE, lines, chunk=5000)


def run_flood(
    port: int,
    kind: str,
    config: str,
    seconds: float,
    backlog: int,
    tmp: Path,
    cpu_share: float,
    flooders_cpu: str,
) -> dict[str, object]:
    r = redis.Redis(port=port)
    for key in list(r.scan_iter(count=1000)):  # a fresh start: everything but the backlog
        if key != TEMPLATE.encode():
            r.delete(key)
    r.copy(TEMPLATE, STREAM)
    role: Role = "both" if config.startswith("both") else "writer"
    via_stream = config.endswith("-stream")
    listening = not config.startswith("none")
    target = QSTREAM if via_stream else (Q if listening else UNHEARD)
    run_dir = tmp / f"{kind}-{config}"
    run_dir.mkdir()
    metrics_port = free_port()
    cfg = run_dir / "serve.toml"
    write_config(cfg, port, run_dir / "ckpt", cpu_share, metrics_port)
    settings = load_settings(cfg, ["metrics.enabled=false"])
    registry = CollectorRegistry()
    service = Service(settings, redis_factory(settings.redis), registry, role=role)
    stop = threading.Event()
    service.start(stop)
    responder: subprocess.Popen[bytes] | None = None
    try:
        service.spaces[0].ready.wait(60)
        service.spaces[0].listening.wait(30)
        if config == "split-stream":
            responder = start_responder(cfg, run_dir / "responder.log")
        live = service.spaces[0].consumer.live
        while live.applied < 2000:  # past the first compile
            time.sleep(0.05)
        idle = applied_rate(service, 3.0)

        children = [
            subprocess.Popen(
                [
                    sys.executable,
                    __file__,
                    "--flood-client",
                    str(port),
                    kind,
                    str(seconds),
                    f"fl{k}",
                    target,
                    flooders_cpu,
                ],
                stdout=subprocess.PIPE,
                text=True,
            )
            for k in range(2)
        ]
        asked: dict[str, list[float] | int] = {}
        q_stop = threading.Event()
        asker = threading.Thread(
            target=normal_questions, args=(redis.Redis(port=port), via_stream, q_stop, asked)
        )
        a0, t0 = live.applied, time.perf_counter()
        if listening:
            asker.start()
        offered = 0
        for child in children:
            out, _ = child.communicate(timeout=seconds + 60)
            offered += int(out.strip() or 0)
        flood_s = time.perf_counter() - t0
        during = (live.applied - a0) / flood_s
        q_stop.set()
        if listening:
            asker.join(10)
        flood_end = time.perf_counter()
        recovered = float("nan")
        deadline = flood_end + 120
        while listening and time.perf_counter() < deadline:
            try:
                if normal_question(r, via_stream, 0.5).get("ok"):
                    recovered = time.perf_counter() - flood_end
                    break
            except ServiceError:
                pass
        ran_out = live.applied >= backlog - 10
        remote = scrape(metrics_port) if responder is not None else {}
    finally:
        stop.set()
        service.join()
        if responder is not None:
            stop_process(responder)

    def counter(name: str, **labels: str) -> float:
        if responder is not None:  # summed over the labels not named
            return sum(
                v
                for (n, lbls), v in remote.items()
                if n == name and labels.items() <= dict(lbls).items()
            )
        v = registry.get_sample_value(name, {"space": "duel", **labels})
        return 0.0 if v is None else v

    lat = asked.get("latency", [])
    assert isinstance(lat, list)
    res: dict[str, object] = {
        "flood": kind,
        "config": config,
        "offered_per_s": offered / flood_s,
        "consumer_idle_per_s": idle,
        "consumer_during_per_s": during,
        "consumer_ratio": during / idle if idle else float("nan"),
        "backlog_ran_out": ran_out,
    }
    if not listening:
        return res
    return {
        **res,
        "answered_during": len(lat),
        "p50_ms": 1000 * percentile(lat, 50),
        "p99_ms": 1000 * percentile(lat, 99),
        "busy_replies_to_normal": asked.get("busy", 0),
        "unanswered_normal": asked.get("timeouts", 0),
        "first_answer_after_flood_s": recovered,
        "answered_total": counter(
            "streamrate_query_requests_total",
            kind="pairing" if kind == "pairings" else "lobby",
            outcome="ok",
        ),
        "shed": {
            reason: counter("streamrate_query_shed_total", reason=reason)
            for reason in ("queue_full", "client_queue_full", "expensive", "too_old")
        },
        "resubscribes": {
            reason: counter("streamrate_query_resubscribes_total", reason=reason)
            for reason in ("connection_lost", "backlog")
        },
    }


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "--flood-client":
        _, _, fport, kind, seconds, client, target, cpus = sys.argv
        flood(int(fport), kind, float(seconds), client, target, cpus)
        return
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    ap.add_argument("--backlog", type=int, default=600_000)
    ap.add_argument("--only", choices=["pairings", "lobbies"])
    ap.add_argument("--configs", nargs="+", choices=CONFIGS, default=list(CONFIGS))
    ap.add_argument("--cpu-share", type=float, default=QuerySettings().cpu_share)
    ap.add_argument(
        "--flooders-cpu",
        default="",
        help="CPU numbers (comma-separated) the flooding processes are pinned to",
    )
    args = ap.parse_args()
    sys.setswitchinterval(QUERY_SWITCH_INTERVAL_S)  # as `streamrate serve` does
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        proc, port = start_redis(tmp)
        try:
            fill_backlog(redis.Redis(port=port), args.backlog)
            for kind in ("pairings", "lobbies"):
                if args.only and kind != args.only:
                    continue
                for config in args.configs:
                    res = run_flood(
                        port,
                        kind,
                        config,
                        args.seconds,
                        args.backlog,
                        tmp,
                        args.cpu_share,
                        args.flooders_cpu,
                    )
                    print(json.dumps(res), flush=True)
        finally:
            os.kill(proc.pid, signal.SIGTERM)
            proc.wait(10)


if __name__ == "__main__":
    main()
