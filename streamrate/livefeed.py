"""The live feed: a watch list of pairings and fresh odds after each event touching one.

The watch list is set, extended or cleared by a ``watch`` request (see
:mod:`streamrate.queries`). After every applied event that involves an entity of
a watched pairing, the consumer asks :meth:`WatchList.affected` which pairings
changed and publishes one JSON message per pairing on ``{sr:space}:live``::

    {"first": [...], "second": [...], "context": {...}, "p_first_wins": 0.61,
     "p_draw": null, "model_version": "1733-0", "match_id": "m-17"}

The watch list lives in memory only (a restart starts with none); after a crash
replay the feed may repeat messages (at-least-once), never skip applied events.

>>> w = WatchList(limit=8)
>>> w.set([(("kestrel",), ("marlow",), {})])
1
>>> [p.first for p in w.affected(["marlow", "oskel"])]
[('kestrel',)]
"""

from __future__ import annotations

import json
import threading
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from streamrate.events import Matchup
from streamrate.models.base import Model


@dataclass(frozen=True)
class Watched:
    first: tuple[str, ...]
    second: tuple[str, ...]
    context: tuple[tuple[str, Any], ...]

    def matchup(self) -> Matchup:
        return Matchup.model_construct(
            first=self.first, second=self.second, context=dict(self.context), features={}
        )


PairingSpec = tuple[Iterable[str], Iterable[str], dict[str, Any]]


class WatchList:
    """Watched pairings indexed by entity; safe to change from the query thread."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self._lock = threading.Lock()
        self._pairs: dict[Watched, None] = {}
        self._by_entity: dict[str, set[Watched]] = {}

    def __len__(self) -> int:
        return len(self._pairs)

    def _rebuild(self) -> None:
        index: dict[str, set[Watched]] = {}
        for w in self._pairs:
            for e in w.first + w.second:
                index.setdefault(e, set()).add(w)
        self._by_entity = index

    def _add(self, specs: Iterable[PairingSpec]) -> None:
        for first, second, ctx in specs:
            w = Watched(tuple(first), tuple(second), tuple(sorted(ctx.items())))
            self._pairs[w] = None
        while len(self._pairs) > self.limit:
            self._pairs.pop(next(iter(self._pairs)))

    def set(self, specs: Iterable[PairingSpec]) -> int:
        with self._lock:
            self._pairs = {}
            self._add(specs)
            self._rebuild()
            return len(self._pairs)

    def add(self, specs: Iterable[PairingSpec]) -> int:
        with self._lock:
            self._add(specs)
            self._rebuild()
            return len(self._pairs)

    def clear(self) -> int:
        return self.set([])

    def touches(self, entities: Iterable[str]) -> bool:
        index = self._by_entity
        return bool(index) and any(e in index for e in entities)

    def affected(self, entities: Iterable[str]) -> list[Watched]:
        index = self._by_entity
        out: dict[Watched, None] = {}
        for e in entities:
            for w in index.get(e, ()):
                out[w] = None
        return list(out)


def live_messages(model: Model, pairs: list[Watched], version: str, match_id: str) -> list[str]:
    """Fresh odds of ``pairs`` as JSON messages (call with the model lock held)."""
    out = []
    for w in pairs:
        p = model.predict(w.matchup())
        out.append(
            json.dumps(
                {
                    "first": list(w.first),
                    "second": list(w.second),
                    "context": dict(w.context),
                    "p_first_wins": p.p_win,
                    "p_draw": p.p_draw if model.has_draws else None,
                    "model_version": version,
                    "match_id": match_id,
                }
            )
        )
    return out
