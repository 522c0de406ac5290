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

Start-up: the checkpoint is loaded (queries get "not ready" meanwhile, see
:class:`LiveModel`); one that is unreadable or written for other model settings
stops the start (:class:`~streamrate.errors.CheckpointRefusedError`). With no
checkpoint the group is set to ``start_from`` (default: the first retained entry).

One consumer is active per space. Entries left pending by another consumer name
are taken over with ``XAUTOCLAIM`` once idle for ``claim_idle_ms``: at start
before anything new is read (stream order kept), later as they turn up (then
applied late, and counted).
"""

from __future__ import annotations

import logging
import math
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import redis

from streamrate.checkpoint import (
    Checkpoint,
    CheckpointStore,
    FileCheckpointStore,
    RedisCheckpointStore,
    decode_checkpoint,
    encode_checkpoint,
    load_parts,
    parts_of,
)
from streamrate.config import SpaceKeys, SpaceSettings
from streamrate.deadletters import dead_fields
from streamrate.dedupe import SeenIds
from streamrate.errors import CheckpointRefusedError, EventError, StreamrateError
from streamrate.events import MatchEvent, event_digest, parse_event, time_problem
from streamrate.livefeed import WatchRegistry, live_messages
from streamrate.metrics import CONSUMER_STATES, ServiceMetrics
from streamrate.models.base import Model, Prediction, Predictions, warm_up
from streamrate.models.registry import model_from_state

log = logging.getLogger("streamrate.consumer")
BEHIND_EVERY_S = 2.0
"""How often ``behind`` (the group's lag) is refreshed while the loop runs."""
PROGRESS_EVERY_S = 30.0
"""How often the consumer logs its progress (events applied, entries behind)."""
RUNTIME_SETTINGS = frozenset({"compiled", "active"})
"""Model settings that do not change what a checkpoint means (how kernels run;
which challenger answers): a checkpoint is not refused over them."""

Observer = Callable[[MatchEvent, Prediction, str], None]
"""Called after each applied event with (event, prediction made before learning, model kind);
for a challenger set also once per member with that member's prediction and label."""

Entry = tuple[bytes, dict[bytes, bytes] | None]


def id_key(stream_id: str | bytes) -> tuple[int, int]:
    """Stream id as a sortable pair: ``"17-3" -> (17, 3)``."""
    s = stream_id.decode() if isinstance(stream_id, bytes) else stream_id
    ms, _, seq = s.partition("-")
    return int(ms), int(seq or 0)


Status = Literal["loading", "ready", "stalled"]


@dataclass
class LiveModel:
    """The model the queries read; ``lock`` is held only around predict/learn.

    ``status`` (set by the consumer; queries are answered only when ``ready``):
    ``loading`` until the checkpoint is loaded (or the space is known to start
    empty), ``ready``, ``stalled`` while the consumer cannot apply events;
    ``detail`` says why in words. ``behind``: entries the consumer group has not
    read yet (``None`` when unknown), refreshed every few seconds.
    """

    model: Model
    version: str = "0-0"
    applied: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)
    changed: bool = False  # set (under lock) by a query that changes the model: a promotion
    status: Status = "ready"  # a model handed over as is; the consumer starts at "loading"
    detail: str = ""
    behind: int | None = None


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
        self.behind_at = -math.inf
        self.loaded = False  # a checkpoint (or the empty start) has been installed
        self.progress_at = clock()
        self.progress_applied = 0
        self.mark("loading", "the checkpoint is not loaded yet")

    # -- status -----------------------------------------------------------------
    def mark(self, status: Status, detail: str) -> None:
        """Set the status the queries see (and its gauge)."""
        self.live.status, self.live.detail = status, detail
        for st in CONSUMER_STATES:
            self.metrics.state.labels(space=self.space.name, state=st).set(int(st == status))

    def describe_store(self) -> str:
        """Where the checkpoint lives, in words (for messages)."""
        if isinstance(self.store, FileCheckpointStore):
            return f"checkpoint file {self.store.path}"
        if isinstance(self.store, RedisCheckpointStore):
            return f"checkpoint in Redis key {self.store.key}"
        return "checkpoint"

    def _refuse(self, what: str) -> CheckpointRefusedError:
        where = self.describe_store()
        if isinstance(self.store, RedisCheckpointStore):
            aside = f"rename the key aside (RENAME {self.store.key} {self.store.key}.old)"
        else:
            aside = "move the file aside"
        what = " ".join(what.split())  # one line, whatever the cause's message holds
        return CheckpointRefusedError(
            f"{where} {what}. Either point space {self.space.name!r} at another checkpoint "
            f"(checkpoint.dir, the prefix or the space name), or {aside} to start afresh "
            f"from the stream's first entry"
        )

    # -- start-up ---------------------------------------------------------------
    def load_checkpoint(self) -> bool:
        """Install the stored checkpoint (True) or an empty model when there is none
        (False); :class:`CheckpointRefusedError` when it is unreadable or was
        written for another model, other settings or in another format."""
        try:
            data = self.store.load()
        except StreamrateError as exc:
            raise self._refuse(f"cannot be read ({exc})") from exc
        if data is None:
            self._install(self.build_model(), "0-0", 0)
            load_parts(self.observers, {})
            self.seen = SeenIds(self.space.dedupe_keep_ids, self.space.dedupe_window_s)
            self.last_id = self.ckpt_id = "0-0"
            self.loaded = True
            return False
        try:
            ck = decode_checkpoint(data, self.space.dedupe_keep_ids, self.space.dedupe_window_s)
        except (StreamrateError, ValueError, KeyError, TypeError) as exc:
            raise self._refuse(f"is not a checkpoint this version reads ({exc})") from exc
        asked = self.build_model().to_state()
        if ck.state.kind != asked.kind:
            raise self._refuse(
                f"holds model {ck.state.kind!r}, the settings ask for {asked.kind!r}"
            )
        diff = _settings_diff(ck.state.params, asked.params)
        if diff:
            raise self._refuse(
                f"holds model {asked.kind!r} with other settings ({diff}) than the settings ask for"
            )
        if ck.state.version != asked.version:
            raise self._refuse(
                f"holds {asked.kind!r} state of format version {ck.state.version}, "
                f"this version reads {asked.version}"
            )
        try:
            model = model_from_state(ck.state)
        except (StreamrateError, ValueError, TypeError, KeyError, IndexError) as exc:
            raise self._refuse(f"holds {asked.kind!r} state that cannot be loaded ({exc})") from exc
        self._install(model, ck.last_id, ck.applied)
        try:
            load_parts(self.observers, ck.parts)  # quality windows roll back with the model
        except StreamrateError as exc:
            raise self._refuse(f"holds observer state that cannot be loaded ({exc})") from exc
        self.seen = ck.seen
        self.last_id = self.ckpt_id = ck.last_id
        self.counters.update({k: v for k, v in ck.counters.items() if k in self.counters})
        self.counters["applied"] = ck.applied
        self.loaded = True
        return True

    def _install(self, model: Model, version: str, applied: int) -> None:
        warm_up(model)  # compile kernels before the lock, not under it
        # The query side holds this same LiveModel object: update it in place.
        with self.live.lock:
            self.live.model, self.live.version, self.live.applied = model, version, applied

    def recover(self, stop: threading.Event | None = None) -> None:
        """Load the newest checkpoint, ack what it covers, claim orphans, re-read after it.

        With no checkpoint the group is first set to the configured start
        (``start_from``): by default the stream's first retained entry, so that
        history already in the stream is learned whatever position an older group
        had reached.
        """
        had_checkpoint = self.load_checkpoint()
        self.to_ack, self.since_ckpt = [], 0
        start = self.ckpt_id if had_checkpoint else self._start_id()
        self._place_group(start, move=not had_checkpoint)
        if not had_checkpoint and start != "0-0":
            # Entries up to the start are not for this space: make the start durable.
            self.last_id = self.live.version = start
            self.checkpoint()
        self._ack_covered()
        self._claim_orphans_at_start(stop)
        self.cursor = self.last_id
        self.last_ckpt_at = self.clock()
        self._gauges()
        behind = "an unknown number of" if self.live.behind is None else str(self.live.behind)
        if had_checkpoint:
            log.info(
                "space %s: resuming from the %s after stream id %s (%d events applied); "
                "%s entries to read",
                self.space.name,
                self.describe_store(),
                self.last_id,
                self.live.applied,
                behind,
            )
        else:
            log.info(
                "space %s: no checkpoint; starting %s (start_from = %r); %s entries to read",
                self.space.name,
                "at the stream's first entry" if start == "0-0" else f"after stream id {start}",
                self.space.start_from,
                behind,
            )
        self.progress_applied = self.live.applied

    def _place_group(self, start: str, move: bool) -> None:
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

    def _start_id(self) -> str:
        """The id after which a space with no checkpoint starts reading."""
        how = self.space.start_from
        if how == "first":
            return "0-0"
        if how == "now":
            top = self.r.xrevrange(self.keys.events, count=1)
            if not top:
                return "0-0"
            sid = top[0][0]
            return sid.decode() if isinstance(sid, bytes) else str(sid)
        ms, seq = id_key(how)  # that entry and later ones: start just before it
        if seq > 0:
            return f"{ms}-{seq - 1}"
        return f"{ms - 1}-18446744073709551615" if ms > 0 else "0-0"

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
        """Predict-then-learn one chunk under the model lock; live messages appended.

        Returns the served predictions and, by label, those of the models inside
        the model (challenger members, the raw model under a recalibration), for
        every event of the chunk on either path."""
        live = self.live
        events = [ev for _, ev in part]
        with live.lock:
            if not self.watch.touches(e for ev in events for e in ev.entities()):
                got = live.model.learn_scored(events)
                preds = list(
                    zip(got.served.p_win.tolist(), got.served.p_draw.tolist(), strict=True)
                )
                members = got.parts
            else:
                preds = []
                rows: dict[str, list[tuple[float, float]]] = {}
                for sid, ev in part:
                    one = live.model.learn_scored([ev])
                    preds.append((float(one.served.p_win[0]), float(one.served.p_draw[0])))
                    for label, mp in one.parts.items():
                        rows.setdefault(label, []).append((float(mp.p_win[0]), float(mp.p_draw[0])))
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
                members = {
                    label: Predictions.from_list([Prediction(*r) for r in got_rows])
                    for label, got_rows in rows.items()
                }
            live.applied += len(part)
            live.version = part[-1][0]
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
                        obs(ev, Prediction(float(mp.p_win[i]), float(mp.p_draw[i])), label)

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
                Checkpoint(
                    state,
                    self.last_id,
                    applied,
                    self.seen,
                    dict(self.counters),
                    parts=parts_of(self.observers),
                )
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
        self.behind_at = self.clock()
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
            # Redis cannot always count the lag (after deletions): then unknown.
            self.live.behind = None if lag is None else int(lag)
            if lag is not None:
                self.metrics.lag.labels(**self._lbl).set(int(lag))

    def tick(self) -> None:
        """Work on a timer, whether events arrive or not: refresh ``behind``, run the
        observers' timers (the quality gauges), log progress every 30 s."""
        now = self.clock()
        if now - self.behind_at >= BEHIND_EVERY_S:
            self._gauges()
        for obs in self.observers:
            timer = getattr(obs, "tick", None)
            if callable(timer):
                timer()
        if now - self.progress_at >= PROGRESS_EVERY_S:
            applied = self.live.applied
            if applied != self.progress_applied or self.live.behind:
                behind = "?" if self.live.behind is None else str(self.live.behind)
                log.info(
                    "space %s: %d events applied (+%d in %.0f s), %s entries behind, at %s",
                    self.space.name,
                    applied,
                    applied - self.progress_applied,
                    now - self.progress_at,
                    behind,
                    self.last_id,
                )
            self.progress_at, self.progress_applied = now, applied

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


def _plain(value: Any) -> Any:
    """Settings as JSON-like values for comparison: lists for tuples, floats for
    numbers, runtime-only keys left out."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items() if k not in RUNTIME_SETTINGS}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    return value


def _settings_diff(saved: dict[str, Any], asked: dict[str, Any], limit: int = 3) -> str:
    """The settings that differ, in words (empty when they agree)."""
    a, b = _plain(saved), _plain(asked)
    if a == b:
        return ""
    keys = sorted(set(a) | set(b))
    parts = [
        f"{k}: {_short(a.get(k, 'unset'))} in the checkpoint, {_short(b.get(k, 'unset'))} asked"
        for k in keys
        if a.get(k) != b.get(k)
    ]
    more = f"; and {len(parts) - limit} more" if len(parts) > limit else ""
    return "; ".join(parts[:limit]) + more


def _short(value: Any, width: int = 60) -> str:
    text = repr(value)
    return text if len(text) <= width else text[: width - 3] + "..."
