"""A real local Redis Cluster for the integration tests.

Three (or more) ``redis-server --cluster-enabled yes`` masters on free loopback
ports (client and cluster-bus port each chosen free), each in its own temp
directory, joined by ``redis-cli --cluster create ... --cluster-replicas 0``
and stopped by their own PIDs. With an ACL file every node runs the shipped
users (deploy/redis/users.conf) and ``redis-cli`` logs in as the admin.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import time
from pathlib import Path

import redis

from .conftest import REDIS_BIN, free_port

REDIS_CLI = shutil.which("redis-cli") or "/usr/bin/redis-cli"


class ClusterNode:
    """One cluster-enabled redis-server we started."""

    def __init__(self, directory: Path, acl: Path | None) -> None:
        self.dir, self.acl = directory, acl
        self.port, self.bus_port = free_port(), free_port()
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        args = [REDIS_BIN, "--port", str(self.port), "--bind", "127.0.0.1",
                "--cluster-enabled", "yes", "--cluster-port", str(self.bus_port),
                "--cluster-config-file", str(self.dir / "nodes.conf"),
                "--cluster-node-timeout", "5000", "--dir", str(self.dir),
                "--save", "", "--appendonly", "no", "--daemonize", "no",
                "--logfile", str(self.dir / "redis.log")]  # fmt: skip
        if self.acl is not None:
            args += ["--aclfile", str(self.acl)]
        self.proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)

    def stop(self) -> None:
        if self.proc is None:
            return
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait(10)
        self.proc = None


class LocalCluster:
    """``masters`` cluster nodes; ``start`` returns once ``cluster_state:ok`` on all."""

    def __init__(
        self,
        directory: Path,
        masters: int = 3,
        acl: Path | None = None,
        passwords: dict[str, Path] | None = None,
    ) -> None:
        self.passwords = passwords or {}
        self.nodes = []
        for i in range(masters):
            d = directory / f"node{i}"
            d.mkdir(parents=True)
            self.nodes.append(ClusterNode(d, acl))

    def password(self, role: str) -> str:
        return self.passwords[role].read_text().strip()

    def node_client(self, node: ClusterNode) -> redis.Redis:
        """A plain client of one node (the admin when the cluster runs the ACL users)."""
        auth = {"username": "admin", "password": self.password("admin")} if self.passwords else {}
        return redis.Redis(host="127.0.0.1", port=node.port, socket_timeout=5, **auth)

    def cluster_client(self) -> redis.cluster.RedisCluster:
        auth = {"username": "admin", "password": self.password("admin")} if self.passwords else {}
        return redis.cluster.RedisCluster(host="127.0.0.1", port=self.nodes[0].port, **auth)

    @property
    def url(self) -> str:
        """The service's URL: the cluster scheme and one node to start from."""
        return f"redis+cluster://127.0.0.1:{self.nodes[0].port}/0"

    def start(self, timeout_s: float = 30.0) -> None:
        for node in self.nodes:
            node.start()
        for node in self.nodes:
            self._wait(lambda n=node: bool(self.node_client(n).ping()), timeout_s, node)
        env = dict(os.environ)
        cli = [REDIS_CLI]
        if self.passwords:
            cli += ["--user", "admin"]
            env["REDISCLI_AUTH"] = self.password("admin")  # not in the process list
        addrs = [f"127.0.0.1:{n.port}" for n in self.nodes]
        subprocess.run(
            [*cli, "--cluster", "create", *addrs, "--cluster-replicas", "0", "--cluster-yes"],
            env=env,
            check=True,
            capture_output=True,
            timeout=60,
        )
        for node in self.nodes:
            self._wait(lambda n=node: self._ok(n), timeout_s, node)

    def _ok(self, node: ClusterNode) -> bool:
        info = self.node_client(node).cluster("info")
        return info.get("cluster_state") == "ok" and int(info["cluster_slots_ok"]) == 16384

    def _wait(self, cond: object, timeout_s: float, node: ClusterNode) -> None:
        deadline = time.monotonic() + timeout_s
        while True:
            try:
                if callable(cond) and cond():
                    return
            except (redis.ConnectionError, redis.BusyLoadingError, redis.ResponseError):
                pass
            if time.monotonic() > deadline or (node.proc is not None and node.proc.poll()):
                log = node.dir / "redis.log"
                text = log.read_text()[-2000:] if log.exists() else ""
                raise RuntimeError(f"cluster node {node.port} not ready: {text}")
            time.sleep(0.05)

    def owner(self, slot: int) -> ClusterNode:
        """The master that serves ``slot`` (from CLUSTER SLOTS)."""
        for start, end, master, *_ in self.node_client(self.nodes[0]).execute_command(
            "CLUSTER", "SLOTS"
        ):
            if start <= slot <= end:
                port = int(master[1])
                return next(n for n in self.nodes if n.port == port)
        raise AssertionError(f"slot {slot} is not served")

    def move_slot(self, slot: int, dst: ClusterNode) -> None:
        """Move ``slot`` and its keys to master ``dst`` while clients use it
        (``SETSLOT IMPORTING/MIGRATING``, ``MIGRATE``, ``SETSLOT NODE`` on every master)."""
        src = self.owner(slot)
        s, d = self.node_client(src), self.node_client(dst)
        src_id, dst_id = s.cluster("myid"), d.cluster("myid")
        d.execute_command("CLUSTER", "SETSLOT", slot, "IMPORTING", src_id)
        s.execute_command("CLUSTER", "SETSLOT", slot, "MIGRATING", dst_id)
        auth = ["AUTH2", "admin", self.password("admin")] if self.passwords else []
        while keys := s.execute_command("CLUSTER", "GETKEYSINSLOT", slot, 100):
            s.execute_command("MIGRATE", "127.0.0.1", dst.port, "", 0, 5000, *auth, "KEYS", *keys)
        for node in (dst, src, *[n for n in self.nodes if n not in (src, dst)]):
            self.node_client(node).execute_command("CLUSTER", "SETSLOT", slot, "NODE", dst_id)

    def stop(self) -> None:
        for node in self.nodes:
            node.stop()
