"""Glicko-2: a rating, a rating deviation (RD) and a volatility per entity.

The formulas are those of the published description 'Example of the Glicko-2
system' (steps 1-8, including the Illinois iteration for the new volatility). On
the internal scale ``mu = (r - 1500) / 173.7178`` and ``phi = RD / 173.7178``.

How matches map to rating periods (our choice):

* ``learn`` treats each match as its own rating period for the entities that
  play in it; ``learn_batch`` treats the whole batch as one rating period (each
  entity is rated against all its opponents of the batch at once, from the
  batch-start state). A batch of one is therefore the same as ``learn``.
* With ``period_s > 0`` an entity's deviation also grows with idle time: before
  it plays, ``phi**2 += (elapsed_s / period_s) * sigma**2`` (step 6 of the method
  applied for a fractional number of empty periods), using ``finished_at``. It is
  capped at the initial deviation, as an entity never seen is no less certain.
  ``predict`` does not know the time and so does not inflate.

Teams: each member is rated against the opposing side taken as one opponent
with the mean ``mu`` of its members and the deviation of that mean,
``sqrt(sum(phi_j**2)) / n``; the expected score in the update is that of the
member's side (its mean ``mu``), the same number the prediction gives, so every
member shares the team's surprise. (Rating each member by its own ``mu`` against
the other side's mean left team forecasts badly under-confident on simulated
team play: calibration slope 2.35.) The prediction between two sides uses each side's
mean and deviation and puts the combined ``phi = sqrt(phi_a**2 + phi_b**2)``
inside ``g``: ``P = 1 / (1 + exp(-g(phi) * (mu_a - mu_b)))``. No draw model:
``p_draw`` is 0 and a draw enters the update as score 0.5.

>>> new = rate_period(0.0, 200 / SCALE, 0.06, [(1400 - 1500) / SCALE], [30 / SCALE], [1.0])
>>> round(1500 + SCALE * new[0], 2)
1563.56
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from streamrate.batch import count_matches, encode_events
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError
from streamrate.events import MatchEvent, Matchup
from streamrate.models.base import (
    Model,
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)

SCALE = 173.7178
"""Ratio between the displayed rating scale and the internal Glicko-2 scale."""
CENTER = 1500.0


def g(phi: float) -> float:
    return 1.0 / math.sqrt(1.0 + 3.0 * phi * phi / (math.pi * math.pi))


def _logistic(x: float) -> float:
    # Two branches so that exp never overflows, however far apart the ratings.
    if x >= 0:
        return 1.0 / (1.0 + math.exp(-x))
    ex = math.exp(x)
    return ex / (1.0 + ex)


def expected(mu: float, mu_j: float, phi_j: float) -> float:
    return _logistic(g(phi_j) * (mu - mu_j))


def new_volatility(
    phi: float, sigma: float, delta: float, v: float, tau: float, tolerance: float = 1e-6
) -> float:
    """Step 5: solve for the new volatility by the Illinois (regula falsi) iteration."""
    a = math.log(sigma * sigma)
    phi2 = phi * phi
    tau2 = tau * tau

    def f(x: float) -> float:
        ex = math.exp(x)
        return ex * (delta * delta - phi2 - v - ex) / (2.0 * (phi2 + v + ex) ** 2) - (x - a) / tau2

    big_a = a
    if delta * delta > phi2 + v:
        big_b = math.log(delta * delta - phi2 - v)
    else:
        k = 1
        while f(a - k * tau) < 0:
            k += 1
        big_b = a - k * tau
    f_a, f_b = f(big_a), f(big_b)
    for _ in range(200):  # converges in a handful of steps; the cap guards the loop
        if abs(big_b - big_a) <= tolerance:
            break
        big_c = big_a + (big_a - big_b) * f_a / (f_b - f_a)
        f_c = f(big_c)
        if f_c * f_b <= 0:
            big_a, f_a = big_b, f_b
        else:
            f_a = f_a / 2.0
        big_b, f_b = big_c, f_c
    return math.exp(big_a / 2.0)


def rate_period(
    mu: float,
    phi: float,
    sigma: float,
    opp_mu: Sequence[float],
    opp_phi: Sequence[float],
    scores: Sequence[float],
    tau: float = 0.5,
    tolerance: float = 1e-6,
) -> tuple[float, float, float]:
    """Steps 3-7 for one entity over one rating period (internal scale in and out)."""
    if len(scores) == 0:
        return mu, math.sqrt(phi * phi + sigma * sigma), sigma
    inv_v = 0.0
    total = 0.0
    for m_j, p_j, s in zip(opp_mu, opp_phi, scores, strict=True):
        gj = g(p_j)
        e = _logistic(gj * (mu - m_j))
        inv_v += gj * gj * e * (1.0 - e)
        total += gj * (s - e)
    return _finish(mu, phi, sigma, inv_v, total, tau, tolerance)


def _finish(
    mu: float, phi: float, sigma: float, inv_v: float, total: float, tau: float, tolerance: float
) -> tuple[float, float, float]:
    if inv_v <= 0.0:
        # Results so certain they carry no information: only the deviation grows.
        return mu, math.sqrt(phi * phi + sigma * sigma), sigma
    v = 1.0 / inv_v
    sigma_new = new_volatility(phi, sigma, v * total, v, tau, tolerance)
    phi_star = math.sqrt(phi * phi + sigma_new * sigma_new)
    phi_new = 1.0 / math.sqrt(1.0 / (phi_star * phi_star) + inv_v)
    return mu + phi_new * phi_new * total, phi_new, sigma_new


class Glicko2(Model):
    """Glicko-2 with one rating period per match (or per mini-batch)."""

    kind: ClassVar[str] = "glicko2"

    def __init__(
        self,
        initial_rating: float = 1500.0,
        initial_deviation: float = 350.0,
        initial_volatility: float = 0.06,
        tau: float = 0.5,
        period_s: float = 0.0,
        tolerance: float = 1e-6,
    ) -> None:
        if not (initial_deviation > 0 and initial_volatility > 0 and tau > 0):
            raise ConfigError("glicko2: deviation, volatility and tau must be positive")
        if not (period_s >= 0 and tolerance > 0 and math.isfinite(initial_rating)):
            raise ConfigError("glicko2: period_s >= 0, tolerance > 0, finite rating required")
        self.initial_rating = float(initial_rating)
        self.initial_deviation = float(initial_deviation)
        self.initial_volatility = float(initial_volatility)
        self.tau = float(tau)
        self.period_s = float(period_s)
        self.tolerance = float(tolerance)
        self._mu0 = (self.initial_rating - CENTER) / SCALE
        self._phi0 = self.initial_deviation / SCALE
        self.entities_ = EntityTable()
        self._alloc(16)

    def _alloc(self, n: int) -> None:
        self.mu_ = np.full(n, self._mu0)
        self.phi_ = np.full(n, self._phi0)
        self.sigma_ = np.full(n, self.initial_volatility)
        self.last_s_ = np.full(n, np.nan)

    def _fit_capacity(self) -> None:
        n, cap = len(self.entities_), len(self.mu_)
        if n > cap:
            old = (self.mu_, self.phi_, self.sigma_, self.last_s_)
            self._alloc(max(n, 2 * cap))
            for new, prev in zip(
                (self.mu_, self.phi_, self.sigma_, self.last_s_), old, strict=True
            ):
                new[:cap] = prev

    def rating(self, entity_id: str) -> tuple[float, float, float]:
        """(rating, RD, volatility) on the displayed scale; the prior if never seen."""
        r = self.entities_.get(entity_id)
        if r < 0:
            return self.initial_rating, self.initial_deviation, self.initial_volatility
        return (
            CENTER + SCALE * float(self.mu_[r]),
            SCALE * float(self.phi_[r]),
            float(self.sigma_[r]),
        )

    def _side(self, rows: Sequence[int]) -> tuple[float, float]:
        """Mean mu of a side and the deviation of that mean."""
        mu = 0.0
        var = 0.0
        for r in rows:
            if r < 0:
                mu += self._mu0
                var += self._phi0 * self._phi0
            else:
                mu += float(self.mu_[r])
                var += float(self.phi_[r]) ** 2
        n = len(rows)
        return mu / n, math.sqrt(var) / n

    @staticmethod
    def _p_win(side_a: tuple[float, float], side_b: tuple[float, float]) -> float:
        phi = math.sqrt(side_a[1] ** 2 + side_b[1] ** 2)
        return _logistic(g(phi) * (side_a[0] - side_b[0]))

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        get = self.entities_.get
        a = self._side([get(e) for e in matchup.first])
        b = self._side([get(e) for e in matchup.second])
        return Prediction(self._p_win(a, b))

    def learn(self, event: MatchEvent) -> Prediction:
        return self.learn_batch([event])[0]

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """One rating period: predict all events from the batch-start state, then rate."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        b = encode_events(events, self.entities_)
        self._fit_capacity()
        n = len(b)
        sides = [
            (b.first[i, : b.first_size[i]].tolist(), b.second[i, : b.second_size[i]].tolist())
            for i in range(n)
        ]
        if self.period_s > 0:
            self._inflate_idle(sides, b.time_s)
        p = np.empty(n)
        # Per entity: sum of g^2 E (1 - E) (that is 1/v) and of g (s - E).
        inv_v: dict[int, float] = {}
        total: dict[int, float] = {}
        for i, (rows_a, rows_b) in enumerate(sides):
            side_a, side_b = self._side(rows_a), self._side(rows_b)
            p[i] = self._p_win(side_a, side_b)
            s = float(b.score[i])
            for rows, (m_own, _), (m_j, p_j), score in (
                (rows_a, side_a, side_b, s),
                (rows_b, side_b, side_a, 1.0 - s),
            ):
                gj = g(p_j)
                # The expectation is the side's, as in the prediction: every member
                # shares the result of the team (for one entity a side, this is the
                # published step 3 exactly).
                e = _logistic(gj * (m_own - m_j))
                for r in rows:
                    inv_v[r] = inv_v.get(r, 0.0) + gj * gj * e * (1.0 - e)
                    total[r] = total.get(r, 0.0) + gj * (score - e)
        updates = {
            r: _finish(
                float(self.mu_[r]),
                float(self.phi_[r]),
                float(self.sigma_[r]),
                inv_v[r],
                total[r],
                self.tau,
                self.tolerance,
            )
            for r in inv_v
        }
        for r, (mu, phi, sigma) in updates.items():
            self.mu_[r], self.phi_[r], self.sigma_[r] = mu, phi, sigma
        for i, (rows_a, rows_b) in enumerate(sides):
            for r in rows_a + rows_b:
                self.last_s_[r] = np.fmax(self.last_s_[r], b.time_s[i])
        count_matches(b, self.entities_)
        return Predictions(p, np.zeros(n))

    def _inflate_idle(self, sides: list[tuple[list[int], list[int]]], time_s: np.ndarray) -> None:
        first_time: dict[int, float] = {}
        for i, (rows_a, rows_b) in enumerate(sides):
            for r in rows_a + rows_b:
                first_time[r] = min(first_time.get(r, math.inf), float(time_s[i]))
        for r, t in first_time.items():
            last = float(self.last_s_[r])
            if math.isnan(last) or t <= last:
                continue
            periods = (t - last) / self.period_s
            phi2 = float(self.phi_[r]) ** 2 + periods * float(self.sigma_[r]) ** 2
            self.phi_[r] = min(math.sqrt(phi2), self._phi0)

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "initial_rating": self.initial_rating,
            "initial_deviation": self.initial_deviation,
            "initial_volatility": self.initial_volatility,
            "tau": self.tau,
            "period_s": self.period_s,
            "tolerance": self.tolerance,
        }

    def _state_arrays(self) -> dict[str, np.ndarray]:
        return entity_arrays(
            self.entities_, mu=self.mu_, phi=self.phi_, sigma=self.sigma_, last_s=self.last_s_
        )

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, loaded = load_entity_arrays(self.kind, arrays, ("mu", "phi", "sigma", "last_s"))
        n = len(table)
        self.entities_ = table
        self._alloc(max(16, 2 * n))
        for dst, src in zip((self.mu_, self.phi_, self.sigma_, self.last_s_), loaded, strict=True):
            dst[:n] = src
