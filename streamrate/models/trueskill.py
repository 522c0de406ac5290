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

The arithmetic lives in :mod:`._kernels_trueskill`, loops over encoded batches
compiled with numba; ``compiled=False`` runs the same loops uncompiled (same
numbers, far slower).

>>> round(v_win(0.0, 0.0), 6), round(w_win(0.0, 0.0), 6)
(0.797885, 0.63662)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np
from scipy.special import ndtri

from streamrate.batch import EncodedBatch, encode_events, has_unknown
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError
from streamrate.events import MatchEvent, Matchup
from streamrate.models import _kernels_trueskill as _k
from streamrate.models._kernels_trueskill import draw_terms, v_win, w_win
from streamrate.models._snapshot import CopyOnWriteRows
from streamrate.models.base import (
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)

__all__ = ["TrueSkill", "draw_margin", "v_draw", "v_win", "w_draw", "w_win"]


def v_draw(t: float, eps: float) -> float:
    """Mean shift for a draw: (N(-eps-t) - N(eps-t)) / (Phi(eps-t) - Phi(-eps-t))."""
    v, _ = draw_terms(abs(t), eps)
    return v if t >= 0 else -v


def w_draw(t: float, eps: float) -> float:
    """Variance shrinkage for a draw (even in t)."""
    return draw_terms(abs(t), eps)[1]


def draw_margin(draw_probability: float, n_players: int, beta: float) -> float:
    """The margin eps at which two equal sides of ``n_players`` in all draw that often."""
    return float(ndtri((draw_probability + 1.0) / 2.0)) * math.sqrt(n_players) * beta


class TrueSkill(CopyOnWriteRows):
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
        compiled: bool = True,
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
        self.compiled = bool(compiled)
        self._prm = np.array([self.mu, self.sigma * self.sigma, self.beta, self.tau])
        self._eps_n = np.zeros(1)
        self.entities_ = EntityTable()
        self._alloc(16)

    def _alloc(self, n: int) -> None:
        self.mu_ = np.full(n, self.mu)
        self.var_ = np.full(n, self.sigma * self.sigma)
        self._mark = np.full(n, -1, dtype=np.int64)  # scratch of the loops, not state

    def _fit_capacity(self) -> None:
        n, cap = len(self.entities_), len(self.mu_)
        if n > cap:
            mu, var = self.mu_, self.var_
            self._alloc(max(n, 2 * cap))
            self.mu_[:cap], self.var_[:cap] = mu, var

    def _margins(self, b: EncodedBatch) -> np.ndarray:
        """Draw margins by number of players, long enough for every match of ``b``."""
        most = b.first.shape[1] + b.second.shape[1]
        if most >= len(self._eps_n):
            self._eps_n = np.array(
                [draw_margin(self.draw_probability, n, self.beta) for n in range(most + 1)]
            )
        return self._eps_n

    def belief(self, entity_id: str) -> tuple[float, float]:
        """(mu, sigma) of an entity; the prior if never seen."""
        r = self.entities_.get(entity_id)
        if r < 0:
            return self.mu, self.sigma
        return float(self.mu_[r]), math.sqrt(float(self.var_[r]))

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        b = encode_events([matchup], self.entities_, add=False)
        p = np.empty((1, 2))
        run = _k.predict_compiled if self.compiled else _k.predict
        run(b.first, b.first_size, b.second, b.second_size, self.mu_, self.var_, self._prm,
            self._margins(b), p)  # fmt: skip
        return Prediction(float(p[0, 0]), float(p[0, 1]))

    def learn(self, event: MatchEvent) -> Prediction:
        p = self.learn_many([event])
        return Prediction(float(p.p_win[0]), float(p.p_draw[0]))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict, then update, one match after another (``learn`` in a loop)."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        return self.learn_encoded(encode_events(events, self.entities_))

    def learn_encoded(self, b: EncodedBatch) -> Predictions:
        """Sequential learning over an encoded batch (``add=True`` encoding)."""
        if has_unknown(b):
            raise ValueError("learn_encoded: batch holds entities unknown to this model")
        self._fit_capacity()
        self.before_batch(b)
        p = np.empty((len(b), 2))
        run = _k.learn_seq_compiled if self.compiled else _k.learn_seq
        run(b.first, b.first_size, b.second, b.second_size, b.score, self.mu_, self.var_,
            self.entities_.counts, self._prm, self._margins(b), p)  # fmt: skip
        return Predictions(p[:, 0].copy(), p[:, 1].copy())

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Predict all from the batch-start beliefs, then combine all updates at once."""
        if len(events) <= 1:
            # A single match: take the update as computed (no round trip through precisions).
            return self.learn_many(events)
        b = encode_events(events, self.entities_)
        self._fit_capacity()
        self.before_batch(b)
        p = np.empty((len(b), 2))
        run = _k.learn_combined_compiled if self.compiled else _k.learn_combined
        run(b.first, b.first_size, b.second, b.second_size, b.score, self.mu_, self.var_,
            self.entities_.counts, self._mark, self._prm, self._margins(b), p)  # fmt: skip
        return Predictions(p[:, 0].copy(), p[:, 1].copy())

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "mu": self.mu,
            "sigma": self.sigma,
            "beta": self.beta,
            "tau": self.tau,
            "draw_probability": self.draw_probability,
            "compiled": self.compiled,
        }

    def _entity_rows(self) -> dict[str, np.ndarray]:
        return {"mu": self.mu_, "var": self.var_}

    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        return entity_arrays(self.entities_, **(self._entity_rows() if rows else {}))

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, (mu, var) = load_entity_arrays(self.kind, arrays, ("mu", "var"))
        n = len(table)
        self.entities_ = table
        self._alloc(max(16, 2 * n))
        self.mu_[:n], self.var_[:n] = mu, var
