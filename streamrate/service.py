"""Running the service: threads per space, signals, reconnect with backoff, drain.

Roles (``streamrate serve --role``): ``writer`` runs the consumer (the only
process that learns, checkpoints, acknowledges and dead-letters; it writes the
applied log) and answers today's pub/sub requests; ``both`` (the default, one
process as before) does that and also answers from the request stream;
``responder`` runs a replica per space (:mod:`streamrate.replica.space`) that
follows the writer's applied log and answers from the request stream;
``standby`` runs the same replica and, when the space's writer lease is free
(the writer died or was paused past ``lease.lease_ms``), stops it and becomes
the space's writer (as ``both``); ``shared`` is a member of a pool of processes
that share the spaces (:mod:`streamrate.pool`): it writes (as ``both``) its fair
share of them, taking free ones and giving back what is above its share.

A writer holds the space's lease (:mod:`streamrate.stream.lease`) while it runs:
it waits at start while another holds it, renews it on its own thread, gives it
back after the final checkpoint, and stops writing that space (one log line,
``streamrate_writer_leases_lost_total``) once it finds the lease lost; the
process's other spaces go on, and the space is followed as a standby that
writes again once the lease is free (:class:`SpaceRunner`; a pool member
instead drops the space and takes a share again, :mod:`streamrate.pool`).

Per model space two threads run: the writer (:mod:`streamrate.stream.writer`) and
the query responder (pub/sub, its own Redis connection, reads the live model
under its lock). ``SIGTERM``/``SIGINT`` set a stop flag: the consumer finishes
the batch in hand, writes a final checkpoint, acknowledges and the process
exits 0.

When Redis goes away each thread logs the outage once, retries with doubling
back-off (``reconnect_min_s`` .. ``reconnect_max_s``) and logs the recovery; the
consumer then re-reads its own pending entries after its last handled id.
"""

from __future__ import annotations

import gc
import logging
import math
import signal
import sys
import threading
import time
from collections.abc import Callable, Sequence
from functools import partial
from typing import Any, Literal

import redis
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import CheckpointStore, FileCheckpointStore, RedisCheckpointStore
from streamrate.config import RedisSettings, Settings, SpaceSettings
from streamrate.connect import RedisClients
from streamrate.errors import (
    CheckpointRefusedError,
    LeaseLostError,
    ReadCutError,
    ServiceError,
)
from streamrate.metrics import CONSUMER_STATES, ReplicaMetrics, ServiceMetrics, serve_metrics
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.pool import Membership, PoolMember
from streamrate.recalibrate import OnlineRecalibrator, recalibrators_of
from streamrate.replica.request_stream import StreamResponder
from streamrate.replica.space import ReplicaSpace
from streamrate.serve.livefeed import WatchRegistry
from streamrate.serve.queries import MAX_WATCH
from streamrate.serve.responder import Responder
from streamrate.stream.apply import Observer
from streamrate.stream.lease import Lease, holder_id
from streamrate.stream.writer import Followed, Writer
from streamrate.watch.quality_metrics import QualityMetrics, QualityObserver, quality_observers

log = logging.getLogger("streamrate.service")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError)
QUERY_SWITCH_INTERVAL_S = 0.0002
ClientFactory = Callable[[], Any]
Role = Literal["writer", "responder", "both", "standby", "shared"]
ROLES: tuple[Role, ...] = ("writer", "responder", "both", "standby", "shared")
_REPLICA_METRICS_LOCK = threading.Lock()
GC_THRESHOLDS = (20_000, 20, 20)
"""Python's cyclic collector, as :func:`tune_gc` sets it: a young collection every
20,000 net allocations of container objects instead of 700. A batch makes and
drops thousands of short-lived objects (stream replies, decoded events, arrays'
wrappers), almost none in cycles; at 700 the collector ran several times per
batch of 100 and found nothing (``bench/bench_service.py`` measures the writer
with this setting, as the service runs it)."""


_gc_tuned = threading.Event()


def tune_gc() -> None:
    """Collect once, move what exists now (modules, settings, models loaded so
    far) out of the collector's sight for good (``gc.freeze``), and collect young
    objects less often (:data:`GC_THRESHOLDS`). Called once at start; garbage in
    cycles is still collected, only later. Each space's writer freezes again once
    it has loaded its checkpoint (:func:`freeze_loaded`)."""
    gc.collect()
    gc.freeze()
    gc.set_threshold(*GC_THRESHOLDS)
    _gc_tuned.set()


def freeze_loaded() -> None:
    """After a checkpoint is loaded (in a process that called :func:`tune_gc`):
    what it loaded (the model's id list: one string per entity) is left out of
    every later collection, so that a full collection does not walk it."""
    if _gc_tuned.is_set():
        gc.freeze()


def redis_factory(settings: RedisSettings) -> ClientFactory:
    """A function giving a new client per call (each thread owns its connections).

    See :class:`streamrate.connect.RedisClients` (password sources, TLS).
    """
    return RedisClients(settings)


class Outage:
    """Log a Redis outage once, back off between attempts, log its end."""

    def __init__(self, what: str, min_s: float, max_s: float, on_begin: Callable[[], None]) -> None:
        self.what, self.min_s, self.max_s, self.on_begin = what, min_s, max_s, on_begin
        self.since: float | None = None
        self.delay = min_s

    def failed(self, exc: BaseException, stop: threading.Event) -> None:
        if self.since is None:
            self.since = time.monotonic()
            self.delay = self.min_s
            self.on_begin()
            log.warning("%s: Redis unreachable (%s); reconnecting", self.what, exc)
        stop.wait(self.delay)
        self.delay = min(self.delay * 2, self.max_s)

    def ok(self) -> bool:
        """Mark success; True when this ended an outage."""
        if self.since is None:
            return False
        log.info("%s: Redis back after %.1f s", self.what, time.monotonic() - self.since)
        self.since = None
        return True


class LoopErrors:
    """Errors at the consumer loop boundary: capped exponential back-off, each kind
    (exception type and message) logged with its traceback the first time, then
    at most once a minute with its count; the end of a run of errors is logged."""

    MAX_KINDS = 256
    REPEAT_LOG_S = 60.0

    def __init__(
        self,
        what: str,
        min_s: float,
        max_s: float,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.what, self.min_s, self.max_s, self.clock = what, min_s, max_s, clock
        self.streak = 0
        self.delay = min_s
        self.counts: dict[str, int] = {}
        self.logged_at: dict[str, float] = {}

    def failed(self, exc: BaseException) -> int:
        """Count one error; return the errors in a row (``delay`` is the wait)."""
        self.streak += 1
        self.delay = min(self.min_s * 2 ** (self.streak - 1), self.max_s)
        kind = f"{type(exc).__name__}: {exc}"[:300]
        if kind not in self.counts and len(self.counts) >= self.MAX_KINDS:
            kind = "other errors"
        n = self.counts[kind] = self.counts.get(kind, 0) + 1
        now = self.clock()
        if n == 1:
            log.error(
                "%s: error in the consumer loop (retrying in %.2f s): %s",
                self.what,
                self.delay,
                kind,
                exc_info=exc,
            )
            self.logged_at[kind] = now
        elif now - self.logged_at.get(kind, -math.inf) >= self.REPEAT_LOG_S:
            log.error(
                "%s: error in the consumer loop again, %d times so far (%d in a row, "
                "retrying in %.2f s): %s",
                self.what,
                n,
                self.streak,
                self.delay,
                kind,
            )
            self.logged_at[kind] = now
        return self.streak

    def ok(self) -> None:
        """Mark a loop turn without error; logs the end of a run of errors."""
        if self.streak:
            log.info("%s: applying events again after %d errors", self.what, self.streak)
        self.streak = 0
        self.delay = self.min_s


class SpaceService:
    """Consumer + query responder of one space."""

    def __init__(
        self,
        settings: Settings,
        space: SpaceSettings,
        clients: ClientFactory,
        metrics: ServiceMetrics,
        observers: Sequence[Observer] = (),
        model_builder: Callable[[], Model] | None = None,
        clock: Callable[[], float] = time.monotonic,
        role: Role = "both",
        holder: str | None = None,
    ) -> None:
        self.settings, self.space, self.clients, self.metrics = settings, space, clients, metrics
        self.role = role
        self.keys = settings.keys(space)
        self.watch = WatchRegistry(MAX_WATCH, settings.queries.max_watchers)
        client = clients()
        # One writer per space: every write below is fenced by this lease.
        self.lease = Lease(
            client, self.keys.lease, self.keys.epoch, settings.lease, holder, clock=clock
        )
        store: CheckpointStore
        if settings.checkpoint.store == "redis":
            store = RedisCheckpointStore(client, self.keys.ckpt, self.lease)
        else:
            store = FileCheckpointStore(settings.checkpoint.dir, space.name, self.lease)
        builder = model_builder or (lambda: build_model(space.model, **space.model_settings))
        self.consumer = Writer(
            client,
            space,
            self.keys,
            store,
            metrics,
            builder,
            self.watch,
            observers,
            clock,
            log_min_entries=settings.replica.log_min_entries,
            background=settings.checkpoint.background,
            lease=self.lease,
        )
        self.ready = threading.Event()  # the consumer has recovered and is reading
        # A standby's replica to start from instead of the checkpoint (Standby sets it).
        self.handoff: Followed | None = None
        # Set when the space cannot start (checkpoint refused) or lost its lease.
        self.fatal: ServiceError | None = None
        self.q = settings.queries
        self.responder = Responder(
            settings, space, self.keys, clients, metrics, self.consumer.live, self.watch
        )
        self.listening = self.responder.listening  # the query responder is subscribed
        self.answerer = self.responder.answerer
        # In one process (role "both") the writer also answers the request stream.
        self.stream: StreamResponder | None = None
        if role in ("both", "standby"):
            self.stream = StreamResponder(
                space, self.keys, settings.replica, self.responder, metrics, share_cpu=True
            )

    def threads(self, stop: threading.Event) -> list[threading.Thread]:
        name = self.space.name
        out = [
            threading.Thread(target=fn, args=(stop,), name=f"{role}-{name}", daemon=True)
            for fn, role in (
                (self.consume, "consumer"),
                (self.respond, "queries"),
                (self.keep_lease, "lease"),
            )
        ]
        if self.stream is not None:
            out.append(self.stream.thread(stop, self.clients, self.settings.redis))
        return out

    # -- consumer thread --------------------------------------------------------
    def consume(self, stop: threading.Event) -> None:
        """The consumer loop, once this process holds the space's lease. A checkpoint
        that does not fit the settings ends it and stops the service
        (``self.fatal``), so does a lost lease (of this space only); Redis outages
        and loop errors back off and are retried, the status the queries see
        saying why meanwhile. The space's quality series are exported from the
        moment it holds the lease (only the process writing a space exports them)."""
        if not self.wait_for_lease(stop):
            return
        self.export_quality(True)
        self._consume(stop)

    def export_quality(self, on: bool) -> None:
        for obs in self.consumer.observers:
            if isinstance(obs, QualityObserver):
                obs.export(on)

    def retire(self) -> None:
        """The space stopped here while the process goes on (its lease lost, or given
        back by a pool member): drop its quality series and this writer's backlog
        gauges, which the space's new writer exports."""
        self.export_quality(False)
        lbl = {"space": self.space.name}
        self.metrics.lag.labels(**lbl).set(0)
        self.metrics.pending.labels(**lbl).set(0)
        self.metrics.error_streak.labels(**lbl).set(0)

    def _consume(self, stop: threading.Event) -> None:
        rs = self.settings.redis
        lbl = {"space": self.space.name}
        connected = self.metrics.redis_connected.labels(**lbl)
        outage = Outage(
            f"consumer {self.space.name}",
            rs.reconnect_min_s,
            rs.reconnect_max_s,
            self.metrics.reconnects.labels(**lbl, role="consumer").inc,
        )
        errors = LoopErrors(f"space {self.space.name}", rs.reconnect_min_s, rs.reconnect_max_s)
        streak = self.metrics.error_streak.labels(**lbl)
        c = self.consumer
        must_recover = True
        while not stop.is_set():
            try:
                if must_recover:
                    handoff, self.handoff = self.handoff, None  # once: later, the checkpoint
                    if handoff is not None:
                        c.adopt(handoff, stop)
                    else:
                        c.recover(stop)
                    freeze_loaded()
                    must_recover = False
                    if not errors.streak:  # after errors: ready once a turn goes well
                        c.mark("ready", "applying events")
                    self.ready.set()
                elif outage.since is not None:
                    c.resync()  # a read reply may have been lost with the connection
                c.step()
                c.tick()
                outage.ok()
                connected.set(1)
                errors.ok()
                streak.set(0)
                if c.live.status != "ready":
                    c.mark("ready", "applying events")
            except CheckpointRefusedError as exc:
                self.fatal = exc
                c.mark("stalled", str(exc))
                stop.set()  # no start on a checkpoint it cannot use
                return
            except LeaseLostError as exc:
                self._lease_lost(exc)
                stop.set()  # this space's threads end; no write after a lost lease
                return
            except ReadCutError as exc:  # a slot moved: expected, nothing read, read again
                self.metrics.reads_cut.labels(**lbl, reader="consumer").inc()
                log.warning("space %s: %s; reading again", self.space.name, exc)
            except REDIS_DOWN as exc:
                connected.set(0)
                c.mark("stalled" if c.loaded else "loading", f"Redis is unreachable ({exc})")
                outage.failed(exc, stop)
            except Exception as exc:  # loop boundary: log, count, rebuild from the checkpoint
                self.metrics.loop_errors.labels(**lbl).inc()
                n = errors.failed(exc)
                streak.set(n)
                c.mark(
                    "stalled" if c.loaded else "loading",
                    f"the consumer cannot apply events: {type(exc).__name__}: {exc} "
                    f"({n} errors in a row)",
                )
                c.failed()
                must_recover = True
                stop.wait(errors.delay)
        if must_recover:
            return  # nothing applied since the last durable checkpoint
        deadline = time.monotonic() + 30.0
        while True:
            try:
                c.close()
                log.info("space %s: final checkpoint at %s", self.space.name, c.ckpt_id)
                self.lease.release()  # a standby need not wait for it to lapse
                return
            except LeaseLostError as exc:
                self._lease_lost(exc)
                return
            except REDIS_DOWN as exc:
                if time.monotonic() > deadline:
                    log.error("space %s: could not write the final checkpoint", self.space.name)
                    return
                outage.failed(exc, threading.Event())

    def _lease_lost(self, exc: LeaseLostError) -> None:
        """One line, one count; this process holds nothing of the space's stream any more."""
        self.fatal = exc
        live = self.consumer.live
        live.status, live.detail = "stalled", str(exc)
        log.error("space %s: %s", self.space.name, exc)
        lbl = {"space": self.space.name}
        for st in CONSUMER_STATES:  # no state here: this process no longer runs the consumer
            self.metrics.state.labels(**lbl, state=st).set(0)
        self.metrics.leases_lost.labels(**lbl).inc()
        self.retire()

    # -- the lease ------------------------------------------------------------------
    def wait_for_lease(self, stop: threading.Event) -> bool:
        """Take the writer lease, waiting while another writer holds it; False on ``stop``."""
        said = False
        while not stop.is_set():
            try:
                if self.lease.take():
                    return True
                if not said:
                    log.info(
                        "space %s: waiting for the writer lease (held by %s)",
                        self.space.name,
                        self.lease.holder_now(),
                    )
                    said = True
            except REDIS_DOWN as exc:
                self.consumer.mark("loading", f"Redis is unreachable ({exc})")
            stop.wait(self.settings.lease.poll_every_ms / 1000)
        return False

    def keep_lease(self, stop: threading.Event) -> None:
        """Renew the lease until ``stop`` (the consumer notices a loss, and logs it, at
        its next read or write)."""
        self.lease.keep(stop, lambda exc: None)

    # -- query threads (streamrate.serve.responder) -------------------------------------
    def respond(self, stop: threading.Event) -> None:
        rs = self.settings.redis
        reconnects = self.metrics.reconnects.labels(space=self.space.name, role="queries")

        def outage_of(role: str) -> Outage:
            # Counted under role="queries", apart from the consumer's outages.
            return Outage(
                f"{role} {self.space.name}", rs.reconnect_min_s, rs.reconnect_max_s, reconnects.inc
            )

        self.responder.run(stop, outage_of)


class Standby:
    """A replica of one space that becomes its writer when the writer lease is free.

    Until then it follows the applied log and answers the request stream
    (:class:`ReplicaSpace`; ``answer=False``: it only follows), keeping beside the
    model what the writer keeps (the retry record, the counters, the observers);
    it looks at the lease every ``lease.poll_every_ms``. Once the lease is free it
    stops the replica, takes the lease, applies what is left in the applied log
    (nothing can be added to it any more: its writes are fenced by the lease) and
    returns the space's writer (:class:`SpaceService`, made by ``make_writer``)
    ready to start from its own model, without loading the checkpoint
    (:meth:`Writer.adopt`); the writer then continues the stream after its last
    applied event, its own pending entries first. When the replica cannot hand
    over (it knows too little: nothing applied yet, or a writer of an older
    version) the writer starts from the checkpoint instead.
    """

    def __init__(
        self,
        settings: Settings,
        space: SpaceSettings,
        clients: ClientFactory,
        metrics: ServiceMetrics,
        replica_metrics: ReplicaMetrics,
        make_writer: Callable[[], SpaceService],
        observers: Sequence[Observer] = (),
        answer: bool = True,
    ) -> None:
        self.settings, self.space, self.clients = settings, space, clients
        self.replica = ReplicaSpace(
            settings, space, clients, metrics, replica_metrics, observers, writer_state=True
        )
        self.make_writer = make_writer
        self.answer = answer
        self.writer: SpaceService | None = None
        keys = settings.keys(space)
        self.probe = Lease(clients(), keys.lease, keys.epoch, settings.lease)

    def follow(self, stop: threading.Event) -> SpaceService | None:
        """Follow until the lease is free; then the writer to start (None on ``stop``)."""
        following = threading.Event()
        threads = self.replica.threads(following, answer=self.answer)
        for t in threads:
            t.start()
        poll_s = self.settings.lease.poll_every_ms / 1000
        free = False
        while not free and not stop.wait(poll_s):
            try:
                free = self.probe.holder_now() is None
            except REDIS_DOWN:
                continue
        following.set()
        for t in threads:
            t.join()
        if stop.is_set():
            return None
        log.info(
            "space %s: the writer lease is free; this standby becomes the writer", self.space.name
        )
        self.writer = self.make_writer()
        self.writer.handoff = self._handoff(self.writer)
        return self.writer

    def _handoff(self, writer: SpaceService) -> Followed | None:
        """Take the lease and bring the replica to the end of the applied log; what
        it followed, or None (then the writer loads the checkpoint)."""
        follower = self.replica.follower
        try:
            if not writer.lease.take():
                return None  # another standby was quicker: wait for the lease as a writer
            follower.drain(writer.lease.ensure)
        except Exception as exc:  # any doubt: the checkpoint path is always right
            log.warning(
                "space %s: the replica cannot hand over (%s: %s); loading the checkpoint",
                self.space.name,
                type(exc).__name__,
                exc,
            )
            return None
        got = follower.followed()
        if got is None:
            log.info(
                "space %s: the replica knows too little to hand over; loading the checkpoint",
                self.space.name,
            )
        return got


def run_space(space: SpaceService, stop: threading.Event) -> None:
    """Run a space's threads until ``stop`` or until they end on their own (its
    consumer stops them all when it loses the lease or cannot start)."""
    own = threading.Event()
    threads = space.threads(own)
    for t in threads:
        t.start()
    while any(t.is_alive() for t in threads) and not stop.wait(0.1):
        pass
    own.set()  # on ``stop``: the final checkpoint, then the lease is given back
    for t in threads:
        t.join()


class SpaceRunner:
    """One space of a process that is not a pool member, for the process's life:
    its writer, or a standby of it, and back.

    A writer that loses its lease (paused or cut off from Redis past
    ``lease_ms``) stops writing that space at once (:meth:`SpaceService.consume`:
    one log line, ``streamrate_writer_leases_lost_total``); only that space's
    threads end, the process's other spaces go on. The space then runs as a
    :class:`Standby`: a replica, loaded from the checkpoint (the stopped writer's
    model may hold events its fenced log refused), follows the new writer and
    takes the lease again when it is free. ``first`` is the writer to start
    with (roles ``writer``, ``both``), or None to start as a standby.
    A checkpoint that does not fit (:class:`CheckpointRefusedError`) stops the
    whole process (``fatal``).
    """

    def __init__(
        self,
        name: str,
        first: SpaceService | None,
        make_standby: Callable[[], Standby],
    ) -> None:
        self.name, self.first, self.make_standby = name, first, make_standby
        self.writer: SpaceService | None = first
        self.standby: Standby | None = None
        self.fatal: ServiceError | None = None

    def run(self, stop: threading.Event) -> None:
        writer = self.first
        while not stop.is_set():
            if writer is None:
                self.standby = self.make_standby()
                writer = self.standby.follow(stop)
                if writer is None:
                    return
            self.writer = writer
            run_space(writer, stop)
            if isinstance(writer.fatal, CheckpointRefusedError):
                self.fatal = writer.fatal
                stop.set()  # refused settings stop the process (exit code 2)
                return
            if not isinstance(writer.fatal, LeaseLostError) or stop.is_set():
                return
            log.info(
                "space %s: following the new writer as a standby; writing again once the "
                "lease is free",
                self.name,
            )
            writer = None


def _live_recalibrators(consumer: Writer) -> dict[str, OnlineRecalibrator]:
    return recalibrators_of(consumer.live.model)


class Service:
    """All spaces of one process; ``run`` blocks until ``stop`` is set."""

    def __init__(
        self,
        settings: Settings,
        clients: ClientFactory,
        registry: CollectorRegistry | None = None,
        observers: Sequence[Observer] = (),
        clock: Callable[[], float] = time.monotonic,
        role: Role = "both",
    ) -> None:
        self.settings = settings
        self.role = role
        self.registry = registry or CollectorRegistry()
        self.metrics = ServiceMetrics(self.registry, [s.name for s in settings.spaces])
        self.replicas: list[ReplicaSpace] = []
        self.spaces: list[SpaceService] = []
        self.runners: list[SpaceRunner] = []
        self.pool: PoolMember | None = None
        self.threads: list[threading.Thread] = []
        self._replica_metrics: ReplicaMetrics | None = None
        if role == "shared":
            self.quality = QualityMetrics(self.registry)
            self.pool = self._pool_member(clients, observers, clock)
            return
        if role == "responder":
            rm = self.replica_metrics()
            self.replicas = [
                ReplicaSpace(settings, s, clients, self.metrics, rm) for s in settings.spaces
            ]
            return
        self.quality = QualityMetrics(self.registry)
        if role != "standby":
            self.spaces = [
                self._space_service(clients, observers, clock, s, role) for s in settings.spaces
            ]
        first = dict(zip([s.name for s in settings.spaces], self.spaces, strict=False))
        for s in settings.spaces:
            make = partial(self._standby, clients, observers, clock, s, role)
            self.runners.append(SpaceRunner(s.name, first.get(s.name), make))

    def replica_metrics(self) -> ReplicaMetrics:
        """The replica series of this registry, made once (a writer that lost its
        lease follows as a standby: then it needs them too)."""
        with _REPLICA_METRICS_LOCK:
            if self._replica_metrics is None:
                names = [s.name for s in self.settings.spaces]
                self._replica_metrics = ReplicaMetrics(self.registry, names)
            return self._replica_metrics

    def _with_quality(self, observers: Sequence[Observer], space: SpaceSettings) -> list[Observer]:
        """``observers`` and the quality observers of ``space`` (which do not export:
        the gauges are exported by the process writing the space)."""
        return [
            *observers,
            *quality_observers(space.name, space.quality, self.quality, exporting=False),
        ]

    def _standby(
        self,
        clients: ClientFactory,
        observers: Sequence[Observer],
        clock: Callable[[], float],
        space: SpaceSettings,
        role: Role,
    ) -> Standby:
        """A standby of ``space``; its writer has the process's role (``both`` for a standby)."""
        # The replica feeds the same observers the writer goes on with.
        obs = self._with_quality(observers, space)
        writer_role: Role = "writer" if role == "writer" else "both"
        make = partial(self._space_service, clients, obs, clock, space, writer_role, own=True)
        return Standby(
            self.settings,
            space,
            clients,
            self.metrics,
            self.replica_metrics(),
            make,
            obs,
            answer=role != "writer",
        )

    def _space_service(
        self,
        clients: ClientFactory,
        observers: Sequence[Observer],
        clock: Callable[[], float],
        space: SpaceSettings,
        role: Role,
        holder: str | None = None,
        own: bool = False,
    ) -> SpaceService:
        """The writer of a space (``own``: ``observers`` are the space's own already,
        the quality observers among them)."""
        if not own:
            observers = self._with_quality(observers, space)
        sp = SpaceService(
            self.settings,
            space,
            clients,
            self.metrics,
            observers,
            clock=clock,
            role=role,
            holder=holder,
        )
        for obs in sp.consumer.observers:  # the recalibration gauges follow the live model
            if isinstance(obs, QualityObserver):
                obs.recalibrators = partial(_live_recalibrators, sp.consumer)
        return sp

    def _pool_member(
        self, clients: ClientFactory, observers: Sequence[Observer], clock: Callable[[], float]
    ) -> PoolMember:
        by_name = {s.name: s for s in self.settings.spaces}
        probe = clients()
        lease_keys = {s.name: self.settings.keys(s).lease for s in self.settings.spaces}
        me = holder_id()
        pool = self.settings.pool

        def make_space(name: str) -> SpaceService:
            return self._space_service(clients, observers, clock, by_name[name], "both", me)

        def owner_of(name: str) -> str | None:
            got = probe.get(lease_keys[name])  # "<holder> <epoch>"; the holder is a member id
            return None if got is None else got.decode().rpartition(" ")[0]

        def try_take(sp: Any) -> bool:
            return bool(sp.lease.take())

        def on_change(members: int, held: int) -> None:
            self.metrics.pool_members.set(members)
            self.metrics.pool_spaces.set(held)

        return PoolMember(
            Membership(probe, self.settings.pool_key(), me, pool.member_ttl_ms),
            list(by_name),
            make_space,
            try_take,
            owner_of,
            pool.heartbeat_ms,
            on_change,
        )

    def start(self, stop: threading.Event) -> None:
        m = self.settings.metrics
        if m.enabled:
            serve_metrics(self.registry, m.bind, m.port)
        for run in self.runners:
            self.threads.append(
                threading.Thread(
                    target=run.run, args=(stop,), name=f"space-{run.name}", daemon=True
                )
            )
            if run.first is None:
                log.info("space %s: standby following the writer", run.name)
        if self.pool is not None:
            self.threads.append(
                threading.Thread(target=self.pool.run, args=(stop,), name="pool", daemon=True)
            )
            log.info(
                "pool %s: sharing %d spaces with the other members",
                self.settings.pool.name,
                len(self.settings.spaces),
            )
        for rp in self.replicas:
            self.threads += rp.threads(stop)
            log.info("space %s: responder %s following the writer", rp.space.name, rp.stream.name)
        for t in self.threads:
            t.start()

    def join(self) -> None:
        for t in self.threads:
            t.join()

    def run(self, stop: threading.Event) -> None:
        """Run until ``stop``; :class:`CheckpointRefusedError` when a space could not start."""
        self.start(stop)
        while not stop.is_set():
            stop.wait(0.5)
        self.join()
        for run in self.runners:
            if run.fatal is not None:
                raise run.fatal
        if self.pool is not None and self.pool.fatal is not None:
            raise self.pool.fatal


def serve_forever(settings: Settings, clients: ClientFactory, role: Role = "both") -> int:
    """Run until SIGTERM/SIGINT; return the exit code."""
    stop = threading.Event()

    def on_signal(signum: int, _frame: object) -> None:
        log.info("signal %d: finishing the batch in hand, then checkpointing", signum)
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    # Queries and the consumer share the GIL. With Python's default switch
    # interval (5 ms) a query arriving while a batch is being applied waits for
    # the whole interval; a shorter one bounds that wait (bench/bench_service.py
    # measures query latency while the consumer is busy).
    sys.setswitchinterval(QUERY_SWITCH_INTERVAL_S)
    service = Service(settings, clients, role=role)
    tune_gc()
    service.run(stop)
    return 0
