"""Reading the event stream as a consumer-group member, and acknowledging.

The one module that speaks to the event stream (``{sr:space}:events``) and its
group: where the group starts, the read cursor, claiming entries left pending
by another consumer name (``XAUTOCLAIM``), acknowledging, trimming, and the
group's pending count and lag. It decides nothing about the entries it hands
over; :mod:`streamrate.stream.decide` does.

The cursor: after a start, a reconnect or an error it is the last handled id,
so the consumer re-reads its own pending entries after it (``XREADGROUP`` with
an explicit id) before reading new ones (``>``): entries delivered but never
seen (a lost reply) are not skipped.

>>> id_key("17-3")
(17, 3)
>>> entries_of([[b"events", [(b"1-0", {b"event": b"{}"})]]])
[(b'1-0', {b'event': b'{}'})]
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from typing import Any

import redis

from streamrate.config import SpaceKeys, SpaceSettings
from streamrate.errors import ReadCutError

log = logging.getLogger("streamrate.consumer")

Entry = tuple[bytes, dict[bytes, bytes] | None]
"""A stream entry: its id and its fields (None: deleted before it was read)."""

ACK_CHUNK = 5000
"""Ids per XACK call."""


def id_key(stream_id: str | bytes) -> tuple[int, int]:
    """Stream id as a sortable pair: ``"17-3" -> (17, 3)``."""
    s = stream_id.decode() if isinstance(stream_id, bytes) else stream_id
    ms, _, seq = s.partition("-")
    return int(ms), int(seq or 0)


def entries_of(resp: Any) -> list[Entry]:
    """The entries of an ``XREADGROUP`` reply (RESP2 or RESP3 shape)."""
    if not resp:
        return []
    if isinstance(resp, dict):  # RESP3 shape
        out: list[Entry] = []
        for rows in resp.values():
            out.extend(rows[0] if rows and isinstance(rows[0], list) else rows)
        return out
    return [(sid, fields) for sid, fields in resp[0][1]]


def rows_of(resp: Any) -> list[tuple[bytes, dict[bytes, bytes]]]:
    """The entries of a reply that cannot hold deleted entries (``XREAD``, or
    ``XREADGROUP`` with ``>``): each with its fields."""
    return [(sid, fields) for sid, fields in entries_of(resp) if fields is not None]


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def read_cut(exc: BaseException, where: str) -> BaseException:
    """The error to raise for a failed blocked stream read: :class:`ReadCutError`
    when the server cut it off because its key left the node (a cluster slot
    moved: ``UNBLOCKED the stream key no longer exists``), else ``exc`` itself.

    >>> type(read_cut(redis.ResponseError("UNBLOCKED the stream key no longer exists"), "k"))
    <class 'streamrate.errors.ReadCutError'>
    >>> type(read_cut(redis.ResponseError("NOGROUP No such key"), "k"))
    <class 'redis.exceptions.ResponseError'>
    """
    if isinstance(exc, redis.ResponseError) and str(exc).startswith("UNBLOCKED"):
        return ReadCutError(f"the blocked read of {where} was cut off ({exc}; a slot moved?)")
    return exc


class StreamReader:
    """The event stream and this consumer's group, for one space (client injected)."""

    def __init__(self, client: redis.Redis, space: SpaceSettings, keys: SpaceKeys) -> None:
        self.r, self.space, self.keys = client, space, keys
        self.cursor = "0-0"  # explicit id = re-read own pending after it; ">" = new entries

    # -- reading ----------------------------------------------------------------
    def read(self) -> list[Entry]:
        """One batch: own pending entries after the cursor, else new ones (blocking)."""
        sp = self.space
        if self.cursor != ">":
            resp = self.r.xreadgroup(
                sp.group, sp.consumer, {self.keys.events: self.cursor}, count=sp.batch_count
            )
            entries = entries_of(resp)
            self.cursor = entries[-1][0].decode() if entries else ">"
            return entries
        try:
            resp = self.r.xreadgroup(
                sp.group,
                sp.consumer,
                {self.keys.events: ">"},
                count=sp.batch_count,
                block=sp.block_ms,
            )
        except redis.ResponseError as exc:
            raise read_cut(exc, self.keys.events) from exc  # ReadCutError: read again
        return entries_of(resp)

    def resync(self, last_id: str) -> None:
        """Re-read own pending entries after ``last_id`` before any new one."""
        self.cursor = last_id

    # -- the group --------------------------------------------------------------
    def place_group(self, start: str, move: bool) -> None:
        """Create the group at ``start``; when it exists and ``move``, set it there."""
        # From the first entry the group has read none: telling Redis so (7.0+)
        # lets it count the lag; older servers refuse the option, then go without.
        read = 0 if start == "0-0" else None
        ev, group = self.keys.events, self.space.group
        try:
            try:
                self.r.xgroup_create(ev, group, id=start, mkstream=True, entries_read=read)
            except redis.ResponseError as exc:
                if read is None or "BUSYGROUP" in str(exc):
                    raise
                self.r.xgroup_create(ev, group, id=start, mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise
            if move:
                try:
                    self.r.xgroup_setid(ev, group, start, entries_read=read)
                except redis.ResponseError:
                    if read is None:
                        raise
                    self.r.xgroup_setid(ev, group, start)

    def start_id(self) -> str:
        """The id after which a space with no checkpoint starts reading (``start_from``)."""
        how = self.space.start_from
        if how == "first":
            return "0-0"
        if how == "now":
            top = self.r.xrevrange(self.keys.events, count=1)
            return _text(top[0][0]) if top else "0-0"
        ms, seq = id_key(how)  # that entry and later ones: start just before it
        if seq > 0:
            return f"{ms}-{seq - 1}"
        return f"{ms - 1}-18446744073709551615" if ms > 0 else "0-0"

    def group_state(self) -> tuple[int, int | None] | None:
        """The group's pending count and lag (None: Redis cannot count it), or None
        when there is no such group yet."""
        try:
            groups = self.r.xinfo_groups(self.keys.events)
        except redis.ResponseError:
            return None
        for g in groups:
            if _text(g.get("name")) != self.space.group:
                continue
            lag = g.get("lag")
            return int(g.get("pending") or 0), None if lag is None else int(lag)
        return None

    # -- acknowledging and trimming ---------------------------------------------
    def ack(self, ids: list[bytes]) -> None:
        """Acknowledge ``ids`` (call only once a durable checkpoint covers them)."""
        for start in range(0, len(ids), ACK_CHUNK):
            self.r.xack(self.keys.events, self.space.group, *ids[start : start + ACK_CHUNK])

    def ack_covered(self, upto: str) -> None:
        """Acknowledge every pending entry up to ``upto`` (a checkpoint covers them)."""
        while True:
            rows = self.r.xpending_range(
                self.keys.events, self.space.group, min="-", max=upto, count=1000
            )
            if not rows:
                return
            self.r.xack(self.keys.events, self.space.group, *[row["message_id"] for row in rows])

    def trim(self, min_id: str) -> None:
        """Drop entries before ``min_id`` (approximately)."""
        self.r.xtrim(self.keys.events, minid=min_id, approximate=True)

    # -- claims -----------------------------------------------------------------
    def others_pending(self) -> int:
        """Entries pending with other consumer names of the group."""
        info = self.r.xpending(self.keys.events, self.space.group)
        me = self.space.consumer
        return sum(int(c["pending"]) for c in info.get("consumers") or [] if _text(c["name"]) != me)

    def claim(self) -> list[Entry]:
        """Take over entries idle for ``claim_idle_ms`` with other consumer names."""
        # Not JUSTID: redis-py drops the cursor from JUSTID replies.
        out: list[Entry] = []
        start = "0-0"
        while True:
            res = self.r.xautoclaim(
                self.keys.events,
                self.space.group,
                self.space.consumer,
                min_idle_time=self.space.claim_idle_ms,
                start_id=start,
                count=500,
            )
            start = _text(res[0])
            out.extend(res[1])
            if start == "0-0":
                return out

    def own_strays(self, min_idle_ms: int, count: int = 500) -> list[Entry]:
        """Entries pending under this consumer name, idle at least ``min_idle_ms``
        (the caller leaves out those it handled): delivered to an earlier holder
        of the name, e.g. a writer that read once more after losing its lease."""
        rows = self.r.xpending_range(
            self.keys.events,
            self.space.group,
            min="-",
            max="+",
            count=count,
            consumername=self.space.consumer,
            idle=min_idle_ms,
        )
        out: list[Entry] = []
        for row in rows:
            raw = row["message_id"]
            sid = raw if isinstance(raw, bytes) else str(raw).encode()
            got: Any = self.r.xrange(self.keys.events, min=sid, max=sid)
            out.append((sid, got[0][1] if got else None))  # None: deleted meanwhile
        return out

    def claim_orphans(
        self, stop: threading.Event | None, counted: Callable[[int], None] | None = None
    ) -> None:
        """At start: wait until no other consumer name holds pending entries, taking
        them over as they turn idle (``counted(n)`` is called per take-over).
        They are then re-read with this consumer's own pending entries, in stream order."""
        warned = False
        while self.others_pending():
            got = self.claim()
            if got:
                if counted is not None:
                    counted(len(got))
                log.info("space %s: took over %d orphaned entries", self.space.name, len(got))
                continue
            if not warned:
                log.warning(
                    "space %s: another consumer holds pending entries; waiting up to %d ms idle",
                    self.space.name,
                    self.space.claim_idle_ms,
                )
                warned = True
            if stop is not None and stop.wait(0.2):
                return
