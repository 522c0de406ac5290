"""A command whose reply is lost is not sent again by the client (real redis-server).

redis-py can repeat a command after a connection error; a command that had run
would then run twice. The service's clients repeat nothing
(:mod:`streamrate.connect`): the error reaches the loop that made the call,
which reconnects and re-reads its own pending entries. Checked for the three
writes that must not run twice: the lease take (a new epoch), the fenced
applied-log ``XADD`` and the group read ``XREADGROUP ... >``. The same checks
run against a Redis Cluster in ``test_cluster.py``.
"""

from __future__ import annotations

from typing import Any

import pytest
import redis

from streamrate.config import LeaseSettings, RedisSettings
from streamrate.connect import RedisClients
from streamrate.stream.lease import Lease

from .conftest import RedisServer
from .lost_reply import cut_after_send

pytestmark = pytest.mark.integration


def _client(url: str, marker: bytes, **settings: Any) -> tuple[Any, dict[str, int]]:
    clients = RedisClients(RedisSettings(url=url, **settings))
    conn = cut_after_send(marker)
    clients.kwargs["connection_class"] = conn
    return clients(), conn.cut  # type: ignore[attr-defined]


def check_lost_replies(url: str, admin: Any, tag: str, **settings: Any) -> None:
    """The three writes, each with its reply lost once, against ``url``."""
    lease_key, epoch_key = f"{{sr:{tag}}}:lease", f"{{sr:{tag}}}:epoch"
    applied, events = f"{{sr:{tag}}}:applied", f"{{sr:{tag}}}:events"

    # The lease take: the epoch is taken once, and taking again works at once
    # (the lease names this holder) instead of waiting for it to lapse.
    r, cut = _client(url, b"INCRBY", **settings)
    lease = Lease(r, lease_key, epoch_key, LeaseSettings(lease_ms=60_000), "host:1:ab")
    with pytest.raises(redis.ConnectionError):
        lease.take()
    assert cut["cuts"] == 1
    assert admin.get(epoch_key) == b"1"
    assert lease.take() == 2
    assert admin.get(lease_key) == b"host:1:ab 2"
    other = Lease(admin, lease_key, epoch_key, LeaseSettings(lease_ms=60_000), "host:2:cd")
    assert other.take() == 0  # another holder still cannot take it

    # The fenced applied-log XADD: one entry, not two.
    r, cut = _client(url, b"unpack(fields)", **settings)
    lease = Lease(r, lease_key, epoch_key, LeaseSettings(lease_ms=60_000), "host:1:ab")
    assert lease.take() == 3
    with pytest.raises(redis.ConnectionError):
        lease.xadd_all(applied, [{"kind": "chunk", "seq": "0"}])
    assert cut["cuts"] == 1
    assert admin.xlen(applied) == 1

    # XREADGROUP >: the entries of the lost reply stay pending under our name and
    # no further entries are delivered behind them; re-reading our own pending
    # entries (what the writer does after an outage) finds them in order.
    for i in range(4):
        admin.xadd(events, {"event": str(i)})
    admin.xgroup_create(events, "streamrate", id="0")
    r, cut = _client(url, b"XREADGROUP", **settings)
    with pytest.raises(redis.ConnectionError):
        r.xreadgroup("streamrate", "w1", {events: ">"}, count=2)
    assert cut["cuts"] == 1
    assert admin.xpending(events, "streamrate")["pending"] == 2
    got = r.xreadgroup("streamrate", "w1", {events: "0"}, count=10)
    assert [f[b"event"] for _, f in got[0][1]] == [b"0", b"1"]


def test_a_lost_reply_is_not_sent_again_on_one_server(redis_server: RedisServer) -> None:
    check_lost_replies(redis_server.url, redis_server.client(), "duel")


def test_the_clients_are_built_without_retries() -> None:
    for url in ("redis://127.0.0.1:6379/0", "redis+cluster://127.0.0.1:7000/0"):
        assert RedisClients(RedisSettings(url=url)).kwargs["retry"].get_retries() == 0
