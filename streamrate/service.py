"""Running the service: threads per space, signals, reconnect with backoff, drain.

Per model space two threads run: the consumer (:mod:`streamrate.consumer`) and
the query responder (pub/sub, its own Redis connection, reads the live model
under its lock). ``SIGTERM``/``SIGINT`` set a stop flag: the consumer finishes
the batch in hand, writes a final checkpoint, acknowledges and the process
exits 0.

When Redis goes away each thread logs the outage once, retries with doubling
back-off (``reconnect_min_s`` .. ``reconnect_max_s``) and logs the recovery; the
consumer then re-reads its own pending entries after its last handled id.
"""

from __future__ import annotations

import logging
import signal
import sys
import threading
import time
from collections.abc import Callable, Sequence
from functools import partial
from typing import Any

import redis
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import CheckpointStore, FileCheckpointStore, RedisCheckpointStore
from streamrate.config import RedisSettings, Settings, SpaceSettings
from streamrate.connect import RedisClients
from streamrate.consumer import Consumer, Observer
from streamrate.livefeed import WatchRegistry
from streamrate.metrics import ServiceMetrics, serve_metrics
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.quality_metrics import QualityMetrics, QualityObserver, quality_observers
from streamrate.queries import MAX_WATCH
from streamrate.recalibrate import OnlineRecalibrator, recalibrators_of
from streamrate.responder import Responder

log = logging.getLogger("streamrate.service")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError)
QUERY_SWITCH_INTERVAL_S = 0.0002
ClientFactory = Callable[[], Any]


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
    ) -> None:
        self.settings, self.space, self.clients, self.metrics = settings, space, clients, metrics
        self.keys = settings.keys(space)
        self.watch = WatchRegistry(MAX_WATCH, settings.queries.max_watchers)
        client = clients()
        store: CheckpointStore
        if settings.checkpoint.store == "redis":
            store = RedisCheckpointStore(client, self.keys.ckpt)
        else:
            store = FileCheckpointStore(settings.checkpoint.dir, space.name)
        builder = model_builder or (lambda: build_model(space.model, **space.model_settings))
        self.consumer = Consumer(
            client, space, self.keys, store, metrics, builder, self.watch, observers, clock
        )
        self.ready = threading.Event()  # the consumer has recovered and is reading
        self.q = settings.queries
        self.responder = Responder(
            settings, space, self.keys, clients, metrics, self.consumer.live, self.watch
        )
        self.listening = self.responder.listening  # the query responder is subscribed
        self.answerer = self.responder.answerer

    # -- consumer thread --------------------------------------------------------
    def consume(self, stop: threading.Event) -> None:
        rs = self.settings.redis
        lbl = {"space": self.space.name}
        outage = Outage(
            f"consumer {self.space.name}",
            rs.reconnect_min_s,
            rs.reconnect_max_s,
            self.metrics.reconnects.labels(**lbl, role="consumer").inc,
        )
        c = self.consumer
        must_recover = True
        while not stop.is_set():
            try:
                if must_recover:
                    c.recover(stop)
                    must_recover = False
                    self.ready.set()
                elif outage.since is not None:
                    c.resync()  # a read reply may have been lost with the connection
                c.step()
                outage.ok()
            except REDIS_DOWN as exc:
                outage.failed(exc, stop)
            except Exception:  # loop boundary: log, count, rebuild from the checkpoint
                log.exception("space %s: error in the consumer loop", self.space.name)
                self.metrics.loop_errors.labels(**lbl).inc()
                c.failed()
                must_recover = True
                stop.wait(rs.reconnect_min_s)
        if must_recover:
            return  # nothing applied since the last durable checkpoint
        deadline = time.monotonic() + 30.0
        while True:
            try:
                c.close()
                log.info("space %s: final checkpoint at %s", self.space.name, c.ckpt_id)
                return
            except REDIS_DOWN as exc:
                if time.monotonic() > deadline:
                    log.error("space %s: could not write the final checkpoint", self.space.name)
                    return
                outage.failed(exc, threading.Event())

    # -- query threads (streamrate.responder) -------------------------------------------
    def respond(self, stop: threading.Event) -> None:
        rs = self.settings.redis
        reconnects = self.metrics.reconnects.labels(space=self.space.name, role="queries")

        def outage_of(role: str) -> Outage:
            # Counted under role="queries", apart from the consumer's outages.
            return Outage(
                f"{role} {self.space.name}", rs.reconnect_min_s, rs.reconnect_max_s, reconnects.inc
            )

        self.responder.run(stop, outage_of)


def _live_recalibrators(consumer: Consumer) -> dict[str, OnlineRecalibrator]:
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
    ) -> None:
        self.settings = settings
        self.registry = registry or CollectorRegistry()
        self.metrics = ServiceMetrics(self.registry, [s.name for s in settings.spaces])
        self.quality = QualityMetrics(self.registry)
        self.spaces = [
            SpaceService(
                settings,
                s,
                clients,
                self.metrics,
                [*observers, *quality_observers(s.name, s.quality, self.quality)],
                clock=clock,
            )
            for s in settings.spaces
        ]
        for sp in self.spaces:  # the recalibration gauges follow the live model
            for obs in sp.consumer.observers:
                if isinstance(obs, QualityObserver):
                    obs.recalibrators = partial(_live_recalibrators, sp.consumer)
        self.threads: list[threading.Thread] = []

    def start(self, stop: threading.Event) -> None:
        m = self.settings.metrics
        if m.enabled:
            serve_metrics(self.registry, m.bind, m.port)
        for sp in self.spaces:
            for target, role in ((sp.consume, "consumer"), (sp.respond, "queries")):
                t = threading.Thread(
                    target=target, args=(stop,), name=f"{role}-{sp.space.name}", daemon=True
                )
                t.start()
                self.threads.append(t)

    def join(self) -> None:
        for t in self.threads:
            t.join()

    def run(self, stop: threading.Event) -> None:
        self.start(stop)
        while not stop.is_set():
            stop.wait(0.5)
        self.join()


def serve_forever(settings: Settings, clients: ClientFactory) -> int:
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
    Service(settings, clients).run(stop)
    return 0
