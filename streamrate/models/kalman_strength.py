"""Gaussian strengths with a full covariance over the entities active now.

:mod:`streamrate.models.bayes_strength` keeps one variance per entity: after a
match between A and B it knows that ``s_A - s_B`` moved, but not that A's and
B's strengths are now correlated, so what a later match of B against C teaches
about B never reaches A. A batch fit keeps that flow through common opponents.
This model keeps it online: the strengths of the entities *active now* (at most
``max_active``: a league's sides, the players of this week) share one Gaussian
``N(z, P)`` with a full covariance; every other entity waits in a diagonal store
(mean and variance, as in ``bayes_strength``).

**State.** ``z = (h, b, s_1 .. s_K)``: the first-side advantage ``h``, the shared
newcomer offset ``b`` (see ``bayes_strength``) and the strengths of the ``K``
active slots; ``P`` is its ``(K+2) x (K+2)`` covariance.

**Prediction.** For sides A and B the logit is ``theta = x . z`` with
``x_h = 1``, ``x_b`` = the sum of ``x_j`` over members still new, ``x_j = 1/|A|``
for members of A and ``-1/|B|`` for members of B. With ``m = x . z`` and
``V = x' P x`` the probit approximation gives ``p = sigmoid(m / sqrt(1 + pi V / 8))``.

**Update** (in the spirit of 'A Bayesian Approximation Method for Online Ranking',
JMLR 2011, with a full covariance). Expand the log likelihood
``l(theta) = y ln p + (1 - y) ln(1 - p)`` to second order at the prior mean:
gradient ``g = y - p``, curvature ``-w`` with ``w = p (1 - p)`` (``y`` the score,
a draw 0.5). The prior ``N(z, P)`` times ``exp(g t - w t^2 / 2)`` in
``t = x . (s - z)`` is Gaussian; with ``u = P x`` its precision is
``P^-1 + w x x'`` and, by Sherman-Morrison,

    z <- z + u g / (1 + w V)
    P <- P - w u u' / (1 + w V)

This is the Kalman filter's update for a scalar observation of ``x . s`` with
noise variance ``1/w`` and innovation ``g / w``; for a Gaussian observation it
is exact (what the tests check against a direct solve). Keeping only the
diagonal of ``P`` gives back ``bayes_strength``'s update; keeping all of it, the
``u`` of a match between A and B has entries for every entity correlated with
A or B, so their means move too.

**Time.** An entity's strength is a random walk: before it plays, ``P_jj``
grows by ``noise_per_day`` times its idle days (capped at ``prior_var``). Adding
it late is exact within a period: until the entity plays, no update reads
``P_jj`` (an update's ``u`` reads the columns of the players only); across a
season change the noise of the idle days before it is added unscaled (a small
approximation). ``h`` and ``b`` drift by ``shared_noise_per_day`` per day of the
event clock.

**Periods.** With ``period_field`` set, when that context value changes every
strength becomes ``(1 - c) s + e`` with ``c = period_pull`` and
``e ~ N(0, period_var)``: the strength means and their rows and columns of ``P``
are scaled by ``1 - c`` (``(1 - c)^2`` on the strength block), then
``period_var`` is added to each strength's variance (capped at ``prior_var``);
the diagonal store gets the same with its variances.

**Newcomers** (``newcomer_matches = n``). After its ``n``-th match an entity takes
the offset in, ``s_j <- s_j + b``: a linear map ``T = I + e_j e_b'``, so
``z_j += z_b`` and ``P <- T P T'`` (row ``j`` += row ``b``, then column ``j``
+= column ``b``), exact.

**The active set.** An entity enters a free slot when it plays, with its mean and
variance from the store (a newcomer: 0 and ``prior_var``) and no covariance. It
leaves after ``idle_days`` without a match (a side relegated, a player gone), or
when the set is full and a newcomer needs its slot (then the one idle longest
leaves): its marginal mean and variance go to the store and its covariances are
dropped, so it re-enters with its marginal. In a space of millions of entities
the covariance covers the ``max_active`` most recent ones and the rest is the
diagonal filter; the cost per event is ``O(max_active^2)`` (the rank-one update)
and the memory ``(max_active + 2)^2`` float64 (20 KB for 48) plus 40 bytes per
entity (mean, variance, last day, match count while new, slot).

Measured on the football results of ``tests/test_open_dataset.py`` (README, model
section): in a league where every pair of sides meets twice a season the
correlations stay small (about 0.08, mostly the common level, which a difference
does not see), and the full covariance gains under 0.0005 nats over the diagonal
filter; it is offered as a model, not a member of the default mixture.
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
    GaussianRows,
    check_settings,
)
from streamrate.models._jit import kernel
from streamrate.models.base import (
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)

__all__ = ["DAY_S", "HEAD", "PROBIT", "KalmanStrength"]
HEAD = 2
"""Slots 0 and 1 of the state hold the advantage and the newcomer offset."""


def _kalman_loop(
    first: np.ndarray,
    first_size: np.ndarray,
    second: np.ndarray,
    second_size: np.ndarray,
    score: np.ndarray,
    day: np.ndarray,
    mu: np.ndarray,
    var: np.ndarray,
    last_day: np.ndarray,
    age: np.ndarray,
    slot_of: np.ndarray,
    row_of: np.ndarray,
    z: np.ndarray,
    cov: np.ndarray,
    clock: np.ndarray,
    noise_per_day: float,
    prior_var: float,
    newcomer_matches: float,
    shared_noise_per_day: float,
    idle_days: float,
    out: np.ndarray,
) -> None:
    """Sequential filter over encoded events; writes each widened forecast to ``out``.

    Plain Python over numpy arrays, also compiled by numba: both give the same numbers.
    """
    n_slots = row_of.shape[0]
    x = np.zeros(z.shape[0])
    for i in range(score.shape[0]):
        n1 = first_size[i]
        n2 = second_size[i]
        if not math.isnan(clock[0]):  # the shared parameters drift
            drift = shared_noise_per_day * max(day[i] - clock[0], 0.0)
            cov[0, 0] += drift
            cov[1, 1] += drift
        clock[0] = day[i] if math.isnan(clock[0]) else max(clock[0], day[i])
        for s in range(n_slots):  # entities idle too long leave the active set
            r = row_of[s]
            if r >= 0 and day[i] - last_day[r] > idle_days:
                k = HEAD + s  # its marginal goes to the store, the slot is freed
                mu[r] = z[k]
                var[r] = cov[k, k]
                slot_of[r] = -1
                row_of[s] = -1
                z[k] = 0.0
                cov[k, :] = 0.0
                cov[:, k] = 0.0
        x[:] = 0.0
        x[0] = 1.0
        for j in range(n1 + n2):
            r = first[i, j] if j < n1 else second[i, j - n1]
            s = slot_of[r]
            if s < 0:  # enter: a free slot, else the one idle longest
                best = -1
                for t in range(n_slots):
                    q = row_of[t]
                    if q < 0:
                        best = t
                        break
                    if x[HEAD + t] == 0.0 and (best < 0 or last_day[q] < last_day[row_of[best]]):
                        best = t
                if best < 0:
                    raise ValueError("kalman_strength: max_active is smaller than a match")
                q = row_of[best]
                if q >= 0:  # the one idle longest leaves, as above
                    k = HEAD + best
                    mu[q] = z[k]
                    var[q] = cov[k, k]
                    slot_of[q] = -1
                    cov[k, :] = 0.0
                    cov[:, k] = 0.0
                s = best
                slot_of[r] = s
                row_of[s] = r
                z[HEAD + s] = mu[r]
                cov[HEAD + s, HEAD + s] = var[r]
            k = HEAD + s
            if not math.isnan(last_day[r]):
                idle = max(day[i] - last_day[r], 0.0)
                cov[k, k] = max(min(cov[k, k] + noise_per_day * idle, prior_var), cov[k, k])
            last_day[r] = day[i]
            xj = 1.0 / n1 if j < n1 else -1.0 / n2
            x[k] += xj
            if age[r] < newcomer_matches:
                x[1] += xj
        u = cov @ x
        m = float(z @ x)
        big_v = max(float(u @ x), 0.0)
        p = 1.0 / (1.0 + math.exp(-m / math.sqrt(1.0 + PROBIT * big_v)))
        out[i] = p
        g = score[i] - p
        w = p * (1.0 - p)
        denom = 1.0 + w * big_v
        z += u * (g / denom)
        cov -= np.outer(u, u) * (w / denom)
        for j in range(n1 + n2):  # an entity that stops being new takes the offset in
            r = first[i, j] if j < n1 else second[i, j - n1]
            if age[r] < newcomer_matches:
                age[r] += 1.0
                if age[r] >= newcomer_matches:
                    k = HEAD + slot_of[r]
                    z[k] += z[1]
                    cov[k, :] += cov[1, :]
                    cov[:, k] += cov[:, 1]


_kalman_loop_compiled = kernel(_kalman_loop)


class KalmanStrength(GaussianRows):
    """Gaussian strengths with a full covariance over the active entities.

    The settings shared with :class:`~streamrate.models.bayes_strength.BayesStrength`
    have its defaults, so the two differ by the covariance only."""

    kind: ClassVar[str] = "kalman_strength"
    state_version: ClassVar[int] = 1
    PARAMS: ClassVar[tuple[str, ...]] = (
        "prior_var",
        "noise_per_day",
        "advantage_var",
        "period_field",
        "period_pull",
        "period_var",
        "newcomer_matches",
        "newcomer_var",
        "shared_noise_per_day",
        "max_active",
        "idle_days",
        "compiled",
    )
    ROW_FILLS: ClassVar[tuple[tuple[str, float], ...]] = (
        *GaussianRows.ROW_FILLS,
        ("slot_of_", -1),
    )

    def __init__(
        self,
        prior_var: float = 1.0,
        noise_per_day: float = 0.002,
        advantage_var: float = 0.25,
        period_field: str | None = None,
        period_pull: float = 0.0,
        period_var: float = 0.0,
        newcomer_matches: int = 0,
        newcomer_var: float = 0.25,
        shared_noise_per_day: float = 0.0,
        max_active: int = 48,
        idle_days: float = 200.0,
        compiled: bool = True,
    ) -> None:
        nums = (
            prior_var,
            noise_per_day,
            advantage_var,
            period_pull,
            period_var,
            newcomer_var,
            shared_noise_per_day,
            idle_days,
        )
        nonnegative = (noise_per_day, advantage_var, period_var, newcomer_var)
        check_settings(self.kind, nums, prior_var, nonnegative, period_pull)
        if newcomer_matches < 0 or shared_noise_per_day < 0 or idle_days <= 0:
            raise ConfigError("kalman_strength: newcomer_matches, shared noise >= 0; idle_days > 0")
        if not 2 <= max_active <= 1024:  # the covariance: at most 8.4 MB
            raise ConfigError("kalman_strength: max_active must lie in [2, 1024]")
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
        self.max_active = int(max_active)
        self.idle_days = float(idle_days)
        self.slot_of_: np.ndarray
        self._init_rows({"slot_of_": np.int64})
        self.row_of_ = np.full(self.max_active, -1, dtype=np.int64)
        self.z_ = np.zeros(HEAD + self.max_active)
        self.cov_ = np.zeros((HEAD + self.max_active, HEAD + self.max_active))
        self.cov_[0, 0] = self.advantage_var
        self.cov_[1, 1] = self.newcomer_var
        self.clock_ = np.array([np.nan])

    # -- state helpers ------------------------------------------------------------
    def new_period(self) -> None:
        """Every strength becomes ``(1 - c) s + e``, ``e ~ N(0, period_var)``."""
        c = 1.0 - self.period_pull
        n = len(self.entities_)
        self.mu_[:n] *= c
        self.var_[:n] = np.minimum(self.var_[:n] * c * c + self.period_var, self.prior_var)
        self.z_[HEAD:] *= c
        self.cov_[HEAD:, :] *= c
        self.cov_[:, HEAD:] *= c
        for s in np.flatnonzero(self.row_of_ >= 0):
            k = HEAD + int(s)
            self.cov_[k, k] = max(min(self.cov_[k, k] + self.period_var, self.prior_var), 0.0)

    def mean_cov(self, entity_ids: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """The joint mean and covariance of these entities' strengths now (no idle
        widening); entities not both active have covariance 0."""
        idx, m, v = [], [], []
        for e in entity_ids:
            r = self.entities_.get(e)
            s = -1 if r < 0 else int(self.slot_of_[r])
            idx.append(s)
            if s >= 0:
                m.append(self.z_[HEAD + s])
                v.append(self.cov_[HEAD + s, HEAD + s])
            else:
                m.append(0.0 if r < 0 else self.mu_[r])
                v.append(self.prior_var if r < 0 else self.var_[r])
        cov = np.diag(v)
        for a, sa in enumerate(idx):
            for b, sb in enumerate(idx):
                if a != b and sa >= 0 and sb >= 0:
                    cov[a, b] = self.cov_[HEAD + sa, HEAD + sb]
        return np.array(m), cov

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        """The forecast now: idle widening up to the latest event's day."""
        return Prediction(self._forecast(matchup, float(self.clock_[0])))

    def _forecast(self, matchup: Matchup, day: float) -> float:
        """What the loop would forecast for ``matchup`` on ``day``, without learning:
        idle widening and drift up to ``day``; a member idle longer than ``idle_days``
        counts with its marginal only, as it would after leaving the active set."""
        x = np.zeros(len(self.z_))
        x[0] = 1.0
        m, big_v = 0.0, 0.0  # from members outside the active set, and widening
        known = not math.isnan(day) and not math.isnan(float(self.clock_[0]))
        if known:
            drift = self.shared_noise_per_day * max(day - float(self.clock_[0]), 0.0)
            big_v += drift  # the advantage's (x_h = 1)
        xb = 0.0
        for side, sign in ((matchup.first, 1.0), (matchup.second, -1.0)):
            xj = sign / len(side)
            for e in side:
                r = self.entities_.get(e)
                if self.newcomer_matches and (r < 0 or self.age_[r] < self.newcomer_matches):
                    xb += xj
                if r < 0:
                    big_v += xj * xj * self.prior_var
                    continue
                s = int(self.slot_of_[r])
                last = float(self.last_day_[r])
                idle = 0.0 if not known or math.isnan(last) else max(day - last, 0.0)
                if s >= 0 and idle > self.idle_days:  # it would leave the active set first
                    v0, mean = float(self.cov_[HEAD + s, HEAD + s]), float(self.z_[HEAD + s])
                    s = -1
                elif s >= 0:
                    x[HEAD + s] += xj
                    v0, mean = float(self.cov_[HEAD + s, HEAD + s]), 0.0
                else:
                    v0, mean = float(self.var_[r]), float(self.mu_[r])
                grown = max(min(v0 + self.noise_per_day * idle, self.prior_var), v0)
                m += xj * mean
                big_v += xj * xj * (grown - v0 if s >= 0 else grown)
        x[1] = xb
        if known and xb:
            big_v += xb * xb * self.shared_noise_per_day * max(day - float(self.clock_[0]), 0.0)
        u = self.cov_ @ x
        m += float(self.z_ @ x)
        big_v = max(big_v + float(u @ x), 0.0)
        return 1.0 / (1.0 + math.exp(-m / math.sqrt(1.0 + PROBIT * big_v)))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        return self.learn_encoded(events, encode_events(events, self.entities_))

    def learn_encoded(
        self, events: Sequence[MatchEvent], batch: EncodedBatch, count: bool = True
    ) -> Predictions:
        """The sequential path over ``events`` already encoded against this model's
        entity table; ``count=False`` leaves the match counts alone (a mixture whose
        members share one table counts once)."""
        self._fit_capacity()
        if len(events) and int((batch.first_size + batch.second_size).max()) > self.max_active:
            raise ConfigError("kalman_strength: a match has more members than max_active")
        out = self._by_period(events, lambda part: self._run(batch.take(part)))
        if count:
            count_matches(batch, self.entities_)
        return Predictions(out, np.zeros_like(out))

    def _run(self, batch: EncodedBatch, compiled: bool | None = None) -> np.ndarray:
        out = np.empty(len(batch))
        use = self.compiled if compiled is None else compiled
        loop = _kalman_loop_compiled if use else _kalman_loop
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
            self.age_,
            self.slot_of_,
            self.row_of_,
            self.z_,
            self.cov_,
            self.clock_,
            self.noise_per_day,
            self.prior_var,
            float(self.newcomer_matches),
            self.shared_noise_per_day,
            self.idle_days,
            out,
        )
        return out

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict every event from the batch-start state, then filter them in order
        (the state after a batch is the sequential one; a batch of one is ``learn``)."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        return self.learn_batch_encoded(events, encode_events(events, self.entities_))

    def learn_batch_encoded(
        self, events: Sequence[MatchEvent], b: EncodedBatch, count: bool = True
    ) -> Predictions:
        """:meth:`learn_batch` on events already encoded (see :meth:`learn_encoded`)."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        if len(events) == 1:
            return self.learn_encoded(events, b, count=count)
        self._enter_period(self._period_of(events[0]))
        day = b.time_s / DAY_S
        p = np.array([self._forecast(ev, float(d)) for ev, d in zip(events, day, strict=True)])
        self.learn_encoded(events, b, count=count)
        return Predictions(p, np.zeros_like(p))

    # -- persistence --------------------------------------------------------------
    def _state_arrays(self) -> dict[str, np.ndarray]:
        arrays = entity_arrays(
            self.entities_,
            mu=self.mu_,
            var=self.var_,
            last_day=self.last_day_,
            age=self.age_,
            slot_of=self.slot_of_.astype(np.float64),
        )
        arrays["row_of"] = self.row_of_.copy()
        arrays["z"] = self.z_.copy()
        arrays["cov"] = self.cov_.copy()
        arrays["clock"] = self.clock_.copy()
        arrays.update(self._period_arrays())
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        names = (*ROW_NAMES, "slot_of")
        table, rows = load_entity_arrays(self.kind, arrays, names)
        k = HEAD + self.max_active
        z = np.asarray(arrays["z"], dtype=np.float64)
        cov = np.asarray(arrays["cov"], dtype=np.float64)
        row_of = np.asarray(arrays["row_of"], dtype=np.int64)
        clock = np.asarray(arrays["clock"], dtype=np.float64)
        if z.shape != (k,) or cov.shape != (k, k) or row_of.shape != (self.max_active,):
            raise StateError("kalman_strength: state arrays do not fit max_active")
        if not (np.all(np.isfinite(z)) and np.all(np.isfinite(cov))) or clock.shape != (1,):
            raise StateError("kalman_strength: mean and covariance must be finite")
        n = len(table)
        self._load_rows(table, (*rows[:-1], rows[-1].astype(np.int64)))
        active = row_of[row_of >= 0]
        if np.any(active >= n) or not np.array_equal(
            np.sort(np.flatnonzero(self.slot_of_[:n] >= 0)), np.sort(active)
        ):
            raise StateError("kalman_strength: active slots and entities disagree")
        self.row_of_, self.z_, self.cov_ = row_of.copy(), z.copy(), cov.copy()
        self.clock_ = clock.copy()
        self._load_period(arrays)
