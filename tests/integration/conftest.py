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
from dataclasses import dataclass
from pathlib import Path
from typing import Any

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


# -- Redis with the shipped ACL users, and over TLS ------------------------------

DEPLOY_REDIS = Path(__file__).resolve().parents[2] / "deploy" / "redis"
ROLES = ("admin", "streamrate", "producer", "asker")


def need(what: str, ok: bool) -> None:
    """Skip when a tool is missing; under CI=true fail instead, so CI cannot skip silently."""
    if ok:
        return
    if os.environ.get("CI") == "true":
        pytest.fail(f"{what} (CI=true: the security tests must run)")
    pytest.skip(what)


def redis_has_tls() -> bool:
    """Debian's redis-server is built with TLS when it accepts ``--tls-port``."""
    out = subprocess.run(
        [REDIS_BIN, "--port", "0", "--tls-port", "0", "--save", ""],
        capture_output=True,
        text=True,
        timeout=10,
    )
    return "Bad directive" not in out.stdout + out.stderr


def render_users(directory: Path) -> tuple[Path, dict[str, Path]]:
    """deploy/redis/users.conf rendered by its own script, with a new password per role.

    Returns the ACL file and each role's password file (mode 600).
    """
    directory.mkdir(parents=True, exist_ok=True)
    files: dict[str, Path] = {}
    for role in ROLES:
        f = directory / f"{role}.password"
        f.write_text(f"{role}-{os.urandom(12).hex()}\n")
        f.chmod(0o600)
        files[role] = f
    acl = directory / "users.acl"
    pairs = [f"{role}={f}" for role, f in files.items()]
    with open(acl, "wb") as out:
        subprocess.run(
            ["sh", str(DEPLOY_REDIS / "render-users.sh"), str(DEPLOY_REDIS / "users.conf"), *pairs],
            stdout=out,
            check=True,
        )
    return acl, files


@dataclass(frozen=True)
class Certs:
    """A test CA, a server certificate for 127.0.0.1, a client certificate, and a stranger CA."""

    ca: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path
    other_ca: Path


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def make_certs(directory: Path) -> Certs:
    """Certificates made with the openssl command line (EC P-256, valid two days)."""
    need("openssl is not installed", shutil.which("openssl") is not None)
    directory.mkdir(parents=True, exist_ok=True)
    ec = ("-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes")
    ca_ext = ("-addext", "basicConstraints=critical,CA:TRUE",
              "-addext", "keyUsage=critical,keyCertSign,cRLSign")  # fmt: skip
    for name in ("ca", "other-ca"):
        _openssl("req", "-x509", *ec, "-keyout", f"{name}.key", "-out", f"{name}.crt",
                 "-days", "2", "-subj", f"/CN=streamrate test {name}", *ca_ext,
                 cwd=directory)  # fmt: skip
    for name, usage, san in (
        ("server", "serverAuth", "subjectAltName=IP:127.0.0.1\n"),
        ("client", "clientAuth", ""),
    ):
        (directory / f"{name}.ext").write_text(
            "basicConstraints=CA:FALSE\nkeyUsage=critical,digitalSignature\n"
            f"extendedKeyUsage={usage}\nsubjectKeyIdentifier=hash\n"
            f"authorityKeyIdentifier=keyid,issuer\n{san}"
        )
        _openssl("req", *ec, "-keyout", f"{name}.key", "-out", f"{name}.csr",
                 "-subj", f"/CN=streamrate test {name}", cwd=directory)  # fmt: skip
        _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
                 "-CAcreateserial", "-days", "2", "-out", f"{name}.crt",
                 "-extfile", f"{name}.ext", cwd=directory)  # fmt: skip
    d = directory
    return Certs(d / "ca.crt", d / "server.crt", d / "server.key", d / "client.crt",
                 d / "client.key", d / "other-ca.crt")  # fmt: skip


class SecureRedisServer(RedisServer):
    """A RedisServer with the rendered ACL file, and TLS-only when ``certs`` are given.

    With TLS the server listens on no plain port and asks every client for a
    certificate signed by the test CA.
    """

    def __init__(self, directory: Path, acl: Path, passwords: dict[str, Path],
                 certs: Certs | None = None) -> None:  # fmt: skip
        super().__init__(directory)
        self.acl, self.passwords, self.certs = acl, passwords, certs

    @property
    def url(self) -> str:
        scheme = "redis" if self.certs is None else "rediss"
        return f"{scheme}://127.0.0.1:{self.port}/0"

    def password(self, role: str) -> str:
        return self.passwords[role].read_text().strip()

    def tls_kwargs(self) -> dict[str, Any]:
        if self.certs is None:
            return {}
        c = self.certs
        return {"ssl": True, "ssl_ca_certs": str(c.ca), "ssl_certfile": str(c.client_cert),
                "ssl_keyfile": str(c.client_key)}  # fmt: skip

    def start(self) -> None:
        ports = ["--port", str(self.port)]
        if self.certs is not None:
            c = self.certs
            ports = ["--port", "0", "--tls-port", str(self.port),
                     "--tls-cert-file", str(c.server_cert), "--tls-key-file", str(c.server_key),
                     "--tls-ca-cert-file", str(c.ca), "--tls-auth-clients", "yes"]  # fmt: skip
        args = [REDIS_BIN, *ports, "--bind", "127.0.0.1", "--dir", str(self.dir),
                "--save", "", "--appendonly", "yes", "--appendfsync", "always",
                "--daemonize", "no", "--logfile", str(self.dir / "redis.log"),
                "--aclfile", str(self.acl)]  # fmt: skip
        self.launch(args)

    def launch(self, args: list[str]) -> None:
        """Start redis-server with ``args`` and wait until it answers PING."""
        self.proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 10
        while True:
            client = self.client(socket_connect_timeout=0.2)
            try:
                if client.ping():
                    return
            except (redis.ConnectionError, redis.BusyLoadingError):
                if time.monotonic() > deadline or self.proc.poll() is not None:
                    log = self.dir / "redis.log"
                    text = log.read_text() if log.exists() else ""
                    raise RuntimeError(f"redis-server did not start: {text}") from None
                time.sleep(0.05)
            finally:
                client.close()

    def client(self, role: str = "admin", **kwargs: Any) -> redis.Redis:
        """A client logged in as ``role`` (default: the admin)."""
        kw: dict[str, Any] = {"socket_timeout": 5, **self.tls_kwargs(), **kwargs}
        return redis.Redis(
            host="127.0.0.1", port=self.port, username=role, password=self.password(role), **kw
        )


@pytest.fixture
def acl_redis(tmp_path: Path) -> Iterator[SecureRedisServer]:
    """redis-server with deploy/redis/users.conf as its ACL, plain TCP."""
    data = tmp_path / "redis"
    data.mkdir()
    acl, passwords = render_users(tmp_path / "secrets")
    server = SecureRedisServer(data, acl, passwords)
    server.start()
    try:
        yield server
    finally:
        server.stop(signal.SIGKILL)


@pytest.fixture
def tls_redis(tmp_path: Path) -> Iterator[SecureRedisServer]:
    """redis-server with the shipped ACL over TLS only, certificates made in the test."""
    need("this redis-server is built without TLS (--tls-port refused)", redis_has_tls())
    certs = make_certs(tmp_path / "certs")
    data = tmp_path / "redis"
    data.mkdir()
    acl, passwords = render_users(tmp_path / "secrets")
    server = SecureRedisServer(data, acl, passwords, certs)
    server.start()
    try:
        yield server
    finally:
        server.stop(signal.SIGKILL)
