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
from the node that owns the slot. When the slot moves (resharding, a replica
promoted) that node ends the subscription (``sunsubscribe``), or refuses a new
one with ``MOVED`` when the client's slot map is old: :class:`Subscriber`
then reads the slot map again and subscribes on the new owner by itself
(counted in ``renewals``; messages sent in between are lost, as with any
reconnect); :class:`AsyncSubscriber` raises :class:`redis.ConnectionError`
and the caller subscribes again.

>>> import fakeredis
>>> r = fakeredis.FakeRedis()
>>> sub = Subscriber(r, "{sr:duel}:live")
>>> publish(r, "{sr:duel}:live", "hello")
1
>>> sub.get_message(timeout=1.0)["data"]
b'hello'
>>> sub.close()
"""

from __future__ import annotations

import collections
import time
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
    owns their common slot (cluster). Subscribed when constructed: the
    constructor returns once the server confirmed every channel (so a request
    published next cannot overtake the subscription to its reply channel), and
    raises :class:`redis.TimeoutError` when that takes longer than ``confirm_s``.

    :meth:`get_message` returns data messages only, each a dict with ``type``
    ``"message"``, ``channel`` and ``data``; ``None`` when nothing came within
    ``timeout`` or what came was not data (a subscribe confirmation).
    ``connection`` is the subscription's connection (redis-py reconnects it and
    subscribes again by itself; its connect callbacks see that). ``renewals``
    counts the subscriptions renewed on another node after a slot move.
    """

    def __init__(self, client: Any, *channels: str, confirm_s: float = 5.0) -> None:
        if not channels:
            raise ValueError("a subscriber needs at least one channel")
        self.channels = tuple(dict.fromkeys(channels))
        self.confirm_s = confirm_s
        self.sharded = sharded(client)
        self.renewals = 0
        self.where = ""
        self._early: collections.deque[dict[str, Any]] = collections.deque()
        if self.sharded:
            self.cluster = cluster_of(client)
            one_slot(self.cluster.keyslot, self.channels)
            self._subscribe_on_owner()
        else:
            self.pubsub: Any = client.pubsub()
            self.pubsub.subscribe(*self.channels)
            self._confirm("subscribe")

    def _subscribe_on_owner(self) -> None:
        for attempt in range(3):
            node = self.cluster.get_node_from_key(self.channels[0])
            self.where = node.name
            self.pubsub = self.cluster.get_redis_connection(node).pubsub()
            self.pubsub.ssubscribe(*self.channels)
            try:
                self._confirm("ssubscribe")
                return
            except redis.exceptions.MovedError:  # our slot map is older than the move
                self.pubsub.close()
                if attempt == 2:
                    raise
                self.cluster.nodes_manager.initialize()

    def _confirm(self, kind: str) -> None:
        """Read one confirmation per channel; data that arrives meanwhile is kept."""
        left = len(self.channels)
        deadline = time.monotonic() + self.confirm_s
        while left:
            wait = deadline - time.monotonic()
            if wait <= 0:
                raise redis.TimeoutError(f"{kind} of {self.channels} not confirmed in time")
            msg = self.pubsub.get_message(timeout=wait)
            if msg is None:
                continue
            if _kind(msg) == kind:
                left -= 1
            elif (data := _data_message(msg, self.where)) is not None:
                self._early.append(data)

    def _renew(self) -> None:
        """The slot moved: read the slot map again and subscribe on its owner."""
        self.pubsub.close()
        self.cluster.nodes_manager.initialize()
        self._subscribe_on_owner()
        self.renewals += 1

    @property
    def connection(self) -> Any:
        return self.pubsub.connection

    def get_message(self, timeout: float = 0.0) -> dict[str, Any] | None:
        if self._early:
            return self._early.popleft()
        try:
            msg = self.pubsub.get_message(timeout=timeout)
            return _data_message(msg, self.where)
        except (redis.exceptions.MovedError, SlotMoved):
            if not self.sharded:
                raise
            self._renew()
            return None

    def close(self) -> None:
        self.pubsub.close()


class SlotMoved(redis.ConnectionError):
    """The node ended a sharded subscription: the channel's slot moved elsewhere."""


def _kind(msg: dict[str, Any]) -> str:
    kind = msg.get("type")
    return kind.decode() if isinstance(kind, bytes) else str(kind)


def _data_message(msg: dict[str, Any] | None, where: str) -> dict[str, Any] | None:
    if msg is None:
        return None
    kind = _kind(msg)
    if kind in _DATA:
        return {"type": "message", "channel": msg["channel"], "data": msg["data"]}
    if kind == "sunsubscribe":  # sent by the node when the slot moved away from it
        raise SlotMoved(
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
            await self.client.nodes_manager.initialize()  # the slot may have moved
            node = self.client.get_node_from_key(self.channels[0])
            self.where = node.name
            self.node = self.node_client(node.host, node.port)
            self.pubsub = self.node.pubsub()
            await self.pubsub.ssubscribe(*self.channels)
        else:
            self.pubsub = self.client.pubsub()
            await self.pubsub.subscribe(*self.channels)

    async def get_message(self, timeout: float = 0.0) -> dict[str, Any] | None:
        try:
            msg = await self.pubsub.get_message(timeout=timeout)
        except redis.exceptions.MovedError as exc:
            raise SlotMoved(f"{self.channels[0]!r} is served elsewhere: {exc}") from exc
        return _data_message(msg, self.where)

    async def aclose(self) -> None:
        try:
            if self.pubsub is not None:
                await self.pubsub.aclose()
        finally:
            if self.node is not None:
                await self.node.aclose()
