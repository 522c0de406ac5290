"""Online recalibration: learn a correction of the model's logit from the live stream.

The corrected probability is ``sigmoid(intercept + slope * logit(p))``
(``method="slope_intercept"``) or ``sigmoid(logit(p) / temperature)`` with
``temperature = 1 / slope`` (``method="temperature"``, intercept fixed at 0).
Parameters are learned prequentially: :meth:`OnlineRecalibrator.learn` returns
the corrected probability made *before* seeing the outcome, then takes one
Newton step on that event's log loss with a running, exponentially forgotten
Hessian (an online Newton / recursive least-squares style update). The
forgetting factor sets the memory: ``1 / (1 - forgetting)`` events.

A prior of ``prior_events`` pseudo-events of curvature keeps the first steps
small, so an untrained recalibrator is the identity and moves gradually.

:class:`Recalibrated` wraps any built-in model (name ``"recalibrated"`` in the
model registry, settings ``base``, ``base_settings``, ``method``, ...), so a
space can serve corrected probabilities and keep the correction in its checkpoint.

>>> import numpy as np
>>> rng = np.random.default_rng(1)
>>> rc = OnlineRecalibrator()
>>> for z in rng.normal(0, 1.5, 20000):
...     y = float(rng.random() < 1 / (1 + np.exp(-z)))   # truth: sigmoid(z)
...     _ = rc.learn(1 / (1 + np.exp(-2 * z)), y)         # model says sigmoid(2 z)
>>> round(rc.slope, 1)
0.5
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar, Literal

import numpy as np

from streamrate.columns import scores_of
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError, StateError, StateVersionError
from streamrate.events import MatchEvent, Matchup
from streamrate.models._jit import kernel
from streamrate.models._snapshot import MemberState, RowSnapshot, full_state, snapshot_of_members
from streamrate.models.base import Learned, Model, ModelState, Prediction, Predictions

Method = Literal["slope_intercept", "temperature"]
P_CLIP = 1e-9
"""Probabilities are clipped to [P_CLIP, 1 - P_CLIP] before taking the logit."""
MAX_ABS_LOGIT = 30.0
"""Corrected logits are kept within ±this so one extreme event cannot blow a step up."""


def _logit(p: float) -> float:
    pc = min(max(p, P_CLIP), 1.0 - P_CLIP)
    return math.log(pc) - math.log1p(-pc)


def _sigmoid(z: float) -> float:
    if z >= 0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


def _recal_loop(
    p_win: np.ndarray,
    p_draw: np.ndarray,
    y: np.ndarray,
    theta: np.ndarray,
    h: np.ndarray,
    temperature: bool,
    forgetting: float,
    out: np.ndarray,
) -> None:
    """:meth:`OnlineRecalibrator.apply` then :meth:`~OnlineRecalibrator.learn` for each
    event in turn, on arrays (``theta = [intercept, slope]``, ``h = [h_aa, h_ab, h_bb]``,
    both updated in place; ``out`` gets the corrected ``p_win``). The same arithmetic
    as the methods, compiled: a run of events costs no Python call per event."""
    for i in range(p_win.shape[0]):
        d = p_draw[i]
        e = p_win[i] + 0.5 * d
        pc = min(max(e, P_CLIP), 1.0 - P_CLIP)
        x = math.log(pc) - math.log1p(-pc)
        z = max(-MAX_ABS_LOGIT, min(MAX_ABS_LOGIT, theta[0] + theta[1] * x))
        if z >= 0:
            q = 1.0 / (1.0 + math.exp(-z))
        else:
            ez = math.exp(z)
            q = ez / (1.0 + ez)
        out[i] = q if d == 0.0 else min(max(q - 0.5 * d, 0.0), 1.0 - d)
        w = max(q * (1.0 - q), 1e-6)
        g = q - y[i]
        h_aa, h_ab, h_bb = h[0], h[1], h[2]
        h_bb = forgetting * h_bb + w * x * x
        if not temperature:
            h_aa = forgetting * h_aa + w
            h_ab = forgetting * h_ab + w * x
            det = h_aa * h_bb - h_ab * h_ab
            theta[0] -= (h_bb * g - h_ab * g * x) / det
            theta[1] -= (h_aa * g * x - h_ab * g) / det
        else:
            theta[1] -= g * x / h_bb
        h[0], h[1], h[2] = h_aa, h_ab, h_bb


_recal_loop_compiled = kernel(_recal_loop)


class OnlineRecalibrator:
    """Learns slope and intercept (or a temperature) of the logit online.

    ``forgetting`` in (0, 1]: weight kept by past curvature per event.
    ``prior_events``: curvature of the starting point, in pseudo-events of weight 1/4.
    """

    def __init__(
        self,
        method: Method = "slope_intercept",
        forgetting: float = 0.9995,
        prior_events: float = 50.0,
    ) -> None:
        if method not in ("slope_intercept", "temperature"):
            raise ValueError(f"unknown recalibration method {method!r}")
        if not 0.0 < forgetting <= 1.0:
            raise ValueError("forgetting must lie in (0, 1]")
        if prior_events <= 0:
            raise ValueError("prior_events must be positive")
        self.method = method
        self.forgetting = forgetting
        self.prior_events = prior_events
        # Plain floats: this runs once per event, where small numpy arrays cost more
        # than the arithmetic. Curvature h = [h_aa, h_ab, h_bb] of (intercept, slope).
        self.intercept_ = 0.0
        self.slope_ = 1.0
        prior = 0.25 * prior_events
        self.h_ = [prior, 0.0, prior]
        self.n_events_ = 0

    @property
    def slope(self) -> float:
        return self.slope_

    @property
    def intercept(self) -> float:
        return self.intercept_

    @property
    def theta_(self) -> np.ndarray:
        """``[intercept, slope]`` as an array (what state files store)."""
        return np.array([self.intercept_, self.slope_])

    @property
    def hess_(self) -> np.ndarray:
        """The running curvature: 2 x 2 for slope and intercept, 1 x 1 for temperature."""
        h_aa, h_ab, h_bb = self.h_
        if self.method == "temperature":
            return np.array([[h_bb]])
        return np.array([[h_aa, h_ab], [h_ab, h_bb]])

    @property
    def temperature(self) -> float:
        """``1 / slope``: above 1 softens over-confident probabilities."""
        return 1.0 / self.slope if self.slope != 0 else math.inf

    def params(self) -> dict[str, float | int | str]:
        """The current correction, JSON-able (what a status page shows)."""
        return {
            "method": self.method,
            "slope": self.slope,
            "intercept": self.intercept,
            "temperature": self.temperature,
            "events": self.n_events_,
        }

    def transform(self, p: float) -> float:
        """The corrected probability for a model probability ``p``."""
        z = self.intercept_ + self.slope_ * _logit(float(p))
        return _sigmoid(max(-MAX_ABS_LOGIT, min(MAX_ABS_LOGIT, z)))

    def learn(self, p: float, y: float) -> float:
        """Return the corrected ``p`` as it was before this outcome, then learn from ``y``.

        ``y`` is the first side's score (1, 0.5 or 0); a draw is the target 0.5.
        """
        x = _logit(float(p))
        q = self.transform(p)
        self.n_events_ += 1
        w = max(q * (1.0 - q), 1e-6)
        f, g = self.forgetting, q - float(y)
        h_aa, h_ab, h_bb = self.h_
        h_bb = f * h_bb + w * x * x
        if self.method == "slope_intercept":
            h_aa = f * h_aa + w
            h_ab = f * h_ab + w * x
            det = h_aa * h_bb - h_ab * h_ab  # > 0: the prior keeps it positive definite
            self.intercept_ -= (h_bb * g - h_ab * g * x) / det
            self.slope_ -= (h_aa * g * x - h_ab * g) / det
        else:
            self.slope_ -= g * x / h_bb
        self.h_ = [h_aa, h_ab, h_bb]
        return q

    def learn_arrays(self, p_win: np.ndarray, p_draw: np.ndarray, y: np.ndarray) -> np.ndarray:
        """:meth:`apply` then :meth:`learn` for each event in turn (compiled); returns
        the corrected ``p_win`` of each, as it was before its outcome."""
        theta = np.array([self.intercept_, self.slope_])
        h = np.array(self.h_, dtype=np.float64)
        out = np.empty(len(p_win))
        _recal_loop_compiled(
            np.ascontiguousarray(p_win, dtype=np.float64),
            np.ascontiguousarray(p_draw, dtype=np.float64),
            np.ascontiguousarray(y, dtype=np.float64),
            theta,
            h,
            self.method == "temperature",
            self.forgetting,
            out,
        )
        self.intercept_, self.slope_ = float(theta[0]), float(theta[1])
        self.h_ = [float(h[0]), float(h[1]), float(h[2])]
        self.n_events_ += len(p_win)
        return out

    def apply(self, prediction: Prediction) -> Prediction:
        """Correct a model's :class:`Prediction`.

        Without draws ``p_win`` is corrected. With draws the expected score is
        corrected and ``p_draw`` kept; ``p_win`` is then clipped to [0, 1 - p_draw].
        """
        if prediction.p_draw == 0.0:
            return Prediction(self.transform(prediction.p_win), 0.0)
        es = self.transform(prediction.expected_score)
        p_win = min(max(es - 0.5 * prediction.p_draw, 0.0), 1.0 - prediction.p_draw)
        return Prediction(p_win, prediction.p_draw)

    # -- persistence (JSON only) --------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "forgetting": self.forgetting,
            "prior_events": self.prior_events,
            "theta": self.theta_.tolist(),
            "hess": self.hess_.tolist(),
            "n_events": self.n_events_,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> OnlineRecalibrator:
        try:
            rc = cls(data["method"], float(data["forgetting"]), float(data["prior_events"]))
            theta = np.asarray(data["theta"], dtype=np.float64)
            hess = np.asarray(data["hess"], dtype=np.float64)
            n = int(data["n_events"])
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"recalibration state is not usable: {exc}") from exc
        if theta.shape != (2,) or hess.shape != rc.hess_.shape:
            raise StateError("recalibration state has arrays of the wrong shape")
        if not (np.all(np.isfinite(theta)) and np.all(np.isfinite(hess))):
            raise StateError("recalibration state holds non-finite numbers")
        rc.intercept_, rc.slope_ = float(theta[0]), float(theta[1])
        if hess.shape == (1, 1):
            rc.h_[2] = float(hess[0, 0])
        else:
            rc.h_ = [float(hess[0, 0]), float(hess[0, 1]), float(hess[1, 1])]
        rc.n_events_ = n
        return rc


_BASE_PREFIX = "base."


class Recalibrated(Model):
    """Any built-in model whose forecasts pass through an :class:`OnlineRecalibrator`.

    ``learn`` returns the recalibrated forecast made before the outcome (what a
    query would have answered), then teaches both the base model and the
    recalibrator. Saved state holds the base model's arrays (prefixed ``base.``)
    and the recalibrator's parameters, so a restart keeps both.

    >>> from datetime import datetime, timezone
    >>> from streamrate.events import MatchEvent
    >>> m = Recalibrated(base="elo")
    >>> ev = MatchEvent(match_id="q-1", finished_at=datetime(2026, 3, 1, tzinfo=timezone.utc),
    ...                 first=("kelvash",), second=("morvenn",), score=1.0)
    >>> m.learn(ev).p_win, m.recalibrator_.params()["events"]
    (0.5, 1)
    """

    kind: ClassVar[str] = "recalibrated"
    state_version: ClassVar[int] = 1

    def __init__(
        self,
        base: str = "mixture",
        base_settings: dict[str, Any] | None = None,
        method: Method = "slope_intercept",
        forgetting: float = 0.9995,
        prior_events: float = 50.0,
    ) -> None:
        from streamrate.models.registry import build_model

        if base == self.kind:
            raise ConfigError("recalibrated: the base model cannot itself be 'recalibrated'")
        self.base = base
        self.base_settings = dict(base_settings or {})
        self.method = method
        self.forgetting = forgetting
        self.prior_events = prior_events
        self.model_ = build_model(base, **self.base_settings)
        self.recalibrator_ = OnlineRecalibrator(method, forgetting, prior_events)
        self.has_draws = self.model_.has_draws  # type: ignore[misc]

    @property
    def entities_(self) -> EntityTable:  # type: ignore[override]  # the base model's table
        return self.model_.entities_

    def predict(self, matchup: Matchup) -> Prediction:
        return self.recalibrator_.apply(self.model_.predict(matchup))

    def predict_many(self, matchups: Sequence[Matchup]) -> Predictions:
        """The base model's predictions of every pairing at once, each corrected."""
        raw = self.model_.predict_many(matchups)
        apply = self.recalibrator_.apply
        pairs = zip(raw.p_win.tolist(), raw.p_draw.tolist(), strict=True)
        return Predictions.from_list([apply(Prediction(pw, pd)) for pw, pd in pairs])

    def learn(self, event: MatchEvent) -> Prediction:
        got = self.learn_scored([event]).served
        return Prediction(float(got.p_win[0]), float(got.p_draw[0]))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        return self.learn_scored(events).served

    def learn_scored(self, events: Sequence[MatchEvent]) -> Learned:
        """Served (recalibrated) predictions, and the base model's own (raw) ones
        under the label ``<base>.raw``: scoring them keeps the quality alerts on
        the raw model while the recalibrated numbers are served."""
        if len(events) == 1:
            raw = Predictions.from_list([self.model_.learn(events[0])])
            pred = raw.one(0)
            out = Predictions.from_list([self.recalibrator_.apply(pred)])
            self.recalibrator_.learn(pred.expected_score, events[0].score)
            return Learned(out, {f"{self.base}.raw": raw})
        raw = self.model_.learn_many(events)
        y = np.array(scores_of(events), dtype=np.float64)
        p_win = self.recalibrator_.learn_arrays(raw.p_win, raw.p_draw, y)
        served = Predictions(p_win, np.array(raw.p_draw, dtype=np.float64))
        return Learned(served, {f"{self.base}.raw": raw})

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        # Mini-batch semantics: every forecast of the batch uses the batch-start
        # correction, then the recalibrator learns from the whole batch.
        raw = self.model_.learn_batch(events)
        preds = [Prediction(float(a), float(b)) for a, b in zip(raw.p_win, raw.p_draw, strict=True)]
        out = [self.recalibrator_.apply(p) for p in preds]
        for p, ev in zip(preds, events, strict=True):
            self.recalibrator_.learn(p.expected_score, ev.score)
        return Predictions.from_list(out)

    def get_params(self) -> dict[str, Any]:
        return {
            "base": self.base,
            "base_settings": self.base_settings,
            "method": self.method,
            "forgetting": self.forgetting,
            "prior_events": self.prior_events,
        }

    def _state_arrays(self, member_state: MemberState = full_state) -> dict[str, np.ndarray]:
        base = member_state(self.model_, _BASE_PREFIX)
        arrays = {_BASE_PREFIX + k: v for k, v in base.arrays.items()}
        rc = self.recalibrator_
        arrays["recal_theta"] = rc.theta_.copy()
        arrays["recal_hess"] = rc.hess_.copy()
        arrays["recal_events"] = np.array([rc.n_events_], dtype=np.int64)
        arrays["recal_base_version"] = np.array([self.model_.state_version], dtype=np.int64)
        return arrays

    def snapshot(self) -> tuple[ModelState, RowSnapshot]:
        """:meth:`to_state` with the base model's per-entity rows left in its
        copy-on-write snapshots (:func:`~streamrate.models._snapshot.snapshot_of_members`)."""
        return snapshot_of_members(
            self,
            lambda take: ModelState(
                self.kind, self.state_version, self.get_params(), self._state_arrays(take)
            ),
        )

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        version = int(arrays["recal_base_version"][0])
        base = {k[len(_BASE_PREFIX) :]: v for k, v in arrays.items() if k.startswith(_BASE_PREFIX)}
        if version == self.model_.state_version:
            self.model_._load_arrays(base)
        else:  # an older base state loads as it would alone: upgraded, as it was trained
            state = ModelState(self.model_.kind, version, self.model_.get_params(), base)
            try:
                self.model_ = type(self.model_).from_state(state)
            except StateVersionError as exc:
                raise StateVersionError(
                    f"saved {self.base!r} state inside 'recalibrated' has version {version}; "
                    f"this code reads version {self.model_.state_version}"
                ) from exc
        self.recalibrator_ = OnlineRecalibrator.from_dict(
            {
                "method": self.method,
                "forgetting": self.forgetting,
                "prior_events": self.prior_events,
                "theta": np.asarray(arrays["recal_theta"], dtype=np.float64).tolist(),
                "hess": np.asarray(arrays["recal_hess"], dtype=np.float64).tolist(),
                "n_events": int(arrays["recal_events"][0]),
            }
        )


def recalibrators_of(model: Model) -> dict[str, OnlineRecalibrator]:
    """The online recalibrators inside ``model`` by model label (for the gauges):
    the model itself when it is :class:`Recalibrated`, else its challenger members
    that are."""
    if isinstance(model, Recalibrated):
        return {model.kind: model.recalibrator_}
    members: dict[str, Model] = getattr(model, "models_", {})
    return {label: m.recalibrator_ for label, m in members.items() if isinstance(m, Recalibrated)}
