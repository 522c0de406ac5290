"""The plain-Python Glicko-2 and TrueSkill models as they were before their
compiled kernels: the reference the kernels are held to (tests) and the baseline
of their speed ratio (bench/bench_models.py). Not used by the package.
"""

from __future__ import annotations

# ruff: noqa
# mypy: ignore-errors

# ---- Glicko-2 ----


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


class ReferenceGlicko2(Model):
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


# ---- TrueSkill ----


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


class ReferenceTrueSkill(Model):
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
