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

First-side advantage (our choice, built on the same update equations). The
first side's performance gets one more summand ``h ~ N(mu_h, sigma_h**2)``, a
home or first-move edge shared by every match: a member with a skill belief
but no performance noise (``beta**2`` is counted for the ``n`` real players only,
and the draw margin too). Its belief is independent of the players', so the
performance difference stays Gaussian with

    d = mu_first + mu_h - mu_second,   c**2 = n * beta**2 + sum of sigma**2 + sigma_h**2,

and prediction is the formula above with these. The outcome is a truncation of
that one Gaussian, and the exact posterior moments of any Gaussian summand ``x``
of it (prior ``N(m, s**2)``) give ``m += s**2 / c * v`` and
``s**2 *= 1 - s**2 / c**2 * w``, whether or not ``x`` carries noise of its own
(the noise only widens ``c``). So ``h`` is updated by the member formulas, on the
first side's sign. Before each match its variance grows by ``advantage_tau**2``
(the edge may drift, as a skill does by ``tau``).

Settings: ``first_advantage`` is ``mu_h`` at the start (skill units).
``advantage_sigma = 0`` turns learning off: ``h`` stays at ``first_advantage``
with no variance (``advantage_tau`` unused), which is the model without the
advantage to the last bit; a state of version 1, saved before the advantage,
loads that way. The default ``advantage_sigma = sigma / 4 = beta / 2`` is argued
on the model's scale: an edge of ``beta`` (two prior deviations) would make a
known player's performance beat a known equal's 76% of the time
(``Phi(1 / sqrt 2)``), a larger edge than we expect, while a first match moves
``mu_h`` by a fraction of a skill unit. It matters little: on the football
results' first 80%, half or twice the value scored within 0.0001 nats of it.
``advantage_tau = 0.005`` was chosen on those first 80% (scoring their second
half) and on simulated worlds (seeds 8001-8004), from 0, 0.002, 0.005, 0.01,
0.02, 0.05: it follows a slowly changing edge (in steady state the advantage's
deviation is about ``sqrt(advantage_tau * c / sqrt(w))``, some 0.2 skill units,
and its memory some ``c / (advantage_tau * sqrt(w))``, about 1,500 matches) and
cost at most 0.0003 nats there where the edge was absent.

Mini-batches: each event of a batch gives a Gaussian update from the batch-start
beliefs (the advantage's among them, its ``advantage_tau`` added once per batch
as a member's ``tau`` is); the updates are combined by adding their changes in
precision and precision-times-mean (multiplying the messages, as in message
passing), so a batch of one is exactly ``learn``.

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
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models import _kernels_trueskill as _k
from streamrate.models._kernels_trueskill import draw_terms, v_win, w_win
from streamrate.models._snapshot import CopyOnWriteRows
from streamrate.models.base import (
    ModelState,
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)

__all__ = ["TrueSkill", "draw_margin", "v_draw", "v_win", "w_draw", "w_win"]

ADVANTAGE_SIGMA = 25.0 / 12.0
"""Prior deviation of the first-side advantage: a quarter of the skill prior's (see above)."""
ADVANTAGE_TAU = 0.005
"""The advantage's drift per match (see above)."""


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
    state_version: ClassVar[int] = 2
    has_draws: ClassVar[bool] = True

    def __init__(
        self,
        mu: float = 25.0,
        sigma: float = 25.0 / 3.0,
        beta: float = 25.0 / 6.0,
        tau: float = 25.0 / 300.0,
        draw_probability: float = 0.1,
        compiled: bool = True,
        first_advantage: float = 0.0,
        advantage_sigma: float = ADVANTAGE_SIGMA,
        advantage_tau: float = ADVANTAGE_TAU,
    ) -> None:
        if not (sigma > 0 and beta > 0 and tau >= 0 and math.isfinite(mu)):
            raise ConfigError("trueskill: sigma, beta must be > 0, tau >= 0, mu finite")
        if not 0.0 <= draw_probability < 1.0:
            raise ConfigError("trueskill: draw_probability must be in [0, 1)")
        if not (math.isfinite(first_advantage) and 0 <= advantage_sigma < math.inf):
            raise ConfigError("trueskill: first_advantage finite, advantage_sigma >= 0 finite")
        if not 0 <= advantage_tau < math.inf:
            raise ConfigError("trueskill: advantage_tau must be a number >= 0")
        self.mu = float(mu)
        self.sigma = float(sigma)
        self.beta = float(beta)
        self.tau = float(tau)
        self.draw_probability = float(draw_probability)
        self.compiled = bool(compiled)
        self.first_advantage = float(first_advantage)
        self.advantage_sigma = float(advantage_sigma)
        self.advantage_tau = float(advantage_tau)
        learn = 1.0 if self.advantage_sigma > 0 else 0.0
        self._prm = np.array(
            [self.mu, self.sigma * self.sigma, self.beta, self.tau, self.advantage_tau, learn]
        )
        # The advantage's belief [mean, variance]; variance 0 when it is not learned.
        self.advantage_ = np.array(
            [self.first_advantage, self.advantage_sigma * self.advantage_sigma]
        )
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

    def advantage(self) -> tuple[float, float]:
        """(mean, deviation) of the first-side advantage, in skill units."""
        return float(self.advantage_[0]), math.sqrt(float(self.advantage_[1]))

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        b = encode_events([matchup], self.entities_, add=False)
        p = np.empty((1, 2))
        run = _k.predict_compiled if self.compiled else _k.predict
        run(b.first, b.first_size, b.second, b.second_size, self.mu_, self.var_, self._prm,
            self._margins(b), self.advantage_, p)  # fmt: skip
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
            self.entities_.counts, self._prm, self._margins(b), self.advantage_, p)  # fmt: skip
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
            self.entities_.counts, self._mark, self._prm, self._margins(b), self.advantage_,
            p)  # fmt: skip
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
            "first_advantage": self.first_advantage,
            "advantage_sigma": self.advantage_sigma,
            "advantage_tau": self.advantage_tau,
        }

    @classmethod
    def upgrade_state(cls, state: ModelState) -> ModelState:
        """A version 1 state (saved before the advantage existed) loads with the
        advantage off and at 0: it predicts and learns exactly as it was saved."""
        if state.kind != cls.kind or state.version != 1:
            return state
        params = {**state.params, "first_advantage": 0.0, "advantage_sigma": 0.0}
        arrays = {**state.arrays, "advantage": np.zeros(2)}
        return ModelState(state.kind, 2, params, arrays)

    def _entity_rows(self) -> dict[str, np.ndarray]:
        return {"mu": self.mu_, "var": self.var_}

    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        arrays = entity_arrays(self.entities_, **(self._entity_rows() if rows else {}))
        arrays["advantage"] = self.advantage_.copy()
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, (mu, var) = load_entity_arrays(self.kind, arrays, ("mu", "var"))
        adv = np.asarray(arrays["advantage"], dtype=np.float64)
        if adv.shape != (2,) or not np.all(np.isfinite(adv)) or adv[1] < 0:
            raise StateError(
                "trueskill: array 'advantage' must hold a finite mean and variance >= 0"
            )
        n = len(table)
        self.advantage_ = adv.copy()
        self.entities_ = table
        self._alloc(max(16, 2 * n))
        self.mu_[:n], self.var_[:n] = mu, var
