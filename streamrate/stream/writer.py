"""The writer of a space: the steps of the data path, wired once.

One writer owns one model space. Its loop, one batch at a time::

    reader.read()            XREADGROUP (own pending after the cursor, then ">")
      -> split_fresh          entries already covered: only acknowledged
      -> decider.decide()     valid / dead letters (with reasons) / retries skipped
      -> dead.write()         the dead-letter stream
      -> applier.learn()      predict then learn, in stream order, under the model lock
         log.chunk()          the applied log, for the replicas (one entry per batch,
                              written with the next read in one round trip, or
                              before a checkpoint)
         applier.notify()     observers (quality windows, drift)
    checkpoints.due()        every N entries or T seconds:
      -> checkpoints.save()   model + last id + retry record, durably; then XACK, trim
                              (background: the state is copied under the lock, then
                              encoded and stored in a thread; XACK once it is stored)

Writer and replica differ in one place, the wiring below: both apply events
through :class:`~streamrate.stream.apply.Applier`; only the writer reads the
event stream, decides, dead-letters, writes the applied log, checkpoints and
acknowledges. A replica (:class:`streamrate.replica.follower.Follower`) reads
the applied log and applies what it says, nothing else.

================  ===========================  =============================
step              writer (this module)         replica
================  ===========================  =============================
read              ``reader.StreamReader``      the applied log
decide            ``decide.Decider``           (the writer decided)
apply             ``apply.Applier``            ``apply.Applier``
dead letters      ``decide.DeadLetters``       never
applied log       ``AppliedLogWriter``         reads it
checkpoint, ack   ``checkpoints.Checkpointer`` loads only
================  ===========================  =============================

Exactly-once rests on three facts: (1) an entry is acknowledged only after a
durable checkpoint covers it; (2) the checkpoint holds the model, the last
handled stream id and the retry record as one atomic value; (3) after a start,
a reconnect or an error the writer re-reads its own pending entries after its
last handled id before reading new ones, so entries delivered but never seen
(a lost reply) are not skipped. Dead letters are written with the source
entry's id as their own id, so a replay does not write them twice.

Start-up: the checkpoint is loaded (queries get "not ready" meanwhile, see
:class:`LiveModel`); one that is unreadable or written for other model settings
stops the start (:class:`~streamrate.errors.CheckpointRefusedError`). With no
checkpoint the group is set to ``start_from`` (default: the first retained entry).

One writer is active per space. Entries left pending by another consumer name
are taken over with ``XAUTOCLAIM`` once idle for ``claim_idle_ms``: at start
before anything new is read (stream order kept), later as they turn up (then
applied late, and counted).

The model version (``live.version``) and the last handled id are written in one
place, :meth:`Writer._at`.
"""

from __future__ import annotations

import bisect
import logging
import math
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import redis

from streamrate.checkpoint import CheckpointStore, load_parts
from streamrate.columns import sids_of
from streamrate.config import SpaceKeys, SpaceSettings
from streamrate.dedupe import SeenIds
from streamrate.errors import LeaseLostError, StreamrateError
from streamrate.metrics import CONSUMER_STATES, ServiceMetrics
from streamrate.models.base import Model, warm_up
from streamrate.scan import warm_up as warm_scan
from streamrate.serve.livefeed import WatchRegistry
from streamrate.stream.applied_log import AppliedLogWriter, Tally
from streamrate.stream.apply import Applier, LiveModel, Observer, Status, redis_publisher
from streamrate.stream.checkpoints import Checkpointer, describe_store, load_checked, refusal
from streamrate.stream.decide import DeadLetters, Decider, Decision, split_fresh
from streamrate.stream.lease import Lease
from streamrate.stream.reader import Entry, StreamReader, id_key

log = logging.getLogger("streamrate.consumer")
BEHIND_EVERY_S = 2.0
"""How often ``behind`` (the group's lag) is refreshed while the loop runs."""
PROGRESS_EVERY_S = 30.0
"""How often the writer logs its progress (events applied, entries behind)."""


@dataclass
class Followed:
    """What a replica followed, for :meth:`Writer.adopt`: its model at ``applied``
    events, the last of them at stream id ``version``, the applied-log entry
    ``position`` it reached, the retry record and counters at that event."""

    model: Model
    applied: int
    version: str
    position: str
    seen: SeenIds
    counters: dict[str, int]


class Writer:
    """The consumer-group member that learns for one space (Redis client, store,
    clock injected)."""

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
        log_min_entries: int = 1000,
        background: bool = False,
        lease: Lease | None = None,
    ) -> None:
        self.space, self.keys, self.store, self.metrics = space, keys, store, metrics
        self.lease = lease  # fences every write (give the same lease to the store)
        self.build_model = build_model
        self.watch = watch if watch is not None else WatchRegistry(0, 0)
        self.observers: list[Observer] = list(observers)
        self.clock = clock
        self.live = LiveModel(build_model())
        # The wiring: what makes this a writer and not a replica.
        self.reader = StreamReader(client, space, keys)
        self.decider = Decider(
            SeenIds(space.dedupe_keep_ids, space.dedupe_window_s),
            space.event_field,
            space.future_limit_s,
        )
        self.dead = DeadLetters(
            client, keys.dead, space.dead_max_payload_bytes, space.dead_max_entries
        )
        self.applier = Applier(
            self.live, self.watch, keys.live_of, redis_publisher(client), self.observers
        )
        self.log = AppliedLogWriter(client, keys.applied, keys.epoch, lease)  # for the replicas
        self.checkpoints = Checkpointer(
            store, self.reader, self.log, self.live, self.observers, metrics, space, clock,
            log_min_entries, background, lease,
        )  # fmt: skip
        self.last_id = "0-0"  # the last handled stream id (see _at)
        self.counters = {"applied": 0, "dead_lettered": 0, "duplicate": 0}
        self._lbl = {"space": space.name}
        self._top_in_hand = ""  # highest id of the batch being handled (careful mode)
        self.last_claim_at = clock()
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
        return describe_store(self.store)

    def _at(self, version: str) -> None:
        """The one place the last handled id and the model version are written."""
        self.last_id = self.live.version = version

    # -- start-up ---------------------------------------------------------------
    def load_checkpoint(self) -> bool:
        """Install the stored checkpoint (True) or an empty model when there is none
        (False); :class:`CheckpointRefusedError` when it is unreadable or was
        written for another model, other settings or in another format."""
        self.checkpoints.settle()  # a save in flight lands (or not) before the load
        got = load_checked(self.store, self.space, self.build_model)
        if got is None:
            self._install(self.build_model(), "0-0", 0)
            load_parts(self.observers, {})
            self.decider.seen = SeenIds(self.space.dedupe_keep_ids, self.space.dedupe_window_s)
            self.checkpoints.restart("0-0", "0-0")
            self.loaded = True
            return False
        ck, model = got
        self._install(model, ck.last_id, ck.applied)
        try:
            load_parts(self.observers, ck.parts)  # quality windows roll back with the model
        except StreamrateError as exc:
            raise refusal(
                self.store, self.space.name, f"holds observer state that cannot be loaded ({exc})"
            ) from exc
        self.decider.seen = ck.seen
        self.checkpoints.restart(ck.last_id, ck.log_id)
        self.counters.update({k: v for k, v in ck.counters.items() if k in self.counters})
        self.counters["applied"] = ck.applied
        self.loaded = True
        return True

    def _install(self, model: Model, version: str, applied: int) -> None:
        warm_up(model)  # compile kernels before the lock, not under it
        warm_scan()
        # The query side holds this same LiveModel object: update it in place.
        with self.live.lock:
            self.live.model, self.live.applied = model, applied
            self._at(version)

    def recover(self, stop: threading.Event | None = None) -> None:
        """Load the newest checkpoint, ack what it covers, claim orphans, re-read after it.

        With no checkpoint the group is first set to the configured start
        (``start_from``): by default the stream's first retained entry, so that
        history already in the stream is learned whatever position an older group
        had reached.
        """
        epoch = self._take_lease()
        had_checkpoint = self.load_checkpoint()
        self.metrics.writer_starts.labels(**self._lbl, source="checkpoint").inc()
        ckpt = self.checkpoints
        # A new epoch: replicas ahead of this checkpoint reload it (see applied_log).
        self.log.start(self.live.applied, ckpt.ckpt_id, ckpt.log_id, epoch)
        start = ckpt.ckpt_id if had_checkpoint else self.reader.start_id()
        self.reader.place_group(start, move=not had_checkpoint)
        if not had_checkpoint and start != "0-0":
            # Entries up to the start are not for this space: make the start durable.
            self._at(start)
            self.checkpoint()
        self.reader.ack_covered(ckpt.ckpt_id)
        self.reader.claim_orphans(stop, self.metrics.claimed.labels(**self._lbl).inc)
        self.reader.resync(self.last_id)
        ckpt.last_at = self.clock()
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

    def _take_lease(self) -> int:
        """Take the lease with a new epoch (the fencing token); 0 without a lease."""
        if self.lease is None:
            return 0
        epoch = self.lease.take()
        if not epoch:
            raise LeaseLostError(
                f"writer lease {self.lease.key} is held by {self.lease.holder_now()!r}"
            )
        return epoch

    def adopt(self, state: Followed, stop: threading.Event | None = None) -> None:
        """Become the writer from a replica's model (a standby's), without loading
        the checkpoint: the model, the retry record and the counters the replica
        followed up to its last applied event (``state``; the observers are the
        same objects the replica fed). The first checkpoint, at once, covers that
        event; the stream is then re-read after it (own pending entries first, as
        after :meth:`recover`): dead letters are written again under their own
        ids (no duplicates), retries are recognised by the same record.
        """
        epoch = self._take_lease()
        self.checkpoints.settle()
        warm_up(state.model)
        warm_scan()
        with self.live.lock:
            self.live.model, self.live.applied = state.model, state.applied
            self._at(state.version)
        self.decider.seen = state.seen
        self.counters.update(state.counters)
        self.counters["applied"] = state.applied
        self.loaded = True
        ckpt = self.checkpoints
        ckpt.restart("0-0", state.position)  # "0-0": the checkpoint below is written
        self.log.last_id = state.position  # the newest applied-log entry the model covers
        self.checkpoint()
        self.log.start(state.applied, ckpt.ckpt_id, ckpt.log_id, epoch)
        self.reader.place_group(self.last_id, move=False)
        self.reader.ack_covered(self.last_id)
        self.reader.claim_orphans(stop, self.metrics.claimed.labels(**self._lbl).inc)
        self.reader.resync(self.last_id)
        ckpt.last_at = self.clock()
        self._gauges()
        self.metrics.writer_starts.labels(**self._lbl, source="replica").inc()
        log.info(
            "space %s: writer from this standby's own replica, without reloading the "
            "checkpoint (%d events applied, after stream id %s)",
            self.space.name,
            self.live.applied,
            self.last_id,
        )
        self.progress_applied = self.live.applied

    def resync(self) -> None:
        """After a reconnect: re-read own pending entries after the last handled id."""
        self.reader.resync(self.last_id)

    # -- the loop ---------------------------------------------------------------
    def step(self) -> int:
        """Read and handle one batch; checkpoint when due. Returns entries handled."""
        if self.lease is not None:
            self.lease.ensure()  # after a pause: nothing is read on a lapsed lease
        # The applied log of the batch before goes with this read, in one round trip
        # (written before the read, so a blocking read does not hold it back).
        if not self.log.waiting:
            entries = self.reader.read()
        elif self.reader.carries:
            entries = self.reader.read(self.log.carry)
        else:
            self.log.flush()
            entries = self.reader.read()
        if entries:
            self.handle(entries)
        for model in self.applier.take_promotions():  # promotions made while idle
            self.log.promote(self.live.applied, model)
        self.checkpoints.poll()  # a background save that finished: ack what it covers
        if self.checkpoints.due():
            self.checkpoint(wait=False)
        self.maybe_claim()
        return len(entries)

    def handle(self, entries: list[Entry], late: bool = False) -> None:
        """Decide and apply a batch (``late``: claimed entries, order not enforced)."""
        t0 = time.perf_counter()
        fresh = split_fresh(entries, self.last_id, late)
        self.checkpoints.covered(fresh.covered)
        if not fresh.entries:
            return
        self._top_in_hand = fresh.top
        decision = self.decider.decide(fresh.entries)
        if decision.dead and self.lease is not None:
            self.lease.check()
        self.dead.write(decision.dead)
        self._apply(decision, self._tally(decision))
        # Also when nothing moved forward: a late chunk set the version back.
        self._at(fresh.top if id_key(fresh.top) > id_key(self.last_id) else self.last_id)
        self.checkpoints.handled([sid for sid, _ in fresh.entries])
        for outcome, n in decision.counts().items():
            self.counters[outcome] += n
            if n:
                self.metrics.events.labels(space=self.space.name, outcome=outcome).inc(n)
        self.metrics.batch_seconds.labels(**self._lbl).observe(time.perf_counter() - t0)

    def _tally(self, decision: Decision) -> Tally:
        """The counters of dead letters and retries up to a stream id of this batch
        (logged with each chunk: a standby promoted at that chunk continues them)."""
        dead0, dupes0 = self.counters["dead_lettered"], self.counters["duplicate"]
        dead = sorted(id_key(sid) for sid, _, _ in decision.dead)
        dupes = sorted(id_key(sid) for sid in decision.dupes)

        def tally(upto: str) -> tuple[int, int]:
            at = id_key(upto)
            return dead0 + bisect.bisect_right(dead, at), dupes0 + bisect.bisect_right(dupes, at)

        return tally

    def _apply(self, decision: Decision, tally: Tally | None = None) -> None:
        """Apply in chunks through the shared :class:`Applier`; log each chunk."""
        valid, raws = decision.valid, decision.raws
        chunk = 1 if self.careful else self.space.lock_chunk
        take_raw = raws.__getitem__
        for start in range(0, len(valid), chunk):
            part = valid[start : start + chunk]
            seq = self.live.applied  # only this thread changes it
            try:
                got = self.applier.learn(part)
            except Exception as exc:
                if len(part) == 1:  # careful mode: this is the event the model rejects
                    self.decider.set_aside(part[0][0], exc)
                raise
            self.decider.remember(part, decision.digests)
            for model in got.promoted:  # made before this chunk, under the same lock
                self.log.promote(seq, model)
            sids = sids_of(part)
            self.log.chunk(seq, sids, list(map(take_raw, sids)), tally)
            if got.published:
                self.metrics.live_published.labels(**self._lbl).inc(got.published)
            self.applier.notify(part, got)

    def failed(self) -> None:
        """The loop failed while handling a batch. Until past that batch, apply one
        event at a time: if the model itself cannot learn from an event, that event
        is found, set aside as a dead letter, and the stream goes on."""
        self.decider.failed(self._top_in_hand)

    @property
    def careful(self) -> bool:
        return self.decider.careful(self.last_id)

    def maybe_claim(self) -> None:
        """Now and then, take over entries another consumer name left pending."""
        if self.clock() - self.last_claim_at < max(self.space.claim_idle_ms / 2000, 1.0):
            return
        self.last_claim_at = self.clock()
        mine = self.checkpoints.awaiting()  # applied by us, not acknowledged yet
        if self.lease is not None:  # read under our name by a writer that lost the lease
            strays = [
                e for e in self.reader.own_strays(self.lease.settings.lease_ms) if e[0] not in mine
            ]
            if strays:
                log.warning(
                    "space %s: applying %d entries a replaced writer had read",
                    self.space.name,
                    len(strays),
                )
                self.handle(sorted(strays, key=lambda e: id_key(e[0])), late=True)
                mine = self.checkpoints.awaiting()
        if not self.reader.others_pending():
            return
        claimed = [e for e in self.reader.claim() if e[0] not in mine]
        if claimed:
            log.warning("space %s: applying %d late entries", self.space.name, len(claimed))
            self.metrics.claimed.labels(**self._lbl).inc(len(claimed))
            self.handle(sorted(claimed, key=lambda e: id_key(e[0])), late=True)

    # -- checkpoint and acknowledge -----------------------------------------------
    def maybe_checkpoint(self) -> None:
        self.checkpoints.poll()
        if self.checkpoints.due():
            self.checkpoint(wait=False)

    def checkpoint(self, wait: bool = True) -> None:
        """Store model + last id + retry record durably, then ack what it covers.

        ``wait=False`` (the loop's cadence): with background checkpoints only the
        state is copied here; the save completes in :meth:`step` later."""
        self.checkpoints.save(self.last_id, self.decider.seen, self.counters, wait=wait)
        if not self.checkpoints.in_flight:
            self._gauges()

    def close(self) -> None:
        """Final checkpoint and ack (call after the batch in hand is done); waits for
        the save in flight first."""
        self.checkpoint()

    # -- on a timer ---------------------------------------------------------------
    def _gauges(self) -> None:
        self.behind_at = self.clock()
        got = self.reader.group_state()
        if got is None:
            return
        pending, lag = got
        self.metrics.pending.labels(**self._lbl).set(pending)
        # Redis cannot always count the lag (after deletions): then unknown.
        self.live.behind = lag
        if lag is not None:
            self.metrics.lag.labels(**self._lbl).set(lag)

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

    # -- read-only views kept for callers of the former Consumer ------------------
    @property
    def cursor(self) -> str:
        return self.reader.cursor

    @property
    def ckpt_id(self) -> str:
        return self.checkpoints.ckpt_id

    @property
    def prev_ckpt_log_id(self) -> str:
        return self.checkpoints.prev_log_id

    @property
    def log_min_entries(self) -> int:
        return self.checkpoints.log_min_entries

    @log_min_entries.setter
    def log_min_entries(self, value: int) -> None:
        self.checkpoints.log_min_entries = value
