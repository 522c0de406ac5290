"""A real ``redis-server`` per test: free loopback port, own temp dir, stopped by its PID.

The server runs with ``appendonly yes`` and ``appendfsync always`` (no RDB
snapshots), so a restart on the same directory keeps every acknowledged write.
It never touches the machine's default port.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

REDIS_BIN = shutil.which("redis-server") or "/usr/bin/redis-server"


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class RedisServer:
    """One redis-server process we started; ``stop``/``start`` keep port and data dir."""

    def __init__(self, directory: Path) -> None:
        self.dir = directory
        self.port = free_port()
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> None:
        args = [
            REDIS_BIN,
            "--port", str(self.port),
            "--bind", "127.0.0.1",
            "--dir", str(self.dir),
            "--save", "",
            "--appendonly", "yes",
            "--appendfsync", "always",
            "--daemonize", "no",
            "--logfile", str(self.dir / "redis.log"),
        ]  # fmt: skip
        self.proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        client = redis.Redis(port=self.port, socket_connect_timeout=0.2)
        deadline = time.monotonic() + 10
        while True:
            try:
                if client.ping():
                    break
            except (redis.ConnectionError, redis.BusyLoadingError):
                if time.monotonic() > deadline or self.proc.poll() is not None:
                    raise RuntimeError("redis-server did not start") from None
                time.sleep(0.02)
        client.close()

    def stop(self, sig: int = signal.SIGTERM) -> None:
        if self.proc is None:
            return
        if self.proc.poll() is None:
            os.kill(self.proc.pid, sig)
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(5)
        self.proc = None

    def client(self) -> redis.Redis:
        return redis.Redis(port=self.port, socket_timeout=5)


@pytest.fixture
def redis_server(tmp_path: Path) -> Iterator[RedisServer]:
    data = tmp_path / "redis"
    data.mkdir()
    server = RedisServer(data)
    server.start()
    try:
        yield server
    finally:
        server.stop(signal.SIGKILL)


@pytest.fixture(scope="module")
def shared_redis(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RedisServer]:
    """One server for a whole module (hypothesis examples use their own key prefixes)."""
    server = RedisServer(tmp_path_factory.mktemp("redis"))
    server.start()
    try:
        yield server
    finally:
        server.stop(signal.SIGKILL)
