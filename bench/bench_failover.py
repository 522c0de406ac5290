"""Failover and sharing against a real redis-server (run by hand, never in CI).

    python bench/bench_failover.py                       # all three parts
    python bench/bench_failover.py --only lease          # one part: lease, share, failover
    python bench/bench_failover.py --kills 5 --lease-ms 2000

Starts its own ``redis-server`` on a free loopback port in a temporary directory
(no persistence) and stops it by its PID. Every figure comes with a baseline
measured in the same run:

* ``lease``: the cost of the lease checks per event. The writer's loop (blade-chest
  d=8, checkpoints to Redis) over the same pre-filled stream twice, with the lease
  and its fence (renewal check before each read, fenced checkpoint ``SET`` and
  applied-log ``XADD`` in scripts) and without; alternated ``--repeat`` times.
  Reported: events/s of each, the ratio, and the extra microseconds per event.
* ``share``: throughput of six spaces on three ``serve --role shared`` processes
  against one space on one ``serve --role both`` process. The processes are
  started and ready first; then every stream is filled at once and the clock runs
  until every entry is acknowledged (acknowledged = covered by a durable
  checkpoint). Reported: events/s in all and the ratio (six on three over one
  on one), and per process.
* ``failover``: a writer (``--role both``) and a standby (``--role standby``), events
  sent at ``--rate`` per second; the writer is SIGKILLed ``--kills`` times (a new
  standby is started after each kill). Reported per kill, from the kill: when
  the lease lapsed, when the standby took it (the gap with no writer holding
  it, in ms), when the first event was applied by the new writer (the newest
  applied-log entry of the new epoch), and the events that arrived in the
  stream while no writer applied anything; as ratios to ``lease_ms`` too.

Two cores shared by redis-server, the services and this script: expect noise,
run more than once and read ranges.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import redis
from _common import fill_stream, start_redis
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import RedisCheckpointStore
from streamrate.config import LeaseSettings, Settings, SpaceSettings
from streamrate.metrics import ServiceMetrics
from streamrate.models.registry import build_model
from streamrate.stream.applied_log import parse_entry
from streamrate.stream.lease import Lease
from streamrate.stream.writer import Writer

MODEL = "blade_chest"
MODEL_SETTINGS = {"dims": 8}


def event_lines(n: int, entities: int, seed: int) -> list[str]:
    rng = np.random.default_rng(seed)
    a = rng.integers(0, entities, n)
    b = (a + rng.integers(1, entities, n)) % entities
    score = rng.integers(0, 2, n)
    return [
        json.dumps({
            "match_id": f"f{seed}-{i}", "finished_at": f"2026-03-01T{(i // 3600) % 24:02d}:"
            f"{(i // 60) % 60:02d}:{i % 60:02d}Z", "first": [f"q{a[i]}"], "second": [f"q{b[i]}"],
            "score": int(score[i]),
        })
        for i in range(n)
    ]  # fmt: skip


def space_settings(name: str, batch: int = 500) -> SpaceSettings:
    return SpaceSettings(
        name=name, model=MODEL, model_settings=MODEL_SETTINGS, batch_count=batch, block_ms=50,
        checkpoint_every_events=5000, checkpoint_every_s=1.0,
    )  # fmt: skip


# -- lease: the writer's loop with and without the lease ---------------------------------
def writer_rate(r: redis.Redis, name: str, lines: list[str], fenced: bool) -> dict[str, float]:
    """The writer's loop over ``lines``: events/s (wall clock), this process's CPU
    time per event (the loop and its checkpoint thread) and the server's time per
    event (every command, from ``INFO commandstats``; ``eval_us``: the lease's
    scripts alone), in microseconds. CPU times are less disturbed by other
    processes on a shared machine than the wall clock."""
    space = space_settings(name)
    keys = Settings(spaces=(space,)).keys(space)
    fill_stream(r, keys.events, lines)
    lease = Lease(r, keys.lease, keys.epoch, LeaseSettings()) if fenced else None
    w = Writer(
        r, space, keys, RedisCheckpointStore(r, keys.ckpt, lease),
        ServiceMetrics(CollectorRegistry(), [name]),
        lambda: build_model(MODEL, **MODEL_SETTINGS), lease=lease,
    )  # fmt: skip
    w.recover()
    r.config_resetstat()
    t0, c0 = time.perf_counter(), time.process_time()
    while True:
        reading_new = w.cursor == ">"
        if w.step() == 0 and reading_new:
            break
    w.checkpoint()
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    assert w.live.applied == len(lines), (w.live.applied, len(lines))
    stats = r.info("commandstats")
    server = sum(v["usec"] for k, v in stats.items() if not k.startswith("cmdstat_info"))
    n = len(lines)
    return {
        "rate": n / dt,
        "cpu_us": cpu * 1e6 / n,
        "server_us": server / n,
        "eval_us": stats.get("cmdstat_eval", {}).get("usec", 0) / n,
    }


def bench_lease(r: redis.Redis, events: int, repeat: int) -> None:
    lines = event_lines(events, 2000, seed=11)
    writer_rate(r, "warm", lines[:1000], True)  # compile the kernels first
    runs: dict[bool, list[dict[str, float]]] = {True: [], False: []}
    for k in range(repeat):
        order = (True, False) if k % 2 == 0 else (False, True)
        for fenced in order:
            runs[fenced].append(writer_rate(r, f"lease{k}{int(fenced)}", lines, fenced))
    print(f"\nlease checks per event ({events} events, blade_chest d=8, {repeat} runs each)")
    for fenced, label in ((False, "without the lease"), (True, "with the lease   ")):
        got = runs[fenced]
        print(
            f"  {label}: {_range([g['rate'] for g in got])} events/s; client CPU "
            f"{_range([g['cpu_us'] for g in got], '.1f')} us, server "
            f"{_range([g['server_us'] for g in got], '.1f')} us per event"
        )
    pairs = list(zip(runs[True], runs[False], strict=True))
    cost = [(a["cpu_us"] + a["server_us"]) - (b["cpu_us"] + b["server_us"]) for a, b in pairs]
    ratio = [(a["cpu_us"] + a["server_us"]) / (b["cpu_us"] + b["server_us"]) for a, b in pairs]
    print(f"  lease's scripts on the server: {_range([a['eval_us'] for a, _ in pairs], '.2f')} us")
    print(f"  cost per event, with - without (client CPU + server): {_range(cost, '.1f')} us")
    print(f"  ratio with / without (client CPU + server per event): {_range(ratio, '.3f')}")
    print(f"  wall-clock rate ratio: {_range([a['rate'] / b['rate'] for a, b in pairs], '.2f')}")


# -- processes ------------------------------------------------------------------------------
def write_config(path: Path, port: int, names: list[str], lease_ms: int) -> None:
    tables = {
        "redis": {"url": f"redis://127.0.0.1:{port}/0", "reconnect_max_s": 0.5},
        "checkpoint": {"store": "redis"},
        "metrics": {"enabled": False},
        "lease": {"lease_ms": lease_ms, "renew_every_ms": max(lease_ms // 6, 10),
                  "poll_every_ms": 50},
        "pool": {"heartbeat_ms": max(lease_ms // 6, 10), "member_ttl_ms": lease_ms},
    }  # fmt: skip
    out = []
    for table, values in tables.items():
        out.append(f"[{table}]")
        out += [f"{k} = {json.dumps(v)}" for k, v in values.items()]
    for name in names:
        sp = space_settings(name).model_dump(
            include={"name", "model", "batch_count", "block_ms", "checkpoint_every_events",
                     "checkpoint_every_s"}
        )  # fmt: skip
        out.append("[[spaces]]")
        out += [f"{k} = {json.dumps(v)}" for k, v in sp.items()]
        out.append("[spaces.model_settings]")
        out += [f"{k} = {json.dumps(v)}" for k, v in MODEL_SETTINGS.items()]
    path.write_text("\n".join(out) + "\n")


def serve(cfg: Path, log: Path, *args: str) -> subprocess.Popen[bytes]:
    with open(log, "ab") as fh:
        return subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg), *args],
            stdout=fh,
            stderr=subprocess.STDOUT,
        )


def stop(procs: list[subprocess.Popen[bytes]]) -> None:
    for p in procs:
        if p.poll() is None:
            os.kill(p.pid, signal.SIGKILL)
            p.wait()


def wait(cond: object, timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():  # type: ignore[operator]
        if time.monotonic() > deadline:
            raise RuntimeError(f"timed out waiting for {what}")
        time.sleep(0.01)


def group_ready(r: redis.Redis, stream: str) -> bool:
    try:
        return bool(r.xinfo_groups(stream))
    except redis.ResponseError:
        return False


def acked_all(r: redis.Redis, stream: str) -> bool:
    last = r.xinfo_stream(stream)["last-generated-id"]
    g = r.xinfo_groups(stream)[0]
    return bool(g["last-delivered-id"] == last and g["pending"] == 0)


def rate_of(
    r: redis.Redis, tmp: Path, port: int, names: list[str], procs_n: int, events: int, tag: str
) -> float:
    cfg = tmp / f"{tag}.toml"
    write_config(cfg, port, names, 5000)
    role = ["--role", "shared"] if procs_n > 1 else ["--role", "both"]
    procs = [serve(cfg, tmp / f"{tag}{i}.log", *role) for i in range(procs_n)]
    streams = [f"{{sr:{n}}}:events" for n in names]
    try:
        wait(lambda: all(group_ready(r, s) for s in streams), 600, f"{tag}: every writer")
        wait(
            lambda: (
                all(r.get(f"{{sr:{n}}}:lease") for n in names)
                and (procs_n == 1 or r.zcard("{sr}:pool:main") == procs_n)
            ),
            60,
            f"{tag}: every lease held",
        )
        time.sleep(1.0)  # the first rebalancing settles
        lines = {n: event_lines(events, 2000, seed=100 + k) for k, n in enumerate(names)}
        t0 = time.perf_counter()
        fillers = [
            threading.Thread(target=fill_stream, args=(redis.Redis(port=port), s, lines[n]))
            for s, n in zip(streams, names, strict=True)
        ]
        for t in fillers:
            t.start()
        for t in fillers:
            t.join()
        wait(lambda: all(acked_all(r, s) for s in streams), 600, f"{tag}: every entry acked")
        dt = time.perf_counter() - t0
    finally:
        for p in procs:
            os.kill(p.pid, signal.SIGTERM)
        for p in procs:
            p.wait(60)
        stop(procs)
    return events * len(names) / dt


def bench_share(r: redis.Redis, tmp: Path, port: int, events: int, repeat: int) -> None:
    one, six = [], []
    for k in range(repeat):
        one.append(rate_of(r, tmp, port, [f"solo{k}"], 1, events, f"one{k}"))
        six.append(rate_of(r, tmp, port, [f"s{k}x{i}" for i in range(6)], 3, events, f"six{k}"))
    print(f"\nsix spaces on three processes against one space on one ({events} events a space)")
    print(f"  one space, one process:      {_range(one)} events/s")
    print(f"  six spaces, three processes: {_range(six)} events/s in all")
    ratios = [a / b for a, b in zip(six, one, strict=True)]
    print(f"  ratio six-on-three / one-on-one: {_range(ratios, '.2f')}")
    print(f"  per process: {_range([x / 3 for x in ratios], '.2f')} of one")


# -- failover --------------------------------------------------------------------------------
def kill_and_watch(
    r: redis.Redis, name: str, writer: subprocess.Popen[bytes]
) -> dict[str, float | int]:
    """SIGKILL ``writer`` (it holds the lease of ``name``) and time the takeover."""
    lease_key, events, applied = (f"{{sr:{name}}}:{k}" for k in ("lease", "events", "applied"))
    holder = r.get(lease_key)
    old_epoch = int(holder.split()[1]) if holder else 0
    os.kill(writer.pid, signal.SIGKILL)
    killed = time.monotonic()
    writer.wait()
    at_kill = r.xlen(events)
    lapsed = taken = first = None
    at_take = at_first = 0
    while first is None and time.monotonic() - killed < 60:
        now = time.monotonic()
        got = r.get(lease_key)
        if lapsed is None and got is None:
            lapsed = now
        if got is not None and int(got.split()[1]) > old_epoch and taken is None:
            taken, at_take = now, r.xlen(events)
            lapsed = lapsed or now
        if taken is not None:
            top = r.xrevrange(applied, count=1)
            if top:
                e = parse_entry(top[0][0], top[0][1])
                if e.epoch > old_epoch and e.kind == "chunk":
                    first, at_first = now, r.xlen(events)
        time.sleep(0.002)
    if lapsed is None or taken is None or first is None:
        raise RuntimeError("no takeover within 60 s")
    return {
        "lapse_ms": (lapsed - killed) * 1000,
        "gap_ms": (taken - lapsed) * 1000,
        "first_ms": (first - killed) * 1000,
        "first_after_take_ms": (first - taken) * 1000,
        "events_to_take": at_take - at_kill,
        "events_to_first": at_first - at_kill,
    }


def sender(port: int, stream: str, rate: float, stop: threading.Event) -> None:
    c = redis.Redis(port=port)
    lines = event_lines(int(rate * 900), 2000, seed=hash(stream) % 1000)
    k, t0 = 0, time.monotonic()
    while not stop.is_set() and k < len(lines):
        due = min(int((time.monotonic() - t0) * rate), len(lines))
        while k < due:
            c.xadd(stream, {"event": lines[k]})
            k += 1
        time.sleep(0.002)


def failover_rows(
    r: redis.Redis, tmp: Path, port: int, kills: int, lease_ms: int, rate: float, how: str
) -> list[dict[str, float | int]]:
    """``how``: "standby" (a writer and a standby: the standby goes on from its
    replica) or "pool" (two ``--role shared`` members of one space: the idle one
    goes on from the checkpoint)."""
    name = f"fo{how}"
    cfg = tmp / f"{name}.toml"
    write_config(cfg, port, [name], lease_ms)
    roles = {
        "standby": (["--role", "both"], ["--role", "standby"]),
        "pool": (["--role", "shared"],) * 2,
    }
    first_role, next_role = roles[how]
    n = iter(range(1000))
    procs = [serve(cfg, tmp / f"{name}{next(n)}.log", *first_role)]
    writer = procs[0]
    done = threading.Event()
    rows = []
    try:
        wait(lambda: group_ready(r, f"{{sr:{name}}}:events"), 600, "the writer")
        threading.Thread(
            target=sender, args=(port, f"{{sr:{name}}}:events", rate, done), daemon=True
        ).start()
        for _ in range(kills):
            log = tmp / f"{name}{next(n)}.log"
            procs.append(serve(cfg, log, *next_role))
            ready = "replica loaded" if how == "standby" else "sharing"
            wait(lambda p=log, w=ready: w in p.read_text(), 600, f"the next {how}")
            time.sleep(1.5)
            rows.append(kill_and_watch(r, name, writer))
            rows[-1]["from_replica"] = int("without reloading" in log.read_text())
            writer = procs[-1]
    finally:
        done.set()
        stop(procs)
    return rows


def bench_failover(
    r: redis.Redis, tmp: Path, port: int, kills: int, lease_ms: int, rate: float
) -> None:
    print(f"\nfailover: {kills} SIGKILLs of the writer each way, lease_ms = {lease_ms}, "
          f"{rate:.0f} events/s sent")  # fmt: skip
    print("  (standby: goes on from its own replica; pool: an idle shared member loads the "
          "checkpoint, the baseline)")  # fmt: skip
    head = ("way", "kill->lapse ms", "no-holder gap ms", "take->1st applied ms",
            "kill->1st applied ms", "/lease", "events kill->take", "events kill->1st",
            "replica")  # fmt: skip
    print("  " + " | ".join(head))
    summary = {}
    for how in ("standby", "pool"):
        rows = failover_rows(r, tmp, port, kills, lease_ms, rate, how)
        for row in rows:
            cells = (how, f"{row['lapse_ms']:.0f}", f"{row['gap_ms']:.0f}",
                     f"{row['first_after_take_ms']:.0f}", f"{row['first_ms']:.0f}",
                     f"{row['first_ms'] / lease_ms:.2f}", str(row["events_to_take"]),
                     str(row["events_to_first"]), str(bool(row["from_replica"])))  # fmt: skip
            print("  " + " | ".join(c.rjust(len(h)) for c, h in zip(cells, head, strict=True)))
        summary[how] = rows
    for how, rows in summary.items():
        gaps = [float(row["gap_ms"]) for row in rows]
        take = [float(row["first_after_take_ms"]) for row in rows]
        firsts = [float(row["first_ms"]) / lease_ms for row in rows]
        print(f"  {how}: no-holder gap {_range(gaps)} ms; take->first applied {_range(take)} ms; "
              f"kill->first applied / lease_ms {_range(firsts, '.2f')}")  # fmt: skip
    ratio = [
        float(a["first_after_take_ms"]) / float(b["first_after_take_ms"])
        for a, b in zip(summary["standby"], summary["pool"], strict=True)
    ]
    print(f"  take->first applied, standby / pool (same run): {_range(ratio, '.2f')}")


def _range(xs: list[float], fmt: str = ".0f") -> str:
    if len(xs) == 1:
        return format(xs[0], fmt)
    lo, mid, hi = (format(x, fmt) for x in (min(xs), statistics.median(xs), max(xs)))
    return f"{mid} (range {lo}-{hi})"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", choices=("lease", "share", "failover"))
    ap.add_argument("--events", type=int, default=20_000, help="events a space (lease, share)")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--kills", type=int, default=3)
    ap.add_argument("--lease-ms", type=int, default=2000)
    ap.add_argument("--rate", type=float, default=500.0, help="events/s sent during failover")
    a = ap.parse_args()
    print(f"cores: {os.cpu_count()}, load average {os.getloadavg()[0]:.1f} "
          "(redis-server, the services and this script share them)")  # fmt: skip
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        proc, port = start_redis(tmp)
        r = redis.Redis(port=port)
        try:
            if a.only in (None, "lease"):
                bench_lease(r, a.events, a.repeat)
            if a.only in (None, "share"):
                bench_share(r, tmp, port, a.events, a.repeat)
            if a.only in (None, "failover"):
                bench_failover(r, tmp, port, a.kills, a.lease_ms, a.rate)
        finally:
            os.kill(proc.pid, signal.SIGTERM)
            proc.wait(10)


if __name__ == "__main__":
    main()
