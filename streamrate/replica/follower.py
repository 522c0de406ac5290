"""A replica: the newest checkpoint, then what the writer applied, in its order.

The follower loads the newest checkpoint of a space (checked as the writer
checks it), then reads the applied log (:mod:`streamrate.stream.applied_log`)
after the position the checkpoint records and applies each chunk through the
same :class:`~streamrate.stream.apply.Applier` the writer uses, so that at
every applied count its model equals the writer's. It never acknowledges,
checkpoints or dead-letters: the writer decided all of that.

Per entry (``N`` = events this replica has applied)::

    epoch older than the replica's         ignored (a writer that was replaced)
    start, seq == N                        the new writer starts where we are: go on
    start, seq != N                        the writer restarted from a checkpoint:
                                           load it, continue after the start entry
    chunk, seq == N                        apply
    chunk, seq + len <= N                  already applied (a re-sent entry): skip
    chunk, seq > N (or a partial overlap)  entries missing (trimmed): reload
    promote, seq <= N                      promote (between the same two chunks as
                                           on the writer)

A standby's follower (``writer_state``) also keeps what the writer keeps beside
the model, so that it can become the writer without loading the checkpoint
(:meth:`followed`, :meth:`streamrate.stream.writer.Writer.adopt`): the retry
record (the checkpoint's, then every applied event added as the writer adds
it), the writer's counters of dead letters and retries (each chunk carries
them) and the observers (quality windows, drift; the checkpoint's parts, then
every applied event).

Every ``check_every_s`` it reads the newest entry of the log to measure its lag
in events; more than ``max_behind_events`` behind, it reloads the checkpoint
when that checkpoint is ahead of it.
"""

from __future__ import annotations

import collections
import logging
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

import redis

from streamrate.checkpoint import Checkpoint, CheckpointStore, load_parts
from streamrate.columns import EventColumns, events_of, pairs_of, sids_of
from streamrate.config import ReplicaSettings, SpaceKeys, SpaceSettings
from streamrate.dedupe import SeenIds
from streamrate.errors import AppliedLogError, CheckpointRefusedError
from streamrate.events import MatchEvent, event_digest
from streamrate.metrics import CONSUMER_STATES, ReplicaMetrics, ServiceMetrics
from streamrate.models.base import Model, warm_up
from streamrate.scan import warm_up as warm_scan
from streamrate.serve.livefeed import WatchRegistry
from streamrate.stream.applied_log import LogEntry, id_key, parse_entry
from streamrate.stream.apply import Applier, LiveModel, Observer, Status, now_ms
from streamrate.stream.checkpoints import describe_store, load_checked
from streamrate.stream.reader import rows_of
from streamrate.stream.writer import Followed

log = logging.getLogger("streamrate.replica")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError)
READ_COUNT = 200
LAG_SAMPLES = 20_000


class Reload(Exception):
    """Raised inside the follower when it must load the checkpoint (internal)."""

    def __init__(self, reason: str, start: LogEntry | None = None) -> None:
        super().__init__(reason)
        self.reason, self.start = reason, start


class Follower:
    """One replica of one space (Redis client, store, model builder injected)."""

    def __init__(
        self,
        client: Any,
        space: SpaceSettings,
        keys: SpaceKeys,
        store: CheckpointStore,
        build_model: Callable[[], Model],
        settings: ReplicaSettings,
        metrics: ReplicaMetrics | None = None,
        service_metrics: ServiceMetrics | None = None,
        watch: WatchRegistry | None = None,
        publish: Callable[[list[tuple[str, str]]], None] | None = None,
        clock: Callable[[], float] = time.monotonic,
        observers: Sequence[Observer] = (),
        writer_state: bool = False,
    ) -> None:
        self.r, self.space, self.keys, self.store = client, space, keys, store
        self.build_model, self.settings, self.clock = build_model, settings, clock
        self.metrics, self.service_metrics = metrics, service_metrics
        self.live = LiveModel(build_model(), status="loading", writable=False)
        self.live.detail = "the checkpoint is not loaded yet"
        self.observers = list(observers)
        self.applier = Applier(
            self.live,
            watch if watch is not None else WatchRegistry(0, 0),
            keys.live_of,
            publish,
            self.observers,
        )
        self.writer_state = writer_state
        self.seen: SeenIds | None = None  # the writer's retry record (writer_state)
        self.counters: dict[str, int] | None = None  # ... its counters (None: unknown)
        self.position = "0-0"  # id of the last applied-log entry handled
        self.epoch = 0
        self.loaded = False
        self.checked_at = -1e18
        self.lag_events: int | None = None
        self.lag_ms: collections.deque[float] = collections.deque(maxlen=LAG_SAMPLES)
        self.reloads: dict[str, int] = collections.Counter()
        self._lbl = {"space": space.name}
        self.changed = threading.Condition()  # notified after every change of the model

    # -- status -----------------------------------------------------------------
    def mark(self, status: Status, detail: str) -> None:
        self.live.status, self.live.detail = status, detail
        if self.service_metrics is not None:
            for st in CONSUMER_STATES:
                self.service_metrics.state.labels(space=self.space.name, state=st).set(
                    int(st == status)
                )

    # -- checkpoint -------------------------------------------------------------
    def reload(self, reason: str, start: LogEntry | None = None) -> bool:
        """Load the newest checkpoint; after a writer's ``start`` entry continue after
        it (or after the checkpoint when that is newer). False when the checkpoint
        is not ahead of this replica (then nothing changes)."""
        got = load_checked(self.store, self.space, self.build_model)
        ck: Checkpoint | None = None
        if got is None:
            model, applied, version, log_id, last_id = self.build_model(), 0, "0-0", "0-0", "0-0"
        else:
            ck, model = got
            applied, version, log_id, last_id = ck.applied, ck.last_id, ck.log_id, ck.last_id
        if reason == "behind" and applied <= self.live.applied:
            return False
        position = log_id
        if start is not None:
            if applied == start.seq and last_id == start.ckpt_last_id:
                position = max(start.id, log_id, key=id_key)
            elif id_key(log_id) < id_key(start.id):
                raise AppliedLogError(
                    f"the writer started from a checkpoint ({start.seq} events applied) that "
                    f"the {describe_store(self.store)} does not hold yet"
                )
            self.epoch = max(self.epoch, start.epoch)
        warm_up(model)  # compile kernels before the lock, not under it
        warm_scan()
        if self.writer_state:
            self._writer_state_of(ck)
        with self.live.lock:
            self.live.model, self.live.version, self.live.applied = model, version, applied
        self.position = position
        self.loaded = True
        self.reloads[reason] += 1
        if self.metrics is not None:
            self.metrics.reloads.labels(space=self.space.name, reason=reason).inc()
        log.info(
            "space %s: replica loaded the %s (%d events applied, reason: %s); following "
            "the applied log after %s",
            self.space.name,
            describe_store(self.store),
            applied,
            reason,
            position,
        )
        self._notify()
        return True

    def _writer_state_of(self, ck: Checkpoint | None) -> None:
        """The retry record, counters and observers as the checkpoint holds them."""
        sp = self.space
        self.seen = ck.seen if ck is not None else SeenIds(sp.dedupe_keep_ids, sp.dedupe_window_s)
        counts = ck.counters if ck is not None else {}
        self.counters = {k: int(counts.get(k, 0)) for k in ("dead_lettered", "duplicate")}
        load_parts(self.observers, ck.parts if ck is not None else {})

    def followed(self) -> Followed | None:
        """What a writer needs to go on from this replica's model (see the module
        docstring); None when it is not known (not a standby's follower, nothing
        applied yet, or a log entry without the writer's counters)."""
        if not self.loaded or self.seen is None or self.counters is None:
            return None
        if self.live.applied == 0:
            return None
        return Followed(
            self.live.model,
            self.live.applied,
            self.live.version,
            self.position,
            self.seen,
            dict(self.counters),
        )

    def drain(self, between: Callable[[], None] = lambda: None) -> int:
        """Apply what is in the log now (the writer is gone); entries handled.
        ``between`` runs before each read (the new writer renews its lease there)."""
        total = 0
        while True:
            between()
            n = self.step(block_ms=None, wait=False)
            total += n
            if n == 0:
                return total

    # -- following --------------------------------------------------------------
    def step(self, block_ms: int | None = None, wait: bool = True) -> int:
        """Read and handle one batch of log entries; returns entries handled
        (``wait=False``: do not block when there is none)."""
        if not self.loaded:
            self.reload("initial")
        if self.clock() - self.checked_at >= 1.0:
            self.check_lag()
        block = (self.settings.block_ms if block_ms is None else block_ms) if wait else None
        resp = self.r.xread({self.keys.applied: self.position}, count=READ_COUNT, block=block)
        rows = rows_of(resp)
        try:
            for sid, fields in rows:
                self.handle(parse_entry(sid, fields))
        except Reload as why:
            self.reload(why.reason, why.start)
        return len(rows)

    def handle(self, entry: LogEntry) -> None:
        n = self.live.applied
        if entry.epoch < self.epoch:
            self.position = entry.id  # from a writer that was replaced: not ours
            return
        if entry.kind == "start":
            if entry.seq != n:
                raise Reload("writer_restart", entry)
            self.epoch = entry.epoch
        elif entry.kind == "promote":
            if entry.seq > n:
                raise Reload("gap")
            with self.live.lock:
                promote = getattr(self.live.model, "promote", None)
                if callable(promote):
                    promote(entry.model)
            self._notify()
        else:
            if entry.seq + len(entry.ids) <= n:
                self.position = entry.id  # applied already
                return
            if entry.seq != n:
                raise Reload("gap")
            self.epoch = max(self.epoch, entry.epoch)
            part = pairs_of(list(entry.ids), entry.events)
            for start, end in entry.pieces():  # as the writer applied them
                self.applier.apply(part[start:end])
            if self.writer_state:
                self._follow_writer_state(entry, part)
            lag_ms = max(now_ms() - id_key(entry.id)[0], 0)
            self.lag_ms.append(float(lag_ms))
            if self.metrics is not None:
                self.metrics.applied.labels(**self._lbl).inc(len(part))
                self.metrics.lag_seconds.labels(**self._lbl).observe(lag_ms / 1000)
            self._notify()
        self.position = entry.id

    def _follow_writer_state(self, entry: LogEntry, part: Sequence[tuple[str, MatchEvent]]) -> None:
        """Add the applied events to the retry record as the writer did
        (:meth:`streamrate.stream.decide.Decider.remember`); take its counters."""
        if self.seen is not None:
            sids, events = sids_of(part), events_of(part)
            if isinstance(events, EventColumns):  # the digests are at hand
                received_s = [id_key(sid)[0] / 1000 for sid in sids]
                self.seen.add_many(events.match_ids, received_s, b"".join(events.digests))
            else:
                for sid, ev in zip(sids, events, strict=True):
                    self.seen.add(ev.match_id, id_key(sid)[0] / 1000, event_digest(ev))
        if entry.dead < 0 or entry.dupes < 0 or self.counters is None:
            self.counters = None  # a writer of an older version: not known
        else:
            self.counters = {"dead_lettered": entry.dead, "duplicate": entry.dupes}

    def check_lag(self) -> None:
        """Measure how far behind the writer this replica is; reload when too far."""
        self.checked_at = self.clock()
        top = self.r.xrevrange(self.keys.applied, count=1)
        if not top:
            self.lag_events = 0
        else:
            head = parse_entry(top[0][0], top[0][1])
            end = head.seq + len(head.ids)
            self.lag_events = max(end - self.live.applied, 0)
        if self.metrics is not None:
            self.metrics.lag_events.labels(**self._lbl).set(self.lag_events)
        self.live.behind = self.lag_events
        if self.lag_events > self.settings.max_behind_events:
            self.reload("behind")

    def _notify(self) -> None:
        with self.changed:
            self.changed.notify_all()

    # -- the loop ----------------------------------------------------------------
    def run(self, stop: threading.Event, min_s: float = 0.05, max_s: float = 5.0) -> None:
        """Follow until ``stop``; Redis outages and errors back off and reload."""
        delay = min_s
        while not stop.is_set():
            try:
                self.step()
                if self.live.status != "ready":
                    self.mark("ready", "following the writer")
                delay = min_s
            except CheckpointRefusedError as exc:
                self.mark("stalled" if self.loaded else "loading", str(exc))
                stop.wait(max_s)
            except REDIS_DOWN as exc:
                self.mark("stalled" if self.loaded else "loading", f"Redis is unreachable ({exc})")
                stop.wait(delay)
                delay = min(delay * 2, max_s)
            except Exception as exc:  # loop boundary: log, count, reload
                log.warning(
                    "space %s: replica error (%s: %s); reloading the checkpoint",
                    self.space.name,
                    type(exc).__name__,
                    exc,
                )
                self.mark(
                    "stalled" if self.loaded else "loading",
                    f"the replica cannot follow: {type(exc).__name__}: {exc}",
                )
                self.loaded = False  # the next step reloads
                self.reloads["error"] += 1
                if self.metrics is not None:
                    self.metrics.reloads.labels(space=self.space.name, reason="error").inc()
                stop.wait(delay)
                delay = min(delay * 2, max_s)

    def wait_applied(self, applied: int, timeout_s: float) -> bool:
        """Block until at least ``applied`` events are in the model (for tests, benches)."""
        deadline = time.monotonic() + timeout_s
        with self.changed:
            while self.live.applied < applied:
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                self.changed.wait(min(left, 0.1))
        return True
