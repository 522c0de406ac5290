"""Helpers shared by the bench scripts (imported as ``_common``: the scripts run as
``python bench/x.py``, which puts ``bench/`` first on ``sys.path``)."""

from __future__ import annotations

import shutil
import socket
import subprocess
import time
from pathlib import Path

import redis

from streamrate.stream.writer import Writer


def start_redis(directory: Path) -> tuple[subprocess.Popen[bytes], int]:
    """A ``redis-server`` on a free loopback port in ``directory``, without
    persistence, once it answers PING; the caller stops it by its PID."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = int(s.getsockname()[1])
    exe = shutil.which("redis-server") or "/usr/bin/redis-server"
    args = [exe, "--port", str(port), "--bind", "127.0.0.1", "--dir", str(directory),
            "--save", "", "--appendonly", "no", "--daemonize", "no"]  # fmt: skip
    proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    r = redis.Redis(port=port)
    for _ in range(200):
        try:
            r.ping()
            return proc, port
        except redis.ConnectionError:
            time.sleep(0.02)
    raise RuntimeError("redis-server did not start")


def fill_stream(r: redis.Redis, stream: str, lines: list[str], chunk: int = 2000) -> None:
    """``XADD`` every line to ``stream`` as its ``event`` field, pipelined ``chunk`` at a time."""
    pipe = r.pipeline(transaction=False)
    for k, line in enumerate(lines, 1):
        pipe.xadd(stream, {"event": line})
        if k % chunk == 0:
            pipe.execute()
    pipe.execute()


def run_to_end(w: Writer) -> None:
    """Step the writer through its own pending entries, then until a read of new
    entries finds none; then checkpoint."""
    while True:
        reading_new = w.cursor == ">"
        if w.step() == 0 and reading_new:
            break
    w.checkpoint()
