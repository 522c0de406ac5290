"""TrueSkill: a Gaussian belief N(mu, sigma**2) over each entity's skill.

Method of the NIPS 2006 paper 'TrueSkill™: A Bayesian Skill Rating System',
for two teams of any size. A player's performance is its skill plus N(0, beta**2)
noise; a team's performance is the sum of its members'. The first side wins when
its performance exceeds the second's by more than the draw margin ``eps``, and a
draw is a difference within ``[-eps, eps]``. Before each match every player's
variance grows by ``tau**2`` (skill drifts). With ``c**2 = n * beta**2 + sum of
sigma**2`` (n players, tau added) and ``t = (mu_winner - mu_loser) / c``, the
exact posterior moments of the two-team case are

    mu     += +-sigma**2 / c * v(t, eps / c)
    sigma**2 *= 1 - sigma**2 / c**2 * w(t, eps / c)

with ``v, w`` the mean shift and variance shrinkage of a truncated Gaussian
(one-sided for a win, two-sided for a draw; see :func:`v_win`, :func:`v_draw`).

The draw margin comes from a draw probability for two equal sides of
``n1 + n2`` players: ``eps = Phi^-1((p_draw + 1) / 2) * sqrt(n1 + n2) * beta``.

Prediction (our formula; ``tau`` is not added): with ``c**2 = n * beta**2 +
sum of sigma**2`` and ``d = mu_first - mu_second`` (sums over members),

    P(first wins) = Phi((d - eps) / c),  P(second wins) = Phi((-d - eps) / c),
    P(draw) = 1 - both.

Defaults mu=25, sigma=25/3, beta=sigma/2, tau=sigma/100 are those of the
paper's experiments (from memory); draw probability 0.1 is common practice.

Mini-batches: each event of a batch gives a Gaussian update from the batch-start
beliefs; the updates are combined by adding their changes in precision and
precision-times-mean (multiplying the messages, as in message passing), so a
batch of one is exactly ``learn``.

>>> round(v_win(0.0, 0.0), 6), round(w_win(0.0, 0.0), 6)
(0.797885, 0.63662)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np
from scipy.special import log_ndtr, ndtr, ndtri

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

_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


def _log_pdf(x: float) -> float:
    return -0.5 * x * x - _LOG_SQRT_2PI


def v_win(t: float, eps: float) -> float:
    """Mean of X ~ N(0,1) given X > eps - t, i.e. N(t-eps) / Phi(t-eps) (a win)."""
    x = t - eps
    # In log space: Phi(x) underflows long before the ratio does.
    return math.exp(_log_pdf(x) - float(log_ndtr(x)))


def w_win(t: float, eps: float) -> float:
    """Variance shrinkage for a win: v * (v + t - eps), kept within [0, 1]."""
    x = t - eps
    v = v_win(t, eps)
    return min(max(v * (v + x), 0.0), 1.0)


def _draw_terms(t: float, eps: float) -> tuple[float, float]:
    """(v, w) for a draw at t >= 0: X ~ N(0,1) truncated to [-eps - t, eps - t]."""
    a, b = -eps - t, eps - t
    width = b - a
    if width < 1e-6:
        # A band this narrow pins the variable to its middle; the exact moments
        # differ by O(width**2) while the general formula below would cancel badly.
        return 0.5 * (a + b), 1.0 - width * width / 12.0
    log_b, log_a = float(log_ndtr(b)), float(log_ndtr(a))
    # log(Phi(b) - Phi(a)) without cancellation or underflow (a <= b <= eps).
    log_z = log_b + math.log(-math.expm1(log_a - log_b))
    pa = math.exp(_log_pdf(a) - log_z)
    pb = math.exp(_log_pdf(b) - log_z)
    v = pa - pb
    w = v * v + b * pb - a * pa
    return v, min(max(w, 0.0), 1.0)


def v_draw(t: float, eps: float) -> float:
    """Mean shift for a draw: (N(-eps-t) - N(eps-t)) / (Phi(eps-t) - Phi(-eps-t))."""
    v, _ = _draw_terms(abs(t), eps)
    return v if t >= 0 else -v


def w_draw(t: float, eps: float) -> float:
    """Variance shrinkage for a draw (even in t)."""
    return _draw_terms(abs(t), eps)[1]


def draw_margin(draw_probability: float, n_players: int, beta: float) -> float:
    """The margin eps at which two equal sides of ``n_players`` in all draw that often."""
    return float(ndtri((draw_probability + 1.0) / 2.0)) * math.sqrt(n_players) * beta


class TrueSkill(Model):
    """Two-team TrueSkill with draws; beliefs kept as (mu, sigma) per entity."""

    kind: ClassVar[str] = "trueskill"
    has_draws: ClassVar[bool] = True

    def __init__(
        self,
        mu: float = 25.0,
        sigma: float = 25.0 / 3.0,
        beta: float = 25.0 / 6.0,
        tau: float = 25.0 / 300.0,
        draw_probability: float = 0.1,
    ) -> None:
        if not (sigma > 0 and beta > 0 and tau >= 0 and math.isfinite(mu)):
            raise ConfigError("trueskill: sigma, beta must be > 0, tau >= 0, mu finite")
        if not 0.0 <= draw_probability < 1.0:
            raise ConfigError("trueskill: draw_probability must be in [0, 1)")
        self.mu = float(mu)
        self.sigma = float(sigma)
        self.beta = float(beta)
        self.tau = float(tau)
        self.draw_probability = float(draw_probability)
        self.entities_ = EntityTable()
        self._alloc(16)

    def _alloc(self, n: int) -> None:
        self.mu_ = np.full(n, self.mu)
        self.var_ = np.full(n, self.sigma * self.sigma)

    def _fit_capacity(self) -> None:
        n, cap = len(self.entities_), len(self.mu_)
        if n > cap:
            mu, var = self.mu_, self.var_
            self._alloc(max(n, 2 * cap))
            self.mu_[:cap], self.var_[:cap] = mu, var

    def belief(self, entity_id: str) -> tuple[float, float]:
        """(mu, sigma) of an entity; the prior if never seen."""
        r = self.entities_.get(entity_id)
        if r < 0:
            return self.mu, self.sigma
        return float(self.mu_[r]), math.sqrt(float(self.var_[r]))

    def _side(self, rows: Sequence[int], extra_var: float) -> tuple[float, float]:
        mu = 0.0
        var = 0.0
        for r in rows:
            if r < 0:
                mu += self.mu
                var += self.sigma * self.sigma + extra_var
            else:
                mu += float(self.mu_[r])
                var += float(self.var_[r]) + extra_var
        return mu, var

    def _predict_rows(self, rows_a: Sequence[int], rows_b: Sequence[int]) -> Prediction:
        n = len(rows_a) + len(rows_b)
        mu_a, var_a = self._side(rows_a, 0.0)
        mu_b, var_b = self._side(rows_b, 0.0)
        c = math.sqrt(n * self.beta * self.beta + var_a + var_b)
        eps = draw_margin(self.draw_probability, n, self.beta)
        d = mu_a - mu_b
        p_win = float(ndtr((d - eps) / c))
        p_loss = float(ndtr((-d - eps) / c))
        return Prediction(p_win, max(0.0, 1.0 - p_win - p_loss))

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        get = self.entities_.get
        return self._predict_rows([get(e) for e in matchup.first], [get(e) for e in matchup.second])

    def learn(self, event: MatchEvent) -> Prediction:
        return self.learn_batch([event])[0]

    def _event_update(
        self, rows_a: list[int], rows_b: list[int], score: float
    ) -> list[tuple[int, float, float]]:
        """(row, new mu, new variance) for every player of one match, from the current state."""
        tau2 = self.tau * self.tau
        n = len(rows_a) + len(rows_b)
        mu_a, var_a = self._side(rows_a, tau2)
        mu_b, var_b = self._side(rows_b, tau2)
        c2 = n * self.beta * self.beta + var_a + var_b
        c = math.sqrt(c2)
        eps = draw_margin(self.draw_probability, n, self.beta) / c
        if score == 0.5:
            t = (mu_a - mu_b) / c
            v, w = v_draw(t, eps), w_draw(t, eps)
        else:
            sign = 1.0 if score == 1.0 else -1.0
            t = sign * (mu_a - mu_b) / c
            v, w = v_win(t, eps), w_win(t, eps)
            if sign < 0:
                v = -v
        out = []
        for rows, direction in ((rows_a, 1.0), (rows_b, -1.0)):
            for r in rows:
                var = float(self.var_[r]) + tau2
                out.append(
                    (
                        r,
                        float(self.mu_[r]) + direction * var / c * v,
                        var * (1.0 - var / c2 * w),
                    )
                )
        return out

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict all from the batch-start beliefs, then combine all updates at once."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        b = encode_events(events, self.entities_)
        self._fit_capacity()
        n = len(b)
        p_win, p_draw = np.empty(n), np.empty(n)
        tau2 = self.tau * self.tau
        # Changes in natural parameters (precision, precision * mean) per entity.
        d_prec: dict[int, float] = {}
        d_pm: dict[int, float] = {}
        updates = []
        for i in range(n):
            rows_a = b.first[i, : b.first_size[i]].tolist()
            rows_b = b.second[i, : b.second_size[i]].tolist()
            p_win[i], p_draw[i] = self._predict_rows(rows_a, rows_b)
            updates.extend(self._event_update(rows_a, rows_b, float(b.score[i])))
        if n == 1:
            # A single match: take the update as computed (no round trip through precisions).
            for r, mu_new, var_new in updates:
                self.mu_[r], self.var_[r] = mu_new, var_new
        else:
            # Changes in natural parameters (precision, precision * mean) per entity.
            d_prec: dict[int, float] = {}
            d_pm: dict[int, float] = {}
            for r, mu_new, var_new in updates:
                prior_var = float(self.var_[r]) + tau2
                prior_mu = float(self.mu_[r])
                d_prec[r] = d_prec.get(r, 0.0) + 1.0 / var_new - 1.0 / prior_var
                d_pm[r] = d_pm.get(r, 0.0) + mu_new / var_new - prior_mu / prior_var
            for r, dp in d_prec.items():
                prior_var = float(self.var_[r]) + tau2
                prec = 1.0 / prior_var + dp
                self.mu_[r] = (float(self.mu_[r]) / prior_var + d_pm[r]) / prec
                self.var_[r] = 1.0 / prec
        count_matches(b, self.entities_)
        return Predictions(p_win, p_draw)

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "mu": self.mu,
            "sigma": self.sigma,
            "beta": self.beta,
            "tau": self.tau,
            "draw_probability": self.draw_probability,
        }

    def _state_arrays(self) -> dict[str, np.ndarray]:
        return entity_arrays(self.entities_, mu=self.mu_, var=self.var_)

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, (mu, var) = load_entity_arrays(self.kind, arrays, ("mu", "var"))
        n = len(table)
        self.entities_ = table
        self._alloc(max(16, 2 * n))
        self.mu_[:n], self.var_[:n] = mu, var
