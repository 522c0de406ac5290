"""Online matchup models: logistic strength (Bradley-Terry) and blade-chest vectors.

Each entity ``i`` has a scalar strength ``s_i`` (optional) and, for ``dims > 0``, a
blade vector ``a_i`` and a chest vector ``c_i`` (the WSDM 2016 paper 'Modeling
Intransitivity in Matchup and Comparison Data'; context as in the KDD 2016 paper
'Predicting Matchups and Preferences in Context'). A side's strength and vectors
are the *mean* of its members' (so a team of one is the entity itself, and team
size does not scale the logit). For sides A (first) and B::

    inner form:     M(A, B) = a_A . c_B - a_B . c_A
    distance form:  M(A, B) = |a_B - c_A|^2 - |a_A - c_B|^2
    logit theta = (s_A - s_B) + M(A, B) + h0 + h . z

``h0 + h . z`` is the learned first-side advantage (``z`` is the hashed context).
Without draws ``P(win) = sigmoid(theta)`` and a draw is learned as half a win.
With ``draws=True`` Davidson's draw model is used (JASA 1970, 'On
extending the Bradley-Terry model to accommodate ties in paired comparison
experiments'): with ``nu = exp(eta)`` learned, ``P(win) : P(draw) : P(loss) =
e^(theta/2) : nu : e^(-theta/2)``.

Entity features (``feature_width > 0``): an entity's parameters are
``prior + own`` with ``prior = g(W x)`` (``g`` identity or tanh, ``W`` shared and
learned) and ``own`` its own offsets, pulled toward 0 by L2, so an unseen entity
starts from what its features say. Context modes: ``"stacked"`` appends ``z`` to
each member's input of ``W`` (with no entity features: a learned linear map of
``z`` added to every entity's parameters); ``"gated"`` multiplies blade and chest
element-wise by ``1 + G z``; ``"none"`` uses ``z`` for the advantage only.

**Uncertainty** (``uncertainty=True``, the default; the strength term only). Each
entity's strength offset is Gaussian, ``s_i ~ N(mu_i, v_i)``; ``v_i`` is kept in
``acc[i, 0]`` (where the AdaGrad sum of the strength would be). Before a match,
``v_i`` grows by ``noise_per_day`` per day since the entity's last match (a random
walk, capped at ``prior_var``, the variance of a newcomer). With member weights
``x_j = 1/|A|`` (first side) and ``-1/|B|`` and ``V = sum_j x_j^2 v_j``, the logit
``theta`` is integrated over ``N(theta, V)`` by the probit approximation:
``kappa = 1 / sqrt(1 + pi V / 8)``, the forecast uses ``kappa * theta``, so newcomers
and long-idle entities get humbler probabilities. The update follows the approach
of 'A Bayesian Approximation Method for Online Ranking' (JMLR 2011): expand the
widened log likelihood to second order at the prior mean, gradient
``g = kappa (y - p)`` and curvature ``w = kappa^2 p (1 - p)`` (for Davidson's draws
``w = kappa^2 (p_w + p_l - (p_w - p_l)^2) / 4``); the Gaussian prior times this
quadratic is Gaussian with, along ``x`` (rank one, Sherman-Morrison),
``Sigma' = Sigma - w Sigma x x' Sigma / (1 + w V)`` and mean step
``Sigma x g / (1 + w V)``. Keeping the diagonal, with ``R_j = V - x_j^2 v_j``::

    v_j' = v_j / (1 + v_j a_j),   a_j = w x_j^2 / (1 + w R_j)
    mu_j' = mu_j + v_j' x_j g / (1 + w R_j)

(equal to the rank-one formulas; in this information form a mini-batch sums
``a_j`` and ``x_j g / (1 + w R_j)`` over its events, so a batch of one is the
sequential step). ``v_j`` thus sets the entity's step size in place of AdaGrad's.
Without vector uncertainty, blade and chest vectors keep AdaGrad steps; their
gradients carry the factor ``kappa``. Defaults ``prior_var = 0.3`` and
``noise_per_day = 1e-4`` were chosen on the first 80% of the football results
only (they also do well on the simulated worlds).

**Vector uncertainty** (``vector_uncertainty=True``, off by default; ``dims > 0``).
Each entity's blade and chest offsets are Gaussian with one variance per group,
``a_i ~ N(m_i, u_i I)``, ``c_i ~ N(n_i, r_i I)`` (diagonal per parameter group),
kept in ``acc[i, so]`` and ``acc[i, so + dims]`` (the AdaGrad sums of those
columns are then unused). They grow like the strength's, by
``vector_noise_per_day`` per idle day up to ``vector_prior_var``, the newcomer's.
*Forecast.* Linearise ``M`` around the means: the logit moves by
``J_a . da_j + J_c . dc_j`` for member ``j``'s offsets, with ``J_a = |x_j|
dtheta/da_A`` and ``J_c = |x_j| dtheta/dc_A`` for a first-side member (likewise
with ``a_B``, ``c_B`` on the second side); inner form ``dtheta/da_A = c_B``,
``dtheta/dc_A = -a_B``, ``dtheta/da_B = -c_A``, ``dtheta/dc_B = a_A``; distance form
``dtheta/da_A = -2 (a_A - c_B)``, ``dtheta/dc_A = -2 (a_B - c_A)``, ``dtheta/da_B =
2 (a_B - c_A)``, ``dtheta/dc_B = 2 (a_A - c_B)``; with the gate, dimension ``k`` of
a blade (chest) gradient is multiplied by its gate ``ga_k`` (``gc_k``). ``V`` adds
``u_j |J_a|^2 + r_j |J_c|^2`` per member. The logit is bilinear (inner) or
quadratic (distance) in the vectors, so the linearisation misses the product of
two variances; for independent Gaussians that part is known exactly and is added
too (the distance form's shift of the mean under noise is left out): with
``S_aA = sum_j x_j^2 u_j`` the side's blade variance per dimension (likewise
``S_cA``, ``S_aB``, ``S_cB``), inner
form ``sum_k ga_k^2 gc_k^2 (S_aA S_cB + S_aB S_cA)`` (the variance of a product of
independent normals, 'On the Exact Variance of Products', JASA 1960), distance
form ``2 sum_k s_k^2`` over both squared distances with ``s_k`` the per-dimension
variance of ``a_B - c_A`` (resp. ``a_A - c_B``). The probit widening then uses
this ``V`` as above. *Update.* The same second-order expansion at the means,
group by group, the other groups and members being noise of variance
``R = V - u q`` (``q = |J_a|^2``): the group's likelihood term is
``w/(1 + w R) (J . da)^2 / 2`` plus its gradient. With the prior ``N(m, u I)`` the
exact Gaussian posterior has precision ``I/u + beta J J' / q`` with
``beta = w q / (1 + w R)``: its mean (Sherman-Morrison along ``J``)::

    m' = m - u / (1 + u beta) * g_a / (1 + w R),   g_a = kappa (p - y) J_a (+ L2 pull)

and, tied back to one variance per group, the precision averaged over the
group's ``d`` directions (``1/u' = trace(precision) / d``; the mean-field
projection, exact for ``d = 1`` where it is the strength's formula)::

    u' = u / (1 + u beta / d)

A mini-batch sums ``beta`` and ``g_a / (1 + w R)`` over its events (information
form), so a batch of one is the sequential step. This variance, not AdaGrad,
sets the vectors' step size. Memory per entity is unchanged (the two variances
reuse AdaGrad slots; the last match time is kept as for the strength). Measured
(README): it helps a little where there are no cycles and loses on the cyclic
worlds, where AdaGrad's per-coordinate steps escape the small random start faster.

Learning is SGD on the negative log likelihood with AdaGrad step sizes (float32
sums per entity parameter), optional forgetting (own offsets shrink by
``exp(-forget_per_day * idle_days)`` when an entity plays again) and a
deterministic small random start of the vectors from ``seed``.

>>> from datetime import datetime, timezone
>>> from streamrate.events import MatchEvent, Matchup
>>> m = BladeChest(dims=4, backend="numpy")
>>> t = datetime(2026, 3, 1, tzinfo=timezone.utc)
>>> for k in range(20):
...     _ = m.learn(MatchEvent(match_id=f"m{k}", finished_at=t, first=("kelvash",),
...                            second=("morvenn",), score=1.0))
>>> m.predict(Matchup(first=("kelvash",), second=("morvenn",))).p_win > 0.8
True
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from types import ModuleType
from typing import Any, ClassVar

import numpy as np

from streamrate.batch import EncodedBatch, count_matches, encode_events
from streamrate.encode import EntityTable, FeatureHasher, RunningScale
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models._snapshot import CopyOnWriteRows
from streamrate.models.base import (
    GROW_ROWS,
    ModelState,
    Prediction,
    Predictions,
    numbers_read_raw,
    with_room,
)

CONTEXT_MODES = ("none", "stacked", "gated")
PRIOR_MAPS = ("identity", "tanh")
BACKENDS = ("auto", "numba", "numpy")
_MASK64 = (1 << 64) - 1


def _kernels(backend: str) -> ModuleType:
    if backend in ("auto", "numba"):
        try:
            from streamrate.models import _kernels

            return _kernels
        except ImportError as exc:
            if backend == "numba":
                raise ConfigError(f"backend 'numba' is not available: {exc}") from exc
    from streamrate.models import _kernels_numpy

    return _kernels_numpy


def hashed_uniform(seed: int, lo: int, hi: int, width: int) -> np.ndarray:
    """Uniform [-1, 1) numbers for rows ``lo..hi``: a function of (seed, row, column) only.

    Row ``r`` gets the same start however the arrays grew (splitmix64 finaliser).
    """
    key = np.uint64((seed * 0x9E3779B97F4A7C15 + 0x632BE59BD9B4E019) & _MASK64)
    x = np.arange(lo * width, hi * width, dtype=np.uint64) + key
    x ^= x >> np.uint64(30)
    x *= np.uint64(0xBF58476D1CE4E5B9)
    x ^= x >> np.uint64(27)
    x *= np.uint64(0x94D049BB133111EB)
    x ^= x >> np.uint64(31)
    u = (x >> np.uint64(11)).astype(np.float64) * (1.0 / (1 << 53))
    return (2.0 * u - 1.0).reshape(hi - lo, width)


class MatchupModel(CopyOnWriteRows):
    """Strength + blade-chest model; :class:`BradleyTerry`, :class:`BladeChest` and
    :class:`BladeChestDistance` are its presets.

    Settings: ``dims`` blade/chest length; ``strength`` keep a scalar strength;
    ``lr`` AdaGrad step of blade/chest, ``lr_strength`` of strengths, the advantage
    and the draw weight, ``lr_shared`` of the feature map ``W`` and gate ``G``;
    ``l2`` pull of own offsets toward the prior (per match played), ``l2_shared``
    on ``W``/``G``/``h`` (per update touching them); ``init_scale`` half-width of
    the random start of the vectors; ``accum_init`` starting AdaGrad sum (caps
    the first steps at about ``lr / sqrt(accum_init)`` per unit gradient);
    ``draws`` Davidson's draw model; ``advantage`` learn ``h0 + h.z``;
    ``context`` "none"/"stacked"/"gated" and ``context_width`` hashed slots;
    ``feature_width`` hashed entity-feature slots (0: off), ``feature_slots``
    features kept per entity, ``prior_map`` "identity"/"tanh"; ``forget_per_day``
    decay rate of idle entities' own offsets; ``seed``; ``backend``
    "auto"/"numba"/"numpy"; ``scale_numbers`` numbers of the context and of the
    features enter as standard scores from a running mean and deviation per
    field (:class:`~streamrate.encode.RunningScale`, kept in the state), so that
    their units do not matter; ``uncertainty`` a Gaussian strength per entity
    (module docstring) with newcomer variance ``prior_var`` and growth
    ``noise_per_day`` per idle day (ignored with ``strength=False``);
    ``vector_uncertainty`` a Gaussian blade and chest per entity with one
    variance per group, newcomer variance ``vector_prior_var`` and growth
    ``vector_noise_per_day`` (module docstring; ignored with ``dims == 0``).

    Defaults were picked on synthetic worlds (tests and bench): with 60 entities
    and 3000-4000 matches, blade-chest d=8..16 reaches prequential log loss near
    0.50 on a three-style cycle (ln 2 = 0.693) and matches Elo (within 0.002) on
    a world with no cycles.
    """

    kind: ClassVar[str] = "matchup"
    # Version 2 added the running statistics of numeric fields (scale_numbers);
    # a version 1 state still loads, with numbers read raw as it was trained.
    # Version 3 added the strengths' uncertainty (``acc[:, 0]`` then holds their
    # variances); older states load with it off, as they were trained.
    # Version 4 added the blade and chest variances (``vector_uncertainty``);
    # version 3 states load with it off.
    state_version: ClassVar[int] = 4
    form: ClassVar[int] = 0  # 0: inner, 1: distance

    def __init__(
        self,
        dims: int = 16,
        strength: bool = True,
        lr: float = 0.1,
        lr_strength: float = 0.4,
        lr_shared: float = 0.02,
        l2: float = 1e-3,
        l2_shared: float = 1e-4,
        init_scale: float = 0.1,
        accum_init: float = 0.1,
        draws: bool = False,
        advantage: bool = True,
        context: str = "none",
        context_width: int = 32,
        feature_width: int = 0,
        feature_slots: int = 8,
        prior_map: str = "identity",
        forget_per_day: float = 0.0,
        seed: int = 0,
        backend: str = "auto",
        scale_numbers: bool = True,
        uncertainty: bool = True,
        prior_var: float = 0.3,
        noise_per_day: float = 1e-4,
        vector_uncertainty: bool = False,
        vector_prior_var: float = 0.1,
        vector_noise_per_day: float = 1e-4,
    ) -> None:
        if dims < 0 or (dims == 0 and not strength):
            raise ConfigError("dims must be >= 0, and dims == 0 needs strength=True")
        if context not in CONTEXT_MODES:
            raise ConfigError(f"context must be one of {CONTEXT_MODES}, not {context!r}")
        if prior_map not in PRIOR_MAPS:
            raise ConfigError(f"prior_map must be one of {PRIOR_MAPS}, not {prior_map!r}")
        if backend not in BACKENDS:
            raise ConfigError(f"backend must be one of {BACKENDS}, not {backend!r}")
        if (
            min(lr, lr_strength, lr_shared, accum_init) <= 0
            or min(l2, l2_shared, forget_per_day) < 0
        ):
            raise ConfigError("step sizes and accum_init must be > 0; l2s and forgetting >= 0")
        if prior_var <= 0 or noise_per_day < 0:
            raise ConfigError("prior_var must be > 0 and noise_per_day >= 0")
        if vector_prior_var <= 0 or vector_noise_per_day < 0:
            raise ConfigError("vector_prior_var must be > 0 and vector_noise_per_day >= 0")
        if context_width < 0 or feature_width < 0 or feature_slots < 1:
            raise ConfigError("widths must be >= 0 and feature_slots >= 1")
        if context != "none" and context_width == 0:
            raise ConfigError(f"context={context!r} needs context_width > 0")
        self.dims = int(dims)
        self.strength = bool(strength)
        self.lr, self.lr_strength, self.lr_shared = float(lr), float(lr_strength), float(lr_shared)
        self.l2, self.l2_shared = float(l2), float(l2_shared)
        self.init_scale, self.accum_init = float(init_scale), float(accum_init)
        self.draws, self.advantage = bool(draws), bool(advantage)
        self.context, self.context_width = context, int(context_width)
        self.feature_width, self.feature_slots = int(feature_width), int(feature_slots)
        self.prior_map, self.forget_per_day = prior_map, float(forget_per_day)
        self.seed, self.backend = int(seed), backend
        self.scale_numbers = bool(scale_numbers)
        self.uncertainty = bool(uncertainty) and self.strength  # it is the strength's
        self.prior_var, self.noise_per_day = float(prior_var), float(noise_per_day)
        self.vector_uncertainty = bool(vector_uncertainty) and self.dims > 0
        self.vector_prior_var = float(vector_prior_var)
        self.vector_noise_per_day = float(vector_noise_per_day)
        self.has_draws = self.draws  # type: ignore[misc]
        self._k = _kernels(backend)
        self._ctx = FeatureHasher(context_width) if context_width else None
        self._feat = FeatureHasher(feature_width) if feature_width else None
        self.entities_ = EntityTable()
        self.fast_path = True  # tests switch it off to compare with the general loop
        self._fresh_state()

    # -- settings -------------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "dims": self.dims,
            "strength": self.strength,
            "lr": self.lr,
            "lr_strength": self.lr_strength,
            "lr_shared": self.lr_shared,
            "l2": self.l2,
            "l2_shared": self.l2_shared,
            "init_scale": self.init_scale,
            "accum_init": self.accum_init,
            "draws": self.draws,
            "advantage": self.advantage,
            "context": self.context,
            "context_width": self.context_width,
            "feature_width": self.feature_width,
            "feature_slots": self.feature_slots,
            "prior_map": self.prior_map,
            "forget_per_day": self.forget_per_day,
            "seed": self.seed,
            "backend": self.backend,
            "scale_numbers": self.scale_numbers,
            "uncertainty": self.uncertainty,
            "prior_var": self.prior_var,
            "noise_per_day": self.noise_per_day,
            "vector_uncertainty": self.vector_uncertainty,
            "vector_prior_var": self.vector_prior_var,
            "vector_noise_per_day": self.vector_noise_per_day,
        }

    @classmethod
    def upgrade_state(cls, state: ModelState) -> ModelState:
        state = numbers_read_raw(cls, state)
        if state.kind == cls.kind and state.version == 2:
            params = {**state.params, "uncertainty": False}
            state = ModelState(state.kind, 3, params, state.arrays)
        if state.kind == cls.kind and state.version == 3:
            params = {**state.params, "vector_uncertainty": False}
            state = ModelState(state.kind, 4, params, state.arrays)
        return state

    @property
    def _timed(self) -> bool:
        """Whether each entity's last match time is kept (forgetting, uncertainty)."""
        return self.forget_per_day > 0 or self.uncertainty or self.vector_uncertainty

    @property
    def width(self) -> int:
        """Parameters per entity: strength (if on) + blade + chest."""
        return int(self.strength) + 2 * self.dims

    def _cfg(self) -> np.ndarray:
        return np.array(
            [
                self.dims,
                int(self.strength),
                self.form,
                int(self.prior_map == "tanh"),
                int(self.draws),
                int(self.context == "stacked"),
                int(self.context == "gated"),
                self.feature_width,
                int(self.uncertainty),
                int(self.vector_uncertainty),
            ],
            dtype=np.int64,
        )

    def _hyp(self) -> np.ndarray:
        return np.array(
            [
                self.lr,
                self.lr_shared,
                self.l2,
                self.l2_shared,
                self.forget_per_day,
                self.clock_s_,
                float(self.advantage),
                self.lr_strength,
                self.prior_var,
                self.noise_per_day,
                self.vector_prior_var,
                self.vector_noise_per_day,
            ]
        )

    # -- state ----------------------------------------------------------------------
    def _fresh_state(self) -> None:
        D, d, C = self.width, self.dims, self.context_width
        self._rows_ready = 0  # rows of the entity arrays initialised so far
        self.own_ = np.zeros((0, D), dtype=np.float32)
        self.acc_ = np.zeros((0, D), dtype=np.float32)
        self.last_s_ = np.zeros(0, dtype=np.float64)
        self.feat_idx_ = np.zeros((0, self.feature_slots), dtype=np.int32)
        self.feat_val_ = np.zeros((0, self.feature_slots), dtype=np.float32)
        in_w = self.feature_width + (C if self.context == "stacked" else 0)
        self.W_ = np.zeros((D, in_w) if in_w else (0, 0))
        self.G_ = np.zeros((2 * d, C) if self.context == "gated" else (0, 0))
        self.H_ = np.zeros((1, C))
        self.sc_ = np.array([0.0, math.log(0.25)])
        self.AW_ = np.full(self.W_.shape, self.accum_init)
        self.AG_ = np.full(self.G_.shape, self.accum_init)
        self.AH_ = np.full(self.H_.shape, self.accum_init)
        self.asc_ = np.full(2, self.accum_init)
        self.clock_s_ = math.nan
        self.context_scale_ = RunningScale()
        self.feature_scale_ = RunningScale()

    def _grow(self, need: int) -> None:
        """Make rows ``0..need`` usable.

        Rows are initialised (random start, AdaGrad sums) in steps of at most
        :data:`GROW_ROWS`, so memory is taken in chunks as entities arrive. The
        arrays themselves are reserved ahead by :func:`with_room`, whose spare
        rows are pages the OS has not handed out yet: a larger reserve copies
        only the rows in use, and the peak stays near twice the arrays in use
        instead of the three copies of growing by concatenation.
        """
        ready = self._rows_ready
        if need <= ready:
            return
        hi = max(need, min(2 * ready, ready + GROW_ROWS), 16)
        so = int(self.strength)
        self.own_ = with_room(self.own_, ready, hi)
        self.acc_ = with_room(self.acc_, ready, hi)
        self.acc_[ready:hi] = self.accum_init
        if self.uncertainty:
            self.acc_[ready:hi, 0] = self.prior_var  # the strength's variance, not a sum
        if self.vector_uncertainty:  # the blade's and the chest's variances
            self.acc_[ready:hi, so] = self.vector_prior_var
            self.acc_[ready:hi, so + self.dims] = self.vector_prior_var
        for lo in range(ready, hi, GROW_ROWS) if self.dims else ():
            top = min(lo + GROW_ROWS, hi)  # float64 temporaries of one step at most
            block = hashed_uniform(self.seed, lo, top, 2 * self.dims)
            self.own_[lo:top, so:] = self.init_scale * block
        if self._timed:
            self.last_s_ = with_room(self.last_s_, ready, hi)
            self.last_s_[ready:hi] = np.nan
        if self.feature_width:
            self.feat_idx_ = with_room(self.feat_idx_, ready, hi)
            self.feat_idx_[ready:hi] = -1
            self.feat_val_ = with_room(self.feat_val_, ready, hi)
        self._rows_ready = hi

    # -- encoded API ------------------------------------------------------------------
    def encode(self, events: Sequence[Matchup], add: bool = True) -> EncodedBatch:
        """Events as arrays for :meth:`learn_encoded` / :meth:`predict_encoded`."""
        if not self.scale_numbers:
            return encode_events(events, self.entities_, self._ctx, self._feat, add=add)
        return encode_events(
            events,
            self.entities_,
            self._ctx,
            self._feat,
            add=add,
            context_scale=self.context_scale_,
            feature_scale=self.feature_scale_,
        )

    def _args(self, b: EncodedBatch) -> tuple[np.ndarray, ...]:
        c = np.ascontiguousarray
        if b.has_features and self.feature_width:
            fi, fv = c(b.feat_idx), c(b.feat_val)
        else:
            fi, fv = np.zeros((0, 0, 0), np.int32), np.zeros((0, 0, 0))
        return (
            c(b.first),
            c(b.second),
            c(b.first_size),
            c(b.second_size),
            c(b.score),
            c(b.ctx_idx),
            c(b.ctx_val),
            c(b.time_s),
            fi,
            fv,
        )

    def _state(self) -> tuple[np.ndarray, ...]:
        return (
            self.own_,
            self.acc_,
            self.last_s_,
            self.feat_idx_,
            self.feat_val_,
            self.W_,
            self.AW_,
            self.G_,
            self.AG_,
            self.H_,
            self.AH_,
            self.sc_,
            self.asc_,
        )

    def _check_learnable(self, b: EncodedBatch) -> None:
        if np.isnan(b.score).any():
            raise ConfigError("cannot learn from an event without a score")
        self._grow(len(self.entities_))
        self.before_batch(b)  # the rows this batch writes: keep a snapshot's values

    def learn_encoded(self, b: EncodedBatch) -> Predictions:
        """Sequential predict-then-learn over an encoded batch (``add=True`` encoding)."""
        self._check_learnable(b)
        out = np.zeros((len(b), 2))
        hyp = self._hyp()
        a = self._args(b)
        if self._solo_ok(b):
            st = self._state()
            from streamrate.models._kernels_solo import learn_solo

            learn_solo(
                a[0], a[1], a[4], a[5], a[6], a[7],
                st[0], st[1], st[2], st[9], st[10], st[11], st[12],
                self._cfg(), hyp, out,
            )  # fmt: skip
        else:
            self._k.learn_seq(*a, *self._state(), self._cfg(), hyp, out)
        self.clock_s_ = float(hyp[5])
        count_matches(b, self.entities_)
        return Predictions(out[:, 0].copy(), out[:, 1].copy())

    def _solo_ok(self, b: EncodedBatch) -> bool:
        # the specialised compiled loop covers 1v1 with context in the advantage only
        return (
            self.fast_path
            and self._k.__name__.endswith("._kernels")
            and b.first.shape[1] == 1
            and b.second.shape[1] == 1
            and self.context == "none"
            and self.feature_width == 0
            and not self.uncertainty
            and not self.vector_uncertainty
            and len(b) > 0
            and min(int(b.first.min()), int(b.second.min())) >= 0
        )

    def learn_batch_encoded(self, b: EncodedBatch) -> Predictions:
        """Mini-batch: predictions from the batch-start state, then one combined step."""
        self._check_learnable(b)
        a = self._args(b)
        rows = np.concatenate([b.first.ravel(), b.second.ravel()])
        uniq = np.unique(rows[rows >= 0]).astype(np.int64)
        loc1 = np.where(a[0] >= 0, np.searchsorted(uniq, a[0]), -1).astype(np.int64)
        loc2 = np.where(a[1] >= 0, np.searchsorted(uniq, a[1]), -1).astype(np.int64)
        out = np.zeros((len(b), 2))
        hyp = self._hyp()
        self._k.learn_minibatch(*a, *self._state(), self._cfg(), hyp, out, uniq, loc1, loc2)
        self.clock_s_ = float(hyp[5])
        count_matches(b, self.entities_)
        return Predictions(out[:, 0].copy(), out[:, 1].copy())

    def predict_encoded(self, b: EncodedBatch) -> Predictions:
        """Probabilities from the current state; changes nothing."""
        out = np.zeros((len(b), 2))
        a = self._args(b)
        s = self._state()
        self._k.predict_seq(
            *a[:4], *a[5:], s[0], s[1], s[2], s[3], s[4], s[5], s[7], s[9], s[11],
            self._cfg(), self._hyp(), out,
        )  # fmt: skip
        return Predictions(out[:, 0].copy(), out[:, 1].copy())

    # -- the online API -----------------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        p = self.predict_encoded(self.encode([matchup], add=False))
        return Prediction(float(p.p_win[0]), float(p.p_draw[0]))

    def predict_many(self, matchups: Sequence[Matchup]) -> Predictions:
        """:meth:`predict` of each pairing, as one encoded batch (the same kernel)."""
        if not matchups:
            return Predictions(np.zeros(0), np.zeros(0))
        return self.predict_encoded(self.encode(matchups, add=False))

    def learn(self, event: MatchEvent) -> Prediction:
        p = self.learn_encoded(self.encode([event]))
        return Prediction(float(p.p_win[0]), float(p.p_draw[0]))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        return self.learn_encoded(self.encode(events))

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        return self.learn_batch_encoded(self.encode(events))

    def vectors(self, entity_id: str) -> np.ndarray | None:
        """The entity's own offsets ``[strength?, blade, chest]`` (None if unknown)."""
        r = self.entities_.get(entity_id)
        return None if r < 0 else self.own_[r].astype(np.float64)

    def strength_variance(self, entity_id: str) -> float | None:
        """The variance of the entity's strength after its last match (None if unknown or
        uncertainty is off); it grows by ``noise_per_day`` per idle day from there."""
        r = self.entities_.get(entity_id)
        return None if r < 0 or not self.uncertainty else float(self.acc_[r, 0])

    def vector_variances(self, entity_id: str) -> tuple[float, float] | None:
        """The (blade, chest) variances of the entity after its last match (None if
        unknown or vector uncertainty is off); each grows by ``vector_noise_per_day``
        per idle day from there."""
        r = self.entities_.get(entity_id)
        if r < 0 or not self.vector_uncertainty:
            return None
        so = int(self.strength)
        return float(self.acc_[r, so]), float(self.acc_[r, so + self.dims])

    # -- persistence -------------------------------------------------------------------
    def _entity_rows(self) -> dict[str, np.ndarray]:
        """The live per-entity arrays (all their rows) under their saved names."""
        rows: dict[str, np.ndarray] = {"own": self.own_, "acc": self.acc_}
        if self._timed:
            rows["last_s"] = self.last_s_
        if self.feature_width:
            rows["feat_idx"], rows["feat_val"] = self.feat_idx_, self.feat_val_
        return rows

    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        n = len(self.entities_)
        self._grow(n)
        arrays: dict[str, np.ndarray] = {
            "W": self.W_,
            "AW": self.AW_,
            "G": self.G_,
            "AG": self.AG_,
            "H": self.H_,
            "AH": self.AH_,
            "sc": self.sc_,
            "asc": self.asc_,
            "clock_s": np.array([self.clock_s_]),
            **self.entities_.to_arrays(),
            **self.context_scale_.to_arrays("context_scale"),
            **self.feature_scale_.to_arrays("feature_scale"),
        }
        if rows:
            arrays.update({k: v[:n].copy() for k, v in self._entity_rows().items()})
        return arrays

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        table = EntityTable.from_arrays(arrays)
        n = len(table)
        expect: dict[str, tuple[tuple[int, ...], Any]] = {
            "own": ((n, self.width), np.float32),
            "acc": ((n, self.width), np.float32),
            "W": (self.W_.shape, np.float64),
            "AW": (self.W_.shape, np.float64),
            "G": (self.G_.shape, np.float64),
            "AG": (self.G_.shape, np.float64),
            "H": (self.H_.shape, np.float64),
            "AH": (self.H_.shape, np.float64),
            "sc": ((2,), np.float64),
            "asc": ((2,), np.float64),
            "clock_s": ((1,), np.float64),
        }
        if self._timed:
            expect["last_s"] = ((n,), np.float64)
        if self.feature_width:
            expect["feat_idx"] = ((n, self.feature_slots), np.int32)
            expect["feat_val"] = ((n, self.feature_slots), np.float32)
        got: dict[str, np.ndarray] = {}
        for name, (shape, dtype) in expect.items():
            arr = arrays[name]
            if arr.shape != shape or arr.dtype != dtype:
                raise StateError(
                    f"saved {self.kind!r} array {name!r} is {arr.dtype}{list(arr.shape)}, "
                    f"expected {np.dtype(dtype)}{list(shape)}"
                )
            got[name] = np.array(arr, dtype=dtype)
        if "context_scale_names" in arrays or self.scale_numbers:
            self.context_scale_ = RunningScale.from_arrays(arrays, "context_scale")
            self.feature_scale_ = RunningScale.from_arrays(arrays, "feature_scale")
        self.entities_ = table
        self._rows_ready = n
        self.own_, self.acc_ = got["own"], got["acc"]
        self.W_, self.AW_, self.G_, self.AG_ = got["W"], got["AW"], got["G"], got["AG"]
        self.H_, self.AH_, self.sc_, self.asc_ = got["H"], got["AH"], got["sc"], got["asc"]
        self.clock_s_ = float(got["clock_s"][0])
        if self._timed:
            self.last_s_ = got["last_s"]
        if self.feature_width:
            self.feat_idx_, self.feat_val_ = got["feat_idx"], got["feat_val"]


class BradleyTerry(MatchupModel):
    """Logistic strength model: one strength per entity (``dims`` is 0)."""

    kind = "bradley_terry"

    def __init__(self, **settings: Any) -> None:
        settings.setdefault("dims", 0)
        if settings["dims"] != 0 or not settings.get("strength", True):
            raise ConfigError("bradley_terry has strengths only; use blade_chest for vectors")
        super().__init__(**settings)


class BladeChest(MatchupModel):
    """Blade-chest vectors, inner form (plus strengths unless ``strength=False``)."""

    kind = "blade_chest"
    # Preset defaults, chosen by prequential log loss on simulated worlds drawn with
    # seeds no test uses (cyclic 101, plain 201, patch 301): eight dimensions are
    # enough for a few play styles, and "stacked" context lets a map shift each
    # entity's vectors.
    preset: ClassVar[dict[str, Any]] = {
        "dims": 8,
        "context": "stacked",
        "lr": 0.15,
        "lr_strength": 0.2,
    }

    def __init__(self, **settings: Any) -> None:
        settings = {**self.preset, **settings}
        if settings["dims"] < 1:
            raise ConfigError(f"{self.kind} needs dims >= 1")
        super().__init__(**settings)


class BladeChestDistance(BladeChest):
    """Blade-chest vectors, distance form."""

    kind = "blade_chest_dist"
    form = 1
