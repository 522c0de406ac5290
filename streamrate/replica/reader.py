"""An in-process reader for Python callers (a matchmaker): the model in your process.

:class:`LocalReader` connects to Redis, loads the newest checkpoint of a space,
follows the writer's applied log in a background thread
(:class:`~streamrate.replica.follower.Follower`) and answers in-process, with no
network hop: P(first wins) for one pairing or a batch of pairings, and a lobby
split. Every answer carries the model version (the id of the last event in the
model) and the count of events applied. Thread-safe: answers and the follower
share the model's lock.

Example (against a running service; not run as a doctest)::

    from streamrate.config import load_settings
    from streamrate.replica.reader import LocalReader

    with LocalReader(load_settings("configs/service.toml"), "duel") as reader:
        a = reader.p_first_wins(["kelvash"], ["morvenn"])
        print(a.p_first_wins, a.model_version)
        b = reader.p_first_wins_many([(["kelvash"], ["morvenn"]), (["oskuvar"], ["tuvrenn"])])
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Sequence
from typing import Any, NamedTuple

import numpy as np
import numpy.typing as npt

from streamrate.checkpoint import CheckpointStore, FileCheckpointStore, RedisCheckpointStore
from streamrate.config import Settings
from streamrate.connect import RedisClients
from streamrate.errors import ServiceError
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.replica import fastpath
from streamrate.replica.follower import Follower
from streamrate.serve.queries import Answerer, LobbyRequest, QueryError


class Answer(NamedTuple):
    """One pairing's answer: P(first wins), P(draw) (None without draws), model version."""

    p_first_wins: float
    p_draw: float | None
    model_version: str
    applied: int


class BatchAnswer(NamedTuple):
    """P(first wins) for each pairing of a batch, all from one model version."""

    p_first_wins: npt.NDArray[np.float64]
    model_version: str
    applied: int


class LocalReader:
    """Follows one space's writer in a background thread and answers in-process."""

    def __init__(
        self,
        settings: Settings,
        space: str | None = None,
        clients: Callable[[], Any] | None = None,
        store: CheckpointStore | None = None,
    ) -> None:
        self.settings = settings
        self.space = settings.space(space)
        self.keys = settings.keys(self.space)
        self._clients = clients or RedisClients(settings.redis)
        client = self._clients()
        if store is None:
            if settings.checkpoint.store == "redis":
                store = RedisCheckpointStore(client, self.keys.ckpt)
            else:
                store = FileCheckpointStore(settings.checkpoint.dir, self.space.name)
        sp = self.space
        self.follower = Follower(
            client,
            sp,
            self.keys,
            store,
            lambda: build_model(sp.model, **sp.model_settings),
            settings.replica,
        )
        self.live = self.follower.live
        q = settings.queries
        self._answerer = Answerer(self.live, q.lobby_exact_max, q.lobby_max, q.pairs_per_lock)
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._single_of: tuple[Model, fastpath.Single] | None = None

    # -- lifecycle --------------------------------------------------------------
    def start(self, timeout_s: float = 30.0) -> LocalReader:
        """Load the checkpoint (in the caller's thread: errors surface here), then
        follow in the background. :class:`ServiceError` when not ready in time."""
        self.follower.reload("initial")
        self.follower.mark("ready", "following the writer")
        self._thread = threading.Thread(
            target=self.follower.run,
            args=(
                self._stop,
                self.settings.redis.reconnect_min_s,
                self.settings.redis.reconnect_max_s,
            ),
            name=f"reader-{self.space.name}",
            daemon=True,
        )
        self._thread.start()
        deadline = time.monotonic() + timeout_s
        while self.live.status != "ready":
            if time.monotonic() > deadline:
                raise ServiceError(f"reader of space {self.space.name!r}: {self.live.detail}")
            time.sleep(0.01)
        return self

    def close(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(10)

    def __enter__(self) -> LocalReader:
        return self.start() if self._thread is None else self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- state ------------------------------------------------------------------
    @property
    def model_version(self) -> str:
        return self.live.version

    @property
    def applied(self) -> int:
        return self.live.applied

    @property
    def behind(self) -> int | None:
        """Events the writer had applied and this reader not yet, when last measured."""
        return self.follower.lag_events

    def wait_applied(self, applied: int, timeout_s: float = 10.0) -> bool:
        """Block until the model holds at least ``applied`` events."""
        return self.follower.wait_applied(applied, timeout_s)

    # -- answers ----------------------------------------------------------------
    def _single(self) -> fastpath.Single:
        model = self.live.model
        got = self._single_of
        if got is None or got[0] is not model:  # a reload replaced the model
            got = self._single_of = (model, fastpath.single(model))
        return got[1]

    def p_first_wins(
        self, first: Sequence[str], second: Sequence[str], context: dict[str, Any] | None = None
    ) -> Answer:
        """P(first side wins) for one pairing (unknown ids count as new entities)."""
        ctx = context or {}
        with self.live.lock:
            p = self._single()(first, second, ctx)
            has_draws = self.live.model.has_draws
            return Answer(
                p.p_win, p.p_draw if has_draws else None, self.live.version, self.live.applied
            )

    def p_first_wins_many(
        self,
        pairs: Sequence[tuple[Sequence[str], Sequence[str]]],
        context: dict[str, Any] | None = None,
    ) -> BatchAnswer:
        """P(first side wins) for each (first, second) pair, from one model version."""
        with self.live.lock:
            p = fastpath.many(self.live.model, pairs, context or {})
            return BatchAnswer(p, self.live.version, self.live.applied)

    def lobby(
        self,
        entities: Sequence[str],
        team_sizes: tuple[int, int],
        context: dict[str, Any] | None = None,
    ) -> dict[str, Any]:
        """The pairwise matrix and the most even split, as the ``lobby`` query answers."""
        req = LobbyRequest.model_construct(
            kind="lobby",
            id="local",
            reply_to="local",
            entities=list(entities),
            team_sizes=(team_sizes[0], team_sizes[1]),
            context=context or {},
        )
        try:
            return self._answerer.lobby(req)
        except QueryError as exc:
            raise ServiceError(str(exc)) from exc
