"""Screenshots of the overlay and the board for the README, from the demo world.

Starts its own redis-server (free loopback port, temporary directory), the
service in this process (blade-chest with map context, as ``streamrate demo``)
with its metrics page, and the web server; streams the demo world's duels and
photographs both pages in headless Chromium (Debian's ``/usr/bin/chromium``
driven by the playwright package). Writes ``docs/web/overlay.png`` and
``docs/web/board.png``, reduced to a small palette to keep them small.

    python scripts/web_screenshots.py
"""

from __future__ import annotations

import argparse
import shutil
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

import redis
from PIL import Image
from prometheus_client import CollectorRegistry

from streamrate.client import send_events
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    QualitySettings,
    RedisSettings,
    Settings,
    SpaceSettings,
    WebSettings,
)
from streamrate.events import event_to_json
from streamrate.service import Service, redis_factory
from streamrate.simulate import simulate, world_spec
from streamrate.web.server import WebServer

FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_for(cond: Callable[[], bool], timeout_s: float) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        if time.monotonic() > deadline:
            raise TimeoutError("timed out")
        time.sleep(0.05)


def small_png(path: Path, colours: int = 200) -> None:
    """Reduce to a palette (alpha kept): a few tens of kilobytes instead of hundreds."""
    img = Image.open(path)
    if img.mode == "RGBA" and img.getextrema()[3][0] < 255:  # transparent: keep alpha
        small = img.quantize(colours, method=Image.Quantize.FASTOCTREE)
    else:
        small = img.convert("RGB").quantize(colours, method=Image.Quantize.MAXCOVERAGE)
    small.save(path, optimize=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path("docs/web"))
    ap.add_argument("--chromium", default=shutil.which("chromium") or "/usr/bin/chromium")
    args = ap.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    from playwright.sync_api import sync_playwright

    tmp = Path(tempfile.mkdtemp(prefix="streamrate-shots-"))
    port = free_port()
    redis_proc = subprocess.Popen(
        ["redis-server", "--port", str(port), "--bind", "127.0.0.1", "--save", "",
         "--dir", str(tmp), "--daemonize", "no"],
        stdout=subprocess.DEVNULL,
    )  # fmt: skip
    stop = threading.Event()
    server = None
    try:
        url = f"redis://127.0.0.1:{port}/0"
        wait_for(lambda: _pings(url), 10)
        space = SpaceSettings(
            name="duel",
            model="blade_chest",
            model_settings={"context": "stacked"},
            batch_count=50,
            block_ms=20,
            quality=QualitySettings(
                recent_events=800, reference_events=2000, publish_every_s=0.5, drift_fields=("map",)
            ),
        )
        metrics_port = free_port()
        settings = Settings(
            redis=RedisSettings(url=url),
            checkpoint=CheckpointSettings(dir=tmp / "ckpt"),
            metrics=MetricsSettings(enabled=True, port=metrics_port),
            spaces=(space,),
        )
        service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
        service.start(stop)
        assert service.spaces[0].ready.wait(120)
        world = simulate(world_spec("cyclic", matches=6000, entities=40, seed=7))
        lines = [event_to_json(e) for e in world.events]
        counts: dict[str, int] = {}
        for ev in world.events[:500]:
            for e in ev.entities():
                counts[e] = counts.get(e, 0) + 1
        top = sorted(counts, key=lambda e: (-counts[e], e))[:8]
        client = redis.Redis.from_url(url)
        keys = settings.keys(space)
        send_events(client, keys.events, lines[:2500])
        live = service.spaces[0].consumer.live
        wait_for(lambda: live.applied >= 2500, 120)
        web_port = free_port()
        web = WebSettings(
            port=web_port,
            metrics_url=f"http://127.0.0.1:{metrics_port}/metrics",
            quality_every_s=1.0,
        )
        server = WebServer(web, settings)
        server.start()
        base = f"http://127.0.0.1:{web_port}"
        pairs = "&".join(f"p={top[i]}:{top[i + 1]}" for i in range(0, 8, 2))
        with sync_playwright() as pw, tempfile.TemporaryDirectory() as profile:
            ctx = pw.chromium.launch_persistent_context(
                profile, executable_path=args.chromium, headless=True, args=FLAGS,
                viewport={"width": 1920, "height": 1080},
            )  # fmt: skip
            board = ctx.new_page()
            board.set_viewport_size({"width": 1480, "height": 900})
            board.goto(f"{base}/board?{pairs}&minutes=1")
            overlay = ctx.new_page()
            overlay.goto(
                f"{base}/overlay?p={top[0]}:{top[1]}&ctx=map=saltflats&ctx=stage=final"
                "&a=Vashthap%20Crew&b=Nevjor%20Five&title=win%20probability"
            )
            send_events(client, keys.events, lines[2500:], rate_per_s=300.0, chunk=20)
            wait_for(lambda: live.applied >= len(lines), 120)
            time.sleep(2.5)
            overlay.screenshot(
                path=str(args.out / "overlay.png"),
                omit_background=True,
                clip={"x": 360, "y": 800, "width": 1200, "height": 280},
            )
            board.screenshot(path=str(args.out / "board.png"), full_page=True)
            ctx.close()
        for name in ("overlay.png", "board.png"):
            small_png(args.out / name)
            print(f"wrote {args.out / name} ({(args.out / name).stat().st_size // 1024} KB)")
    finally:
        if server is not None:
            server.stop()
        stop.set()
        redis_proc.terminate()
        redis_proc.wait(10)
        shutil.rmtree(tmp, ignore_errors=True)


def _pings(url: str) -> bool:
    try:
        return bool(redis.Redis.from_url(url, socket_connect_timeout=0.2).ping())
    except redis.ConnectionError:
        return False


if __name__ == "__main__":
    main()
