"""Operational metrics of the service (Prometheus), on an injected registry.

Names follow ``streamrate_<subsystem>_<name>_<unit>``; counters end in
``_total``. Every label takes values from a closed set that is pre-initialised,
so a series exists (at 0) before its first event and dashboards never see gaps.

The HTTP endpoint is off by default; :func:`serve_metrics` starts it on the
configured bind address and port.

>>> from prometheus_client import CollectorRegistry
>>> m = ServiceMetrics(CollectorRegistry(), spaces=["duel"])
>>> m.events.labels(space="duel", outcome="applied").inc(3)
>>> m.registry.get_sample_value(
...     "streamrate_consumer_events_total", {"space": "duel", "outcome": "applied"})
3.0
"""

from __future__ import annotations

import errno
import logging
from collections.abc import Sequence

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, start_http_server

from streamrate.errors import ServiceError

EVENT_OUTCOMES = ("applied", "dead_lettered", "duplicate")
QUERY_KINDS = ("pairing", "lobby", "watch", "invalid")
QUERY_OUTCOMES = ("ok", "error")
OUTAGE_ROLES = ("consumer", "queries")
QUERY_SHED_REASONS = ("queue_full", "client_queue_full", "expensive", "too_old")
QUERY_FAILED_STAGES = ("answer", "publish")
QUERY_LOOPS = ("subscriber", "answerer")
QUERY_RESUBSCRIBE_REASONS = ("connection_lost", "backlog")
WRITER_STARTS = ("checkpoint", "replica")
"""How a writer started: from the stored checkpoint, or from the replica a
standby kept current (no reload)."""
CONSUMER_STATES = ("loading", "ready", "stalled")
"""``loading``: the checkpoint is not loaded yet; ``ready``: applying events and
answering; ``stalled``: the consumer cannot apply events (loop errors, Redis
unreachable). Queries get a "not ready" error reply unless ``ready``."""
_BATCH_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)
_PAUSE_BUCKETS = (
    0.001, 0.0025, 0.005, 0.01, 0.02, 0.03, 0.04, 0.05, 0.075, 0.1, 0.25, 0.5, 1.0, 2.5
)  # fmt: skip
_QUERY_BUCKETS = (0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1)


class ServiceMetrics:
    """All operational series; one instance per process, shared by every space."""

    def __init__(self, registry: CollectorRegistry, spaces: Sequence[str]) -> None:
        self.registry = registry
        r = registry
        self.events = Counter(
            "streamrate_consumer_events_total",
            "Stream entries handled by the consumer, by outcome.",
            ["space", "outcome"],
            registry=r,
        )
        self.loop_errors = Counter(
            "streamrate_consumer_loop_errors_total",
            "Unexpected errors caught at the consumer loop boundary.",
            ["space"],
            registry=r,
        )
        self.claimed = Counter(
            "streamrate_consumer_claimed_entries_total",
            "Entries taken over from another consumer after the idle time.",
            ["space"],
            registry=r,
        )
        self.reconnects = Counter(
            "streamrate_redis_outages_total",
            "Times a Redis connection was lost and the service began reconnecting, "
            "by the thread that lost it (the consumer or the query responder).",
            ["space", "role"],
            registry=r,
        )
        self.state = Gauge(
            "streamrate_consumer_state",
            "1 for the consumer's current state (loading, ready, stalled), 0 for the others.",
            ["space", "state"],
            registry=r,
        )
        self.error_streak = Gauge(
            "streamrate_consumer_consecutive_loop_errors",
            "Loop errors since the consumer last applied a batch without error (0 when healthy).",
            ["space"],
            registry=r,
        )
        self.redis_connected = Gauge(
            "streamrate_redis_up",
            "1 while the consumer's Redis connection works, 0 during an outage.",
            ["space"],
            registry=r,
        )
        self.lag = Gauge(
            "streamrate_consumer_lag_entries",
            "Entries in the stream not yet delivered to the consumer group.",
            ["space"],
            registry=r,
        )
        self.pending = Gauge(
            "streamrate_consumer_pending_entries",
            "Entries delivered to the group but not yet acknowledged.",
            ["space"],
            registry=r,
        )
        self.batch_seconds = Histogram(
            "streamrate_consumer_batch_processing_seconds",
            "Time to validate and apply one batch read from the stream.",
            ["space"],
            buckets=_BATCH_BUCKETS,
            registry=r,
        )
        self.checkpoint_seconds = Histogram(
            "streamrate_checkpoint_write_seconds",
            "Time to encode and durably store one checkpoint.",
            ["space"],
            buckets=_BATCH_BUCKETS,
            registry=r,
        )
        self.checkpoint_pause = Histogram(
            "streamrate_checkpoint_pause_seconds",
            "Time the writer stops applying events to start one checkpoint (the state"
            " copied under the model lock; with inline checkpoints, the whole write).",
            ["space"],
            buckets=_PAUSE_BUCKETS,
            registry=r,
        )
        self.checkpoint_time = Gauge(
            "streamrate_checkpoint_last_success_timestamp_seconds",
            "Unix time of the last durable checkpoint (age = time() - this).",
            ["space"],
            registry=r,
        )
        self.queries = Counter(
            "streamrate_query_requests_total",
            "Query requests answered, by kind and outcome.",
            ["space", "kind", "outcome"],
            registry=r,
        )
        self.query_seconds = Histogram(
            "streamrate_query_latency_seconds",
            "Time from receiving a request to publishing its reply.",
            ["space", "kind"],
            buckets=_QUERY_BUCKETS,
            registry=r,
        )
        self.live_published = Counter(
            "streamrate_livefeed_messages_total",
            "Probability updates published on the live feed.",
            ["space"],
            registry=r,
        )
        self.query_shed = Counter(
            "streamrate_query_shed_total",
            "Requests refused with a busy reply (or dropped when none could be sent), by reason.",
            ["space", "reason"],
            registry=r,
        )
        self.query_failed = Counter(
            "streamrate_query_failed_total",
            "Requests that failed inside the service: an unexpected error while answering,"
            " or a reply that could not be published (for example a Redis permission error).",
            ["space", "stage"],
            registry=r,
        )
        self.query_restarts = Counter(
            "streamrate_query_loop_restarts_total",
            "Times a query loop died of an unexpected error and was started again.",
            ["space", "loop"],
            registry=r,
        )
        self.query_resubscribes = Counter(
            "streamrate_query_resubscribes_total",
            "Times the request subscription was renewed: its connection was lost"
            " (Redis drops a subscriber whose output buffer overflows), or its backlog"
            " was older than the longest useful wait.",
            ["space", "reason"],
            registry=r,
        )
        self.query_outages = Counter(
            "streamrate_query_redis_outages_total",
            "Times a query-side connection (subscriber or replies) lost Redis and began"
            " reconnecting (the consumer's outages: streamrate_redis_outages_total).",
            ["space"],
            registry=r,
        )
        self.query_queue = Gauge(
            "streamrate_query_queued_entries",
            "Requests waiting between the subscriber and the answering thread.",
            ["space"],
            registry=r,
        )
        self.watchers = Gauge(
            "streamrate_livefeed_watcher_entries",
            "Watchers with a live watch list.",
            ["space"],
            registry=r,
        )
        self.writer_starts = Counter(
            "streamrate_writer_starts_total",
            "Times this process became the writer of a space, by what it started from "
            "(the checkpoint, or a standby's own replica without a reload).",
            ["space", "source"],
            registry=r,
        )
        self.reads_cut = Counter(
            "streamrate_stream_reads_cut_total",
            "Blocked stream reads the server ended because the stream's key left the node "
            "(a Redis Cluster slot moved); read again at once, nothing lost.",
            ["space", "reader"],
            registry=r,
        )
        self.leases_lost = Counter(
            "streamrate_writer_leases_lost_total",
            "Times a writer of a space in this process found its lease lost (paused or cut "
            "off past lease_ms) and stopped writing that space (it then follows as a standby).",
            ["space"],
            registry=r,
        )
        self.pool_members = Gauge(
            "streamrate_pool_member_entries",
            "Members of this process's pool alive at its last heartbeat (serve --role shared).",
            registry=r,
        )
        self.pool_spaces = Gauge(
            "streamrate_pool_held_space_entries",
            "Spaces this pool member writes now (serve --role shared).",
            registry=r,
        )
        for s in spaces:
            for source in WRITER_STARTS:
                self.writer_starts.labels(space=s, source=source)
            for reason in QUERY_SHED_REASONS:
                self.query_shed.labels(space=s, reason=reason)
            for stage in QUERY_FAILED_STAGES:
                self.query_failed.labels(space=s, stage=stage)
            for loop in QUERY_LOOPS:
                self.query_restarts.labels(space=s, loop=loop)
            for reason in QUERY_RESUBSCRIBE_REASONS:
                self.query_resubscribes.labels(space=s, reason=reason)
            self.query_queue.labels(space=s)
            self.query_outages.labels(space=s)
            self.watchers.labels(space=s)
            for o in EVENT_OUTCOMES:
                self.events.labels(space=s, outcome=o)
            for metric in (self.loop_errors, self.claimed, self.live_published, self.leases_lost):
                metric.labels(space=s)
            for role in OUTAGE_ROLES:
                self.reconnects.labels(space=s, role=role)
            for reader in READ_CUT_READERS:
                self.reads_cut.labels(space=s, reader=reader)
            for g in (self.lag, self.pending, self.checkpoint_time, self.error_streak):
                g.labels(space=s)
            self.redis_connected.labels(space=s).set(1)
            for st in CONSUMER_STATES:
                self.state.labels(space=s, state=st).set(1 if st == "loading" else 0)
            self.batch_seconds.labels(space=s)
            self.checkpoint_seconds.labels(space=s)
            self.checkpoint_pause.labels(space=s)
            for k in QUERY_KINDS:
                self.query_seconds.labels(space=s, kind=k)
                for o in QUERY_OUTCOMES:
                    self.queries.labels(space=s, kind=k, outcome=o)


READ_CUT_READERS = ("consumer", "responder")
"""Whose blocked stream read was cut: the writer's (events) or a responder's (requests)."""

REPLICA_RELOADS = ("initial", "writer_restart", "gap", "behind", "error")
"""Why a replica loaded the checkpoint: its first load; a writer restarted below
it; entries missing from the applied log (trimmed); too far behind; after an error."""
_LAG_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 5.0)


class ReplicaMetrics:
    """Series of replicas following the applied log (responders, in-process readers)."""

    def __init__(self, registry: CollectorRegistry, spaces: Sequence[str]) -> None:
        r = registry
        self.lag_events = Gauge(
            "streamrate_replica_lag_events",
            "Events the writer has applied and this replica not yet (last measured).",
            ["space"],
            registry=r,
        )
        self.lag_seconds = Histogram(
            "streamrate_replica_lag_seconds",
            "From the writer appending a chunk to the applied log to this replica applying it.",
            ["space"],
            buckets=_LAG_BUCKETS,
            registry=r,
        )
        self.applied = Counter(
            "streamrate_replica_applied_events_total",
            "Events this replica applied from the applied log.",
            ["space"],
            registry=r,
        )
        self.reloads = Counter(
            "streamrate_replica_checkpoint_reloads_total",
            "Times this replica loaded the newest checkpoint, by reason.",
            ["space", "reason"],
            registry=r,
        )
        for s in spaces:
            self.lag_events.labels(space=s)
            self.lag_seconds.labels(space=s)
            self.applied.labels(space=s)
            for reason in REPLICA_RELOADS:
                self.reloads.labels(space=s, reason=reason)


def serve_metrics(registry: CollectorRegistry, bind: str, port: int) -> None:
    """Expose ``registry`` over HTTP at ``http://bind:port/metrics`` (daemon thread).

    :class:`ServiceError` (one line, no traceback) when the address cannot be taken.
    """
    try:
        start_http_server(port, addr=bind, registry=registry)
    except OSError as exc:
        busy = exc.errno == errno.EADDRINUSE
        why = "is in use by another process" if busy else f"cannot be opened ({exc.strerror})"
        raise ServiceError(
            f"metrics address {bind}:{port} {why}: choose another with metrics.port "
            f"(--set metrics.port=N) or turn metrics off (--set metrics.enabled=false)"
        ) from exc
    host = f"[{bind}]" if ":" in bind else bind
    logging.getLogger("streamrate.service").info("metrics at http://%s:%d/metrics", host, port)
