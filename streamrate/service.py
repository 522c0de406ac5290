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

import json
import logging
import math
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
from streamrate.consumer import Consumer, Observer
from streamrate.errors import CheckpointRefusedError, EventError, ServiceError
from streamrate.events import Matchup
from streamrate.livefeed import WatchList
from streamrate.metrics import ServiceMetrics, serve_metrics
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.quality_metrics import QualityMetrics, QualityObserver, quality_observers
from streamrate.queries import MAX_WATCH, Answerer, QueryError, WatchRequest, handle
from streamrate.recalibrate import OnlineRecalibrator, recalibrators_of

log = logging.getLogger("streamrate.service")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError)
QUERY_SWITCH_INTERVAL_S = 0.0002
ClientFactory = Callable[[], Any]


def redis_factory(settings: RedisSettings) -> ClientFactory:
    """A function giving a new client per call (each thread owns its connections)."""
    if settings.url is None:
        raise ServiceError("no Redis URL given (use --redis-url or redis.url in the settings)")
    url = settings.url

    def make() -> redis.Redis:
        return redis.Redis.from_url(
            url,
            socket_timeout=settings.socket_timeout_s,
            socket_connect_timeout=settings.connect_timeout_s,
            retry_on_timeout=False,
        )

    return make


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
    ) -> None:
        self.settings, self.space, self.clients, self.metrics = settings, space, clients, metrics
        self.keys = settings.keys(space)
        self.watch = WatchList(limit=4 * MAX_WATCH)
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
        self.fatal: CheckpointRefusedError | None = None  # set when the space cannot start
        self.listening = threading.Event()  # the query responder is subscribed
        self.q = settings.queries
        self.answerer = Answerer(self.consumer.live, self.q.lobby_exact_max, self.q.lobby_max)

    # -- consumer thread --------------------------------------------------------
    def consume(self, stop: threading.Event) -> None:
        """The consumer loop. A checkpoint that does not fit the settings ends it
        and stops the service (``self.fatal``); Redis outages and loop errors back
        off and are retried, the status the queries see saying why meanwhile."""
        rs = self.settings.redis
        lbl = {"space": self.space.name}
        connected = self.metrics.redis_connected.labels(**lbl)
        outage = Outage(
            f"consumer {self.space.name}",
            rs.reconnect_min_s,
            rs.reconnect_max_s,
            self.metrics.reconnects.labels(**lbl).inc,
        )
        errors = LoopErrors(f"space {self.space.name}", rs.reconnect_min_s, rs.reconnect_max_s)
        streak = self.metrics.error_streak.labels(**lbl)
        c = self.consumer
        must_recover = True
        while not stop.is_set():
            try:
                if must_recover:
                    c.recover(stop)
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
                stop.set()  # the service does not start on a checkpoint it cannot use
                return
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
                return
            except REDIS_DOWN as exc:
                if time.monotonic() > deadline:
                    log.error("space %s: could not write the final checkpoint", self.space.name)
                    return
                outage.failed(exc, threading.Event())

    # -- query thread -------------------------------------------------------------
    def on_watch(self, req: WatchRequest) -> dict[str, Any]:
        specs = []
        for i, p in enumerate(req.pairings):
            try:
                Matchup(first=p.first, second=p.second, context=p.context)
            except ValueError as exc:
                raise QueryError(f"pairings.{i}: {exc}") from exc
            specs.append((p.first, p.second, dict(p.context)))
        if req.action == "set":
            n = self.watch.set(specs)
        elif req.action == "add":
            n = self.watch.add(specs)
        else:
            n = self.watch.clear()
        return {"watching": n, "live_channel": self.keys.live}

    def answer(self, raw: bytes) -> tuple[str, str]:
        """Reply channel and JSON reply for one raw request (never raises)."""
        t0 = time.perf_counter()
        try:
            reply_to, body, kind = handle(
                raw, self.answerer, self.on_watch, self.q.max_request_bytes
            )
        except (EventError, QueryError, ValueError) as exc:
            reply_to, body, kind = None, {"id": None, "ok": False, "error": str(exc)}, "invalid"
        outcome = "ok" if body.get("ok") else "error"
        self.metrics.queries.labels(space=self.space.name, kind=kind, outcome=outcome).inc()
        self.metrics.query_seconds.labels(space=self.space.name, kind=kind).observe(
            time.perf_counter() - t0
        )
        return reply_to or self.keys.errors, json.dumps(body)

    def respond(self, stop: threading.Event) -> None:
        rs = self.settings.redis
        outage = Outage(f"queries {self.space.name}", rs.reconnect_min_s, rs.reconnect_max_s, _noop)
        while not stop.is_set():
            client = None
            try:
                client = self.clients()
                pubsub = client.pubsub(ignore_subscribe_messages=True)
                pubsub.subscribe(self.keys.requests)
                pubsub.get_message(timeout=1.0)  # the subscribe confirmation
                outage.ok()
                self.listening.set()
                while not stop.is_set():
                    msg = pubsub.get_message(timeout=0.2)
                    if msg is None or msg.get("type") != "message":
                        continue
                    try:
                        channel, reply = self.answer(msg["data"])
                    except Exception:  # loop boundary: a reply must not kill the responder
                        log.exception("space %s: error answering a query", self.space.name)
                        continue
                    client.publish(channel, reply)
                pubsub.close()
            except REDIS_DOWN as exc:
                outage.failed(exc, stop)
            finally:
                if client is not None:
                    client.close()


def _live_recalibrators(consumer: Consumer) -> dict[str, OnlineRecalibrator]:
    return recalibrators_of(consumer.live.model)


def _noop() -> None:
    return None


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
        """Run until ``stop``; :class:`CheckpointRefusedError` when a space could not start."""
        self.start(stop)
        while not stop.is_set():
            stop.wait(0.5)
        self.join()
        for sp in self.spaces:
            if sp.fatal is not None:
                raise sp.fatal


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
