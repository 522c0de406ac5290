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

First-side advantage (our choice, mirroring Elo's): the first side plays as if
its mean ``mu`` were ``h`` higher, with ``h = advantage / 173.7178`` on the
internal scale, everywhere: the prediction uses ``mu_a + h`` against ``mu_b``,
and in the update the first side's members face an opponent of mean
``mu_b - h`` while the second side's members face ``mu_a + h``. After a match
``h`` moves by ``advantage_k / 173.7178 * (score - E)``, with ``E`` the first
side's expected score in that update (Elo's rule: a stochastic gradient step on
the log loss up to the factor ``g``, in rating points per unit of surprise). It
starts at ``first_advantage`` (rating points; ``advantage_`` holds ``h``, the
``advantage`` method gives points); ``advantage_k = 0`` keeps it fixed.
``advantage_k`` defaults to 2.0, Elo's default: the displayed Glicko scale
(173.7178 points per unit of the internal scale, that is 400 / ln 10) is Elo's
rating-point scale, so the same number of points per unit of surprise is the
same step. It was not tuned on scored data (checked afterwards on the first 80%
of the football results: 1, 2 and 4 score within 0.0004 nats of each other, 8 is
0.0013 worse, 0 is 0.044 worse). ``learn_batch`` keeps ``h`` fixed
for the whole batch (one rating period from the batch-start state) and then adds
the summed steps of its matches, so a batch of one is again ``learn``.
States of version 1 (before the advantage) load with advantage 0 and
``advantage_k = 0``: they predict and learn exactly as they did.

The arithmetic lives in :mod:`._kernels_glicko2`, loops over encoded batches
compiled with numba; ``compiled=False`` runs the same loops uncompiled (same
numbers, far slower).

>>> new = rate_period(0.0, 200 / SCALE, 0.06, [(1400 - 1500) / SCALE], [30 / SCALE], [1.0])
>>> round(1500 + SCALE * new[0], 2)
1563.56
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from streamrate.batch import EncodedBatch, encode_events, has_unknown
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models import _kernels_glicko2 as _k
from streamrate.models._kernels_glicko2 import finish, g, logistic
from streamrate.models._kernels_glicko2 import new_volatility as _new_volatility
from streamrate.models._snapshot import CopyOnWriteRows
from streamrate.models.base import (
    ModelState,
    Prediction,
    Predictions,
    entity_arrays,
    load_entity_arrays,
)

__all__ = ["CENTER", "SCALE", "Glicko2", "expected", "g", "new_volatility", "rate_period"]

SCALE = 173.7178
"""Ratio between the displayed rating scale and the internal Glicko-2 scale."""
CENTER = 1500.0


def expected(mu: float, mu_j: float, phi_j: float) -> float:
    return logistic(g(phi_j) * (mu - mu_j))


def new_volatility(
    phi: float, sigma: float, delta: float, v: float, tau: float, tolerance: float = 1e-6
) -> float:
    """Step 5: solve for the new volatility by the Illinois (regula falsi) iteration."""
    return _new_volatility(phi, sigma, delta, v, tau, tolerance)


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
        e = logistic(gj * (mu - m_j))
        inv_v += gj * gj * e * (1.0 - e)
        total += gj * (s - e)
    return finish(mu, phi, sigma, inv_v, total, tau, tolerance)


class Glicko2(CopyOnWriteRows):
    """Glicko-2 with one rating period per match (or per mini-batch) and a learned
    first-side advantage (rating points)."""

    kind: ClassVar[str] = "glicko2"
    state_version: ClassVar[int] = 2

    def __init__(
        self,
        initial_rating: float = 1500.0,
        initial_deviation: float = 350.0,
        initial_volatility: float = 0.06,
        tau: float = 0.5,
        period_s: float = 0.0,
        tolerance: float = 1e-6,
        compiled: bool = True,
        first_advantage: float = 0.0,
        advantage_k: float = 2.0,
    ) -> None:
        if not (initial_deviation > 0 and initial_volatility > 0 and tau > 0):
            raise ConfigError("glicko2: deviation, volatility and tau must be positive")
        if not (period_s >= 0 and tolerance > 0 and math.isfinite(initial_rating)):
            raise ConfigError("glicko2: period_s >= 0, tolerance > 0, finite rating required")
        if not math.isfinite(first_advantage):
            raise ConfigError("glicko2: first_advantage must be finite")
        if not (advantage_k >= 0 and math.isfinite(advantage_k)):
            raise ConfigError("glicko2: advantage_k must be a number >= 0")
        self.initial_rating = float(initial_rating)
        self.initial_deviation = float(initial_deviation)
        self.initial_volatility = float(initial_volatility)
        self.tau = float(tau)
        self.period_s = float(period_s)
        self.tolerance = float(tolerance)
        self.compiled = bool(compiled)
        self.first_advantage = float(first_advantage)
        self.advantage_k = float(advantage_k)
        self._mu0 = (self.initial_rating - CENTER) / SCALE
        self._phi0 = self.initial_deviation / SCALE
        self._prm = np.array(
            [self._mu0, self._phi0, self.tau, self.tolerance, self.period_s,
             self.advantage_k / SCALE]
        )  # fmt: skip
        self.advantage_ = np.array([self.first_advantage / SCALE])  # h, internal scale
        self.entities_ = EntityTable()
        self._alloc(16)

    def _alloc(self, n: int) -> None:
        self.mu_ = np.full(n, self._mu0)
        self.phi_ = np.full(n, self._phi0)
        self.sigma_ = np.full(n, self.initial_volatility)
        self.last_s_ = np.full(n, np.nan)
        self._mark = np.full(n, -1, dtype=np.int64)  # scratch of the loops, not state

    def _fit_capacity(self) -> None:
        n, cap = len(self.entities_), len(self.mu_)
        if n > cap:
            old = (self.mu_, self.phi_, self.sigma_, self.last_s_)  # _mark: all -1 between calls
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

    def advantage(self) -> float:
        """The first-side advantage now, in rating points."""
        return SCALE * float(self.advantage_[0])

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        b = encode_events([matchup], self.entities_, add=False)
        p = np.empty(1)
        run = _k.predict_compiled if self.compiled else _k.predict
        run(b.first, b.first_size, b.second, b.second_size, self.mu_, self.phi_, self._prm,
            self.advantage_, p)  # fmt: skip
        return Prediction(float(p[0]))

    def learn(self, event: MatchEvent) -> Prediction:
        p = self.learn_many([event])
        return Prediction(float(p.p_win[0]), float(p.p_draw[0]))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        """Each match its own rating period, in order (``learn`` in a loop)."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        return self.learn_encoded(encode_events(events, self.entities_))

    def learn_encoded(self, b: EncodedBatch) -> Predictions:
        """Sequential learning over an encoded batch (``add=True`` encoding)."""
        if has_unknown(b):
            raise ValueError("learn_encoded: batch holds entities unknown to this model")
        self._fit_capacity()
        self.before_batch(b)
        p = np.empty(len(b))
        run = _k.learn_seq_compiled if self.compiled else _k.learn_seq
        run(b.first, b.first_size, b.second, b.second_size, b.score, b.time_s, self.mu_,
            self.phi_, self.sigma_, self.last_s_, self.entities_.counts, self._mark, self._prm,
            self.advantage_, p)  # fmt: skip
        return Predictions(p, np.zeros(len(b)))

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """One rating period: predict all events from the batch-start state, then rate."""
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        b = encode_events(events, self.entities_)
        self._fit_capacity()
        self.before_batch(b)
        p = np.empty(len(b))
        run = _k.learn_period_compiled if self.compiled else _k.learn_period
        run(b.first, b.first_size, b.second, b.second_size, b.score, b.time_s, self.mu_,
            self.phi_, self.sigma_, self.last_s_, self.entities_.counts, self._mark, self._prm,
            self.advantage_, p)  # fmt: skip
        return Predictions(p, np.zeros(len(b)))

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "initial_rating": self.initial_rating,
            "initial_deviation": self.initial_deviation,
            "initial_volatility": self.initial_volatility,
            "tau": self.tau,
            "period_s": self.period_s,
            "tolerance": self.tolerance,
            "compiled": self.compiled,
            "first_advantage": self.first_advantage,
            "advantage_k": self.advantage_k,
        }

    @classmethod
    def upgrade_state(cls, state: ModelState) -> ModelState:
        """A version 1 state (before the advantage) loads with advantage 0, kept fixed."""
        if state.kind != cls.kind or state.version != 1:
            return state
        params = {**state.params, "first_advantage": 0.0, "advantage_k": 0.0}
        return ModelState(state.kind, 2, params, {**state.arrays, "advantage": np.zeros(1)})

    def _entity_rows(self) -> dict[str, np.ndarray]:
        return {"mu": self.mu_, "phi": self.phi_, "sigma": self.sigma_, "last_s": self.last_s_}

    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        arrays = entity_arrays(self.entities_, **(self._entity_rows() if rows else {}))
        arrays["advantage"] = self.advantage_.copy()
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table, loaded = load_entity_arrays(self.kind, arrays, ("mu", "phi", "sigma", "last_s"))
        n = len(table)
        self.entities_ = table
        self._alloc(max(16, 2 * n))
        for dst, src in zip((self.mu_, self.phi_, self.sigma_, self.last_s_), loaded, strict=True):
            dst[:n] = src
        adv = np.asarray(arrays["advantage"], dtype=np.float64)
        if adv.shape != (1,) or not np.isfinite(adv[0]):
            raise StateError("glicko2: array 'advantage' must hold one finite number")
        self.advantage_ = adv.copy()
