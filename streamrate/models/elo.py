"""Elo ratings: one number per entity, moved by the surprise of each result.

The first side's expected score is the logistic curve

    E = 1 / (1 + 10 ** (-(R_first + advantage - R_second) / scale))

with ``scale`` 400 as in chess. A side's rating is the mean of its members'
ratings; after a match every member of the first side gains
``k * (score - E)`` and every member of the second side loses the same amount
(a draw is score 0.5). New entities start at ``initial``.

The first-side advantage is learned by the same rule: it starts at
``first_advantage`` and moves by ``advantage_k * (score - E)`` after each match
(a stochastic gradient step on the log loss, in rating points), so a home or
first-move edge is found without tuning; ``advantage_k = 0`` keeps it fixed.

``k`` defaults to 24: the usual chess range is 10-40, and 24 sits in the middle
(common practice). Elo has no draw model, so ``p_draw`` is 0 and ``p_win`` is the
expected score.

Example:

>>> from datetime import datetime, timezone
>>> from streamrate.events import MatchEvent
>>> m = Elo()
>>> ev = MatchEvent(match_id="q-1", finished_at=datetime(2026, 3, 1, tzinfo=timezone.utc),
...                 first=("kelvash",), second=("morvenn",), score=1.0)
>>> m.learn(ev).p_win
0.5
>>> round(m.predict(ev).p_win, 4)
0.5359
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np
from numba import njit

from streamrate.batch import EncodedBatch, count_matches, encode_events
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models._snapshot import CopyOnWriteRows
from streamrate.models.base import (
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)


def _elo_loop(
    first: np.ndarray,
    first_size: np.ndarray,
    second: np.ndarray,
    second_size: np.ndarray,
    score: np.ndarray,
    ratings: np.ndarray,
    k: float,
    scale: float,
    advantage: np.ndarray,
    advantage_k: float,
    out: np.ndarray,
) -> None:
    """Sequential Elo over encoded events; writes the pre-update expectation to ``out``.

    Plain Python so that the same code runs uncompiled (the reference) and
    compiled by numba (the fast path); both give the same numbers.
    """
    for i in range(score.shape[0]):
        n1 = first_size[i]
        n2 = second_size[i]
        r1 = 0.0
        for j in range(n1):
            r1 += ratings[first[i, j]]
        r2 = 0.0
        for j in range(n2):
            r2 += ratings[second[i, j]]
        diff = r1 / n1 + advantage[0] - r2 / n2
        e = 1.0 / (1.0 + math.pow(10.0, -diff / scale))
        out[i] = e
        delta = k * (score[i] - e)
        advantage[0] += advantage_k * (score[i] - e)
        for j in range(n1):
            ratings[first[i, j]] += delta
        for j in range(n2):
            ratings[second[i, j]] -= delta


_elo_loop_compiled = njit(cache=True)(_elo_loop)


class Elo(CopyOnWriteRows):
    """Elo ratings with team means and a learned first-side advantage (rating points)."""

    kind: ClassVar[str] = "elo"

    def __init__(
        self,
        k: float = 24.0,
        scale: float = 400.0,
        initial: float = 1500.0,
        first_advantage: float = 0.0,
        compiled: bool = True,
        advantage_k: float = 2.0,
    ) -> None:
        if not (k > 0 and math.isfinite(k)):
            raise ConfigError("elo: k must be a positive number")
        if not (scale > 0 and math.isfinite(scale)):
            raise ConfigError("elo: scale must be a positive number")
        if not (math.isfinite(initial) and math.isfinite(first_advantage)):
            raise ConfigError("elo: initial and first_advantage must be finite")
        self.k = float(k)
        self.scale = float(scale)
        self.initial = float(initial)
        self.first_advantage = float(first_advantage)
        self.compiled = bool(compiled)
        if not (advantage_k >= 0 and math.isfinite(advantage_k)):
            raise ConfigError("elo: advantage_k must be a number >= 0")
        self.advantage_k = float(advantage_k)
        self.advantage_ = np.array([self.first_advantage], dtype=np.float64)
        self.entities_ = EntityTable()
        self.ratings_ = np.full(16, self.initial, dtype=np.float64)

    # -- state helpers ------------------------------------------------------------
    def _fit_capacity(self) -> None:
        n = len(self.entities_)
        if n > len(self.ratings_):
            grown = np.full(max(n, 2 * len(self.ratings_)), self.initial, dtype=np.float64)
            grown[: len(self.ratings_)] = self.ratings_
            self.ratings_ = grown

    def _side_rating(self, side: Sequence[str]) -> float:
        # Same summation order as the compiled loop, so both agree to the last bit.
        total = 0.0
        for e in side:
            r = self.entities_.get(e)
            total += self.initial if r < 0 else float(self.ratings_[r])
        return total / len(side)

    def rating(self, entity_id: str) -> float:
        """Current rating of an entity (``initial`` if never seen)."""
        r = self.entities_.get(entity_id)
        return self.initial if r < 0 else float(self.ratings_[r])

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        diff = (
            self._side_rating(matchup.first)
            + float(self.advantage_[0])
            - self._side_rating(matchup.second)
        )
        return Prediction(1.0 / (1.0 + math.pow(10.0, -diff / self.scale)))

    def learn(self, event: MatchEvent) -> Prediction:
        # Same arithmetic, in the same order, as _elo_loop (tests hold them equal);
        # written out because encoding a batch of one costs more than the update.
        table = self.entities_
        rows1 = table.rows(event.first)
        rows2 = table.rows(event.second)
        self._fit_capacity()
        if self._copying():
            self.before_write(np.array(rows1 + rows2))
        ratings = self.ratings_
        r1 = 0.0
        for r in rows1:
            r1 += ratings[r]
        r2 = 0.0
        for r in rows2:
            r2 += ratings[r]
        diff = r1 / len(rows1) + self.advantage_[0] - r2 / len(rows2)
        e = 1.0 / (1.0 + math.pow(10.0, -diff / self.scale))
        delta = self.k * (event.score - e)
        self.advantage_[0] += self.advantage_k * (event.score - e)
        for r in rows1:
            ratings[r] += delta
        for r in rows2:
            ratings[r] -= delta
        table.counts[rows1 + rows2] += 1
        return Prediction(float(e))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        return self.learn_encoded(encode_events(events, self.entities_))

    def learn_encoded(self, batch: EncodedBatch, compiled: bool | None = None) -> Predictions:
        """Sequential learning over an already encoded batch (rows must be known).

        ``compiled`` picks the numba loop or the plain-Python one (the default
        follows the model's ``compiled`` setting); both give the same numbers.
        """
        if _any_unknown(batch):
            raise ValueError("learn_encoded: batch holds entities unknown to this model")
        self._fit_capacity()
        self.before_batch(batch)
        out = np.empty(len(batch), dtype=np.float64)
        use = self.compiled if compiled is None else compiled
        loop = _elo_loop_compiled if use and len(batch) > 1 else _elo_loop
        loop(
            batch.first,
            batch.first_size,
            batch.second,
            batch.second_size,
            batch.score,
            self.ratings_,
            self.k,
            self.scale,
            self.advantage_,
            self.advantage_k,
            out,
        )
        count_matches(batch, self.entities_)
        return Predictions(out, np.zeros_like(out))

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict every event from the batch-start ratings, then add up all deltas."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        b = encode_events(events, self.entities_)
        self._fit_capacity()
        p = np.empty(len(b), dtype=np.float64)
        delta = np.zeros(len(self.entities_), dtype=np.float64)
        adv = float(self.advantage_[0])
        adv_step = 0.0
        for i in range(len(b)):
            n1, n2 = int(b.first_size[i]), int(b.second_size[i])
            rows1, rows2 = b.first[i, :n1], b.second[i, :n2]
            r1 = 0.0
            for r in rows1:
                r1 += self.ratings_[r]
            r2 = 0.0
            for r in rows2:
                r2 += self.ratings_[r]
            diff = r1 / n1 + adv - r2 / n2
            p[i] = 1.0 / (1.0 + math.pow(10.0, -diff / self.scale))
            d = self.k * (b.score[i] - p[i])
            adv_step += self.advantage_k * (b.score[i] - p[i])
            delta[rows1] += d
            delta[rows2] -= d
        self.before_batch(b)
        self.ratings_[: len(delta)] += delta
        self.advantage_[0] += adv_step
        count_matches(b, self.entities_)
        return Predictions(p, np.zeros_like(p))

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "k": self.k,
            "scale": self.scale,
            "initial": self.initial,
            "first_advantage": self.first_advantage,
            "compiled": self.compiled,
            "advantage_k": self.advantage_k,
        }

    def _entity_rows(self) -> dict[str, np.ndarray]:
        return {"ratings": self.ratings_}

    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        arrays = entity_arrays(self.entities_, **(self._entity_rows() if rows else {}))
        arrays["advantage"] = self.advantage_.copy()
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, (ratings,) = load_entity_arrays(self.kind, arrays, ("ratings",))
        self.entities_ = table
        self.ratings_ = np.full(max(16, 2 * len(table)), self.initial, dtype=np.float64)
        self.ratings_[: len(table)] = ratings
        # States saved before the advantage was learned lack it: it was the setting.
        adv = np.asarray(arrays.get("advantage", [self.first_advantage]), dtype=np.float64)
        if adv.shape != (1,) or not np.isfinite(adv[0]):
            raise StateError("elo: array 'advantage' must hold one finite number")
        self.advantage_ = adv.copy()


def _any_unknown(batch: EncodedBatch) -> bool:
    for rows, sizes in ((batch.first, batch.first_size), (batch.second, batch.second_size)):
        real = np.arange(rows.shape[1])[None, :] < sizes[:, None]
        if np.any((rows < 0) & real):
            return True
    return False
