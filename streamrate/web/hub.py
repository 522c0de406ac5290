"""In-process fan-out: one record per watched pairing, many browser connections.

The web server is one client of the service; every browser connection is a
:class:`Subscriber` of the :class:`Hub`. A pairing's record keeps its current
probability and a bounded ring of its recent updates, so that a browser coming
back with ``Last-Event-ID`` gets what it missed. Each subscriber has a bounded
queue: when it is full the subscriber is marked ``overflowed`` and its
connection is closed (the browser reconnects and resumes from the ring); the
others are never slowed.

Event ids are model versions (the stream id of the last applied event, e.g.
``1733-0``): they grow with the stream, survive a restart of the web server, and
order updates of different pairings. An update is kept only when its version is
not older than the pairing's current one, so repeats after a service restart
are dropped here.

>>> hub = Hub(max_clients=2, max_pairings=4, max_per_client=2, ring=8, queue=4)
>>> key = pairing_key(["kelvash"], ["morvenn"], {})
>>> sub = hub.attach([key])
>>> hub.publish(Update(key, 0.61, None, "5-0", "m-5", 0))
True
>>> sub.queue.get_nowait().startswith(b"id: 5-0")
True
>>> hub.publish(Update(key, 0.55, None, "4-0", "m-4", 0))  # older: dropped
False
"""

from __future__ import annotations

import asyncio
import json
from collections import deque
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

PairKey = tuple[tuple[str, ...], tuple[str, ...], tuple[tuple[str, Any], ...]]


def pairing_key(first: Iterable[str], second: Iterable[str], context: Mapping[str, Any]) -> PairKey:
    """A hashable name of a pairing in a context (context keys sorted)."""
    return (tuple(first), tuple(second), tuple(sorted(context.items())))


def version_order(version: str) -> tuple[int, int]:
    """``"1733-4"`` -> ``(1733, 4)``; anything unreadable sorts first."""
    ms, _, seq = version.partition("-")
    try:
        return int(ms), int(seq or 0)
    except ValueError:
        return (-1, -1)


class HubFull(Exception):
    """A cap would be exceeded; the message says which."""


@dataclass(frozen=True)
class Update:
    """One probability of one pairing at one model version."""

    key: PairKey
    p_first_wins: float
    p_draw: float | None
    model_version: str
    match_id: str | None
    at_ms: int  # wall-clock time the web server received it

    def as_json(self) -> dict[str, Any]:
        first, second, ctx = self.key
        return {
            "first": list(first),
            "second": list(second),
            "context": dict(ctx),
            "p_first_wins": self.p_first_wins,
            "p_draw": self.p_draw,
            "model_version": self.model_version,
            "match_id": self.match_id,
            "at_ms": self.at_ms,
        }

    def sse(self) -> bytes:
        """The Server-Sent Events frame of this update (id = model version)."""
        data = json.dumps(self.as_json(), separators=(",", ":"))
        return f"id: {self.model_version}\nevent: p\ndata: {data}\n\n".encode()


@dataclass(eq=False)
class Subscriber:
    """One browser connection: its pairings and its bounded queue of frames."""

    keys: tuple[PairKey, ...]
    queue: asyncio.Queue[bytes]
    overflowed: bool = False


@dataclass(eq=False)
class _Record:
    ring: deque[Update]
    current: Update | None = None
    subscribers: set[Subscriber] = field(default_factory=set)
    pinned: bool = False
    idle_since_s: float | None = None


class Hub:
    """Pairing records, subscribers and the caps on both (single event loop, no locks)."""

    def __init__(
        self, max_clients: int, max_pairings: int, max_per_client: int, ring: int, queue: int
    ) -> None:
        self.max_clients = max_clients
        self.max_pairings = max_pairings
        self.max_per_client = max_per_client
        self.ring = ring
        self.queue = queue
        self.records: dict[PairKey, _Record] = {}
        self.subscribers: set[Subscriber] = set()
        self.dropped = 0  # subscribers closed for falling behind
        self.version = "0-0"  # newest model version seen

    def _record(self, key: PairKey) -> _Record:
        rec = self.records.get(key)
        if rec is None:
            rec = _Record(deque(maxlen=self.ring))
            self.records[key] = rec
        rec.idle_since_s = None
        return rec

    def pin(self, keys: Iterable[PairKey]) -> None:
        """Keep these pairings watched with or without browsers (``--watch``)."""
        keys = list(dict.fromkeys(keys))
        if len(set(keys) | set(self.records)) > self.max_pairings:
            raise HubFull(f"more than {self.max_pairings} pairings would be watched")
        for k in keys:
            self._record(k).pinned = True

    def attach(self, keys: Iterable[PairKey]) -> Subscriber:
        """A new subscriber of ``keys``; :class:`HubFull` when a cap would be passed."""
        wanted = tuple(dict.fromkeys(keys))
        if not wanted:
            raise HubFull("no pairing given")
        if len(wanted) > self.max_per_client:
            raise HubFull(f"{len(wanted)} pairings; at most {self.max_per_client} per client")
        if len(self.subscribers) >= self.max_clients:
            raise HubFull(f"the limit of {self.max_clients} clients is reached")
        new = [k for k in wanted if k not in self.records]
        if len(self.records) + len(new) > self.max_pairings:
            raise HubFull(f"the limit of {self.max_pairings} watched pairings is reached")
        sub = Subscriber(wanted, asyncio.Queue(maxsize=self.queue))
        for k in wanted:
            self._record(k).subscribers.add(sub)
        self.subscribers.add(sub)
        return sub

    def detach(self, sub: Subscriber, now_s: float) -> None:
        """Forget a subscriber; its pairings linger (still watched) until :meth:`sweep`."""
        self.subscribers.discard(sub)
        for k in sub.keys:
            rec = self.records.get(k)
            if rec is not None:
                rec.subscribers.discard(sub)
                if not rec.subscribers and not rec.pinned:
                    rec.idle_since_s = now_s

    def sweep(self, now_s: float, linger_s: float) -> list[PairKey]:
        """Drop pairings nobody has watched for ``linger_s``; returns them."""
        gone = [
            k
            for k, r in self.records.items()
            if r.idle_since_s is not None and now_s - r.idle_since_s >= linger_s
        ]
        for k in gone:
            del self.records[k]
        return gone

    def pairings(self) -> list[PairKey]:
        """Every pairing the web server watches (the union over subscribers, pins, lingering)."""
        return list(self.records)

    def current(self, key: PairKey) -> Update | None:
        rec = self.records.get(key)
        return None if rec is None else rec.current

    def publish(self, update: Update) -> bool:
        """Record ``update`` and queue it for its subscribers; False when stale or unwatched."""
        rec = self.records.get(update.key)
        if rec is None:
            return False
        cur = rec.current
        order = version_order(update.model_version)
        if cur is not None:
            cur_order = version_order(cur.model_version)
            if order < cur_order:
                return False
            if order == cur_order and cur.p_first_wins == update.p_first_wins:
                return False
        rec.current = update
        frame = update.sse()
        rec.ring.append(update)
        if order > version_order(self.version):
            self.version = update.model_version
        for sub in rec.subscribers:
            self.offer(sub, frame)
        return True

    def offer(self, sub: Subscriber, frame: bytes) -> None:
        """Queue one frame; a full queue marks the subscriber for closing."""
        if sub.overflowed:
            return
        try:
            sub.queue.put_nowait(frame)
        except asyncio.QueueFull:
            sub.overflowed = True
            self.dropped += 1

    def close_all(self) -> None:
        """End every subscriber's stream (shutdown): browsers reconnect elsewhere or later."""
        for sub in list(self.subscribers):
            sub.overflowed = True
            if not sub.queue.full():
                sub.queue.put_nowait(b"")

    def broadcast(self, frame: bytes) -> None:
        """A frame for every subscriber (feed status)."""
        for sub in list(self.subscribers):
            self.offer(sub, frame)

    def backlog(self, keys: Iterable[PairKey], since: str | None, history: bool) -> list[bytes]:
        """Frames a new connection starts with, oldest first.

        ``since`` (a Last-Event-ID): every kept update at or after it (the browser
        drops repeats by version). ``history``: every kept update. Otherwise the
        current value of each pairing.
        """
        picked: list[Update] = []
        for k in keys:
            rec = self.records.get(k)
            if rec is None:
                continue
            if since is not None:
                floor = version_order(since)
                picked += [u for u in rec.ring if version_order(u.model_version) >= floor]
            elif history:
                picked += list(rec.ring)
            elif rec.current is not None:
                picked.append(rec.current)
        picked.sort(key=lambda u: version_order(u.model_version))
        return [u.sse() for u in picked]
