"""Strengths that know how sure they are: a Gaussian per entity, updated online.

Each entity ``i`` has a strength ``s_i ~ N(mu_i, v_i)`` on the logit scale; the
first side also gets an advantage ``h ~ N(mu_h, v_h)``. A side's strength is the
mean of its members', so for sides A and B the logit is ``theta = x . w`` with
``x_j = 1/|A|`` for members of A, ``-1/|B|`` for members of B and ``1`` for ``h``.

**Prediction.** With ``m = x . mu`` and ``V = sum_j x_j^2 v_j`` (a diagonal
covariance), the predictive probability integrates the logistic over
``theta ~ N(m, V)``; the probit approximation ``sigmoid(m / sqrt(1 + pi V / 8))``
is used, so newcomers and long-idle entities (large ``v``) get humbler numbers.

**Update** (an approximate Bayesian online update in the spirit of 'A Bayesian
Approximation Method for Online Ranking', JMLR 2011). Linearise the log
likelihood ``l(theta) = y ln p + (1 - y) ln(1 - p)`` at the prior mean: gradient
``g = y - p`` and curvature ``w = p (1 - p)`` (``p`` the widened forecast, ``y``
the score, a draw 0.5). The Gaussian prior times this quadratic is Gaussian; its
exact posterior along ``x`` (rank-one, Sherman-Morrison) has mean step
``Sigma x g / (1 + w V)`` and covariance ``Sigma - w Sigma x x' Sigma / (1 + w V)``.
Keeping the diagonal only::

    mu_j <- mu_j + v_j x_j g / (1 + w V)
    v_j  <- v_j (1 - w v_j x_j^2 / (1 + w V))

For one entity against a known opponent (``V = v``) this is
``1/v' = 1/v + w``: the conjugate Gaussian update with observation precision
``w`` (what the tests check). So ``v`` sets each entity's step size: large while
little is known, shrinking as evidence arrives, like a rating deviation.

**Time.** Before an entity plays, its variance grows by ``noise_per_day`` times
the days since its last match (a random walk of the strength), capped at
``prior_var``. **Periods.** With ``period_field`` set (e.g. ``"season"``), when
that context value changes every strength is pulled a share ``period_pull``
toward its prior 0 and every variance grows by ``period_var`` (capped at
``prior_var``); how much to pull is chosen online by mixing several pulls
(:mod:`streamrate.models.mixture`).

**Newcomers** (``newcomer_matches = n > 0``). Arrivals need not be average: a
side promoted into a league, a fresh account. For its first ``n`` matches an
entity's strength is ``mu_j + b``, with ``b ~ N(mu_b, v_b)`` one offset shared
by all newcomers (prior variance ``newcomer_var``), learned like the advantage:
it enters the logit with weight ``x_b = sum of x_j over the new members`` and
gets the same diagonal update (``mu_b += v_b x_b g / (1 + w V)``, ``V`` now
including ``x_b^2 v_b``). After its ``n``-th match the entity takes the current
offset in: ``mu_j += mu_b``, ``v_j += v_b`` (capped at ``prior_var``).

**Drifting shared parameters** (``shared_noise_per_day``). The advantage and
the newcomer offset are random walks too: before each event their variances
grow by ``shared_noise_per_day`` times the days since the previous event, so
they keep tracking a first-side edge that changes over the years instead of
freezing once their variance has shrunk.

>>> from datetime import datetime, timezone
>>> from streamrate.events import MatchEvent, Matchup
>>> m = BayesStrength()
>>> t = datetime(2026, 3, 1, tzinfo=timezone.utc)
>>> for k in range(10):
...     _ = m.learn(MatchEvent(match_id=f"m{k}", finished_at=t, first=("kelvash",),
...                            second=("morvenn",), score=1.0))
>>> m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win > 0.75
True
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import ClassVar

import numpy as np
from numba import njit

from streamrate.batch import EncodedBatch, count_matches, encode_events
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models._gaussian import (
    DAY_S,
    PROBIT,
    ROW_NAMES,
    DiagonalRows,
    check_settings,
)
from streamrate.models.base import (
    ModelState,
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)

__all__ = ["DAY_S", "PROBIT", "BayesStrength"]


def _strength_loop(
    first: np.ndarray,
    first_size: np.ndarray,
    second: np.ndarray,
    second_size: np.ndarray,
    score: np.ndarray,
    day: np.ndarray,
    mu: np.ndarray,
    var: np.ndarray,
    last_day: np.ndarray,
    adv: np.ndarray,
    noise_per_day: float,
    prior_var: float,
    out: np.ndarray,
    age: np.ndarray,
    newc: np.ndarray,
    newcomer_matches: float,
    clock: np.ndarray,
    shared_noise_per_day: float,
) -> None:
    """Sequential update over encoded events; writes each widened forecast to ``out``.

    ``adv`` holds ``[mu_h, v_h]``; ``last_day`` is NaN for entities not yet seen.
    Plain Python, also compiled by numba: both give the same numbers.
    """
    for i in range(score.shape[0]):
        n1 = first_size[i]
        n2 = second_size[i]
        if not math.isnan(clock[0]):  # the shared parameters drift too
            drift = shared_noise_per_day * max(day[i] - clock[0], 0.0)
            adv[1] += drift
            newc[1] += drift
        clock[0] = day[i] if math.isnan(clock[0]) else max(clock[0], day[i])
        m = adv[0]
        big_v = adv[1]
        xb = 0.0  # the newcomer offset's weight: the young members' x summed
        for j in range(n1 + n2):
            r = first[i, j] if j < n1 else second[i, j - n1]
            if not math.isnan(last_day[r]):
                idle = max(day[i] - last_day[r], 0.0)
                var[r] = min(var[r] + noise_per_day * idle, prior_var)
            last_day[r] = day[i]
            x = 1.0 / n1 if j < n1 else -1.0 / n2
            m += x * mu[r]
            big_v += x * x * var[r]
            if age[r] < newcomer_matches:
                xb += x
        m += xb * newc[0]
        big_v += xb * xb * newc[1]
        p = 1.0 / (1.0 + math.exp(-m / math.sqrt(1.0 + PROBIT * big_v)))
        out[i] = p
        g = score[i] - p
        w = p * (1.0 - p)
        denom = 1.0 + w * big_v
        for j in range(n1 + n2):
            r = first[i, j] if j < n1 else second[i, j - n1]
            x = 1.0 / n1 if j < n1 else -1.0 / n2
            mu[r] += var[r] * x * g / denom
            var[r] *= 1.0 - w * var[r] * x * x / denom
        adv[0] += adv[1] * g / denom
        adv[1] *= 1.0 - w * adv[1] / denom
        newc[0] += newc[1] * xb * g / denom
        newc[1] *= 1.0 - w * newc[1] * xb * xb / denom
        for j in range(n1 + n2):  # an entity that stops being new takes the offset in
            r = first[i, j] if j < n1 else second[i, j - n1]
            if age[r] < newcomer_matches:
                age[r] += 1.0
                if age[r] >= newcomer_matches:
                    mu[r] += newc[0]
                    var[r] = min(var[r] + newc[1], prior_var)


_strength_loop_compiled = njit(cache=True)(_strength_loop)


class BayesStrength(DiagonalRows):
    """Gaussian strengths with per-entity variance, time noise and season pulls."""

    kind: ClassVar[str] = "bayes_strength"
    # Version 2 added the newcomer offset (arrays ``age``, ``newcomer``) and the
    # clock of the shared parameters' drift (``clock``); a version 1 state loads
    # with both off, as it was trained.
    state_version: ClassVar[int] = 2
    PARAMS: ClassVar[tuple[str, ...]] = (
        "prior_var",
        "noise_per_day",
        "advantage_var",
        "period_field",
        "period_pull",
        "period_var",
        "compiled",
        "newcomer_matches",
        "newcomer_var",
        "shared_noise_per_day",
    )

    def __init__(
        self,
        prior_var: float = 1.0,
        noise_per_day: float = 0.002,
        advantage_var: float = 0.25,
        period_field: str | None = None,
        period_pull: float = 0.0,
        period_var: float = 0.0,
        compiled: bool = True,
        newcomer_matches: int = 0,
        newcomer_var: float = 0.25,
        shared_noise_per_day: float = 0.0,
    ) -> None:
        nums = (
            prior_var,
            noise_per_day,
            advantage_var,
            period_pull,
            period_var,
            newcomer_var,
            shared_noise_per_day,
        )
        nonnegative = (noise_per_day, advantage_var, period_var)
        check_settings(self.kind, nums, prior_var, nonnegative, period_pull)
        if newcomer_matches < 0 or newcomer_var < 0 or shared_noise_per_day < 0:
            raise ConfigError("bayes_strength: newcomer and shared noise settings must be >= 0")
        self._store_settings(
            prior_var,
            noise_per_day,
            advantage_var,
            period_field,
            period_pull,
            period_var,
            newcomer_matches,
            newcomer_var,
            shared_noise_per_day,
            compiled,
        )
        self._init_rows()
        self.adv_ = np.array([0.0, self.advantage_var])
        self.newcomer_ = np.array([0.0, self.newcomer_var])
        self.clock_ = np.array([np.nan])  # the day of the latest event

    @classmethod
    def upgrade_state(cls, state: ModelState) -> ModelState:
        if state.kind != cls.kind or state.version != 1:
            return state
        n = int(np.asarray(state.arrays["mu"]).shape[0])
        arrays = {
            **state.arrays,
            "age": np.zeros(n),
            "newcomer": np.array([0.0, 0.0]),
            "clock": np.array([np.nan]),
        }
        params = {**state.params, "newcomer_matches": 0, "shared_noise_per_day": 0.0}
        return ModelState(state.kind, 2, params, arrays)

    # -- state helpers ------------------------------------------------------------
    def variance(self, entity_id: str) -> float:
        """The entity's strength variance now (``prior_var`` if never seen)."""
        r = self.entities_.get(entity_id)
        return self.prior_var if r < 0 else float(self.var_[r])

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        adv, newc = self.adv_, self.newcomer_
        shared = (float(adv[0]), float(adv[1]), float(newc[0]), float(newc[1]))
        return Prediction(self._forecast(matchup, shared))

    def predict_many(self, matchups: Sequence[Matchup]) -> Predictions:
        """:meth:`predict` of each pairing; one against one as arrays (the same sums in
        the same order; the exponential and square root of numpy may differ from
        ``math``'s in the last bit), teams one by one."""
        if not matchups or any(len(m.first) != 1 or len(m.second) != 1 for m in matchups):
            return super().predict_many(matchups)
        get = self.entities_.get
        r1 = np.array([get(m.first[0]) for m in matchups], dtype=np.int64)
        r2 = np.array([get(m.second[0]) for m in matchups], dtype=np.int64)
        k1, k2 = r1 >= 0, r2 >= 0
        mu1 = np.where(k1, self.mu_[np.maximum(r1, 0)], 0.0)
        mu2 = np.where(k2, self.mu_[np.maximum(r2, 0)], 0.0)
        v1 = np.where(k1, self.var_[np.maximum(r1, 0)], self.prior_var)
        v2 = np.where(k2, self.var_[np.maximum(r2, 0)], self.prior_var)
        m = float(self.adv_[0]) + 1.0 * mu1 + -1.0 * mu2
        big_v = float(self.adv_[1]) + 1.0 * v1 + 1.0 * v2
        nm = self.newcomer_matches
        if nm:
            new1 = ~k1 | (self.age_[np.maximum(r1, 0)] < nm)
            new2 = ~k2 | (self.age_[np.maximum(r2, 0)] < nm)
            xb = new1.astype(np.float64) - new2.astype(np.float64)
            m = m + xb * float(self.newcomer_[0])
            big_v = big_v + xb * xb * float(self.newcomer_[1])
        p = 1.0 / (1.0 + np.exp(-m / np.sqrt(1.0 + PROBIT * big_v)))
        return Predictions(p, np.zeros_like(p))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        return self.learn_encoded(events, encode_events(events, self.entities_))

    def learn_encoded(
        self, events: Sequence[MatchEvent], batch: EncodedBatch, count: bool = True
    ) -> Predictions:
        """The sequential path over ``events`` already encoded against this model's
        entity table (``batch``); ``count=False`` leaves the match counts alone (a
        mixture whose members share one table counts once)."""
        self._fit_capacity()
        self.before_batch(batch)
        out = self._by_period(events, lambda part: self._run(batch.take(part)))
        if count:
            count_matches(batch, self.entities_)
        return Predictions(out, np.zeros_like(out))

    def _run(self, batch: EncodedBatch, compiled: bool | None = None) -> np.ndarray:
        out = np.empty(len(batch))
        use = self.compiled if compiled is None else compiled
        loop = _strength_loop_compiled if use and len(batch) > 1 else _strength_loop
        loop(
            batch.first,
            batch.first_size,
            batch.second,
            batch.second_size,
            batch.score,
            batch.time_s / DAY_S,
            self.mu_,
            self.var_,
            self.last_day_,
            self.adv_,
            self.noise_per_day,
            self.prior_var,
            out,
            self.age_,
            self.newcomer_,
            float(self.newcomer_matches),
            self.clock_,
            self.shared_noise_per_day,
        )
        return out

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict all from the batch-start state (after idle widening), then add up
        the mean steps and multiply the variance factors of every event."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        return self.learn_batch_encoded(events, encode_events(events, self.entities_))

    def learn_batch_encoded(
        self, events: Sequence[MatchEvent], b: EncodedBatch, count: bool = True
    ) -> Predictions:
        """:meth:`learn_batch` on events already encoded (see :meth:`learn_encoded`)."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        self._enter_period(self._period_of(events[0]))
        self._fit_capacity()
        self.before_batch(b)
        day = b.time_s / DAY_S
        for i in range(len(b)):  # idle widening, as the sequential loop does it
            for r in (*b.first[i, : b.first_size[i]], *b.second[i, : b.second_size[i]]):
                if not math.isnan(self.last_day_[r]):
                    idle = max(day[i] - self.last_day_[r], 0.0)
                    self.var_[r] = min(self.var_[r] + self.noise_per_day * idle, self.prior_var)
                self.last_day_[r] = day[i]
            if not math.isnan(self.clock_[0]):  # the shared parameters' drift
                drift = self.shared_noise_per_day * max(day[i] - self.clock_[0], 0.0)
                self.adv_[1] += drift
                self.newcomer_[1] += drift
            self.clock_[0] = day[i] if math.isnan(self.clock_[0]) else max(self.clock_[0], day[i])
        mu, var, adv = self.mu_.copy(), self.var_.copy(), self.adv_.copy()
        newc, nm = self.newcomer_.copy(), self.newcomer_matches
        p = np.empty(len(b))
        for i in range(len(b)):
            n1, n2 = int(b.first_size[i]), int(b.second_size[i])
            rows = [int(r) for r in (*b.first[i, :n1], *b.second[i, :n2])]
            xs = [1.0 / n1] * n1 + [-1.0 / n2] * n2
            m, big_v = adv[0], adv[1]  # summed in the sequential loop's order
            xb = 0.0
            for r, x in zip(rows, xs, strict=True):
                m += x * mu[r]
                big_v += x * x * var[r]
                xb += x if self.age_[r] < nm else 0.0
            m += xb * newc[0]
            big_v += xb * xb * newc[1]
            p[i] = 1.0 / (1.0 + math.exp(-m / math.sqrt(1.0 + PROBIT * big_v)))
            g, w = b.score[i] - p[i], p[i] * (1.0 - p[i])
            denom = 1.0 + w * big_v
            for r, x in zip(rows, xs, strict=True):
                self.mu_[r] += var[r] * x * g / denom
                self.var_[r] *= 1.0 - w * var[r] * x * x / denom
            self.adv_[0] += adv[1] * g / denom
            self.adv_[1] *= 1.0 - w * adv[1] / denom
            self.newcomer_[0] += newc[1] * xb * g / denom
            self.newcomer_[1] *= 1.0 - w * newc[1] * xb * xb / denom
        for i in range(len(b)):  # entities that stop being new take the offset in
            for r in (*b.first[i, : b.first_size[i]], *b.second[i, : b.second_size[i]]):
                if self.age_[r] < nm:
                    self.age_[r] += 1.0
                    if self.age_[r] >= nm:
                        self.mu_[r] += self.newcomer_[0]
                        self.var_[r] = min(self.var_[r] + self.newcomer_[1], self.prior_var)
        if count:
            count_matches(b, self.entities_)
        return Predictions(p, np.zeros_like(p))

    # -- persistence --------------------------------------------------------------
    def _entity_rows(self) -> dict[str, np.ndarray]:
        return {"mu": self.mu_, "var": self.var_, "last_day": self.last_day_, "age": self.age_}

    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        arrays = entity_arrays(self.entities_, **(self._entity_rows() if rows else {}))
        arrays["advantage"] = self.adv_.copy()
        arrays["newcomer"] = self.newcomer_.copy()
        arrays["clock"] = self.clock_.copy()
        arrays.update(self._period_arrays())
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, rows = load_entity_arrays(self.kind, arrays, ROW_NAMES)
        adv = np.asarray(arrays["advantage"], dtype=np.float64)
        newc = np.asarray(arrays["newcomer"], dtype=np.float64)
        for name, a in (("advantage", adv), ("newcomer", newc)):
            if a.shape != (2,) or not np.all(np.isfinite(a)):
                raise StateError(f"bayes_strength: array {name!r} must hold two finite numbers")
        self._load_rows(table, rows)
        self.adv_, self.newcomer_ = adv.copy(), newc.copy()
        clock = np.asarray(arrays["clock"], dtype=np.float64)
        if clock.shape != (1,):
            raise StateError("bayes_strength: array 'clock' must hold one number")
        self.clock_ = clock.copy()
        self._load_period(arrays)
