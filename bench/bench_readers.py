"""Readers apart from the writer: responders, the in-process reader, replica lag (run by hand).

    python bench/bench_readers.py            # about a minute
    python bench/bench_readers.py --quick    # fewer samples
    python bench/bench_readers.py --only reader   # the in-process reader and GET only

Starts its own ``redis-server`` on a free loopback port (no persistence) and
stops it by its PID; runs ``streamrate serve --role writer`` and one, then two
``--role responder`` processes against it, and an in-process
:class:`~streamrate.replica.reader.LocalReader`. Two spaces: ``duel``
(blade-chest d=16, as in bench_service.py) and ``rating`` (the plain rating
model, where the reader's direct-array path applies). Each figure is measured
idle and while a producer adds events at a steady rate, and is reported beside
a plain GET round trip measured in the same run (same server, same moment):

* responder round trip (XADD to the request stream, reply on pub/sub), p50/p99,
  with 1 and 2 responders; today's pub/sub path answered by the writer, for comparison;
* in-process reader: one pairing, p50/p99 (ratio to the GET p50/p99);
* batch of 1,000 pairings: pairings/s against the single path;
* replica lag (the reader) behind the writer: events and ms, p50/p99;
* lobby of 100 (matrix and split) from a responder, round trip p50.
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
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import redis
from _common import start_redis
from bench_service import event_lines

from streamrate.config import load_settings
from streamrate.replica.reader import LocalReader
from streamrate.stream.applied_log import parse_entry

ENTITIES = 2000
RATE_PER_S = 1500.0  # events per second per space while "loaded"


def write_config(path: Path, port: int, ckpt: Path) -> None:
    path.write_text(
        f'[redis]\nurl = "redis://127.0.0.1:{port}/0"\n'
        f'[checkpoint]\nstore = "redis"\ndir = "{ckpt}"\n'
        "[queries]\ncpu_share = 1.0\n"
        "[metrics]\nenabled = false\n"  # several processes: no shared metrics port
        '[[spaces]]\nname = "duel"\nmodel = "blade_chest"\nbatch_count = 200\nblock_ms = 20\n'
        "[spaces.model_settings]\ndims = 16\n"
        '[[spaces]]\nname = "rating"\nmodel = "elo"\nbatch_count = 200\nblock_ms = 20\n'
    )


def pct(xs: list[float]) -> tuple[float, float]:
    a = np.asarray(xs)
    return float(np.percentile(a, 50)), float(np.percentile(a, 99))


def get_rtt(r: redis.Redis, n: int) -> list[float]:
    r.set("bench:k", "v")
    out = []
    for _ in range(n):
        t0 = time.perf_counter()
        r.get("bench:k")
        out.append(time.perf_counter() - t0)
    return out


class Asker:
    """Pairing questions with one reply channel subscribed once (no per-request SUBSCRIBE)."""

    def __init__(self, r: redis.Redis, space: str) -> None:
        self.r = r
        self.tag = "{sr:" + space + "}"
        self.reply = f"{self.tag}:q:reply:bench:{uuid.uuid4().hex}"
        self.ps = r.pubsub(ignore_subscribe_messages=True)
        self.ps.subscribe(self.reply)
        self.ps.get_message(timeout=1.0)

    def ask(self, req: dict[str, Any], stream: bool) -> dict[str, Any]:
        cid = uuid.uuid4().hex
        body = json.dumps({**req, "id": cid, "reply_to": self.reply})
        if stream:
            self.r.xadd(f"{self.tag}:q:stream", {"request": body}, maxlen=10_000, approximate=True)
        else:
            self.r.publish(f"{self.tag}:q", body)
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline:
            msg = self.ps.get_message(timeout=1.0)
            if msg and msg["type"] == "message":
                got = json.loads(msg["data"])
                if got.get("id") == cid:
                    return got  # type: ignore[no-any-return]
        raise RuntimeError("no reply")

    def rtts(self, reqs: list[dict[str, Any]], stream: bool) -> list[float]:
        out = []
        for req in reqs:
            t0 = time.perf_counter()
            got = self.ask(req, stream)
            out.append(time.perf_counter() - t0)
            if not got.get("ok"):
                raise RuntimeError(f"error reply: {got}")
        return out


class Producer(threading.Thread):
    """Adds events to both spaces at a steady rate until stopped."""

    def __init__(self, port: int, seed: int) -> None:
        super().__init__(daemon=True)
        self.r = redis.Redis(port=port)
        self.lines = event_lines(200_000, ENTITIES, seed)
        self.stop = threading.Event()

    def run(self) -> None:
        step = max(int(RATE_PER_S // 50), 1)
        t0 = time.monotonic()
        i = 0
        while not self.stop.is_set() and i < len(self.lines):
            pipe = self.r.pipeline(transaction=False)
            for line in self.lines[i : i + step]:
                pipe.xadd("{sr:duel}:events", {"event": line})
                pipe.xadd("{sr:rating}:events", {"event": line})
            pipe.execute()
            i += step
            ahead = i / RATE_PER_S - (time.monotonic() - t0)
            if ahead > 0:
                self.stop.wait(ahead)


def serve(cfg: Path, role: str, log: Path) -> subprocess.Popen[bytes]:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    with open(log, "ab") as fh:
        return subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg), "--role", role],
            stdout=fh,
            stderr=subprocess.STDOUT,
            env=env,
        )


def wait_text(log: Path, text: str, count: int, timeout_s: float = 90) -> None:
    deadline = time.monotonic() + timeout_s
    while (log.read_text().count(text) if log.exists() else 0) < count:
        if time.monotonic() > deadline:
            raise RuntimeError(f"timed out waiting for {text!r} in {log}")
        time.sleep(0.05)


def reader_single(reader: LocalReader, pairs: list[tuple[list[str], list[str]]]) -> list[float]:
    out = []
    ask = reader.p_first_wins
    for a, b in pairs:
        t0 = time.perf_counter()
        ask(a, b)
        out.append(time.perf_counter() - t0)
    return out


def lag_samples(reader: LocalReader, r: redis.Redis, seconds: float) -> list[int]:
    out = []
    end = time.monotonic() + seconds
    key = reader.keys.applied
    while time.monotonic() < end:
        top = r.xrevrange(key, count=1)
        if top:
            head = parse_entry(top[0][0], top[0][1])
            out.append(max(head.seq + len(head.ids) - reader.applied, 0))
        time.sleep(0.01)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument(
        "--only",
        choices=["reader"],
        help="reader: the in-process reader (one pairing, batch, lag) beside GET; no responders",
    )
    args = ap.parse_args()
    everything = args.only is None
    n = 300 if args.quick else 1500
    tmp = Path(tempfile.mkdtemp(prefix="bench-readers-"))
    proc, port = start_redis(tmp)
    procs: list[subprocess.Popen[bytes]] = []
    producer: Producer | None = None
    readers: list[LocalReader] = []
    try:
        r = redis.Redis(port=port)
        cfg = tmp / "serve.toml"
        write_config(cfg, port, tmp / "ckpt")
        settings = load_settings(cfg)
        warm = event_lines(20_000, ENTITIES, seed=1)
        pipe = r.pipeline(transaction=False)
        for k, line in enumerate(warm, 1):
            pipe.xadd("{sr:duel}:events", {"event": line})
            pipe.xadd("{sr:rating}:events", {"event": line})
            if k % 2000 == 0:
                pipe.execute()
        pipe.execute()
        wlog = tmp / "writer.log"
        procs.append(serve(cfg, "writer", wlog))
        wait_text(wlog, "entries to read", 2)
        asker = Asker(redis.Redis(port=port), "duel")
        ids = [f"p{i}" for i in range(ENTITIES)]
        rng = np.random.default_rng(3)
        picks = [
            (ids[a], ids[(a + 1 + b) % ENTITIES]) for a, b in rng.integers(0, ENTITIES - 1, (n, 2))
        ]
        reqs = [{"kind": "pairing", "first": [a], "second": [b]} for a, b in picks]
        while asker.ask(reqs[0], stream=False).get("applied", 0) < len(warm):
            time.sleep(0.2)
        reader = LocalReader(settings, "rating").start()
        reader_duel = LocalReader(settings, "duel").start()
        readers += [reader, reader_duel]
        reader.wait_applied(len(warm), 60)
        pairs = [([a], [b]) for a, b in picks]
        lobby = {"kind": "lobby", "entities": ids[:100], "team_sizes": [50, 50]}
        rows: list[tuple[str, str, str]] = []

        def line(what: str, xs: list[float], base: tuple[float, float], unit: float = 1e3) -> None:
            p50, p99 = pct(xs)
            rows.append((what, f"{p50 * unit:.3f} / {p99 * unit:.3f}",
                         f"{p50 / base[0]:.2f}x / {p99 / base[1]:.2f}x"))  # fmt: skip

        for responders in (1, 2) if everything else (0,):
            while len(procs) - 1 < responders:
                log = tmp / f"responder-{len(procs)}.log"
                procs.append(serve(cfg, "responder", log))
                wait_text(log, "answering from the request stream", 2)
            for phase in ("idle", "loaded"):
                if phase == "loaded":
                    producer = Producer(port, seed=100 + responders)
                    producer.start()
                    time.sleep(1.0)
                base = pct(get_rtt(r, n))
                got = f"{base[0] * 1e3:.3f} / {base[1] * 1e3:.3f}"
                rows.append(
                    (f"GET round trip ({phase}, {responders} responder(s))", got, "1x / 1x")
                )
                if everything:
                    line(f"responder pairing round trip, {responders} responder(s), {phase}",
                         asker.rtts(reqs, stream=True), base)  # fmt: skip
                if responders <= 1:
                    if everything:
                        line(f"writer pub/sub pairing round trip (old path), {phase}",
                             asker.rtts(reqs, stream=False), base)  # fmt: skip
                    line(f"in-process reader, one pairing, rating model, {phase}",
                         reader_single(reader, pairs * 4), base)  # fmt: skip
                    line(f"in-process reader, one pairing, blade-chest d=16, {phase}",
                         reader_single(reader_duel, pairs), base)  # fmt: skip
                    for rd, name in ((reader, "rating model"), (reader_duel, "blade-chest d=16")):
                        t0 = time.perf_counter()
                        k = 0
                        while time.perf_counter() - t0 < 1.0:
                            rd.p_first_wins_many(pairs[:1000])
                            k += 1000
                        batch_rate = k / (time.perf_counter() - t0)
                        single = reader_single(rd, pairs[:1000])
                        single_rate = len(single) / sum(single)
                        rows.append((f"batch of 1,000 vs single, {name}, {phase}",
                                     f"{batch_rate:,.0f} vs {single_rate:,.0f} pairings/s",
                                     f"{batch_rate / single_rate:.1f}x"))  # fmt: skip
                    if everything:
                        lobby_rtt = asker.rtts([lobby] * (20 if args.quick else 60), stream=True)
                        line(f"lobby of 100 from a responder, {phase}", lobby_rtt, base)
                if phase == "loaded":
                    reader.follower.lag_ms.clear()
                    ev = lag_samples(reader, r, 3.0)
                    ms = list(reader.follower.lag_ms)
                    e50, e99 = pct([float(x) for x in ev])
                    m50, m99 = pct(ms)
                    what = (
                        f"replica lag at {RATE_PER_S:.0f} events/s per space ({responders} resp.)"
                    )
                    rows.append(
                        (what, f"{e50:.0f} / {e99:.0f} events", f"{m50:.1f} / {m99:.1f} ms")
                    )
                    assert producer is not None
                    producer.stop.set()
                    producer.join()
                    producer = None
                    time.sleep(1.0)
        width = max(len(a) for a, _, _ in rows)
        print(f"{'measure':<{width}}  {'p50 / p99 (ms) or value':<30}  ratio to GET p50 / p99")
        for a, b, c in rows:
            print(f"{a:<{width}}  {b:<30}  {c}")
    finally:
        if producer is not None:
            producer.stop.set()
        for rd in readers:
            rd.close()
        for p in procs:
            if p.poll() is None:
                os.kill(p.pid, signal.SIGTERM)
                try:
                    p.wait(20)
                except subprocess.TimeoutExpired:
                    os.kill(p.pid, signal.SIGKILL)
                    p.wait()
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()


if __name__ == "__main__":
    main()
