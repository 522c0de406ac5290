"""The web server's side of the service protocol: pairing questions and live watches.

The web server is one Redis client of the service, like ``streamrate watch``.
It listens on one pub/sub connection to two channels: its own reply channel
(``{sr:duel}:q:reply:web-<hex>``) and the live channel of its watch. It keeps
the service watching the union of the pairings its browsers want (one watch for
the whole process) by sending the full set again every ``probe_every_s``; that
send doubles as the liveness probe, and a failed one turns the feed ``down``.
When the feed comes back every watched pairing is asked again.

With a Redis Cluster URL (``redis+cluster://``) both channels carry the space's
hash tag: the feed publishes with ``SPUBLISH`` and subscribes with
``SSUBSCRIBE`` on the node that owns the slot (:mod:`streamrate.pubsub`).

How a watch is spelled sits in one place, :class:`PerClientWatch`: the web
server's watch is its own (a ``watcher`` id with a time to live), never the
watch list of another client.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import time
import uuid
from collections.abc import Callable
from typing import Any, Protocol

import redis

from streamrate.config import SpaceKeys, WebSettings
from streamrate.connect import async_clients
from streamrate.errors import ServiceError
from streamrate.pubsub import AsyncSubscriber, apublish
from streamrate.web.hub import Hub, PairKey, Update, pairing_key

log = logging.getLogger("streamrate.web")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError, OSError)
REFRESH_EVERY_S = 60.0  # re-ask every pairing now and then: a service restart between probes


class FeedDown(ServiceError):
    """The service did not answer (not running, Redis unreachable, or not ready)."""

    def __init__(self, message: str, status: str = "down") -> None:
        super().__init__(message)
        self.status = status


# -- the watch protocol: the only place that knows how watches are spelled -----------
class WatchProtocol(Protocol):
    live_channel: str

    def request(self, pairings: list[dict[str, Any]]) -> dict[str, Any]: ...
    def missed(self, message: dict[str, Any]) -> bool: ...


class PerClientWatch:
    """Watches of one ``watcher`` that expire after ``ttl_s`` unless renewed.

    Live messages come on ``{sr:duel}:live:<watcher>`` with a per-watcher ``seq``;
    a jump in ``seq`` means messages were lost, and the caller asks again.
    """

    def __init__(self, keys: SpaceKeys, watcher: str, ttl_s: float) -> None:
        self.watcher, self.ttl_s = watcher, ttl_s
        self.live_channel = keys.live_of(watcher)
        self._seq: int | None = None

    def request(self, pairings: list[dict[str, Any]]) -> dict[str, Any]:
        action = "set" if pairings else "clear"
        return {
            "kind": "watch",
            "action": action,
            "watcher": self.watcher,
            "ttl_s": self.ttl_s,
            "pairings": pairings,
        }

    def missed(self, message: dict[str, Any]) -> bool:
        seq = message.get("seq")
        if not isinstance(seq, int):
            return False
        gap = self._seq is not None and seq > self._seq + 1
        self._seq = seq
        return gap


def watch_protocol(settings: WebSettings, keys: SpaceKeys, watcher: str) -> WatchProtocol:
    return PerClientWatch(keys, watcher, settings.watch_ttl_s)


# -------------------------------------------------------------------------------------
def pairing_body(key: PairKey) -> dict[str, Any]:
    first, second, ctx = key
    return {"first": list(first), "second": list(second), "context": dict(ctx)}


def _now_ms() -> int:
    return int(time.time() * 1000)


class Feed:
    """Keeps the hub's pairings watched and current; reports ``status`` changes."""

    def __init__(
        self,
        settings: WebSettings,
        keys: SpaceKeys,
        hub: Hub,
        redis_url: str,
        on_status: Callable[[str, str], None] = lambda s, d: None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.settings, self.keys, self.hub, self.clock = settings, keys, hub, clock
        self.on_status = on_status
        self.watcher = f"web-{uuid.uuid4().hex[:12]}"
        self.reply_channel = f"{keys.requests}:reply:{self.watcher}"
        self.protocol = watch_protocol(settings, keys, self.watcher)
        self.redis_url = redis_url
        self.status, self.detail = "starting", "connecting to the service"
        self.listening = asyncio.Event()
        self._client: Any = None
        self._node: Any = None  # a cluster's node client maker (sharded subscriptions)
        self._pending: dict[str, asyncio.Future[dict[str, Any]]] = {}
        self._synced: set[PairKey] = set()
        self._sync_lock = asyncio.Lock()
        self._wake = asyncio.Event()
        self._refresh_at = clock() + REFRESH_EVERY_S

    def _set_status(self, status: str, detail: str) -> None:
        if (status, detail) != (self.status, self.detail):
            if status != self.status:
                log.info("feed %s: %s", status, detail)
            self.status, self.detail = status, detail
            self.on_status(status, detail)

    def client(self) -> Any:
        """The asyncio client of one server, or of a Redis Cluster."""
        if self._client is None:
            self._client, self._node = async_clients(
                self.redis_url, socket_timeout=5.0, socket_connect_timeout=2.0
            )
        return self._client

    async def close(self) -> None:
        if self._client is not None and self.status == "ok":
            try:  # leave nothing watched behind
                await self.request(self.protocol.request([]))
            except (FeedDown, *REDIS_DOWN):
                pass
        if self._client is not None:
            await self._client.aclose()

    # -- requests ------------------------------------------------------------------
    async def request(self, body: dict[str, Any]) -> dict[str, Any]:
        """One request/reply round trip; :class:`FeedDown` when nobody answers."""
        if not self.listening.is_set():
            raise FeedDown("the web server is not subscribed to its reply channel yet")
        req = {**body, "id": uuid.uuid4().hex, "reply_to": self.reply_channel}
        fut: asyncio.Future[dict[str, Any]] = asyncio.get_running_loop().create_future()
        self._pending[req["id"]] = fut
        try:
            try:
                listeners = await apublish(self.client(), self.keys.requests, json.dumps(req))
            except REDIS_DOWN as exc:
                raise FeedDown(f"Redis unreachable: {exc}") from exc
            if listeners == 0:
                raise FeedDown(f"no service listens on {self.keys.requests}")
            try:
                reply = await asyncio.wait_for(fut, self.settings.ask_timeout_s)
            except TimeoutError as exc:
                raise FeedDown(f"no reply within {self.settings.ask_timeout_s} s") from exc
        finally:
            self._pending.pop(req["id"], None)
        if not reply.get("ok") and reply.get("status") in ("loading", "stalled"):
            raise FeedDown(str(reply.get("error")), status=str(reply["status"]))
        return reply

    async def sync_watch(self) -> None:
        """Send the whole union of watched pairings (also renews a per-client watch)."""
        async with self._sync_lock:
            keys = self.hub.pairings()
            reply = await self.request(self.protocol.request([pairing_body(k) for k in keys]))
            if not reply.get("ok"):
                raise FeedDown(f"the service refused the watch: {reply.get('error')}", "error")
            self._synced = set(keys)

    async def ask(self, keys: list[PairKey]) -> None:
        """Ask the current probability of each pairing and publish it to the hub."""
        replies = await asyncio.gather(
            *(self.request({"kind": "pairing", **pairing_body(k)}) for k in keys)
        )
        for key, rep in zip(keys, replies, strict=True):
            cur = self.hub.current(key)
            if rep.get("ok") and (cur is None or cur.p_first_wins != rep["p_first_wins"]):
                # Only news is published: an equal value would only repeat what the live
                # messages said, and could overtake one still on its way.
                self.hub.publish(
                    Update(
                        key,
                        float(rep["p_first_wins"]),
                        rep.get("p_draw"),
                        str(rep.get("model_version", "0-0")),
                        None,
                        _now_ms(),
                    )
                )
            else:
                log.warning("pairing %s: %s", key, rep.get("error"))

    async def ensure(self, keys: tuple[PairKey, ...]) -> None:
        """Make sure ``keys`` are watched and have a current value (for a new browser)."""
        try:
            if any(k not in self._synced for k in keys):
                await self.sync_watch()
            missing = [k for k in keys if self.hub.current(k) is None]
            if missing:
                await self.ask(missing)
        except FeedDown as exc:
            self._set_status(exc.status, str(exc))

    async def snapshot(self, keys: list[PairKey]) -> list[Update | None]:
        """Current values: watched ones from the hub, the others asked once."""
        out: list[Update | None] = []
        for key in keys:
            have = self.hub.current(key)
            if have is None:
                rep = await self.request({"kind": "pairing", **pairing_body(key)})
                if rep.get("ok"):
                    have = Update(
                        key,
                        float(rep["p_first_wins"]),
                        rep.get("p_draw"),
                        str(rep.get("model_version", "0-0")),
                        None,
                        _now_ms(),
                    )
            out.append(have)
        return out

    # -- the two loops -----------------------------------------------------------------
    def _dispatch(self, channel: str, data: bytes) -> None:
        try:
            msg = json.loads(data)
        except ValueError:
            return
        if not isinstance(msg, dict):
            return
        if channel == self.reply_channel:
            fut = self._pending.get(str(msg.get("id")))
            if fut is not None and not fut.done():
                fut.set_result(msg)
            return
        if self.protocol.missed(msg):
            self._refresh_at = 0.0  # lost messages: ask everything again at the next probe
            self._wake.set()
        try:
            key = pairing_key(msg["first"], msg["second"], msg.get("context") or {})
            update = Update(
                key,
                float(msg["p_first_wins"]),
                msg.get("p_draw"),
                str(msg["model_version"]),
                msg.get("match_id"),
                _now_ms(),
            )
        except (KeyError, TypeError, ValueError):
            log.warning("live message without the expected fields: %.200s", data)
            return
        self.hub.publish(update)

    async def listen(self, stop: asyncio.Event) -> None:
        delay = 0.05
        while not stop.is_set():
            pubsub = None
            try:
                client = self.client()
                pubsub = AsyncSubscriber(
                    client, self._node, self.reply_channel, self.protocol.live_channel
                )
                await pubsub.start()
                self.listening.set()
                delay = 0.05
                self._wake.set()  # (re)subscribed: probe at once
                while not stop.is_set():
                    msg = await pubsub.get_message(timeout=0.5)
                    if msg is not None:
                        ch = msg["channel"]
                        self._dispatch(ch.decode() if isinstance(ch, bytes) else ch, msg["data"])
            except REDIS_DOWN as exc:
                self.listening.clear()
                self._set_status("down", f"Redis unreachable: {exc}")
                await _sleep_or_stop(stop, delay)
                delay = min(delay * 2, 2.0)
            finally:
                if pubsub is not None:
                    with contextlib.suppress(*REDIS_DOWN):
                        await pubsub.aclose()

    async def probe(self, stop: asyncio.Event) -> None:
        """Renew the watch every ``probe_every_s`` (or when woken); refresh after an outage."""
        while not stop.is_set():
            self._wake.clear()
            self.hub.sweep(self.clock(), self.settings.linger_s)
            if not self.listening.is_set():  # listen() reports why
                await _sleep_or_stop(stop, 0.05)
                continue
            try:
                await self.sync_watch()
                keys = self.hub.pairings()
                outage = self.status not in ("ok", "starting")
                if outage or self.clock() >= self._refresh_at:
                    self._refresh_at = self.clock() + REFRESH_EVERY_S
                else:
                    keys = [k for k in keys if self.hub.current(k) is None]
                if keys:
                    await self.ask(keys)
                self._set_status("ok", "live")
            except FeedDown as exc:
                self._set_status(exc.status, str(exc))
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._wake.wait(), self.settings.probe_every_s)

    def wake(self) -> None:
        self._wake.set()


async def _sleep_or_stop(stop: asyncio.Event, seconds: float) -> None:
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(stop.wait(), seconds)
