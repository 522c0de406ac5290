"""One space in a responder process: a replica of the model and a request-stream responder.

Threads: the follower (:class:`~streamrate.replica.follower.Follower`) keeps the
model current from the applied log; the responder
(:class:`~streamrate.replica.request_stream.StreamResponder`) answers the
requests it takes from the space's request stream from that model. Nothing is
acknowledged on the event stream, checkpointed or dead-lettered here.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Sequence
from typing import Any

from streamrate.checkpoint import CheckpointStore, FileCheckpointStore, RedisCheckpointStore
from streamrate.config import Settings, SpaceSettings
from streamrate.metrics import ReplicaMetrics, ServiceMetrics
from streamrate.models.registry import build_model
from streamrate.replica.follower import Follower
from streamrate.replica.request_stream import StreamResponder
from streamrate.serve.livefeed import WatchRegistry
from streamrate.serve.queries import MAX_WATCH
from streamrate.serve.responder import Responder
from streamrate.stream.apply import Observer

ClientFactory = Callable[[], Any]


class ReplicaSpace:
    """Follower + request-stream responder of one space."""

    def __init__(
        self,
        settings: Settings,
        space: SpaceSettings,
        clients: ClientFactory,
        metrics: ServiceMetrics,
        replica_metrics: ReplicaMetrics,
        observers: Sequence[Observer] = (),
        writer_state: bool = False,
    ) -> None:
        self.settings, self.space, self.clients = settings, space, clients
        self.keys = settings.keys(space)
        client = clients()
        store: CheckpointStore
        if settings.checkpoint.store == "redis":
            store = RedisCheckpointStore(client, self.keys.ckpt)
        else:
            store = FileCheckpointStore(settings.checkpoint.dir, space.name)
        watch = WatchRegistry(MAX_WATCH, settings.queries.max_watchers)  # watches go to the writer
        self.follower = Follower(
            client,
            space,
            self.keys,
            store,
            lambda: build_model(space.model, **space.model_settings),
            settings.replica,
            replica_metrics,
            metrics,
            observers=observers,
            writer_state=writer_state,  # a standby: ready to become the writer
        )
        self.responder = Responder(
            settings, space, self.keys, clients, metrics, self.follower.live, watch
        )
        self.stream = StreamResponder(space, self.keys, settings.replica, self.responder, metrics)
        self.fatal: Exception | None = None

    def threads(self, stop: threading.Event, answer: bool = True) -> list[threading.Thread]:
        """The follower's thread and (``answer``) the request-stream responder's."""
        rs = self.settings.redis
        name = self.space.name
        out = [
            threading.Thread(
                target=self.follower.run,
                args=(stop, rs.reconnect_min_s, rs.reconnect_max_s),
                name=f"replica-{name}",
                daemon=True,
            )
        ]
        if answer:
            out.append(self.stream.thread(stop, self.clients, rs))
        return out
