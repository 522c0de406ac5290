"""The query responder of one space: subscribe, admit, answer, reply.

Two threads per space, both supervised (an unexpected error restarts the loop,
counted in ``streamrate_query_loop_restarts_total``)::

    subscriber: SUBSCRIBE {sr:space}:q -> peek (id, reply_to, kind) -> FairQueue
    answerer:   FairQueue -> validate -> answer (model lock in slices) -> PUBLISH reply

(In a Redis Cluster: SSUBSCRIBE and SPUBLISH, see :mod:`streamrate.pubsub`.)

Everything done for one request (validation, answer, the reply's PUBLISH) sits
inside that request's error handling: a request that fails is one error reply
(when one can be sent), one rate-limited log line and one count in
``streamrate_query_failed_total``; the next request is answered as usual.

Admission control, so that a flood of questions can neither starve the
consumer nor bury other clients' questions:

* the queue is bounded in total and per client (the client is the part of
  ``reply_to`` after the reply namespace, up to the next ``:``); it is served
  round robin over clients. Requests that do not fit get an immediate
  ``{"ok": false, "error": "busy: ..."}``; expensive kinds (lobby, compare) are
  refused once the queue is half full;
* a request that waited longer than ``max_wait_s`` gets "busy" rather than an
  answer nobody waits for;
* the query side's CPU time is capped at ``cpu_share`` of a core (a token
  bucket on thread CPU time): when it is spent, both threads pause and the
  consumer has the interpreter;
* the subscriber publishes a probe on the request channel every
  ``probe_every_s``; a probe that has not come back within ``max_wait_s`` means
  the backlog queued in Redis is older than any useful answer: the
  subscription is dropped (its backlog with it) and renewed, counted in
  ``streamrate_query_resubscribes_total`` (as is a subscription connection
  that Redis closes, for example on output-buffer overflow).
"""

from __future__ import annotations

import collections
import contextlib
import json
import logging
import threading
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import redis

from streamrate.config import Settings, SpaceKeys, SpaceSettings
from streamrate.errors import EventError
from streamrate.events import Matchup
from streamrate.metrics import ServiceMetrics
from streamrate.pubsub import Subscriber, publish
from streamrate.serve.livefeed import SHARED_WATCHER, WatchRegistry
from streamrate.serve.queries import (
    EXPENSIVE_KINDS,
    MAX_ERROR_CHARS,
    Answerer,
    ModelView,
    QueryError,
    WatchRequest,
    handle,
    in_namespace,
    peek,
)

log = logging.getLogger("streamrate.queries")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError)
ClientFactory = Callable[[], Any]
PROBE_KIND = "probe"


class LogLimiter:
    """At most one log line per key per ``every_s``; the next one says how many were held back."""

    def __init__(self, every_s: float = 10.0, clock: Callable[[], float] = time.monotonic) -> None:
        self.every_s, self.clock = every_s, clock
        self._last: dict[str, float] = {}
        self._held: dict[str, int] = {}
        self._lock = threading.Lock()

    def __call__(self, key: str, level: int, msg: str, *args: object) -> bool:
        now = self.clock()
        with self._lock:
            last = self._last.get(key)
            if last is not None and now - last < self.every_s:
                self._held[key] = self._held.get(key, 0) + 1
                return False
            self._last[key] = now
            held = self._held.pop(key, 0)
        if held:
            msg += " (and %d more like it since the last such line)"
            args = (*args, held)
        log.log(level, msg, *args)
        return True


def client_of(reply_to: str | None, prefix: str) -> str:
    """The fairness key of a request: ``{..}:q:reply:<client>:...`` -> ``<client>``."""
    if reply_to is None or not reply_to.startswith(prefix):
        return ""
    rest = reply_to[len(prefix) :]
    return rest.split(":", 1)[0][:64]


@dataclass
class Item:
    raw: bytes
    arrived: float
    cid: str | None
    reply_to: str | None
    kind: str | None
    client: str


@dataclass
class FairQueue:
    """Bounded per-client queues served round robin; ``offer`` returns what it sheds."""

    max_total: int
    max_per_client: int
    _queues: dict[str, collections.deque[Item]] = field(default_factory=dict)
    _turn: collections.OrderedDict[str, None] = field(default_factory=collections.OrderedDict)
    _size: int = 0
    _cond: threading.Condition = field(default_factory=threading.Condition)

    def __len__(self) -> int:
        return self._size

    def offer(self, item: Item) -> list[tuple[Item, str]]:
        """Queue ``item``; returns the (item, reason) pairs shed to make room (maybe itself)."""
        with self._cond:
            own = self._queues.get(item.client)
            own_len = 0 if own is None else len(own)
            if own_len >= self.max_per_client:
                return [(item, "client_queue_full")]
            if item.kind in EXPENSIVE_KINDS and 2 * self._size >= self.max_total:
                return [(item, "expensive")]
            shed: list[tuple[Item, str]] = []
            if self._size >= self.max_total:
                longest = max(self._queues, key=lambda c: len(self._queues[c]))
                if len(self._queues[longest]) <= own_len + 1:
                    return [(item, "queue_full")]
                shed.append((self._pop(longest, newest=True), "queue_full"))
            if own is None:
                own = self._queues[item.client] = collections.deque()
            own.append(item)
            self._turn[item.client] = None
            self._size += 1
            self._cond.notify()
            return shed

    def _pop(self, client: str, newest: bool = False) -> Item:
        q = self._queues[client]
        item = q.pop() if newest else q.popleft()
        self._size -= 1
        if not q:
            del self._queues[client]
            self._turn.pop(client, None)
        return item

    def take(self, timeout_s: float) -> Item | None:
        """The next item, round robin over clients; None after ``timeout_s`` with none."""
        with self._cond:
            if not self._size and not self._cond.wait_for(lambda: self._size > 0, timeout_s):
                return None
            client = next(iter(self._turn))
            item = self._pop(client)
            if client in self._turn:
                self._turn.move_to_end(client)  # its next one waits for everyone else's
            return item


class CpuBudget:
    """A token bucket on thread CPU time shared by the query threads.

    Each thread reports the CPU time it used; when the bucket is empty it
    sleeps long enough to bring the query side back to ``share`` of a core.
    """

    def __init__(
        self, share: float, burst_s: float = 0.02, clock: Callable[[], float] = time.monotonic
    ) -> None:
        self.share, self.burst_s, self.clock = share, burst_s, clock
        self._tokens = burst_s
        self._at = clock()
        self._lock = threading.Lock()

    def charge(self, cpu_s: float, stop: threading.Event) -> float:
        """Take ``cpu_s``; wait while in debt (returns the wait)."""
        with self._lock:
            now = self.clock()
            self._tokens = min(self.burst_s, self._tokens + (now - self._at) * self.share)
            self._at = now
            self._tokens -= cpu_s
            debt = -self._tokens
        if debt <= 0:
            return 0.0
        wait = debt / self.share
        stop.wait(wait)
        return wait


class _Meter:
    """CPU time of the calling thread since the last ``charge``."""

    def __init__(self, budget: CpuBudget) -> None:
        self.budget = budget
        self.at = time.thread_time()

    def charge(self, stop: threading.Event) -> None:
        now = time.thread_time()
        self.budget.charge(now - self.at, stop)
        self.at = time.thread_time()


def busy_reply(cid: str | None, why: str) -> str:
    return json.dumps({"id": cid, "ok": False, "busy": True, "error": f"busy: {why}"})


class Responder:
    """Query side of one space (see the module docstring)."""

    def __init__(
        self,
        settings: Settings,
        space: SpaceSettings,
        keys: SpaceKeys,
        clients: ClientFactory,
        metrics: ServiceMetrics,
        view: ModelView,
        watch: WatchRegistry,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.settings, self.space, self.keys = settings, space, keys
        self.clients, self.metrics, self.watch, self.clock = clients, metrics, watch, clock
        self.q = settings.queries
        self.answerer = Answerer(
            view, self.q.lobby_exact_max, self.q.lobby_max, pairs_per_lock=self.q.pairs_per_lock
        )
        self.queue = FairQueue(self.q.queue_max, self.q.queue_per_client)
        self.budget = CpuBudget(self.q.cpu_share)
        self.outbox: collections.deque[tuple[str, str]] = collections.deque(maxlen=4096)
        self.listening = threading.Event()  # subscribed to the request channel
        self.logs = LogLimiter()
        self._lbl = {"space": space.name}
        self._nonce = uuid.uuid4().hex
        self._probe_sent: float | None = None
        self._last_probe = 0.0
        self._renewed = False

    # -- watch requests -------------------------------------------------------------
    def on_watch(self, req: WatchRequest) -> dict[str, Any]:
        specs = []
        for i, p in enumerate(req.pairings):
            try:
                Matchup(first=p.first, second=p.second, context=p.context)
            except ValueError as exc:
                raise QueryError(f"pairings.{i}: {exc}"[:MAX_ERROR_CHARS]) from exc
            specs.append((p.first, p.second, dict(p.context)))
        watcher = SHARED_WATCHER if req.watcher is None else req.watcher
        ttl_s = min(req.ttl_s or self.q.watch_ttl_s, self.q.watch_ttl_s)
        try:
            if req.action == "set":
                n = self.watch.set(watcher, specs, ttl_s)
            elif req.action == "add":
                n = self.watch.add(watcher, specs, ttl_s)
            elif req.action == "renew":
                n = self.watch.renew(watcher, ttl_s)
            else:
                n = self.watch.clear(watcher)
        except EventError as exc:
            raise QueryError(str(exc)) from exc
        self.metrics.watchers.labels(**self._lbl).set(self.watch.watchers())
        return {
            "watching": n,
            "watcher": req.watcher,
            "live_channel": self.keys.live_of(watcher),
            "ttl_s": ttl_s,
        }

    # -- one request ----------------------------------------------------------------
    def answer(self, raw: bytes) -> tuple[str, str]:
        """Reply channel and JSON reply for one raw request (raises only on a bug)."""
        t0 = time.perf_counter()
        reply_to, body, kind = handle(
            raw,
            self.answerer,
            self.on_watch,
            self.q.max_request_bytes,
            reply_prefix=self.keys.reply_prefix,
            max_cost=self.q.max_request_cost,
        )
        outcome = "ok" if body.get("ok") else "error"
        self.metrics.queries.labels(space=self.space.name, kind=kind, outcome=outcome).inc()
        self.metrics.query_seconds.labels(space=self.space.name, kind=kind).observe(
            time.perf_counter() - t0
        )
        if not body.get("ok") and reply_to is None:
            self.logs(
                "refused",
                logging.INFO,
                "space %s: refused a request: %s",
                self.space.name,
                str(body.get("error"))[:MAX_ERROR_CHARS],
            )
        return reply_to or self.keys.errors, json.dumps(body)

    def serve_one(self, client: Any, item: Item) -> None:
        """Answer and reply to one request; every failure stays inside this request."""
        name = self.space.name
        if self.clock() - item.arrived > self.q.max_wait_s:
            self._shed(item, "too_old")
            return
        try:
            channel, reply = self.answer(item.raw)
        except Exception as exc:  # per-request boundary: one error reply, count, go on
            self.metrics.query_failed.labels(space=name, stage="answer").inc()
            self.logs(
                "answer", logging.ERROR, "space %s: error answering a query: %s", name, _short(exc)
            )
            ok_reply = in_namespace(item.reply_to, self.keys.reply_prefix) and item.reply_to
            channel = item.reply_to if ok_reply and item.reply_to else self.keys.errors
            reply = json.dumps({"id": item.cid, "ok": False, "error": "internal error"})
        try:
            publish(client, channel, reply)
        except REDIS_DOWN:
            self.metrics.query_failed.labels(space=name, stage="publish").inc()
            raise  # the connection is gone: the loop's outage handling takes over
        except Exception as exc:  # e.g. NOPERM: the reply cannot go where it was asked
            self.metrics.query_failed.labels(space=name, stage="publish").inc()
            self.logs(
                "publish",
                logging.WARNING,
                "space %s: could not publish a reply: %s",
                name,
                _short(exc),
            )
            note = {"id": item.cid, "ok": False, "error": f"reply not delivered: {_short(exc)}"}
            with contextlib.suppress(Exception):  # best effort: already counted and logged
                publish(client, self.keys.errors, json.dumps(note))

    def _shed(self, item: Item, reason: str) -> None:
        self.metrics.query_shed.labels(space=self.space.name, reason=reason).inc()
        if in_namespace(item.reply_to, self.keys.reply_prefix) and item.reply_to is not None:
            waited = self.clock() - item.arrived
            why = {
                "too_old": f"waited {waited:.1f} s in the queue; ask again",
                "expensive": "the queue is half full; large requests wait for a quieter moment",
                "client_queue_full": "too many of your requests are waiting",
                "queue_full": "the request queue is full",
            }[reason]
            self.outbox.append((item.reply_to, busy_reply(item.cid, why)))

    # -- subscriber thread ------------------------------------------------------------
    def intake(self, raw: bytes) -> None:
        cid, reply_to, kind = peek(raw)
        if kind == PROBE_KIND:
            if self._nonce.encode() in raw:
                self._probe_sent = None  # our probe came back: the backlog is short
            return
        item = Item(
            raw, self.clock(), cid, reply_to, kind, client_of(reply_to, self.keys.reply_prefix)
        )
        for shed, reason in self.queue.offer(item):
            self._shed(shed, reason)
        self.metrics.query_queue.labels(**self._lbl).set(len(self.queue))

    def _probe(self, client: Any) -> bool:
        """Send a probe when due; False when the last one is overdue (backlog too old)."""
        now = self.clock()
        if self._probe_sent is not None:
            return now - self._probe_sent <= self.q.max_wait_s
        if self._last_probe + self.q.probe_every_s <= now:
            self._last_probe = now
            self._probe_sent = now
            probe = {"kind": PROBE_KIND, "nonce": self._nonce}
            publish(client, self.keys.requests, json.dumps(probe))
        return True

    def subscribe_loop(self, stop: threading.Event, outage: Any) -> None:
        """Subscribe and read until stopped; returns to renew the subscription."""
        name = self.space.name
        meter = _Meter(self.budget)
        client = self.clients()
        pubsub: Subscriber | None = None
        try:
            # SUBSCRIBE, or SSUBSCRIBE on the node of the space's slot in a cluster;
            # returns once the server confirmed it.
            pubsub = Subscriber(client, self.keys.requests)
            outage.ok()
            self.listening.set()
            self._probe_sent = None
            # redis-py reconnects a dropped subscription by itself (and subscribes
            # again); this callback makes each such renewal seen and counted.
            pubsub.connection.register_connect_callback(self._on_reconnect)
            while not stop.is_set():
                self._renewed = False
                try:
                    renewals = pubsub.renewals
                    msg = pubsub.get_message(timeout=0.1)
                    if pubsub.renewals != renewals:  # the slot moved; subscribed again
                        self._on_reconnect(None)
                except REDIS_DOWN:
                    if not self._renewed:  # not yet counted by the callback
                        self._on_reconnect(None)
                    return  # subscribe again (an outage if Redis is really gone)
                if msg is not None and msg.get("type") == "message":
                    self.intake(msg["data"])
                if not self._probe(client):
                    self.metrics.query_resubscribes.labels(space=name, reason="backlog").inc()
                    self.logs(
                        "backlog",
                        logging.WARNING,
                        "space %s: requests queued in Redis are older than %.1f s;"
                        " dropping them and subscribing again",
                        name,
                        self.q.max_wait_s,
                    )
                    return
                meter.charge(stop)
        finally:
            if pubsub is not None:
                pubsub.close()
            client.close()

    def _on_reconnect(self, _connection: Any) -> None:
        self._renewed = True
        self.metrics.query_resubscribes.labels(
            space=self.space.name, reason="connection_lost"
        ).inc()
        self._probe_sent = None
        self.logs(
            "lost",
            logging.WARNING,
            "space %s: the request subscription's connection was closed"
            " (for example on output-buffer overflow) or its cluster slot moved;"
            " subscribing again",
            self.space.name,
        )

    # -- answering thread -------------------------------------------------------------
    def answer_loop(self, stop: threading.Event, outage: Any) -> None:
        meter = _Meter(self.budget)
        client = self.clients()
        try:
            while not stop.is_set():
                self._flush_outbox(client)
                item = self.queue.take(0.1)
                if item is None:
                    continue
                self.metrics.query_queue.labels(**self._lbl).set(len(self.queue))
                self.serve_one(client, item)
                outage.ok()
                meter.charge(stop)
            self._flush_outbox(client)
        finally:
            client.close()

    def _flush_outbox(self, client: Any) -> None:
        if not self.outbox:
            return
        pipe = client.pipeline(transaction=False)
        n = 0
        while self.outbox and n < 500:
            channel, reply = self.outbox.popleft()
            publish(pipe, channel, reply)
            n += 1
        for res in pipe.execute(raise_on_error=False):
            if isinstance(res, Exception):
                self.metrics.query_failed.labels(space=self.space.name, stage="publish").inc()

    # -- supervision ----------------------------------------------------------------------
    def supervise(
        self,
        loop: str,
        body: Callable[[threading.Event], None],
        stop: threading.Event,
        outage: Any,
    ) -> None:
        """Run ``body`` until ``stop``; Redis outages back off, anything else restarts it."""
        rs = self.settings.redis
        delay = rs.reconnect_min_s
        while not stop.is_set():
            try:
                body(stop)
                delay = rs.reconnect_min_s
            except REDIS_DOWN as exc:
                outage.failed(exc, stop)
            except Exception as exc:  # loop boundary: log, count, start the loop again
                self.metrics.query_restarts.labels(space=self.space.name, loop=loop).inc()
                self.logs(
                    f"restart-{loop}",
                    logging.ERROR,
                    "space %s: the query %s loop failed (%s); starting it again",
                    self.space.name,
                    loop,
                    _short(exc),
                )
                stop.wait(delay)
                delay = min(delay * 2, rs.reconnect_max_s)

    def run(self, stop: threading.Event, outage_of: Callable[[str], Any]) -> None:
        """Both loops until ``stop`` (the answerer in its own thread)."""
        ans_outage = outage_of("answers")
        answerer = threading.Thread(
            target=self.supervise,
            args=("answerer", lambda s: self.answer_loop(s, ans_outage), stop, ans_outage),
            name=f"answers-{self.space.name}",
            daemon=True,
        )
        answerer.start()
        sub_outage = outage_of("queries")
        self.supervise("subscriber", lambda s: self.subscribe_loop(s, sub_outage), stop, sub_outage)
        answerer.join()


def _short(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {exc}"[:MAX_ERROR_CHARS]
