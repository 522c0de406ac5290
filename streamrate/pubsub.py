"""Pub/sub on one Redis server or on a Redis Cluster, spelled in one place.

On one server the service uses ``PUBLISH``/``SUBSCRIBE``. In a cluster a plain
``PUBLISH`` is broadcast over the cluster bus to every node, so each message
costs every shard; the service uses sharded pub/sub there instead
(``SPUBLISH``/``SSUBSCRIBE``, Redis 7.0+): a channel lives on the node that owns
its hash slot, like a key. Every channel of a space carries the space's hash
tag (``{sr:duel}:q``, ``{sr:duel}:q:reply:...``, ``{sr:duel}:live:...``, see
:mod:`streamrate.config`), so all of a space's messages stay on the node of its
keys, and one subscription connection per space is enough.

:func:`publish` and :class:`Subscriber` pick the spelling from the client;
:func:`sharded` says which one a client gets. A subscriber in a cluster reads
from the node that owns the slot; when the slot moves (resharding, a replica
promoted) that node ends the subscription and :meth:`Subscriber.get_message`
raises :class:`redis.ConnectionError`, so the caller subscribes again through
a fresh client, as after any lost connection.

>>> import fakeredis
>>> r = fakeredis.FakeRedis()
>>> sub = Subscriber(r, "{sr:duel}:live")
>>> publish(r, "{sr:duel}:live", "hello")
1
>>> sub.get_message(timeout=1.0) is None  # the subscribe confirmation: skipped
True
>>> sub.get_message(timeout=1.0)["data"]
b'hello'
>>> sub.close()
"""

from __future__ import annotations

from typing import Any

import redis
import redis.asyncio as aredis
import redis.asyncio.cluster as acluster
import redis.cluster as rcluster

_CLUSTER_TYPES = (
    rcluster.RedisCluster,
    rcluster.ClusterPipeline,
    acluster.RedisCluster,
    acluster.ClusterPipeline,
)
_DATA = ("message", "smessage")


def sharded(client: Any) -> bool:
    """True when ``client`` (or pipeline) talks to a Redis Cluster: sharded pub/sub."""
    return isinstance(client, _CLUSTER_TYPES) or getattr(client, "sharded_pubsub", False) is True


def publish(client: Any, channel: str, message: str | bytes) -> Any:
    """``PUBLISH`` (one server) or ``SPUBLISH`` (cluster); on a pipeline, queued.

    Returns the number of subscribers that got it (those of the channel's node
    in a cluster, which are all of them with sharded pub/sub).
    """
    if sharded(client):
        return client.spublish(channel, message)
    return client.publish(channel, message)


def cluster_of(client: Any) -> rcluster.RedisCluster:
    """The connected :class:`~redis.cluster.RedisCluster` behind ``client``."""
    inner = client.connected() if hasattr(client, "connected") else client
    if not isinstance(inner, rcluster.RedisCluster):
        raise TypeError(f"not a Redis Cluster client: {type(client).__name__}")
    return inner


def one_slot(keyslot: Any, channels: tuple[str, ...]) -> None:
    """Refuse channels that do not share one hash slot (one node must hold them all)."""
    slots = {keyslot(c) for c in channels}
    if len(slots) != 1:
        raise ValueError(f"channels {channels} span hash slots {sorted(slots)}; give them one tag")


class Subscriber:
    """``SUBSCRIBE`` to ``channels`` (one server) or ``SSUBSCRIBE`` on the node that
    owns their common slot (cluster). Subscribed when constructed.

    :meth:`get_message` returns data messages only, each a dict with ``type``
    ``"message"``, ``channel`` and ``data``; ``None`` when nothing came within
    ``timeout`` or what came was not data (a subscribe confirmation).
    ``connection`` is the subscription's connection (redis-py reconnects it and
    subscribes again by itself; its connect callbacks see that).
    """

    def __init__(self, client: Any, *channels: str) -> None:
        if not channels:
            raise ValueError("a subscriber needs at least one channel")
        self.channels = channels
        self.sharded = sharded(client)
        if self.sharded:
            cluster = cluster_of(client)
            one_slot(cluster.keyslot, channels)
            node = cluster.get_node_from_key(channels[0])
            node_client = cluster.get_redis_connection(node)
            self.where = node.name
            self.pubsub: Any = node_client.pubsub()
            self.pubsub.ssubscribe(*channels)
        else:
            self.where = ""
            self.pubsub = client.pubsub()
            self.pubsub.subscribe(*channels)

    @property
    def connection(self) -> Any:
        return self.pubsub.connection

    def get_message(self, timeout: float = 0.0) -> dict[str, Any] | None:
        msg = self.pubsub.get_message(timeout=timeout)
        return _data_message(msg, self.where)

    def close(self) -> None:
        self.pubsub.close()


def _data_message(msg: dict[str, Any] | None, where: str) -> dict[str, Any] | None:
    if msg is None:
        return None
    kind = msg.get("type")
    if isinstance(kind, bytes):
        kind = kind.decode()
    if kind in _DATA:
        return {"type": "message", "channel": msg["channel"], "data": msg["data"]}
    if kind == "sunsubscribe":  # sent by the node when the slot moved away from it
        raise redis.ConnectionError(
            f"the shard channel {msg.get('channel')!r} left node {where}; subscribe again"
        )
    return None


# -- asyncio (the web server) ----------------------------------------------------------
async def apublish(client: Any, channel: str, message: str) -> Any:
    """:func:`publish` for an asyncio client."""
    if sharded(client):
        return await client.spublish(channel, message)
    return await client.publish(channel, message)


class AsyncSubscriber:
    """:class:`Subscriber` for asyncio clients; call :meth:`start` to subscribe.

    In a cluster ``node_client`` makes a plain asyncio client for a node's
    ``(host, port)`` (same credentials as the cluster client).
    """

    def __init__(self, client: Any, node_client: Any, *channels: str) -> None:
        self.client, self.node_client, self.channels = client, node_client, channels
        self.node: aredis.Redis | None = None
        self.pubsub: Any = None
        self.where = ""

    async def start(self) -> None:
        if sharded(self.client):
            one_slot(self.client.keyslot, self.channels)
            await self.client.initialize()
            node = self.client.get_node_from_key(self.channels[0])
            self.where = node.name
            self.node = self.node_client(node.host, node.port)
            self.pubsub = self.node.pubsub()
            await self.pubsub.ssubscribe(*self.channels)
        else:
            self.pubsub = self.client.pubsub()
            await self.pubsub.subscribe(*self.channels)

    async def get_message(self, timeout: float = 0.0) -> dict[str, Any] | None:
        msg = await self.pubsub.get_message(timeout=timeout)
        return _data_message(msg, self.where)

    async def aclose(self) -> None:
        try:
            if self.pubsub is not None:
                await self.pubsub.aclose()
        finally:
            if self.node is not None:
                await self.node.aclose()
