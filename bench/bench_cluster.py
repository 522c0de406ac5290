"""Round trips on a local Redis Cluster: stream reads and a query's reply.

Run by hand:  python bench/bench_cluster.py [--reads 3000] [--asks 300]

Starts three cluster masters on free loopback ports (the integration tests'
helper) and one plain redis-server, then measures, in the same run:

* ``XREAD`` of one entry per call through redis-py's own cluster client (which
  asks a node ``COMMAND GETKEYS`` to find the key of every stream read) against
  the service's cluster client (streamrate.connect, which spells those keys);
* an ``ask`` round trip (sharded ``SSUBSCRIBE`` to the reply channel, the request
  ``SPUBLISH``-ed, a reply ``SPUBLISH``-ed back by an echo thread) on the cluster
  against the same with ``SUBSCRIBE``/``PUBLISH`` on the plain server.

Prints microseconds per call and the ratios. Loopback only: a real network adds
its latency to every round trip, which makes saved round trips count for more.
"""

from __future__ import annotations

import argparse
import json
import shutil
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import redis
import redis.cluster

from streamrate.client import ask
from streamrate.config import RedisSettings
from streamrate.connect import RedisClients
from streamrate.pubsub import Subscriber, publish
from tests.integration.cluster import LocalCluster
from tests.integration.conftest import RedisServer

STREAM = "{sr:duel}:events"
REQUESTS = "{sr:duel}:q"


def per_call_us(fn: Any, n: int) -> float:
    fn()  # warm: connections, slot map
    t0 = time.perf_counter()
    for _ in range(n):
        fn()
    return (time.perf_counter() - t0) / n * 1e6


def echo(client: Any, stop: threading.Event, ready: threading.Event) -> None:
    """Answer every request on REQUESTS on its reply channel (the service's part)."""
    sub = Subscriber(client, REQUESTS)
    ready.set()
    while not stop.is_set():
        msg = sub.get_message(timeout=0.05)
        if msg is not None:
            req = json.loads(msg["data"])
            publish(client, req["reply_to"], json.dumps({"id": req["id"], "ok": True}))
    sub.close()


def ask_us(make: Any, n: int) -> float:
    stop, ready = threading.Event(), threading.Event()
    t = threading.Thread(target=echo, args=(make(), stop, ready), daemon=True)
    t.start()
    ready.wait(10)
    client = make()
    try:
        return per_call_us(lambda: ask(client, REQUESTS, {"kind": "pairing"}, 5.0), n)
    finally:
        stop.set()
        t.join(5)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--reads", type=int, default=3000)
    ap.add_argument("--asks", type=int, default=300)
    args = ap.parse_args()
    base = Path(tempfile.mkdtemp(prefix="bench-cluster-"))
    cluster = LocalCluster(base / "cluster")
    (base / "plain").mkdir()
    plain = RedisServer(base / "plain")
    try:
        cluster.start()
        plain.start()
        ours = RedisClients(RedisSettings(url=cluster.url))
        theirs = redis.cluster.RedisCluster(host="127.0.0.1", port=cluster.nodes[0].port)
        theirs.xadd(STREAM, {"event": "{}"})
        svc = ours()
        read_theirs = per_call_us(lambda: theirs.xread({STREAM: "0"}, count=1), args.reads)
        read_ours = per_call_us(lambda: svc.xread({STREAM: "0"}, count=1), args.reads)
        print(f"XREAD, redis-py cluster client:   {read_theirs:8.1f} us/call")
        print(f"XREAD, streamrate cluster client: {read_ours:8.1f} us/call")
        print(f"  ratio (streamrate / redis-py):  {read_ours / read_theirs:8.2f}")
        one = RedisClients(RedisSettings(url=plain.url))
        ask_cluster = ask_us(ours, args.asks)
        ask_plain = ask_us(one, args.asks)
        print(f"ask, cluster (sharded pub/sub):   {ask_cluster:8.1f} us/call")
        print(f"ask, one server (pub/sub):        {ask_plain:8.1f} us/call")
        print(f"  ratio (cluster / one server):   {ask_cluster / ask_plain:8.2f}")
    finally:
        cluster.stop()
        plain.stop()
        shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    main()
