"""A mixture of models whose weights follow their past log loss.

Several member models (the same family with different learning rates, noise or
season pulls, or different families) all predict and learn every match. The
mixture forecasts the weighted mean of their expected scores, with weights
``w_i proportional to exp(-eta * L_i)``, ``L_i`` the member's cumulative log
loss so far (exponentially weighted averaging).

**Bound.** The log loss ``l(e, y) = -y ln e - (1 - y) ln(1 - e)`` is
exp-concave for ``eta = 1`` (``exp(-l) = e^y (1 - e)^(1 - y)`` is a weighted
geometric mean of ``e`` and ``1 - e``, concave in ``e``), also for a draw
scored ``y = 1/2``. For exp-concave losses, exponentially weighted averaging
with ``eta = 1`` has cumulative loss at most that of the best member plus
``ln N`` for ``N`` members, on every sequence ('Prediction, Learning, and
Games', Cambridge University Press 2006, chapter 3, exp-concave losses). Member
forecasts are clipped to ``[CLIP, 1 - CLIP]`` first; the bound holds for the
clipped losses. With ``eta < 1`` the bound is ``ln N / eta``.

``p_win`` and ``p_draw`` are mixed with the same weights, so the mixed expected
score is the weighted mean of the members' expected scores.

>>> from datetime import datetime, timezone
>>> from streamrate.events import MatchEvent
>>> m = Mixture()
>>> ev = MatchEvent(match_id="q-1", finished_at=datetime(2026, 3, 1, tzinfo=timezone.utc),
...                 first=("kelvash",), second=("morvenn",), score=1.0)
>>> round(m.learn(ev).p_win, 3), len(m.weights())
(0.5, 4)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np

from streamrate.batch import EncodedBatch, encode_events
from streamrate.columns import scores_of
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models._snapshot import MemberState, RowSnapshot, full_state, snapshot_of_members
from streamrate.models.base import Model, ModelState, Prediction, Predictions
from streamrate.models.bayes_strength import BayesStrength

CLIP = 1e-9

_SHARED: dict[str, Any] = {
    "prior_var": 0.3,
    "period_field": "season",
    "newcomer_matches": 15,
    "shared_noise_per_day": 1e-5,
}
DEFAULT_MEMBERS: tuple[dict[str, Any], ...] = (
    {"label": "steady", "kind": "bayes_strength",
     "settings": {**_SHARED, "noise_per_day": 0.0001}},
    {"label": "seasonal", "kind": "bayes_strength",
     "settings": {**_SHARED, "noise_per_day": 0.0001, "period_pull": 0.1, "period_var": 0.02}},
    {"label": "restless", "kind": "bayes_strength",
     "settings": {**_SHARED, "noise_per_day": 0.0003, "period_pull": 0.2, "period_var": 0.05}},
    {"label": "styles", "kind": "blade_chest",
     "settings": {"dims": 8, "lr": 0.15, "lr_strength": 0.2, "context": "stacked",
                  "init_scale": 0.1}},
)  # fmt: skip
"""Members of the default mixture: three amounts of forgetting (within and between
seasons; a season is the context field ``season`` when events carry it) for
transitive strengths with a drifting first-side edge and a learned newcomer
offset, and blade-chest vectors for cyclic styles. Chosen on the first 80% of the
football results (bench/football_events.py), checked on seed 11 of the seasons world."""


def _clip(e: np.ndarray) -> np.ndarray:
    return np.clip(e, CLIP, 1.0 - CLIP)


def member_log_loss(e: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Log loss of clipped forecasts ``e`` against scores ``y`` (elementwise)."""
    c = _clip(e)
    return -(y * np.log(c) + (1.0 - y) * np.log1p(-c))


class Mixture(Model):
    """Exponentially weighted average of member models (see the module docstring)."""

    kind: ClassVar[str] = "mixture"

    def __init__(self, members: Sequence[dict[str, Any]] | None = None, eta: float = 1.0) -> None:
        from streamrate.models.registry import build_model

        if not (0.0 < eta <= 1.0):
            raise ConfigError("mixture: eta must lie in (0, 1] (1 keeps the ln N bound)")
        specs = [dict(m) for m in (DEFAULT_MEMBERS if members is None else members)]
        if not specs:
            raise ConfigError("mixture: give at least one member")
        labels = []
        for i, spec in enumerate(specs):
            if "kind" not in spec or set(spec) - {"kind", "label", "settings"}:
                raise ConfigError("mixture: each member is {kind, label?, settings?}")
            spec.setdefault("label", f"m{i}")
            spec.setdefault("settings", {})
            labels.append(str(spec["label"]))
        if len(set(labels)) != len(labels):
            raise ConfigError("mixture: member labels must differ")
        self.members = specs
        self.eta = float(eta)
        self.models_ = [build_model(s["kind"], **s["settings"]) for s in specs]
        self._share_ids()
        self.has_draws = any(m.has_draws for m in self.models_)  # type: ignore[misc]
        self.loss_ = np.zeros(len(specs))  # cumulative clipped log loss per member
        self.last_: dict[str, Predictions] = {}
        self._w: list[float] = []
        self._w_key = b""

    def _share_ids(self) -> None:
        """Gaussian-strength members see the same events, so they give every id the
        same row: they share the first one's table, and the mixture encodes each
        run of events once for them all (and counts matches once)."""
        group = [m for m in self.models_ if isinstance(m, BayesStrength)]
        for m in group[1:]:
            m.entities_ = group[0].entities_
        self._bayes = group

    def _member_preds(self, events: Sequence[MatchEvent], batch: bool) -> list[Predictions]:
        shared: EncodedBatch | None = None
        if len(self._bayes) > 1:
            shared = encode_events(events, self._bayes[0].entities_)
        preds = []
        for m in self.models_:
            if shared is not None and isinstance(m, BayesStrength):
                lead = m is self._bayes[0]
                run = m.learn_batch_encoded if batch else m.learn_encoded
                preds.append(run(events, shared, count=lead))
            else:
                preds.append(m.learn_batch(events) if batch else m.learn_many(events))
        return preds

    @property
    def entities_(self) -> EntityTable:  # type: ignore[override]
        return self.models_[0].entities_

    @property
    def labels(self) -> list[str]:
        return [str(s["label"]) for s in self.members]

    def weights(self) -> np.ndarray:
        """Current member weights (sum 1)."""
        z = -self.eta * (self.loss_ - self.loss_.min())
        w = np.exp(z)
        return w / w.sum()  # type: ignore[no-any-return]

    @property
    def bound_nats(self) -> float:
        """Most the cumulative log loss can exceed the best member's: ``ln N / eta``."""
        return math.log(len(self.models_)) / self.eta

    # -- the online API -----------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        key = self.loss_.tobytes()  # the weights change only when the losses do
        if self._w_key != key:
            self._w, self._w_key = [float(x) for x in self.weights()], key
        p_win = p_draw = 0.0
        for wi, m in zip(self._w, self.models_, strict=True):
            pr = m.predict(matchup)
            e = min(max(pr.p_win + 0.5 * pr.p_draw, CLIP), 1.0 - CLIP)
            p_win += wi * e - wi * 0.5 * pr.p_draw
            p_draw += wi * pr.p_draw
        return Prediction(p_win, p_draw)

    def predict_many(self, matchups: Sequence[Matchup]) -> Predictions:
        """:meth:`predict` of each pairing: every member's at once, mixed with the same
        arithmetic element by element."""
        w = [float(x) for x in self.weights()]
        p_win, p_draw = np.zeros(len(matchups)), np.zeros(len(matchups))
        for wi, m in zip(w, self.models_, strict=True):
            pr = m.predict_many(matchups)
            e = np.minimum(np.maximum(pr.p_win + 0.5 * pr.p_draw, CLIP), 1.0 - CLIP)
            p_win += wi * e - wi * 0.5 * pr.p_draw
            p_draw += wi * pr.p_draw
        return Predictions(p_win, p_draw)

    def _mix(
        self, preds: list[Predictions], events: Sequence[MatchEvent], batch: bool
    ) -> Predictions:
        y = np.array(scores_of(events), dtype=np.float64)
        e = _clip(np.array([p.expected_score for p in preds]))  # (N, n)
        draw = np.array([p.p_draw for p in preds])
        losses = member_log_loss(e, y)
        if batch:  # every forecast of a mini-batch uses the batch-start weights
            before = np.repeat(self.loss_[:, None], len(events), axis=1)
            after = self.loss_ + losses.sum(axis=1)
        else:  # the weights before event i count the losses of events 0..i-1, added
            # one at a time in order (cumsum runs sequentially): as learn in a loop
            run = np.cumsum(np.concatenate([self.loss_[:, None], losses], axis=1), axis=1)
            before, after = run[:, :-1], run[:, -1]
        z = -self.eta * (before - before.min(axis=0))
        w = np.exp(z)
        w /= w.sum(axis=0)
        p_win = (w * (e - 0.5 * draw)).sum(axis=0)
        p_draw = (w * draw).sum(axis=0)
        self.loss_ = after.copy()
        self.last_ = dict(zip(self.labels, preds, strict=True))
        return Predictions(p_win, p_draw)

    def learn(self, event: MatchEvent) -> Prediction:
        return self.learn_many([event]).one(0)

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        return self._mix(self._member_preds(events, batch=False), events, batch=False)

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        if not events:
            return Predictions(np.zeros(0), np.zeros(0))
        return self._mix(self._member_preds(events, batch=True), events, batch=True)

    def component_predictions(self, n: int) -> dict[str, Predictions]:
        out = {}
        for label, p in self.last_.items():
            if 0 < n <= len(p.p_win):
                out[f"mixture.{label}"] = Predictions(p.p_win[-n:], p.p_draw[-n:])
        return out

    # -- persistence --------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {"members": [dict(s) for s in self.members], "eta": self.eta}

    def _state_arrays(self, member_state: MemberState = full_state) -> dict[str, np.ndarray]:
        arrays: dict[str, np.ndarray] = {"loss": self.loss_.copy()}
        for i, m in enumerate(self.models_):
            prefix = f"member{i}."
            arrays[f"{prefix}version"] = np.array([m.state_version])
            for name, a in member_state(m, prefix).arrays.items():
                arrays[f"{prefix}{name}"] = a
        return arrays

    def snapshot(self) -> tuple[ModelState, RowSnapshot]:
        """:meth:`to_state` with the members' per-entity rows left in their
        copy-on-write snapshots (:func:`~streamrate.models._snapshot.snapshot_of_members`)."""
        return snapshot_of_members(
            self,
            lambda take: ModelState(
                self.kind, self.state_version, self.get_params(), self._state_arrays(take)
            ),
        )

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        loss = np.asarray(arrays["loss"], dtype=np.float64)
        if loss.shape != (len(self.models_),) or not np.all(np.isfinite(loss)):
            raise StateError("mixture: array 'loss' needs one finite number per member")
        models = []
        for i, (spec, m) in enumerate(zip(self.members, self.models_, strict=True)):
            prefix = f"member{i}."
            mine = {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
            version = int(np.asarray(mine.pop("version")).reshape(-1)[0])
            state = ModelState(spec["kind"], version, m.get_params(), mine)
            models.append(type(m).from_state(state))
        self.models_ = models
        self._share_ids()
        self.loss_ = loss.copy()
