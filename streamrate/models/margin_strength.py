"""Gaussian strengths that learn from margins when events carry them.

The strengths, their variances, the first-side advantage, time noise, season
pulls and the newcomer offset are those of
:mod:`streamrate.models.bayes_strength` (same settings, same result update, same
probit-widened forecast): on events without a ``margin`` this model gives the
same numbers. What it adds is a second observation per event when the margin is
known.

**The margin as a Gaussian observation.** With ``theta = x . s`` the logit of
the match (``x`` as in ``bayes_strength``: ``1/|A|`` for members of A,
``-1/|B|`` for members of B, ``1`` for the advantage, ``x_b`` for the newcomer
offset), the margin ``d`` is modelled as

    d = c theta + e,    e ~ N(0, r)

with ``c`` the margin per unit of logit and ``r`` the noise variance of a
margin, both learned online (below). For a Gaussian prior ``N(mu, Sigma)`` this
is a linear-Gaussian observation, and the exact posterior is the Kalman update
with gain ``k = Sigma x c / S``, ``S = c^2 V + r``, ``V = x' Sigma x``::

    mu    <- mu + k (d - c m),       m = x . mu
    Sigma <- Sigma - S k k'

Kept diagonal, as in ``bayes_strength``: ``mu_j += v_j x_j c (d - c m) / S`` and
``v_j -= (v_j x_j c)^2 / S``. For a diagonal prior the means are exact and the
variances are the exact posterior's diagonal (``tests/test_margin_strength.py``
checks both against a direct solve with numpy). The result update runs first,
then the margin update from the state it left (``V`` and ``m`` recomputed).
A result is a function of its margin, so using both counts the evidence of the
sign twice; ``margin_weight`` (a factor on the margin's precision ``c^2 / r``)
tempers the margin, and ``result_with_margin = false`` drops the result update
when a margin is present.

**Learning c and r** (running moments, the margin's own regression). Before an
event updates anything its forecast has mean ``m`` and variance ``V`` of
``theta``; with ``m`` the posterior mean, ``E[d | m] = c m`` and
``E[(d - c m)^2] = c^2 V + r``. So, over the events with a margin, with every
sum decayed by ``1 - 1/margin_memory`` per such event::

    c = (sum d m + k c0) / (sum m^2 + k)
    r = (sum ((d - c m)^2 - c^2 V) + k r0) / (count + k)

``k = margin_prior_weight`` pseudo-events at ``|m| = 1`` hold ``c`` near its
prior ``margin_scale`` and ``r`` near ``margin_var`` until margins have been
seen; ``c`` is kept within ``[c0/10, 10 c0]`` and ``r`` at least ``r0/100``.
``c`` and ``r`` are read before the event and updated after it, so the
forecast of an event never uses its own margin.

**A weakness: the scale of c.** ``E[d | m] = c m`` holds when the means are
calibrated. Over-confident means (spread wider than the true logits) make the
regression slope smaller than ``c``; a smaller ``c`` reads each margin as a
larger difference of strengths, which spreads the means further: a feedback.
The result update ties the logit to the outcomes and damps it
(``result_with_margin``, on by default); without it only ``c``'s prior pins the
scale. On the football results (README) this model with its default settings
(those of ``bayes_strength``: fast noise, no seasons, already over-confident
there) learns ``c`` near 0.6 and scores worse with margins than without; with the
settings chosen on the first 80% (slow noise, season pulls) ``c`` stays near 1.1
and margins help a little.

**Cost.** A compiled loop like ``bayes_strength``'s with one more pass over the
match's members for a margin; state: 4 float64 per entity (mean, variance, last
day, matches while new) plus the shared parameters and four moments.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import ClassVar

import numpy as np

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
from streamrate.models._jit import kernel
from streamrate.models.base import (
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)
from streamrate.models.bayes_strength import BayesStrength

__all__ = ["DAY_S", "KNOBS", "PROBIT", "MarginStrength"]
# shared: [mu_h, v_h, mu_b, v_b, clock]; moments: [count, sum d m, sum m^2, sum resid]
# knobs: the settings the loop reads, in this order:
KNOBS = (
    "noise_per_day",
    "prior_var",
    "newcomer_matches",
    "shared_noise_per_day",
    "margin_scale",
    "margin_var",
    "margin_prior_weight",
    "margin_memory",
    "margin_weight",
    "result_with_margin",
    "margin_cap",
)


def _margin_loop(
    first: np.ndarray,
    first_size: np.ndarray,
    second: np.ndarray,
    second_size: np.ndarray,
    score: np.ndarray,
    margin: np.ndarray,
    day: np.ndarray,
    mu: np.ndarray,
    var: np.ndarray,
    last_day: np.ndarray,
    age: np.ndarray,
    shared: np.ndarray,
    moments: np.ndarray,
    knobs: np.ndarray,
    out: np.ndarray,
) -> None:
    """Sequential update over encoded events (``margin`` NaN where unknown); writes
    each widened forecast to ``out``. Plain Python, also compiled by numba."""
    noise_per_day, prior_var, nm, shared_noise = knobs[0], knobs[1], knobs[2], knobs[3]
    c0, r0, k, memory, weight = knobs[4], knobs[5], knobs[6], knobs[7], knobs[8]
    result_with_margin = knobs[9] > 0.5
    cap = knobs[10]
    for i in range(score.shape[0]):
        n1 = first_size[i]
        n2 = second_size[i]
        if not math.isnan(shared[4]):  # the shared parameters drift
            drift = shared_noise * max(day[i] - shared[4], 0.0)
            shared[1] += drift
            shared[3] += drift
        shared[4] = day[i] if math.isnan(shared[4]) else max(shared[4], day[i])
        m = shared[0]
        big_v = shared[1]
        xb = 0.0
        for j in range(n1 + n2):
            r = first[i, j] if j < n1 else second[i, j - n1]
            if not math.isnan(last_day[r]):
                idle = max(day[i] - last_day[r], 0.0)
                var[r] = min(var[r] + noise_per_day * idle, prior_var)
            last_day[r] = day[i]
            x = 1.0 / n1 if j < n1 else -1.0 / n2
            m += x * mu[r]
            big_v += x * x * var[r]
            if age[r] < nm:
                xb += x
        m += xb * shared[2]
        big_v += xb * xb * shared[3]
        p = 1.0 / (1.0 + math.exp(-m / math.sqrt(1.0 + PROBIT * big_v)))
        out[i] = p
        d = margin[i]
        has_margin = not math.isnan(d)
        if has_margin:
            d = min(max(d, -cap), cap)
        if not has_margin or result_with_margin:  # the result, as bayes_strength
            g = score[i] - p
            w = p * (1.0 - p)
            denom = 1.0 + w * big_v
            for j in range(n1 + n2):
                r = first[i, j] if j < n1 else second[i, j - n1]
                x = 1.0 / n1 if j < n1 else -1.0 / n2
                mu[r] += var[r] * x * g / denom
                var[r] *= 1.0 - w * var[r] * x * x / denom
            shared[0] += shared[1] * g / denom
            shared[1] *= 1.0 - w * shared[1] / denom
            shared[2] += shared[3] * xb * g / denom
            shared[3] *= 1.0 - w * shared[3] * xb * xb / denom
        if has_margin:
            c = (moments[1] + k * c0) / (moments[2] + k)
            c = min(max(c, 0.1 * c0), 10.0 * c0)
            noise = max((moments[3] + k * r0) / (moments[0] + k), 0.01 * r0)
            m2 = shared[0] + xb * shared[2]  # the state the result update left
            v2 = shared[1] + xb * xb * shared[3]
            for j in range(n1 + n2):
                r = first[i, j] if j < n1 else second[i, j - n1]
                x = 1.0 / n1 if j < n1 else -1.0 / n2
                m2 += x * mu[r]
                v2 += x * x * var[r]
            s = c * c * v2 + noise / weight
            innov = d - c * m2
            for j in range(n1 + n2):
                r = first[i, j] if j < n1 else second[i, j - n1]
                x = 1.0 / n1 if j < n1 else -1.0 / n2
                kv = var[r] * x * c
                mu[r] += kv * innov / s
                var[r] -= kv * kv / s
            kv = shared[1] * c
            shared[0] += kv * innov / s
            shared[1] -= kv * kv / s
            kv = shared[3] * xb * c
            shared[2] += kv * innov / s
            shared[3] -= kv * kv / s
            keep = 1.0 - 1.0 / memory  # the moments, from the forecast's m and V
            resid = d - c * m
            moments[0] = keep * moments[0] + 1.0
            moments[1] = keep * moments[1] + d * m
            moments[2] = keep * moments[2] + m * m
            moments[3] = keep * moments[3] + resid * resid - c * c * big_v
        for j in range(n1 + n2):  # an entity that stops being new takes the offset in
            r = first[i, j] if j < n1 else second[i, j - n1]
            if age[r] < nm:
                age[r] += 1.0
                if age[r] >= nm:
                    mu[r] += shared[2]
                    var[r] = min(var[r] + shared[3], prior_var)


_margin_loop_compiled = kernel(_margin_loop)


class MarginStrength(DiagonalRows):
    """Gaussian strengths learning from results and, when given, margins."""

    kind: ClassVar[str] = "margin_strength"
    PARAMS: ClassVar[tuple[str, ...]] = (*BayesStrength.PARAMS, *KNOBS[4:])  # the margin's

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
        margin_scale: float = 1.0,
        margin_var: float = 4.0,
        margin_prior_weight: float = 100.0,
        margin_memory: float = 5000.0,
        margin_weight: float = 1.0,
        result_with_margin: bool = True,
        margin_cap: float = 1e9,
    ) -> None:
        nums = (
            prior_var,
            noise_per_day,
            advantage_var,
            period_pull,
            period_var,
            newcomer_var,
            shared_noise_per_day,
            margin_scale,
            margin_var,
            margin_prior_weight,
            margin_memory,
            margin_weight,
            margin_cap,
        )
        nonnegative = (noise_per_day, advantage_var, period_var)
        check_settings(self.kind, nums, prior_var, nonnegative, period_pull)
        if newcomer_matches < 0 or newcomer_var < 0 or shared_noise_per_day < 0:
            raise ConfigError("margin_strength: newcomer and shared noise settings must be >= 0")
        if min(margin_scale, margin_var, margin_prior_weight, margin_weight, margin_cap) <= 0:
            raise ConfigError("margin_strength: margin settings must be > 0")
        if margin_memory < 1:
            raise ConfigError("margin_strength: margin_memory must be at least 1 (events)")
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
        self.margin_scale = float(margin_scale)
        self.margin_var = float(margin_var)
        self.margin_prior_weight = float(margin_prior_weight)
        self.margin_memory = float(margin_memory)
        self.margin_weight = float(margin_weight)
        self.result_with_margin = bool(result_with_margin)
        self.margin_cap = float(margin_cap)
        self._knobs = np.array([float(getattr(self, name)) for name in KNOBS])
        self._init_rows()
        self.shared_ = np.array([0.0, self.advantage_var, 0.0, self.newcomer_var, np.nan])
        self.moments_ = np.zeros(4)

    def margin_model(self) -> tuple[float, float]:
        """The current margin per unit of logit ``c`` and margin noise variance ``r``."""
        mom, k = self.moments_, self.margin_prior_weight
        c = (mom[1] + k * self.margin_scale) / (mom[2] + k)
        c = min(max(c, 0.1 * self.margin_scale), 10.0 * self.margin_scale)
        r = max((mom[3] + k * self.margin_var) / (mom[0] + k), 0.01 * self.margin_var)
        return float(c), float(r)

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        sh = self.shared_
        shared = (float(sh[0]), float(sh[1]), float(sh[2]), float(sh[3]))
        return Prediction(self._forecast(matchup, shared))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        """The sequential path; there is no separate mini-batch update
        (``learn_batch`` is this path)."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        batch = encode_events(events, self.entities_)
        margins = np.array([math.nan if ev.margin is None else ev.margin for ev in events])
        self._fit_capacity()
        self.before_batch(batch)
        out = self._by_period(events, lambda part: self._run(batch.take(part), margins[part]))
        count_matches(batch, self.entities_)
        return Predictions(out, np.zeros_like(out))

    def _run(self, b: EncodedBatch, margins: np.ndarray) -> np.ndarray:
        out = np.empty(len(b))
        loop = _margin_loop_compiled if self.compiled and len(b) > 1 else _margin_loop
        loop(
            b.first,
            b.first_size,
            b.second,
            b.second_size,
            b.score,
            margins,
            b.time_s / DAY_S,
            self.mu_,
            self.var_,
            self.last_day_,
            self.age_,
            self.shared_,
            self.moments_,
            self._knobs,
            out,
        )
        return out

    # -- persistence --------------------------------------------------------------
    def _entity_rows(self) -> dict[str, np.ndarray]:
        return {"mu": self.mu_, "var": self.var_, "last_day": self.last_day_, "age": self.age_}

    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        arrays = entity_arrays(self.entities_, **(self._entity_rows() if rows else {}))
        arrays["shared"] = self.shared_.copy()
        arrays["moments"] = self.moments_.copy()
        arrays.update(self._period_arrays())
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, rows = load_entity_arrays(self.kind, arrays, ROW_NAMES)
        shared = np.asarray(arrays["shared"], dtype=np.float64)
        moments = np.asarray(arrays["moments"], dtype=np.float64)
        if shared.shape != (5,) or not np.all(np.isfinite(shared[:4])):
            raise StateError("margin_strength: array 'shared' must hold five numbers")
        if moments.shape != (4,) or not np.all(np.isfinite(moments)):
            raise StateError("margin_strength: array 'moments' must hold four finite numbers")
        self._load_rows(table, rows)
        self.shared_, self.moments_ = shared.copy(), moments.copy()
        self._load_period(arrays)
