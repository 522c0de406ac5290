"""Applying events to a model: the one step the writer and every replica share.

The writer (:class:`streamrate.stream.writer.Writer`) and a replica
(:class:`streamrate.replica.follower.Follower`) both call
:meth:`Applier.apply` on a chunk of events, in the same order, so their models
go through the same arithmetic: predict then learn under the model lock, the
live feed of watched pairings, the observers. What differs between them
(acknowledging, checkpointing, dead letters, the applied log) is outside this
module.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal, Protocol, runtime_checkable

from streamrate.columns import entity_ids_of, events_of, sids_of
from streamrate.events import MatchEvent
from streamrate.models.base import Model, Prediction, Predictions
from streamrate.pubsub import publish as publish_one
from streamrate.serve.livefeed import WatchRegistry, live_messages

Observer = Callable[[MatchEvent, Prediction, str], None]
"""Called after each applied event with (event, prediction made before learning, model kind);
for a challenger set also once per member with that member's prediction and label."""


@runtime_checkable
class ChunkObserver(Protocol):
    """An observer that also takes a whole chunk at once: ``observe_chunk(events,
    scores)`` with each model's expected scores (model name -> one per event,
    P(win) + P(draw) / 2), equal to being called event by event, each event for
    every model in the mapping's order."""

    def __call__(self, event: MatchEvent, prediction: Prediction, kind: str) -> None: ...

    def observe_chunk(
        self, events: Sequence[MatchEvent], scores: Mapping[str, Sequence[float]]
    ) -> None: ...


Status = Literal["loading", "ready", "stalled"]


@dataclass
class LiveModel:
    """The model the queries read; ``lock`` is held only around predict/learn.

    ``status`` (set by the consumer; queries are answered only when ``ready``):
    ``loading`` until the checkpoint is loaded (or the space is known to start
    empty), ``ready``, ``stalled`` while the consumer cannot apply events;
    ``detail`` says why in words. ``behind``: entries the consumer group has not
    read yet (``None`` when unknown), refreshed every few seconds.

    ``promoted`` (writer only): promotions made by queries and not yet written to
    the applied log, in the order they were made (appended under ``lock``).
    ``writable`` is False on a replica: promotions go to the writer.
    """

    model: Model
    version: str = "0-0"
    applied: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)
    changed: bool = False  # set (under lock) by a query that changes the model: a promotion
    status: Status = "ready"  # a model handed over as is; the consumer starts at "loading"
    detail: str = ""
    behind: int | None = None
    promoted: list[str] = field(default_factory=list)
    writable: bool = True


@dataclass
class ChunkResult:
    """What applying one chunk gave: the served predictions, by label those of the
    models inside, the live messages published, and the promotions made before
    the chunk (taken under the same lock, so their order against the chunk holds)."""

    preds: list[tuple[float, float]]
    members: dict[str, Predictions]
    published: int
    promoted: list[str]


@dataclass
class Applier:
    """Applies chunks of events to a live model; wired once at construction.

    ``publish`` sends live messages (channel, JSON) in one round trip; ``None``
    (a process that holds no watches) publishes nothing.
    """

    live: LiveModel
    watch: WatchRegistry
    live_of: Callable[[str], str]
    publish: Callable[[list[tuple[str, str]]], None] | None = None
    observers: Sequence[Observer] = ()

    def apply(self, part: Sequence[tuple[str, MatchEvent]]) -> ChunkResult:
        """:meth:`learn` then :meth:`notify`: the whole step for one chunk."""
        got = self.learn(part)
        self.notify(part, got)
        return got

    def learn(self, part: Sequence[tuple[str, MatchEvent]]) -> ChunkResult:
        """Predict then learn ``part`` (stream id, event) under the lock and publish the
        live messages; the model's version becomes the last id. An exception here
        is the model's (or the live feed's), never an observer's."""
        messages: list[tuple[str, str]] = []
        preds, members, promoted = self._learn(part, messages)
        if messages and self.publish is not None:
            self.publish(messages)
        return ChunkResult(preds, members, len(messages), promoted)

    def notify(self, part: Sequence[tuple[str, MatchEvent]], got: ChunkResult) -> None:
        """Call the observers with each event and its predictions: the served model's
        and those of the models inside it, in that order. An observer with an
        ``observe_chunk`` method (:class:`ChunkObserver`) takes the chunk in one call."""
        if not self.observers:
            return
        kind = self.live.model.kind
        events = events_of(part)
        scores: dict[str, list[float]] | None = None
        for obs in self.observers:
            # (an attribute lookup: a runtime protocol check costs more than the call)
            observe_chunk = getattr(obs, "observe_chunk", None)
            if observe_chunk is not None:
                if scores is None:  # expected scores, as Prediction.expected_score
                    scores = {kind: [pw + 0.5 * pd for pw, pd in got.preds]}
                    for label, mp in got.members.items():
                        scores[label] = mp.expected_score.tolist()
                observe_chunk(events, scores)
                continue
            for i, (ev, p) in enumerate(zip(events, got.preds, strict=True)):
                obs(ev, Prediction(p[0], p[1]), kind)
                for label, mp in got.members.items():
                    obs(ev, Prediction(float(mp.p_win[i]), float(mp.p_draw[i])), label)

    def _learn(
        self, part: Sequence[tuple[str, MatchEvent]], messages: list[tuple[str, str]]
    ) -> tuple[list[tuple[float, float]], dict[str, Predictions], list[str]]:
        live = self.live
        events = events_of(part)
        with live.lock:
            promoted, live.promoted = live.promoted, []
            if not self.watch.touches(entity_ids_of(events)):
                got = live.model.learn_scored(events)
                preds = list(
                    zip(got.served.p_win.tolist(), got.served.p_draw.tolist(), strict=True)
                )
                members = got.parts
            else:
                preds = []
                rows: dict[str, list[tuple[float, float]]] = {}
                for sid, ev in part:
                    one = live.model.learn_scored([ev])
                    preds.append((float(one.served.p_win[0]), float(one.served.p_draw[0])))
                    for label, mp in one.parts.items():
                        rows.setdefault(label, []).append((float(mp.p_win[0]), float(mp.p_draw[0])))
                    hit = self.watch.affected(ev.entities())
                    if hit:
                        messages += live_messages(
                            live.model, hit, sid, ev.match_id, self.live_of, self.watch.next_seq
                        )
                members = {
                    label: Predictions.from_list([Prediction(*r) for r in got_rows])
                    for label, got_rows in rows.items()
                }
            live.applied += len(part)
            live.version = sids_of(part)[-1]
        return preds, members, promoted

    def take_promotions(self) -> list[str]:
        """Promotions made since the last chunk (the writer logs them when idle)."""
        with self.live.lock:
            promoted, self.live.promoted = self.live.promoted, []
        return promoted


def redis_publisher(client: Any) -> Callable[[list[tuple[str, str]]], None]:
    """Publish (channel, message) pairs in one pipelined round trip."""

    def publish(messages: list[tuple[str, str]]) -> None:
        pipe = client.pipeline(transaction=False)
        for channel, m in messages:
            publish_one(pipe, channel, m)
        pipe.execute()

    return publish


def now_ms() -> int:
    """Wall time in ms (the clock of stream ids)."""
    return int(time.time() * 1000)
