"""The live feed: per-watcher watch lists and fresh odds after each event touching them.

A client (a *watcher*, named by a short id it picks) sets, extends, renews or
clears its own watch list with ``watch`` requests (see :mod:`streamrate.serve.queries`).
After every applied event that involves an entity of a watched pairing, the
consumer asks :meth:`WatchRegistry.affected` which (watcher, pairing) pairs
changed and publishes one JSON message per pair on that watcher's channel
``{sr:space}:live:<watcher>``::

    {"first": [...], "second": [...], "context": {...}, "p_first_wins": 0.61,
     "p_draw": null, "model_version": "1733-0", "match_id": "m-17", "seq": 4}

``seq`` increases by one per message of a watcher (a gap means a lost message).
A watcher's list expires ``ttl_s`` seconds after its last watch request unless
renewed, so a client that goes away stops costing anything. Lists live in
memory only (a restart starts with none); after a crash replay the feed may
repeat messages (at-least-once), never skip applied events.

>>> w = WatchRegistry(per_watcher=8, max_watchers=4, clock=lambda: 0.0)
>>> w.set("tab-1", [(("kelvash",), ("morvenn",), {})], ttl_s=60)
1
>>> [(who, p.first) for who, p in w.affected(["morvenn", "oskuvar"])]
[('tab-1', ('kelvash',))]
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

from streamrate.errors import EventError
from streamrate.events import Matchup
from streamrate.models.base import Model

SHARED_WATCHER = ""
"""The watcher of requests that name none (older clients): its channel is the bare
``{sr:space}:live``."""


class WatchLimitError(EventError):
    """A watch request that would go past a per-watcher or global cap."""


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


def _watched(specs: Iterable[PairingSpec]) -> dict[Watched, None]:
    out: dict[Watched, None] = {}
    for first, second, ctx in specs:
        out[Watched(tuple(first), tuple(second), tuple(sorted(ctx.items())))] = None
    return out


@dataclass
class _Watcher:
    pairs: dict[Watched, None] = field(default_factory=dict)
    expires_at: float = 0.0
    seq: int = 0


class WatchRegistry:
    """Watch lists of every watcher, indexed by entity; changed from the query thread,
    read by the consumer (every method takes the registry's own short lock)."""

    def __init__(
        self,
        per_watcher: int,
        max_watchers: int,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.per_watcher = per_watcher
        self.max_watchers = max_watchers
        self.clock = clock
        self._lock = threading.Lock()
        self._watchers: dict[str, _Watcher] = {}
        # entity -> pairing -> watchers of that pairing
        self._index: dict[str, dict[Watched, set[str]]] = {}
        self._next_expiry = float("inf")

    def __len__(self) -> int:
        """Watched (watcher, pairing) pairs in total."""
        with self._lock:
            return sum(len(w.pairs) for w in self._watchers.values())

    def watchers(self) -> int:
        with self._lock:
            self._sweep()
            return len(self._watchers)

    # -- changes (query thread) ----------------------------------------------------
    def set(self, watcher: str, specs: Iterable[PairingSpec], ttl_s: float) -> int:
        """Replace the watcher's list; returns how many pairings it now watches."""
        return self._change(watcher, _watched(specs), ttl_s, replace=True)

    def add(self, watcher: str, specs: Iterable[PairingSpec], ttl_s: float) -> int:
        return self._change(watcher, _watched(specs), ttl_s, replace=False)

    def renew(self, watcher: str, ttl_s: float) -> int:
        """Push the expiry of a watcher's list ``ttl_s`` ahead; 0 when it has none."""
        with self._lock:
            self._sweep()
            w = self._watchers.get(watcher)
            if w is None:
                return 0
            w.expires_at = self.clock() + ttl_s
            self._next_expiry = min(self._next_expiry, w.expires_at)
            return len(w.pairs)

    def clear(self, watcher: str) -> int:
        with self._lock:
            self._drop(watcher)
            return 0

    def _change(self, watcher: str, new: dict[Watched, None], ttl_s: float, replace: bool) -> int:
        with self._lock:
            self._sweep()
            old = self._watchers.get(watcher)
            if old is None and len(self._watchers) >= self.max_watchers:
                raise WatchLimitError(
                    f"busy: {self.max_watchers} watchers already; try again later"
                )
            pairs = {} if replace or old is None else dict(old.pairs)
            pairs.update(new)
            if len(pairs) > self.per_watcher:
                raise WatchLimitError(
                    f"pairings: {len(pairs)} is more than {self.per_watcher} per watcher"
                )
            seq = 0 if old is None else old.seq
            self._drop(watcher)
            if not pairs:
                return 0
            w = _Watcher(pairs, self.clock() + ttl_s, seq)
            self._watchers[watcher] = w
            self._next_expiry = min(self._next_expiry, w.expires_at)
            for p in pairs:
                for e in p.first + p.second:
                    self._index.setdefault(e, {}).setdefault(p, set()).add(watcher)
            return len(pairs)

    def _drop(self, watcher: str) -> None:
        w = self._watchers.pop(watcher, None)
        if w is None:
            return
        for p in w.pairs:
            for e in p.first + p.second:
                by_pair = self._index.get(e)
                if by_pair is None:
                    continue
                who = by_pair.get(p)
                if who is not None:
                    who.discard(watcher)
                    if not who:
                        del by_pair[p]
                if not by_pair:
                    del self._index[e]

    def _sweep(self) -> None:
        now = self.clock()
        if now < self._next_expiry:
            return
        nxt = float("inf")
        for name, w in list(self._watchers.items()):
            if w.expires_at <= now:
                self._drop(name)
            else:
                nxt = min(nxt, w.expires_at)
        self._next_expiry = nxt

    # -- reads (consumer thread, under the model lock) ---------------------------------
    def touches(self, entities: Iterable[str]) -> bool:
        with self._lock:
            self._sweep()
            index = self._index
            return bool(index) and any(e in index for e in entities)

    def affected(self, entities: Iterable[str]) -> list[tuple[str, Watched]]:
        """(watcher, pairing) for every live watch sharing an entity with ``entities``."""
        with self._lock:
            self._sweep()
            out: dict[tuple[str, Watched], None] = {}
            for e in entities:
                for p, who in self._index.get(e, {}).items():
                    for name in sorted(who):
                        out[(name, p)] = None
            return list(out)

    def next_seq(self, watcher: str) -> int:
        """The next ``seq`` of a watcher's messages (1, 2, ...)."""
        with self._lock:
            w = self._watchers.get(watcher)
            if w is None:
                return 0
            w.seq += 1
            return w.seq


def live_messages(
    model: Model,
    hits: list[tuple[str, Watched]],
    version: str,
    match_id: str,
    channel_of: Callable[[str], str],
    seq_of: Callable[[str], int],
) -> list[tuple[str, str]]:
    """(channel, JSON message) per hit with fresh odds (call with the model lock held).

    A pairing watched by several watchers is predicted once.
    """
    preds: dict[Watched, tuple[float, float | None]] = {}
    out = []
    for watcher, w in hits:
        if w not in preds:
            p = model.predict(w.matchup())
            preds[w] = (p.p_win, p.p_draw if model.has_draws else None)
        p_win, p_draw = preds[w]
        body = {
            "first": list(w.first),
            "second": list(w.second),
            "context": dict(w.context),
            "p_first_wins": p_win,
            "p_draw": p_draw,
            "model_version": version,
            "match_id": match_id,
            "seq": seq_of(watcher),
        }
        out.append((channel_of(watcher), json.dumps(body)))
    return out
