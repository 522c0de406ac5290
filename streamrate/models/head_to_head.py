"""Head-to-head frequency: how often this exact pairing went which way before.

A pairing is the two sides as sets of entities, whichever side is listed first.
From the pairing's past results (wins ``w``, draws ``d`` of the side now listed
first, ``n`` games in all) the first side's chance is the add-one (Laplace)
smoothed frequency

    P(first wins) = (w + d / 2 + 1) / (n + 2)

so an unseen pairing gets 0.5 and swapping the sides gives exactly 1 - P. There
is no draw model (``p_draw`` is 0; a draw counts half a win for each side).

**First-side advantage** (``advantage=True``, the default). The add-one smoothing
is a uniform prior: one win and one loss imagined for every pairing. With the
advantage learned, those two imagined games are split by how the first side has
fared in every match so far, ``m = (S + 1) / (N + 2)`` (``S`` the first side's
score summed over all ``N`` matches, itself add-one smoothed):

    P(first wins) = (w + d / 2 + 2 m) / (n + 2)

so an unseen pairing gets the stream's first-side rate and a home team keeps its
edge in a pairing met both ways. With no match yet, ``m = 1/2`` and the formula
is the one above; ``advantage=False`` keeps ``m = 1/2`` for good.

>>> from datetime import datetime, timezone
>>> from streamrate.events import MatchEvent
>>> m = HeadToHead(advantage=False)
>>> ev = MatchEvent(match_id="q-1", finished_at=datetime(2026, 3, 1, tzinfo=timezone.utc),
...                 first=("bravik",), second=("vantor",), score=1.0)
>>> m.learn(ev).p_win, round(m.predict(ev).p_win, 4)
(0.5, 0.6667)
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from streamrate.encode import EntityTable
from streamrate.errors import StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import Model, ModelState, Prediction, Predictions

Key = tuple[tuple[int, ...], tuple[int, ...]]


class HeadToHead(Model):
    """Laplace-smoothed win frequency of each exact pairing of sides."""

    kind: ClassVar[str] = "head_to_head"
    # Version 2 added the first side's running score (``advantage``); a version 1
    # state loads with it off, as it was trained.
    state_version: ClassVar[int] = 2

    def __init__(self, advantage: bool = True) -> None:
        self.advantage = bool(advantage)
        self.first_ = np.zeros(2)  # the first side's summed score, matches (all pairings)
        self.entities_ = EntityTable()
        # pairing -> index into the tallies; the key's first side is the smaller tuple.
        self.pairs_: dict[Key, int] = {}
        self.wins_: list[float] = []  # wins + draws / 2 of the key's first side
        self.games_: list[int] = []

    def _key(self, first: Sequence[int], second: Sequence[int]) -> tuple[Key, bool]:
        """Canonical key of a pairing and whether ``first`` is the key's first side."""
        a, b = tuple(sorted(first)), tuple(sorted(second))
        return ((a, b), True) if a <= b else ((b, a), False)

    def _prior(self) -> float:
        """The first side's smoothed rate over every match so far (1/2 without the advantage)."""
        if not self.advantage:
            return 0.5
        return float((self.first_[0] + 1.0) / (self.first_[1] + 2.0))

    def _p(self, key: Key, forward: bool, prior: float) -> float:
        i = self.pairs_.get(key)
        if i is None:
            return prior
        w = self.wins_[i] if forward else self.games_[i] - self.wins_[i]
        return (w + 2.0 * prior) / (self.games_[i] + 2.0)

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        get = self.entities_.get
        first = [get(e) for e in matchup.first]
        second = [get(e) for e in matchup.second]
        if min(first) < 0 or min(second) < 0:
            return Prediction(self._prior())
        return Prediction(self._p(*self._key(first, second), self._prior()))

    def learn(self, event: MatchEvent) -> Prediction:
        return self.learn_batch([event]).one(0)

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict all events from the tallies at the batch start, then add the results."""
        keys = []
        p = np.empty(len(events))
        prior = self._prior()
        for i, ev in enumerate(events):
            first = self.entities_.rows(ev.first)
            second = self.entities_.rows(ev.second)
            key, forward = self._key(first, second)
            p[i] = self._p(key, forward, prior)
            keys.append((key, forward, ev.score, first + second))
        self.first_ += [sum(ev.score for ev in events), len(events)]
        for key, forward, score, rows in keys:
            slot = self.pairs_.get(key)
            if slot is None:
                slot = self.pairs_[key] = len(self.games_)
                self.wins_.append(0.0)
                self.games_.append(0)
            self.wins_[slot] += score if forward else 1.0 - score
            self.games_[slot] += 1
            self.entities_.counts[rows] += 1
        return Predictions(p, np.zeros_like(p))

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {"advantage": self.advantage}

    @classmethod
    def upgrade_state(cls, state: ModelState) -> ModelState:
        if state.kind != cls.kind or state.version != 1:
            return state
        arrays = {**state.arrays, "first_score": np.zeros(2)}
        return ModelState(state.kind, 2, {**state.params, "advantage": False}, arrays)

    def _state_arrays(self) -> dict[str, np.ndarray]:
        # Each pairing as its member rows, flattened: sizes say where each side ends.
        arrays = self.entities_.to_arrays()
        keys = sorted(self.pairs_, key=self.pairs_.__getitem__)
        arrays["pair_first_size"] = np.array([len(k[0]) for k in keys], dtype=np.int32)
        arrays["pair_second_size"] = np.array([len(k[1]) for k in keys], dtype=np.int32)
        flat = [r for k in keys for side in k for r in side]
        arrays["pair_rows"] = np.array(flat, dtype=np.int32)
        arrays["pair_wins"] = np.array(self.wins_, dtype=np.float64)
        arrays["pair_games"] = np.array(self.games_, dtype=np.int64)
        arrays["first_score"] = self.first_.copy()
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table = EntityTable.from_arrays(arrays)
        n1 = np.asarray(arrays["pair_first_size"], dtype=np.int64)
        n2 = np.asarray(arrays["pair_second_size"], dtype=np.int64)
        rows = np.asarray(arrays["pair_rows"], dtype=np.int64).tolist()
        wins = np.asarray(arrays["pair_wins"], dtype=np.float64)
        games = np.asarray(arrays["pair_games"], dtype=np.int64)
        first = np.asarray(arrays["first_score"], dtype=np.float64).reshape(-1)
        if not (first.shape == (2,) and np.isfinite(first).all() and 0 <= first[0] <= first[1]):
            raise StateError("head_to_head: the first side's score must be 0 <= sum <= matches")
        m = len(n1)
        if not (len(n2) == len(wins) == len(games) == m and len(rows) == int(n1.sum() + n2.sum())):
            raise StateError("head_to_head: pairing arrays have inconsistent lengths")
        if rows and not (min(rows) >= 0 and max(rows) < len(table)):
            raise StateError("head_to_head: a pairing names an entity row that does not exist")
        pairs: dict[Key, int] = {}
        pos = 0
        for i in range(m):
            a = tuple(rows[pos : pos + n1[i]])
            pos += int(n1[i])
            b = tuple(rows[pos : pos + n2[i]])
            pos += int(n2[i])
            pairs[(a, b)] = i
        self.entities_ = table
        self.pairs_ = pairs
        self.wins_ = wins.tolist()
        self.games_ = [int(x) for x in games]
        self.first_ = first.copy()
