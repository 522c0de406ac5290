"""Applied-to-DOM latency of the live overlay, and the web server's memory per client.

One run: a redis-server on a free loopback port, the service in this process
(Elo; an observer stamps the moment each match is applied), ``streamrate web`` in
its own process, and a headless Chromium (Debian's, via playwright) showing the
overlay of the busiest pairing. Matches are streamed at a steady rate, and the
delay from "applied" to "the new number is in the overlay's DOM" is taken for
every change of that pairing:

* baseline: applied -> the live message reaches a plain Redis subscriber;
* with 1 connected client (the browser), then with 500 more: plain HTTP SSE
  readers in another process, whose own receive delays are reported too;
* the web server's resident memory before and after the 500 connect.

    python bench/bench_web.py
    python bench/bench_web.py --clients 500 --rate 40 --seconds 15
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import redis
from prometheus_client import CollectorRegistry

from streamrate.client import follow, send_events
from streamrate.config import CheckpointSettings, RedisSettings, Settings, SpaceSettings
from streamrate.events import MatchEvent, event_to_json
from streamrate.models.base import Prediction
from streamrate.service import Service, redis_factory
from streamrate.simulate import simulate, world_spec

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run"]  # fmt: skip


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def rss_bytes(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    raise RuntimeError("no VmRSS")


def wait_for(cond: Any, timeout_s: float) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        if time.monotonic() > deadline:
            raise TimeoutError("timed out")
        time.sleep(0.05)


# -- the SSE readers' process -----------------------------------------------------------
async def _reader(port: int, path: str, got: list[tuple[str, float]], ready: list[int]) -> None:
    r, w = await asyncio.open_connection("127.0.0.1", port, limit=1 << 20)
    w.write(f"GET {path} HTTP/1.1\r\nHost: bench\r\nAccept: text/event-stream\r\n\r\n".encode())
    await w.drain()
    ready.append(1)
    while line := await r.readline():
        if line.startswith(b'data: {"first"'):
            mid = json.loads(line[6:]).get("match_id")
            if mid:
                got.append((mid, time.time() * 1000))


async def _readers(port: int, path: str, n: int, seconds: float) -> None:
    got: list[tuple[str, float]] = []
    ready: list[int] = []
    tasks = [asyncio.create_task(_reader(port, path, got, ready)) for _ in range(n)]
    while len(ready) < n:
        await asyncio.sleep(0.05)
    print("ready", flush=True)
    await asyncio.sleep(seconds)
    for t in tasks:
        t.cancel()
    print(json.dumps(got), flush=True)


# -- the run ---------------------------------------------------------------------------
class Stamps:
    """When each match was applied (epoch ms): the model's ``learn``, wrapped.

    A chunk touching a watched pairing is learned one event at a time with
    ``learn``, and its live messages are published after the chunk; observers
    run after that publication, so they would stamp too late.
    """

    def __init__(self) -> None:
        self.at: dict[str, float] = {}

    def wrap(self, model: Any) -> None:
        learn = model.learn

        def stamped(event: MatchEvent) -> Prediction:
            out = learn(event)
            self.at[event.match_id] = time.time() * 1000
            return out

        model.learn = stamped


def pct(xs: list[float]) -> tuple[float, float]:
    a = np.asarray(xs)
    return float(np.percentile(a, 50)), float(np.percentile(a, 99))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--clients", type=int, default=500)
    ap.add_argument("--rate", type=float, default=40.0, help="matches per second streamed")
    ap.add_argument("--seconds", type=float, default=15.0, help="streaming time per phase")
    ap.add_argument("--readers", type=int, default=0, help=argparse.SUPPRESS)
    ap.add_argument("--port", type=int, default=0, help=argparse.SUPPRESS)
    ap.add_argument("--path", default="", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.readers:
        asyncio.run(_readers(args.port, args.path, args.readers, args.seconds))
        return
    from playwright.sync_api import sync_playwright

    tmp = Path(tempfile.mkdtemp(prefix="bench-web-"))
    rport = free_port()
    procs: list[subprocess.Popen[bytes]] = []
    stop = threading.Event()
    try:
        procs.append(subprocess.Popen(
            ["redis-server", "--port", str(rport), "--bind", "127.0.0.1", "--save", "",
             "--dir", str(tmp)], stdout=subprocess.DEVNULL))  # fmt: skip
        url = f"redis://127.0.0.1:{rport}/0"
        wait_for(lambda: _pings(url), 10)
        space = SpaceSettings(name="duel", model="elo", batch_count=20, block_ms=5)
        settings = Settings(redis=RedisSettings(url=url), spaces=(space,),
                            checkpoint=CheckpointSettings(dir=tmp / "ckpt"))  # fmt: skip
        keys = settings.keys(space)
        stamps = Stamps()
        service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
        service.start(stop)
        assert service.spaces[0].ready.wait(60)
        stamps.wrap(service.spaces[0].consumer.live.model)
        total = int(args.rate * args.seconds * 2) + 500
        events = simulate(world_spec("cyclic", matches=total, entities=12, seed=3)).events
        counts: dict[str, int] = {}
        for ev in events:
            for e in ev.entities():
                counts[e] = counts.get(e, 0) + 1
        a, b = sorted(counts, key=lambda e: (-counts[e], e))[:2]
        client = redis.Redis.from_url(url)
        send_events(client, keys.events, [event_to_json(e) for e in events[:500]])
        wait_for(lambda: service.spaces[0].consumer.live.applied >= 500, 60)

        wport = free_port()
        env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
        web = subprocess.Popen(
            [sys.executable, "-m", "streamrate", "web", "--redis-url", url, "--port", str(wport),
             "--max-clients", str(args.clients + 10)],
            env=env, stderr=subprocess.DEVNULL)  # fmt: skip
        procs.append(web)
        wait_for(lambda: _listens(wport), 30)

        live_at: dict[str, float] = {}
        live_stop = threading.Event()

        def on_live(msg: dict[str, Any]) -> None:
            live_at.setdefault(msg["match_id"], time.time() * 1000)

        threading.Thread(
            target=follow,
            args=(redis.Redis.from_url(url), keys.live, on_live, live_stop),
            daemon=True,
        ).start()

        with sync_playwright() as pw, tempfile.TemporaryDirectory() as profile:
            browser = pw.chromium.launch_persistent_context(
                profile, executable_path=shutil.which("chromium") or "/usr/bin/chromium",
                headless=True, args=FLAGS, viewport={"width": 1920, "height": 1080})  # fmt: skip
            page = browser.new_page()
            page.goto(f"http://127.0.0.1:{wport}/overlay?p={a}:{b}")
            page.wait_for_function("document.getElementById('overlay').dataset.p !== undefined")
            time.sleep(1.0)
            rss_idle = rss_bytes(web.pid)
            cursor = 500

            def phase() -> tuple[list[float], list[str]]:
                nonlocal cursor
                chunk = events[cursor : cursor + int(args.rate * args.seconds)]
                cursor += len(chunk)
                send_events(client, keys.events, [event_to_json(e) for e in chunk],
                            rate_per_s=args.rate, chunk=1)  # fmt: skip
                wait_for(lambda: service.spaces[0].consumer.live.applied >= cursor, 60)
                time.sleep(1.5)
                ids = [e.match_id for e in chunk if {a, b} & set(e.entities())]
                dom = dict(page.evaluate("SR.log"))
                return [dom[m] - stamps.at[m] for m in ids if m in dom], ids

            dom_one, ids_one = phase()
            base_one = [live_at[m] - stamps.at[m] for m in ids_one if m in live_at]

            readers = subprocess.Popen(
                [sys.executable, __file__, "--readers", str(args.clients), "--port", str(wport),
                 "--path", f"/api/watch?p={a}:{b}", "--seconds", str(args.seconds + 6)],
                stdout=subprocess.PIPE, env=env)  # fmt: skip
            procs.append(readers)
            assert readers.stdout is not None
            assert readers.stdout.readline().strip() == b"ready"
            time.sleep(1.0)
            rss_full = rss_bytes(web.pid)
            dom_many, ids_many = phase()
            base_many = [live_at[m] - stamps.at[m] for m in ids_many if m in live_at]
            out, _ = readers.communicate(timeout=60)
            got = json.loads(out.decode().strip().splitlines()[-1])
            sse_many = [t - stamps.at[m] for m, t in got if m in ids_many]
            browser.close()
        live_stop.set()

        def row(name: str, xs: list[float], base: list[float]) -> str:
            p50, p99 = pct(xs)
            b50, b99 = pct(base)
            return (f"{name:<44} n={len(xs):<6} p50 {p50:7.1f} ms  p99 {p99:7.1f} ms"
                    f"   ({p50 / b50:5.1f}x / {p99 / b99:5.1f}x the Redis subscriber)")  # fmt: skip

        print(f"pairing {a} vs {b}; {args.rate:.0f} matches/s for {args.seconds:.0f} s a phase")
        print(row("baseline: applied -> Redis subscriber", base_one + base_many,
                  base_one + base_many))  # fmt: skip
        print(row("applied -> overlay DOM, 1 client", dom_one, base_one))
        print(row(f"applied -> overlay DOM, {args.clients + 1} clients", dom_many, base_many))
        print(row(f"applied -> SSE reader, {args.clients} readers (all)", sse_many, base_many))
        p1, _ = pct(dom_one)
        pm, _ = pct(dom_many)
        print(f"DOM p50 with {args.clients + 1} clients / with 1: {pm / p1:.2f}x")
        per = (rss_full - rss_idle) / args.clients
        print(f"web server RSS: {rss_idle / 2**20:.1f} MiB with 1 client, "
              f"{rss_full / 2**20:.1f} MiB with {args.clients + 1}: "
              f"{per / 1024:.1f} KiB per connected client")  # fmt: skip
    finally:
        stop.set()
        for p in reversed(procs):
            if p.poll() is None:
                p.send_signal(signal.SIGTERM)
                try:
                    p.wait(10)
                except subprocess.TimeoutExpired:
                    p.kill()
        shutil.rmtree(tmp, ignore_errors=True)


def _pings(url: str) -> bool:
    try:
        return bool(redis.Redis.from_url(url, socket_connect_timeout=0.2).ping())
    except redis.ConnectionError:
        return False


def _listens(port: int) -> bool:
    with socket.socket() as s:
        return s.connect_ex(("127.0.0.1", port)) == 0


if __name__ == "__main__":
    main()
