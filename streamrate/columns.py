"""A batch of checked events held as columns, for the writer's fast lane.

The compiled scan (:mod:`streamrate.scan`) turns a batch of payloads into
columns: match ids, sides, scores, times, contexts (by their text) and content
digests. :class:`EventColumns` keeps them as they are and is still a sequence of
:class:`~streamrate.events.MatchEvent`: an event object is made only when some
code asks for one (an observer, the live feed, a model without an encoder), so
the steps that can read columns (encoding, the retry record, the applied log)
never pay for objects they do not use, and every other step sees the same
events it always did.

:class:`Pairs` is the writer's unit of work, ``(stream id, event)`` pairs, kept
as two columns for the same reason; :func:`sids_of` and :func:`events_of` read
either it or a plain list of pairs.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from datetime import datetime
from itertools import repeat
from typing import TYPE_CHECKING, Any, overload

import numpy as np

from streamrate.decode import make_events
from streamrate.events import MatchEvent, parse_event

if TYPE_CHECKING:
    from streamrate.scan import Scanned

_FIELDS = frozenset(("first", "second", "match_id", "finished_at", "score"))
_FIELDS_CONTEXT = _FIELDS | {"context"}


class EventColumns(Sequence[MatchEvent]):
    """Checked events as columns; a :class:`MatchEvent` is made on first use.

    ``context_keys``: each event's context as the scan's text (see
    :func:`streamrate.scan.context_of`); ``has_context``: whether the payload gave
    a ``context`` field (pydantic's ``model_fields_set`` tells them apart).
    """

    __slots__ = (
        "_events",
        "context_keys",
        "digests",
        "finished",
        "firsts",
        "has_context",
        "match_ids",
        "scores",
        "seconds",
        "times",
    )  # fmt: skip

    def __init__(
        self,
        match_ids: list[str],
        firsts: list[tuple[str, ...]],
        seconds: list[tuple[str, ...]],
        scores: np.ndarray,
        times: np.ndarray,
        finished: list[str],
        context_keys: list[str],
        has_context: list[bool],
        digests: list[bytes],
    ) -> None:
        self.match_ids = match_ids
        self.firsts = firsts
        self.seconds = seconds
        self.scores = scores
        self.times = times
        self.finished = finished
        self.context_keys = context_keys
        self.has_context = has_context
        self.digests = digests
        self._events: list[MatchEvent] | None = None

    @classmethod
    def from_scan(cls, got: Scanned) -> EventColumns:
        """The sure payloads of a scan, as columns."""
        return cls(
            got.match_ids, got.firsts, got.seconds, got.scores, got.times, got.finished,
            got.context_keys, got.has_context, got.digests,
        )  # fmt: skip

    def __len__(self) -> int:
        return len(self.match_ids)

    @overload
    def __getitem__(self, i: int) -> MatchEvent: ...
    @overload
    def __getitem__(self, i: slice) -> EventColumns: ...
    def __getitem__(self, i: int | slice) -> MatchEvent | EventColumns:
        if isinstance(i, slice):
            return EventColumns(
                self.match_ids[i], self.firsts[i], self.seconds[i], self.scores[i],
                self.times[i], self.finished[i], self.context_keys[i], self.has_context[i],
                self.digests[i],
            )  # fmt: skip
        return self.events()[i]

    def __iter__(self) -> Iterator[MatchEvent]:
        return iter(self.events())

    def take(self, at: Sequence[int]) -> EventColumns:
        """The events at positions ``at``, in that order, as columns."""
        idx = np.asarray(at, dtype=np.intp)

        def pick(column: list[Any]) -> list[Any]:
            return [column[i] for i in at]

        return EventColumns(
            pick(self.match_ids), pick(self.firsts), pick(self.seconds), self.scores[idx],
            self.times[idx], pick(self.finished), pick(self.context_keys),
            pick(self.has_context), pick(self.digests),
        )  # fmt: skip

    def event(self, i: int) -> MatchEvent:
        """Event ``i`` alone (the others are not made)."""
        if self._events is not None:
            return self._events[i]
        return self.take([i]).events()[0]

    def events(self) -> list[MatchEvent]:
        """Every event as an object (made once, then kept)."""
        if self._events is None:
            from streamrate.scan import context_of

            n = len(self)
            self._events = make_events(
                self.firsts,
                self.seconds,
                list(map(context_of, self.context_keys)),
                list(map(dict, repeat((), n))),
                self.match_ids,
                list(map(datetime.fromisoformat, self.finished)),
                self.scores.tolist(),
                [None] * n,
                [_FIELDS_CONTEXT if c else _FIELDS for c in self.has_context],
            )
        return self._events

    def entity_ids(self) -> list[str]:
        """Every entity of the batch, both sides, event by event."""
        if max(map(len, self.firsts), default=1) == 1 == max(map(len, self.seconds), default=1):
            return [*(f[0] for f in self.firsts), *(s[0] for s in self.seconds)]
        return [e for f, s in zip(self.firsts, self.seconds, strict=True) for e in (*f, *s)]


class Pairs(Sequence[tuple[str, MatchEvent]]):
    """``(stream id, event)`` pairs held as two columns of equal length; with each
    stream id's clock (``received_ms``) when the caller has it at hand."""

    __slots__ = ("events", "received_ms", "sids")

    def __init__(
        self,
        sids: list[str],
        events: Sequence[MatchEvent],
        received_ms: list[int] | None = None,
    ) -> None:
        self.sids = sids
        self.events = events
        self.received_ms = received_ms

    def __len__(self) -> int:
        return len(self.sids)

    @overload
    def __getitem__(self, i: int) -> tuple[str, MatchEvent]: ...
    @overload
    def __getitem__(self, i: slice) -> Pairs: ...
    def __getitem__(self, i: int | slice) -> tuple[str, MatchEvent] | Pairs:
        if isinstance(i, slice):
            ms = self.received_ms
            return Pairs(self.sids[i], self.events[i], None if ms is None else ms[i])
        return self.sids[i], self.events[i]


def sids_of(part: Sequence[tuple[str, MatchEvent]]) -> list[str]:
    """The stream ids of a part (no event is made)."""
    return part.sids if isinstance(part, Pairs) else [sid for sid, _ in part]


def events_of(part: Sequence[tuple[str, MatchEvent]]) -> Sequence[MatchEvent]:
    """The events of a part (columns stay columns)."""
    return part.events if isinstance(part, Pairs) else [ev for _, ev in part]


def match_ids_of(events: Sequence[MatchEvent]) -> list[str]:
    """The match ids of a batch of events (no event is made)."""
    if isinstance(events, EventColumns):
        return events.match_ids
    return [ev.match_id for ev in events]


def entity_ids_of(events: Sequence[MatchEvent]) -> Iterable[str]:
    """Every entity of a batch (no event is made; lazily, for events as objects)."""
    if isinstance(events, EventColumns):
        return events.entity_ids()
    return (e for ev in events for e in ev.entities())


def pairs_of(sids: list[str], raws: Sequence[bytes]) -> Sequence[tuple[str, MatchEvent]]:
    """``(stream id, event)`` of payloads already checked once (the applied log):
    as columns when the compiled scan is sure of every one, else parsed one by one."""
    from streamrate.scan import scan_payloads

    got = scan_payloads(raws)
    if got.sure.all():
        return Pairs(sids, EventColumns.from_scan(got))
    return [(sid, parse_event(raw)) for sid, raw in zip(sids, raws, strict=True)]


def contexts_of(events: Sequence[MatchEvent]) -> list[dict[str, str | float]]:
    """The context of each event (no event is made: from the columns' texts)."""
    if isinstance(events, EventColumns):
        from streamrate.scan import context_of

        return list(map(context_of, events.context_keys))  # type: ignore[arg-type]
    return [ev.context for ev in events]


def scores_of(events: Sequence[MatchEvent]) -> list[float]:
    """The first side's score of each event (no event is made)."""
    if isinstance(events, EventColumns):
        return events.scores.tolist()  # type: ignore[no-any-return]
    return [ev.score for ev in events]
