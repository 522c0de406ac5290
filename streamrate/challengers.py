"""Challenger models: several models learn the same stream side by side; one answers.

:class:`ChallengerSet` (model kind ``"challengers"``) holds members built from the
registry. Every event is learned by every member (each predicts before it learns,
so every member is scored prequentially), and the *active* member's prediction
is what ``learn``/``predict`` return. :meth:`ChallengerSet.promote` makes another
member the active one: only a pointer changes, so no member loses any state.

The set keeps the per-member forecasts of the last ``window_events`` events in a
ring buffer (with the outcomes), so observers can score every member and
:func:`compare_window` can put them side by side: log loss, Brier score, ECE and
the paired circular block bootstrap interval of the mean log-loss difference to
a reference member (:func:`streamrate.evaluate.paired_block_bootstrap`).

>>> from datetime import datetime, timezone
>>> from streamrate.events import MatchEvent
>>> cs = ChallengerSet(members={"quick": {"kind": "elo", "k": 32.0},
...                             "calm": {"kind": "elo", "k": 8.0}})
>>> ev = MatchEvent(match_id="q-1", finished_at=datetime(2026, 3, 1, tzinfo=timezone.utc),
...                 first=("kelvash",), second=("morvenn",), score=1.0)
>>> cs.learn(ev).p_win, cs.active
(0.5, 'quick')
>>> cs.promote("calm"); cs.models_["calm"].seen("kelvash")
1
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from streamrate import calibration as cal
from streamrate.encode import EntityTable
from streamrate.errors import ConfigError, StateError
from streamrate.events import MatchEvent, Matchup
from streamrate.models._snapshot import MemberState, RowSnapshot, full_state, snapshot_of_members
from streamrate.models.base import Learned, Model, ModelState, Prediction, Predictions

WINDOW_EVENTS = 5000
"""Events whose per-member forecasts are kept for comparison (and saved with the state)."""
DEFAULT_MEMBERS: dict[str, dict[str, Any]] = {
    "elo": {"kind": "elo"},
    "bradley_terry": {"kind": "bradley_terry"},
}
LABEL_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,47}$")
_SEP = "/"
_WINDOW = "_window" + _SEP  # cannot collide with a member prefix: labels start alphanumeric


def _check_members(members: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    if not isinstance(members, Mapping) or not members:
        raise ConfigError("challengers: members must be a non-empty table of label -> settings")
    out: dict[str, dict[str, Any]] = {}
    for label, spec in members.items():
        if not isinstance(label, str) or not LABEL_PATTERN.match(label):
            raise ConfigError(
                f"challengers: member label {label!r} must be 1-48 letters, digits, '_', '.', "
                "'-', starting with a letter or digit"
            )
        if label == ChallengerSet.kind:
            raise ConfigError(f"challengers: {label!r} is reserved for the set's own forecasts")
        if not isinstance(spec, Mapping) or not isinstance(spec.get("kind"), str):
            raise ConfigError(f"challengers: member {label!r} needs a table with a 'kind' name")
        if spec["kind"] == ChallengerSet.kind:
            raise ConfigError(f"challengers: member {label!r} cannot itself be a challenger set")
        out[label] = dict(spec)
    return out


@dataclass(frozen=True)
class Window:
    """Copies of the comparison buffer, oldest event first; columns follow ``labels``."""

    labels: tuple[str, ...]
    active: str
    p_win: np.ndarray  # (n, members)
    p_draw: np.ndarray  # (n, members)
    score: np.ndarray  # (n,)

    @property
    def expected(self) -> np.ndarray:
        """Expected score per event and member: what every metric scores."""
        return self.p_win + 0.5 * self.p_draw


class ChallengerSet(Model):
    """Members learning side by side (see the module docstring).

    ``members`` maps a label to a table with the member's ``kind`` and settings;
    ``active`` names the member that answers (default: the first);
    ``window_events`` is how many recent events are kept for comparison.
    """

    kind: ClassVar[str] = "challengers"
    state_version: ClassVar[int] = 1

    def __init__(
        self,
        members: Mapping[str, Any] | None = None,
        active: str | None = None,
        window_events: int = WINDOW_EVENTS,
    ) -> None:
        from streamrate.models.registry import build_model

        self.members = _check_members(DEFAULT_MEMBERS if members is None else members)
        if not isinstance(window_events, int) or window_events < 1:
            raise ConfigError("challengers: window_events must be a positive integer")
        self.window_events = window_events
        self.models_: dict[str, Model] = {}
        for label, spec in self.members.items():
            settings = {k: v for k, v in spec.items() if k != "kind"}
            self.models_[label] = build_model(spec["kind"], **settings)
        self.labels = tuple(self.models_)
        self.active = self.labels[0]
        self.promote(self.labels[0] if active is None else active)
        m = len(self.labels)
        self.p_win_ = np.zeros((window_events, m))
        self.p_draw_ = np.zeros((window_events, m))
        self.score_ = np.zeros(window_events)
        self.size_ = 0
        self.head_ = 0  # row the next event goes to
        self.events_ = 0  # events learned in all

    # -- which member answers -------------------------------------------------------
    def promote(self, label: str) -> None:
        """Make ``label`` the answering member; :class:`ConfigError` if there is none."""
        if label not in self.models_:
            raise ConfigError(
                f"challengers: no member {label!r}; members: {', '.join(self.labels)}"
            )
        self.active = label
        self.has_draws = self.models_[label].has_draws  # type: ignore[misc]

    @property
    def active_model(self) -> Model:
        return self.models_[self.active]

    @property
    def entities_(self) -> EntityTable:  # type: ignore[override]  # the active member's table
        return self.active_model.entities_

    def seen(self, entity_id: str) -> int:
        return self.active_model.seen(entity_id)

    # -- the online API ----------------------------------------------------------------
    def predict(self, matchup: Matchup) -> Prediction:
        return self.active_model.predict(matchup)

    def learn(self, event: MatchEvent) -> Prediction:
        got = self.learn_scored([event]).served
        return Prediction(float(got.p_win[0]), float(got.p_draw[0]))

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        return self.learn_scored(events).served

    def learn_scored(self, events: Sequence[MatchEvent]) -> Learned:
        """The active member's predictions, and every member's under its label (a
        member's own inner models as ``<label>.<inner label>``)."""
        got = {label: m.learn_scored(events) for label, m in self.models_.items()}
        preds = {label: g.served for label, g in got.items()}
        self._record(preds, np.array([ev.score for ev in events], dtype=np.float64))
        parts = dict(preds)
        for label, g in got.items():
            parts.update({f"{label}.{inner}": p for inner, p in g.parts.items()})
        return Learned(preds[self.active], parts)

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        preds = {label: m.learn_batch(events) for label, m in self.models_.items()}
        self._record(preds, np.array([ev.score for ev in events], dtype=np.float64))
        return preds[self.active]

    def _record(self, preds: dict[str, Predictions], score: np.ndarray) -> None:
        k = score.size
        if k == 0:
            return
        w = self.window_events
        keep = min(k, w)  # of a chunk longer than the window only its tail is kept
        rows = (self.head_ + (k - keep) + np.arange(keep)) % w
        for j, label in enumerate(self.labels):
            self.p_win_[rows, j] = np.asarray(preds[label].p_win, dtype=np.float64)[k - keep :]
            self.p_draw_[rows, j] = np.asarray(preds[label].p_draw, dtype=np.float64)[k - keep :]
        self.score_[rows] = score[k - keep :]
        self.head_ = (self.head_ + k) % w
        self.size_ = min(self.size_ + k, w)
        self.events_ += k

    # -- reading the comparison buffer -------------------------------------------------
    def _order(self, last: int) -> np.ndarray:
        return (self.head_ - last + np.arange(last)) % self.window_events

    def window(self) -> Window:
        """Copies of the buffer, oldest first (cheap: call it under the model lock)."""
        rows = self._order(self.size_)
        return Window(
            self.labels,
            self.active,
            self.p_win_[rows].copy(),
            self.p_draw_[rows].copy(),
            self.score_[rows].copy(),
        )

    def recent_member_predictions(self, n: int) -> dict[str, Predictions]:
        """Each member's predictions for the last ``n`` events learned, oldest first.

        Empty when fewer than ``n`` events are held (``n`` above ``window_events``).
        """
        if n > self.size_ or n < 0:
            return {}
        rows = self._order(n)
        return {
            label: Predictions(self.p_win_[rows, j].copy(), self.p_draw_[rows, j].copy())
            for j, label in enumerate(self.labels)
        }

    def compare(self, reference: str | None = None, **bootstrap: Any) -> dict[str, Any]:
        """Side-by-side figures over the buffer (see :func:`compare_window`)."""
        return compare_window(self.window(), reference, **bootstrap)

    # -- persistence ---------------------------------------------------------------------
    def get_params(self) -> dict[str, Any]:
        return {
            "members": {k: dict(v) for k, v in self.members.items()},
            "active": self.active,
            "window_events": self.window_events,
        }

    def to_state(self, member_state: MemberState = full_state) -> ModelState:
        """Members' own states (kind, version, full settings; arrays under ``LABEL/``),
        each taken by ``member_state`` (whole, or in a snapshot: :meth:`snapshot`)."""
        arrays: dict[str, np.ndarray] = {}
        saved: dict[str, Any] = {}
        for label, model in self.models_.items():
            st = member_state(model, f"{label}{_SEP}")
            saved[label] = {"kind": st.kind, "version": st.version, "params": st.params}
            for name, arr in st.arrays.items():
                arrays[f"{label}{_SEP}{name}"] = arr
        arrays.update(self._state_arrays())
        params = {
            "members": saved,
            "order": list(self.labels),
            "active": self.active,
            "window_events": self.window_events,
        }
        return ModelState(self.kind, self.state_version, params, arrays)

    def snapshot(self) -> tuple[ModelState, RowSnapshot]:
        """:meth:`to_state` with the members' per-entity rows left in their
        copy-on-write snapshots (:func:`~streamrate.models._snapshot.snapshot_of_members`)."""
        return snapshot_of_members(self, self.to_state)

    def _state_arrays(self) -> dict[str, np.ndarray]:
        rows = self._order(self.size_)
        return {
            _WINDOW + "p_win": self.p_win_[rows].copy(),
            _WINDOW + "p_draw": self.p_draw_[rows].copy(),
            _WINDOW + "score": self.score_[rows].copy(),
            _WINDOW + "events": np.array([self.events_], dtype=np.int64),
        }

    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        p_win = np.asarray(arrays[_WINDOW + "p_win"], dtype=np.float64)
        p_draw = np.asarray(arrays[_WINDOW + "p_draw"], dtype=np.float64)
        score = np.asarray(arrays[_WINDOW + "score"], dtype=np.float64)
        n, m = len(score), len(self.labels)
        if p_win.shape != (n, m) or p_draw.shape != (n, m) or n > self.window_events:
            raise StateError("saved challenger window has arrays of the wrong shape")
        self.p_win_[:n], self.p_draw_[:n], self.score_[:n] = p_win, p_draw, score
        self.size_, self.head_ = n, n % self.window_events
        self.events_ = int(np.asarray(arrays[_WINDOW + "events"])[0])

    @classmethod
    def from_state(cls, state: ModelState) -> ChallengerSet:
        from streamrate.models.registry import model_from_state

        cls.check_state(state)
        try:
            saved = dict(state.params["members"])
            order = [str(x) for x in state.params["order"]]
            members = {k: {"kind": saved[k]["kind"], **saved[k]["params"]} for k in order}
            obj = cls(members, str(state.params["active"]), int(state.params["window_events"]))
            for label in order:
                prefix = label + _SEP
                sub = {k[len(prefix) :]: v for k, v in state.arrays.items() if k.startswith(prefix)}
                spec = saved[label]
                member = ModelState(spec["kind"], int(spec["version"]), dict(spec["params"]), sub)
                obj.models_[label] = model_from_state(member)
            obj.promote(obj.active)
            obj._load_arrays(dict(state.arrays))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            if isinstance(exc, ConfigError):
                raise StateError(f"saved challenger settings are not usable: {exc}") from exc
            raise StateError(f"saved challenger state is incomplete: {exc!r}") from exc
        return obj


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


def compare_window(
    window: Window,
    reference: str | None = None,
    *,
    resamples: int | None = None,
    seed: int | None = None,
) -> dict[str, Any]:
    """Per member: events, log loss, Brier score, ECE, accuracy, and the paired
    block-bootstrap interval of ``mean(loss - loss of reference)`` (reference:
    the active member). JSON-able; undefined figures are ``None``."""
    from streamrate import evaluate

    ref = window.active if reference is None else reference
    if ref not in window.labels:
        raise ConfigError(f"challengers: no member {ref!r}; members: {', '.join(window.labels)}")
    y = window.score
    e = window.expected
    losses = {label: cal.pointwise_log_loss(e[:, j], y) for j, label in enumerate(window.labels)}
    boot = {
        "resamples": evaluate.BOOTSTRAP_RESAMPLES if resamples is None else resamples,
        "seed": evaluate.BOOTSTRAP_SEED if seed is None else seed,
    }
    rows: dict[str, dict[str, Any]] = {}
    for j, label in enumerate(window.labels):
        ej = e[:, j]
        row: dict[str, Any] = {
            "active": label == window.active,
            "n": int(y.size),
            "log_loss": _finite(cal.log_loss(ej, y)),
            "brier": _finite(cal.brier(ej, y)),
            "ece": _finite(cal.expected_calibration_error(ej, y)),
            "accuracy": _finite(cal.accuracy(ej, y)),
            "log_loss_diff_ci": None,
        }
        if label != ref and y.size:
            d = evaluate.paired_block_bootstrap(losses[label], losses[ref], **boot)
            row["log_loss_diff_ci"] = d.to_json(ref)
        rows[label] = row
    return {"active": window.active, "reference": ref, "events": int(y.size), "members": rows}


def format_compare(table: Mapping[str, Any]) -> str:
    """A compare table (from :func:`compare_window` or a reply) as fixed-width text."""

    def num(x: Any, width: int, digits: int) -> str:
        return f"{'n/a':>{width}}" if x is None else f"{x:>{width}.{digits}f}"

    ref = table["reference"]
    head = (
        f"  {'member':<18} {'n':>6} {'log_loss':>9} {'brier':>7} {'acc':>6} {'ece':>6}  "
        f"diff vs {ref} [95% CI]"
    )
    lines = [head, "-" * len(head)]
    for label, r in table["members"].items():
        ci = r.get("log_loss_diff_ci")
        diff = "" if ci is None else f"{ci['mean']:+.4f} [{ci['low']:+.4f}, {ci['high']:+.4f}]"
        mark = "*" if r.get("active") else " "
        lines.append(
            f"{mark} {label[:18]:<18} {r['n']:>6} {num(r['log_loss'], 9, 4)} "
            f"{num(r['brier'], 7, 4)} {num(r['accuracy'], 6, 3)} {num(r['ece'], 6, 3)}  {diff}"
        )
    lines.append(f"* answers queries ({table['active']}); over the last {table['events']} events")
    lines.append("log loss in nats on the expected score; CI: paired circular block bootstrap")
    return "\n".join(lines)
