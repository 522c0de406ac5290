"""Responders sharing the questions of a space through a request stream.

Clients ``XADD`` a request (field ``request`` = today's JSON request, same
``reply_to`` namespace, same reply) to ``{sr:space}:q:stream``. Every responder
is a consumer of one group (``responders``) on it, so ``XREADGROUP`` hands each
request to exactly one responder; a responder joins by reading and needs no
restart of anything else. Loop of one responder::

    XREADGROUP > (COUNT, BLOCK) -> older than request_max_age_s: busy reply (not answered late)
                                -> promote, watch: PUBLISH on {sr:space}:q (the writer answers;
                                   it holds the live feed and makes promotions)
                                -> otherwise: answer from this replica's model, PUBLISH reply
                                -> XACK the batch

A responder reads only while its model is ready (loaded, following). A
responder that dies loses the requests it had read and not answered (their
clients time out and ask again); those entries stay pending under its name
until a living responder takes them over with ``XAUTOCLAIM`` once they are
older than the age limit, and acknowledges them unanswered (counted as
``too_old`` sheds).

Measured against pub/sub with a claim in ``bench/bench_readers.py`` (see README):
with a consumer group each request costs the responder one read and one
acknowledgement, shared by the batch, and no request is seen by more than one
responder; with pub/sub every responder would receive every request and all
but one would throw it away after a claim round trip.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import threading
import time
import uuid
from typing import Any

import redis

from streamrate.config import RedisSettings, ReplicaSettings, SpaceKeys, SpaceSettings
from streamrate.errors import ReadCutError
from streamrate.metrics import ServiceMetrics
from streamrate.pubsub import publish
from streamrate.serve.queries import peek
from streamrate.serve.responder import Responder, _Meter, busy_reply
from streamrate.stream.apply import now_ms
from streamrate.stream.reader import read_cut, rows_of

log = logging.getLogger("streamrate.queries")
REDIS_DOWN = (redis.ConnectionError, redis.TimeoutError)
REQUEST_FIELD = b"request"
FORWARDED_KINDS = frozenset({"promote", "watch"})
READ_COUNT = 32
CLAIM_EVERY_S = 2.0


def responder_name() -> str:
    """A consumer name unique to this process and thread."""
    host = socket.gethostname().replace(":", "-")[:32] or "host"
    return f"{host}-{os.getpid()}-{uuid.uuid4().hex[:8]}"


class StreamResponder:
    """One consumer of the request stream, answering through ``responder`` (its model)."""

    def __init__(
        self,
        space: SpaceSettings,
        keys: SpaceKeys,
        settings: ReplicaSettings,
        responder: Responder,
        metrics: ServiceMetrics,
        name: str | None = None,
        share_cpu: bool = False,
    ) -> None:
        self.space, self.keys, self.settings = space, keys, settings
        # In the writer's process (role "both") answers count against the query
        # side's CPU share (``queries.cpu_share``), as the pub/sub answers do, so
        # that a flood on the stream cannot take the consumer's interpreter time.
        self.share_cpu = share_cpu
        self.responder, self.metrics = responder, metrics
        self.name = name or responder_name()
        self.ready = threading.Event()
        self.answered = 0
        self.forwarded = 0
        self.dropped = 0
        self._claimed_at = 0.0

    def ensure_group(self, client: Any) -> None:
        try:
            client.xgroup_create(
                self.keys.request_stream, self.settings.group, id="$", mkstream=True
            )
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise

    def step(self, client: Any, block_ms: int = 100) -> int:
        """Read, answer and acknowledge one batch; returns requests handled."""
        try:
            resp = client.xreadgroup(
                self.settings.group,
                self.name,
                {self.keys.request_stream: ">"},
                count=READ_COUNT,
                block=block_ms,
            )
        except redis.ResponseError as exc:
            raise read_cut(exc, self.keys.request_stream) from exc  # ReadCutError: read again
        rows = rows_of(resp)
        if rows:
            self._handle(client, rows)
        if time.monotonic() - self._claimed_at >= CLAIM_EVERY_S:
            self._drop_orphans(client)
        return len(rows)

    def _handle(self, client: Any, rows: list[tuple[bytes, dict[bytes, bytes]]]) -> None:
        max_age_ms = self.settings.request_max_age_s * 1000
        out: list[tuple[str, str]] = []
        for sid, fields in rows:
            raw = fields.get(REQUEST_FIELD, b"")
            cid, reply_to, kind = peek(raw)
            # Aged at its own turn, not at the read: answering the batch's earlier
            # requests (a few large lobbies) can take longer than the age limit.
            age_ms = now_ms() - int(sid.split(b"-", 1)[0])
            if age_ms > max_age_ms:
                self.dropped += 1
                self.metrics.query_shed.labels(space=self.space.name, reason="too_old").inc()
                if reply_to is not None and reply_to.startswith(self.keys.reply_prefix):
                    why = f"waited {age_ms / 1000:.1f} s in the request stream; ask again"
                    out.append((reply_to, busy_reply(cid, why)))
                continue
            if kind in FORWARDED_KINDS:
                out.append((self.keys.requests, raw.decode("utf-8", "replace")))
                self.forwarded += 1
                continue
            out.append(self.responder.answer(raw))
            self.answered += 1
        pipe = client.pipeline(transaction=False)
        for channel, body in out:
            publish(pipe, channel, body)
        pipe.xack(self.keys.request_stream, self.settings.group, *[sid for sid, _ in rows])
        pipe.execute()

    def _drop_orphans(self, client: Any) -> None:
        """Acknowledge, unanswered, requests a dead responder left pending."""
        self._claimed_at = time.monotonic()
        min_idle = int(self.settings.request_max_age_s * 1000)
        res = client.xautoclaim(
            self.keys.request_stream,
            self.settings.group,
            self.name,
            min_idle_time=min_idle,
            start_id="0-0",
            count=500,
        )
        claimed = [sid for sid, _ in res[1]]
        if claimed:
            client.xack(self.keys.request_stream, self.settings.group, *claimed)
            self.dropped += len(claimed)
            self.metrics.query_shed.labels(space=self.space.name, reason="too_old").inc(
                len(claimed)
            )

    def thread(
        self, stop: threading.Event, clients: Any, redis_settings: RedisSettings
    ) -> threading.Thread:
        """A daemon thread running :meth:`run` until ``stop``, reconnecting with the
        back-off of ``redis_settings``."""
        rs = redis_settings
        return threading.Thread(
            target=self.run,
            args=(stop, clients, rs.reconnect_min_s, rs.reconnect_max_s),
            name=f"responder-{self.space.name}",
            daemon=True,
        )

    def run(self, stop: threading.Event, clients: Any, min_s: float, max_s: float) -> None:
        """Serve until ``stop``; Redis outages back off and reconnect."""
        delay = min_s
        while not stop.is_set():
            client = clients()
            meter = _Meter(self.responder.budget) if self.share_cpu else None
            try:
                self.ensure_group(client)
                while not stop.is_set():
                    # Only a responder whose model is ready takes requests: while it
                    # loads or is stalled, the others answer them.
                    if self.responder.answerer.view.status != "ready":
                        stop.wait(0.05)
                        continue
                    if not self.ready.is_set():
                        self.ready.set()
                        log.info(
                            "space %s: responder %s answering from the request stream",
                            self.space.name,
                            self.name,
                        )
                    try:
                        self.step(client)
                    except ReadCutError as exc:  # a slot moved: expected, read again
                        self.metrics.reads_cut.labels(
                            space=self.space.name, reader="responder"
                        ).inc()
                        log.warning("space %s: %s; reading again", self.space.name, exc)
                        continue
                    if meter is not None:
                        meter.charge(stop)
                    delay = min_s
            except REDIS_DOWN as exc:
                log.warning("space %s: request stream unreachable (%s)", self.space.name, exc)
                stop.wait(delay)
                delay = min(delay * 2, max_s)
            except Exception as exc:  # loop boundary: log, count, start again
                self.metrics.query_restarts.labels(space=self.space.name, loop="answerer").inc()
                log.error("space %s: request stream loop failed: %s", self.space.name, exc)
                stop.wait(delay)
                delay = min(delay * 2, max_s)
            finally:
                client.close()


def request_fields(request: dict[str, Any]) -> dict[str, str]:
    """The stream entry of one request (what :func:`streamrate.client.ask` adds)."""
    return {REQUEST_FIELD.decode(): json.dumps(request)}
