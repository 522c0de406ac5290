"""The consumer: read a batch, validate, apply in stream order, checkpoint, then ack.

One consumer owns one model space. Its loop, one batch at a time::

    XREADGROUP (COUNT, BLOCK) -> validate each entry (field ``event`` = JSON event)
      -> invalid: dead-letter stream (original fields + source id + reason)
      -> duplicate match id: skipped (retry record inside the checkpoint)
      -> valid: predict then learn, in stream order, under the model lock
      -> observers(event, prediction, model kind); live feed for watched entities
    every N events or T seconds: checkpoint (model + last id + retry record) -> XACK

Exactly-once rests on three facts: (1) an entry is acknowledged only after a
durable checkpoint covers it; (2) the checkpoint holds the model, the last
handled stream id and the retry record as one atomic value; (3) after a start,
a reconnect or an error the consumer re-reads its own pending entries after its
last handled id (``XREADGROUP`` with an explicit id) before reading new ones
(``>``), so entries delivered but never seen (a lost reply) are not skipped.
Dead letters are written with the source entry's id as their own id, so a
replay does not write them twice.

One consumer is active per space. Entries left pending by another consumer name
are taken over with ``XAUTOCLAIM`` once idle for ``claim_idle_ms``: at start
before anything new is read (stream order kept), later as they turn up (then
applied late, and counted).
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import redis

from streamrate.checkpoint import Checkpoint, CheckpointStore, decode_checkpoint, encode_checkpoint
from streamrate.config import SpaceKeys, SpaceSettings
from streamrate.deadletters import dead_fields
from streamrate.dedupe import SeenIds
from streamrate.errors import ConfigError, EventError
from streamrate.events import MatchEvent, event_digest, parse_event, time_problem
from streamrate.livefeed import WatchRegistry, live_messages
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Model, Prediction, Predictions, warm_up
from streamrate.models.registry import model_from_state

log = logging.getLogger("streamrate.consumer")

Observer = Callable[[MatchEvent, Prediction, str], None]
"""Called after each applied event with (event, prediction made before learning, model kind);
for a challenger set also once per member with that member's prediction and label."""

Entry = tuple[bytes, dict[bytes, bytes] | None]


def id_key(stream_id: str | bytes) -> tuple[int, int]:
    """Stream id as a sortable pair: ``"17-3" -> (17, 3)``."""
    s = stream_id.decode() if isinstance(stream_id, bytes) else stream_id
    ms, _, seq = s.partition("-")
    return int(ms), int(seq or 0)


@dataclass
class LiveModel:
    """The model the queries read; ``lock`` is held only around predict/learn."""

    model: Model
    version: str = "0-0"
    applied: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)
    changed: bool = False  # set (under lock) by a query that changes the model: a promotion


@dataclass
class _Sorted:
    valid: list[tuple[str, MatchEvent]] = field(default_factory=list)
    dead: list[tuple[str, dict[bytes, bytes], str]] = field(default_factory=list)
    dupes: list[str] = field(default_factory=list)


class Consumer:
    """Consumer-group member for one space (Redis client, store, clock injected)."""

    def __init__(
        self,
        client: redis.Redis,
        space: SpaceSettings,
        keys: SpaceKeys,
        store: CheckpointStore,
        metrics: ServiceMetrics,
        build_model: Callable[[], Model],
        watch: WatchRegistry | None = None,
        observers: Sequence[Observer] = (),
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.r = client
        self.space = space
        self.keys = keys
        self.store = store
        self.metrics = metrics
        self.build_model = build_model
        self.watch = watch if watch is not None else WatchRegistry(0, 0)
        self.observers: list[Observer] = list(observers)
        self.clock = clock
        self.live = LiveModel(build_model())
        self.seen = SeenIds(space.dedupe_keep_ids, space.dedupe_window_s)
        self.last_id = "0-0"
        self.ckpt_id = "0-0"
        self.to_ack: list[bytes] = []
        self.since_ckpt = 0
        self.last_ckpt_at = clock()
        self.last_claim_at = clock()
        self.cursor = "0-0"  # explicit id = re-read own pending after it; ">" = new entries
        self.counters = {"applied": 0, "dead_lettered": 0, "duplicate": 0}
        self._lbl = {"space": space.name}
        # After a failure in the loop: up to this stream id, events are applied one
        # at a time, so that one the model cannot learn from is found and set aside
        # (``poison``: stream id -> reason; such entries go to the dead letters).
        self.careful_until = "0-0"
        self.poison: dict[str, str] = {}
        self._batch_top = "0-0"
        self._digests: dict[str, bytes] = {}  # stream id -> content digest, valid events

    # -- start-up ---------------------------------------------------------------
    def load_checkpoint(self) -> None:
        data = self.store.load()
        if data is None:
            self._install(self.build_model(), "0-0", 0)
            self.seen = SeenIds(self.space.dedupe_keep_ids, self.space.dedupe_window_s)
            self.last_id = self.ckpt_id = "0-0"
            return
        ck = decode_checkpoint(data, self.space.dedupe_keep_ids, self.space.dedupe_window_s)
        if ck.state.kind != self.space.model:
            raise ConfigError(
                f"space {self.space.name!r}: checkpoint holds model {ck.state.kind!r}, "
                f"settings ask for {self.space.model!r}"
            )
        self._install(model_from_state(ck.state), ck.last_id, ck.applied)
        self.seen = ck.seen
        self.last_id = self.ckpt_id = ck.last_id
        self.counters.update({k: v for k, v in ck.counters.items() if k in self.counters})
        self.counters["applied"] = ck.applied

    def _install(self, model: Model, version: str, applied: int) -> None:
        warm_up(model)  # compile kernels before the lock, not under it
        # The query side holds this same LiveModel object: update it in place.
        with self.live.lock:
            self.live.model, self.live.version, self.live.applied = model, version, applied

    def recover(self, stop: threading.Event | None = None) -> None:
        """Load the newest checkpoint, ack what it covers, claim orphans, re-read after it."""
        self.load_checkpoint()
        self.to_ack, self.since_ckpt = [], 0
        try:
            self.r.xgroup_create(self.keys.events, self.space.group, id=self.ckpt_id, mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise
        self._ack_covered()
        self._claim_orphans_at_start(stop)
        self.cursor = self.last_id
        self.last_ckpt_at = self.clock()
        log.info(
            "space %s: resuming after stream id %s (%d events applied)",
            self.space.name,
            self.last_id,
            self.live.applied,
        )

    def resync(self) -> None:
        """After a reconnect: re-read own pending entries after the last handled id."""
        self.cursor = self.last_id

    def _ack_covered(self) -> None:
        while True:
            rows = self.r.xpending_range(
                self.keys.events, self.space.group, min="-", max=self.ckpt_id, count=1000
            )
            if not rows:
                return
            self.r.xack(self.keys.events, self.space.group, *[row["message_id"] for row in rows])

    def _others_pending(self) -> int:
        info = self.r.xpending(self.keys.events, self.space.group)
        me = self.space.consumer
        total = 0
        for c in info.get("consumers") or []:
            name = c["name"].decode() if isinstance(c["name"], bytes) else c["name"]
            if name != me:
                total += int(c["pending"])
        return total

    def _claim(self) -> list[Entry]:
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
            start = res[0].decode() if isinstance(res[0], bytes) else str(res[0])
            out.extend(res[1])
            if start == "0-0":
                return out

    def _claim_orphans_at_start(self, stop: threading.Event | None) -> None:
        warned = False
        while self._others_pending():
            claimed = self._claim()
            if claimed:
                self.metrics.claimed.labels(**self._lbl).inc(len(claimed))
                log.info("space %s: took over %d orphaned entries", self.space.name, len(claimed))
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

    # -- the loop ---------------------------------------------------------------
    def step(self) -> int:
        """Read and handle one batch; checkpoint when due. Returns entries handled."""
        if self.cursor != ">":
            resp = self.r.xreadgroup(
                self.space.group,
                self.space.consumer,
                {self.keys.events: self.cursor},
                count=self.space.batch_count,
            )
            entries = _entries(resp)
            if not entries:
                self.cursor = ">"
            else:
                self.cursor = entries[-1][0].decode()
        else:
            resp = self.r.xreadgroup(
                self.space.group,
                self.space.consumer,
                {self.keys.events: ">"},
                count=self.space.batch_count,
                block=self.space.block_ms,
            )
            entries = _entries(resp)
        if entries:
            self.handle(entries)
        self.maybe_checkpoint()
        self.maybe_claim()
        return len(entries)

    def handle(self, entries: list[Entry], late: bool = False) -> None:
        """Validate and apply a batch (``late``: claimed entries, order not enforced)."""
        t0 = time.perf_counter()
        last = id_key(self.last_id)
        fresh: list[Entry]
        if late or (entries and id_key(entries[0][0]) > last):
            # A read returns entries in stream order, so when the first is new all
            # are: no per-entry id parsing on the hot path.
            fresh = entries
        else:
            fresh = []
            for sid, fields in entries:
                if id_key(sid) <= last:
                    self.to_ack.append(sid)  # re-delivered after a group reset; covered already
                    continue
                fresh.append((sid, fields))
        if not fresh:
            return
        top_sid = max((sid for sid, _ in fresh), key=id_key) if late else fresh[-1][0]
        self._batch_top = top_sid.decode() if isinstance(top_sid, bytes) else top_sid
        sorted_ = self._sort(fresh)
        self._dead_letter(sorted_.dead)
        self._apply(sorted_.valid)
        ids = [sid for sid, _ in fresh]
        top = max((id_key(s) for s in ids), default=last) if late else max(id_key(ids[-1]), last)
        if top > last:
            self.last_id = f"{top[0]}-{top[1]}"
        self.live.version = self.last_id
        self.to_ack.extend(ids)
        self.since_ckpt += len(ids)
        for outcome, n in (
            ("applied", len(sorted_.valid)),
            ("dead_lettered", len(sorted_.dead)),
            ("duplicate", len(sorted_.dupes)),
        ):
            self.counters[outcome] += n
            if n:
                self.metrics.events.labels(space=self.space.name, outcome=outcome).inc(n)
        self.metrics.batch_seconds.labels(**self._lbl).observe(time.perf_counter() - t0)

    def _sort(self, entries: list[Entry]) -> _Sorted:
        """Valid events, dead letters (with reasons) and retries, in stream order.

        Time is the stream's: an event finishing more than ``future_limit_s`` after
        its entry was received (the stream id's clock), or before 2000, is a dead
        letter. A match id already applied (or earlier in this batch) is a retry
        when its content digest is the same, and a dead letter (conflict) when not.
        """
        out = _Sorted()
        batch: dict[str, bytes] = {}
        self._digests = {}
        fname = self.space.event_field.encode()
        limit_s = self.space.future_limit_s
        for sid_b, fields in entries:
            sid = sid_b.decode()
            if fields is None:
                out.dead.append((sid, {}, "entry was deleted from the stream before it was read"))
                continue
            if sid in self.poison:
                out.dead.append((sid, fields, self.poison[sid]))
                continue
            raw = fields.get(fname)
            if raw is None:
                reason = f"entry has no {self.space.event_field!r} field"
                out.dead.append((sid, fields, reason))
                continue
            try:
                ev = parse_event(raw)
            except EventError as exc:
                out.dead.append((sid, fields, str(exc)))
                continue
            problem = time_problem(ev, id_key(sid)[0], limit_s)
            if problem is not None:
                out.dead.append((sid, fields, problem))
                continue
            digest = event_digest(ev)
            mid = ev.match_id
            if mid in batch or mid in self.seen:
                known = batch[mid] if mid in batch else self.seen.digest(mid)
                if known is None or known == digest:  # None: content not recorded (old record)
                    out.dupes.append(sid)
                else:
                    out.dead.append((sid, fields, _conflict(mid)))
                continue
            batch[mid] = digest
            self._digests[sid] = digest
            out.valid.append((sid, ev))
        return out

    def _remember(self, part: list[tuple[str, MatchEvent]]) -> None:
        """Add applied events to the retry record: stream-id time and content digest."""
        for sid, ev in part:
            digest = self._digests.pop(sid, None)
            self.seen.add(ev.match_id, id_key(sid)[0] / 1000, digest or event_digest(ev))

    def _dead_letter(self, dead: list[tuple[str, dict[bytes, bytes], str]]) -> None:
        if not dead:
            return
        cap = self.space.dead_max_payload_bytes
        keep = self.space.dead_max_entries  # XADD MAXLEN ~ keep
        pipe = self.r.pipeline(transaction=False)
        for sid, fields, reason in dead:
            letter = dead_fields(fields, sid, reason, cap)
            pipe.xadd(self.keys.dead, letter, id=sid, maxlen=keep, approximate=True)  # type: ignore[arg-type]
        results = pipe.execute(raise_on_error=False)
        for (sid, fields, reason), res in zip(dead, results, strict=True):
            if isinstance(res, redis.ResponseError):
                # Id not above the newest dead letter: written before (replay) or out of order.
                if not self.r.xrange(self.keys.dead, min=sid, max=sid):
                    letter = dead_fields(fields, sid, reason, cap)
                    self.r.xadd(self.keys.dead, letter, maxlen=keep, approximate=True)  # type: ignore[arg-type]
            elif isinstance(res, Exception):
                raise res

    def _learn(
        self, part: list[tuple[str, MatchEvent]], messages: list[tuple[str, str]]
    ) -> tuple[list[tuple[float, float]], dict[str, Predictions]]:
        """Predict-then-learn one chunk under the model lock; live messages appended."""
        live = self.live
        events = [ev for _, ev in part]
        with live.lock:
            if not self.watch.touches(e for ev in events for e in ev.entities()):
                got = live.model.learn_many(events)
                preds = list(zip(got.p_win.tolist(), got.p_draw.tolist(), strict=True))
            else:
                preds = []
                for sid, ev in part:
                    one = live.model.learn(ev)
                    preds.append((one.p_win, one.p_draw))
                    hit = self.watch.affected(ev.entities())
                    if hit:
                        messages += live_messages(
                            live.model,
                            hit,
                            sid,
                            ev.match_id,
                            self.keys.live_of,
                            self.watch.next_seq,
                        )
            live.applied += len(part)
            live.version = part[-1][0]
            # Models inside the model (challenger members, the raw model under a
            # recalibration) are scored too, each under its own label.
            members = live.model.component_predictions(len(part)) if self.observers else {}
        return preds, members

    def failed(self) -> None:
        """The loop failed while handling a batch. Until past that batch, apply one
        event at a time: if the model itself cannot learn from an event, that event
        is found, set aside as a dead letter, and the stream goes on."""
        if id_key(self._batch_top) > id_key(self.careful_until):
            self.careful_until = self._batch_top

    @property
    def careful(self) -> bool:
        return id_key(self.last_id) < id_key(self.careful_until)

    def _apply(self, valid: list[tuple[str, MatchEvent]]) -> None:
        kind = self.live.model.kind
        chunk = 1 if self.careful else self.space.lock_chunk
        for start in range(0, len(valid), chunk):
            part = valid[start : start + chunk]
            events = [ev for _, ev in part]
            messages: list[tuple[str, str]] = []
            try:
                preds, members = self._learn(part, messages)
            except Exception as exc:
                if len(part) == 1:  # careful mode: this is the event the model rejects
                    self.poison[part[0][0]] = (
                        f"the model could not learn from this event: {type(exc).__name__}: {exc}"
                    )[:500]
                raise
            self._remember(part)
            if messages:
                pipe = self.r.pipeline(transaction=False)
                for channel, m in messages:
                    pipe.publish(channel, m)
                pipe.execute()
                self.metrics.live_published.labels(**self._lbl).inc(len(messages))
            for i, (ev, p) in enumerate(zip(events, preds, strict=True)):
                for obs in self.observers:
                    obs(ev, Prediction(p[0], p[1]), kind)
                    for label, mp in members.items():
                        obs(ev, mp[i], label)

    # -- checkpoint and acknowledge -----------------------------------------------
    def maybe_checkpoint(self) -> None:
        due_n = self.since_ckpt >= self.space.checkpoint_every_events
        due_t = self.clock() - self.last_ckpt_at >= self.space.checkpoint_every_s
        if due_n or (due_t and (self.since_ckpt or self.to_ack or self.live.changed)):
            self.checkpoint()

    def checkpoint(self) -> None:
        """Store model + last id + retry record durably, then ack what it covers."""
        t0 = time.perf_counter()
        if self.since_ckpt or self.ckpt_id != self.last_id or self.live.changed:
            with self.live.lock:
                state = self.live.model.to_state()
                self.live.changed = False
                applied = self.live.applied
            blob = encode_checkpoint(
                Checkpoint(state, self.last_id, applied, self.seen, dict(self.counters))
            )
            self.store.save(blob)
            self.ckpt_id = self.last_id
            self.since_ckpt = 0
            self.metrics.checkpoint_seconds.labels(**self._lbl).observe(time.perf_counter() - t0)
            self.metrics.checkpoint_time.labels(**self._lbl).set(time.time())
        self.last_ckpt_at = self.clock()
        while self.to_ack:
            part = self.to_ack[:5000]
            self.r.xack(self.keys.events, self.space.group, *part)
            del self.to_ack[: len(part)]
        self._trim()
        self._gauges()

    def _trim(self) -> None:
        if self.space.retention_s is None or self.ckpt_id == "0-0":
            return
        horizon_ms = int(time.time() * 1000 - self.space.retention_s * 1000)
        ck = id_key(self.ckpt_id)
        min_id = ck if ck[0] < horizon_ms else (horizon_ms, 0)  # never past the checkpoint
        self.r.xtrim(self.keys.events, minid=f"{min_id[0]}-{min_id[1]}", approximate=True)

    def _gauges(self) -> None:
        try:
            groups = self.r.xinfo_groups(self.keys.events)
        except redis.ResponseError:
            return
        for g in groups:
            name = g.get("name")
            if (name.decode() if isinstance(name, bytes) else name) != self.space.group:
                continue
            self.metrics.pending.labels(**self._lbl).set(int(g.get("pending") or 0))
            lag = g.get("lag")
            if lag is not None:
                self.metrics.lag.labels(**self._lbl).set(int(lag))

    def maybe_claim(self) -> None:
        if self.clock() - self.last_claim_at < max(self.space.claim_idle_ms / 2000, 1.0):
            return
        self.last_claim_at = self.clock()
        if not self._others_pending():
            return
        mine = set(self.to_ack)  # applied by us, awaiting the next checkpoint
        claimed = [e for e in self._claim() if e[0] not in mine]
        if claimed:
            log.warning("space %s: applying %d late entries", self.space.name, len(claimed))
            self.metrics.claimed.labels(**self._lbl).inc(len(claimed))
            self.handle(sorted(claimed, key=lambda e: id_key(e[0])), late=True)

    def close(self) -> None:
        """Final checkpoint and ack (call after the batch in hand is done)."""
        self.checkpoint()


def _entries(resp: Any) -> list[Entry]:
    if not resp:
        return []
    if isinstance(resp, dict):  # RESP3 shape
        out: list[Entry] = []
        for rows in resp.values():
            out.extend(rows[0] if rows and isinstance(rows[0], list) else rows)
        return out
    return [(sid, fields) for sid, fields in resp[0][1]]


def _conflict(match_id: str) -> str:
    return (
        f"match_id: {match_id!r} was applied before with other content "
        "(a reused id, not a retry; the first event stands)"
    )
