"""What every model offers, and nothing about where events come from.

A model is pure in-memory numpy state. It predicts P(first side wins) (and
P(draw) where it models draws), learns from one finished match at a time, offers
a mini-batch path, and saves its state as plain arrays plus JSON-able settings
(:class:`ModelState`; :mod:`streamrate.statefile` writes it to disk without pickle).

Conventions shared by all models:

* ``learn(event)`` is prequential: it returns the prediction made *before* the
  model saw the outcome, then updates. Replay scores exactly that prediction.
* ``learn_batch(events)`` predicts every event of the batch from the state at the
  start of the batch and then applies one combined update. For a batch of one it
  gives the same state and prediction as ``learn``.
* ``learn_many(events)`` is the sequential path over a list (same as calling
  ``learn`` in a loop; models may run it in a compiled loop).
* Constructors only store hyperparameters; learned state is created on first use
  and its attribute names end with an underscore.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar, NamedTuple

import numpy as np
import numpy.typing as npt

from streamrate.encode import EntityTable
from streamrate.errors import StateError, StateVersionError
from streamrate.events import MatchEvent, Matchup


class Prediction(NamedTuple):
    """P(first side wins) and P(draw); ``p_draw`` is 0 for models without draws."""

    p_win: float
    p_draw: float = 0.0

    @property
    def expected_score(self) -> float:
        """The first side's expected score, P(win) + P(draw) / 2: what metrics score."""
        return self.p_win + 0.5 * self.p_draw


class Predictions(NamedTuple):
    """Many predictions as arrays (same meaning as :class:`Prediction`)."""

    p_win: npt.NDArray[np.float64]
    p_draw: npt.NDArray[np.float64]

    @property
    def expected_score(self) -> npt.NDArray[np.float64]:
        return self.p_win + 0.5 * self.p_draw

    def __getitem__(self, i: Any) -> Any:  # type: ignore[override]
        if isinstance(i, int) and not isinstance(i, bool):
            return Prediction(float(self.p_win[i]), float(self.p_draw[i]))
        return tuple.__getitem__(self, i)

    def one(self, i: int) -> Prediction:
        """The ``i``-th prediction (typed; ``preds[i]`` gives the same)."""
        return Prediction(float(self.p_win[i]), float(self.p_draw[i]))

    @classmethod
    def from_list(cls, preds: Sequence[Prediction]) -> Predictions:
        arr = np.array(preds, dtype=np.float64).reshape(-1, 2)
        return cls(arr[:, 0].copy(), arr[:, 1].copy())


class Learned(NamedTuple):
    """What learning a run of events gives: the served predictions, and by label
    those of the models inside (each made before its model saw the outcome)."""

    served: Predictions
    parts: dict[str, Predictions]


@dataclass
class ModelState:
    """A model's whole state: settings (JSON-able) and arrays (numeric, no objects)."""

    kind: str
    version: int
    params: dict[str, Any]
    arrays: dict[str, np.ndarray] = field(default_factory=dict)


class Model(ABC):
    """Base class of every model. Subclasses set ``kind`` and ``state_version``."""

    kind: ClassVar[str]
    state_version: ClassVar[int] = 1
    has_draws: ClassVar[bool] = False

    entities_: EntityTable

    # -- the online API -----------------------------------------------------------
    @abstractmethod
    def predict(self, matchup: Matchup) -> Prediction:
        """P(first side wins) for a pairing; changes nothing (unknown ids are priors)."""

    @abstractmethod
    def learn(self, event: MatchEvent) -> Prediction:
        """Predict, then learn from the outcome; return the prediction made first."""

    def predict_many(self, matchups: Sequence[Matchup]) -> Predictions:
        """:meth:`predict` of each pairing (a lobby's matrix); changes nothing. Models
        that can answer many pairings at once override it with the same numbers."""
        return Predictions.from_list([self.predict(m) for m in matchups])

    def learn_many(self, events: Sequence[MatchEvent]) -> Predictions:
        """Sequential path over several events: identical to ``learn`` in a loop."""
        return Predictions.from_list([self.learn(e) for e in events])

    def learn_batch(self, events: Sequence[MatchEvent]) -> Predictions:
        """Mini-batch path: predict all from the batch-start state, then update once.

        The default is the sequential path; models that have a true mini-batch
        update override it.
        """
        return self.learn_many(events)

    def learn_scored(self, events: Sequence[MatchEvent]) -> Learned:
        """The sequential path (``learn`` in a loop), also returning the predictions
        of the models inside this one (challenger members; the raw model under a
        recalibration), by label, so that each is scored too. The one way such
        predictions leave a model: ``learn`` and ``learn_many`` of a model that
        holds others are built on it. Empty ``parts`` for a plain model."""
        if len(events) == 1:
            return Learned(Predictions.from_list([self.learn(events[0])]), {})
        return Learned(self.learn_many(events), {})

    def seen(self, entity_id: str) -> int:
        """How many matches an entity has been learned from (0 if never seen)."""
        return self.entities_.seen(entity_id) if hasattr(self, "entities_") else 0

    # -- persistence --------------------------------------------------------------
    @abstractmethod
    def get_params(self) -> dict[str, Any]:
        """The constructor's arguments, JSON-able."""

    @abstractmethod
    def _state_arrays(self) -> dict[str, np.ndarray]:
        """Learned state as arrays (include ``self.entities_.to_arrays()``)."""

    @abstractmethod
    def _load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        """Rebuild learned state from :meth:`_state_arrays` output."""

    def to_state(self) -> ModelState:
        return ModelState(self.kind, self.state_version, self.get_params(), self._state_arrays())

    @classmethod
    def check_state(cls, state: ModelState) -> None:
        """Refuse a saved state of another model kind or another state version."""
        if state.kind != cls.kind:
            raise StateError(f"saved state is of model {state.kind!r}, not {cls.kind!r}")
        if state.version != cls.state_version:
            raise StateVersionError(
                f"saved {state.kind!r} state has version {state.version}; "
                f"this code reads version {cls.state_version}"
            )

    @classmethod
    def upgrade_state(cls, state: ModelState) -> ModelState:
        """A saved state of an older version that this code still reads, in the
        current version's terms; other states as they are."""
        return state

    @classmethod
    def from_state(cls, state: ModelState) -> Model:
        state = cls.upgrade_state(state)
        cls.check_state(state)
        try:
            model = cls(**state.params)
        except TypeError as exc:
            raise StateError(f"saved {state.kind!r} settings are not usable: {exc}") from exc
        try:
            model._load_arrays(dict(state.arrays))
        except KeyError as exc:
            raise StateError(f"saved {state.kind!r} state lacks array {exc.args[0]!r}") from exc
        return model

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({args})"


GROW_ROWS = 1 << 16
"""Entity arrays take memory in steps of at most this many rows."""


def with_room(arr: np.ndarray, used: int, rows: int) -> np.ndarray:
    """``arr`` itself if it has ``rows`` rows, else a larger array holding its first
    ``used`` rows (the rest zero).

    The larger array comes from ``np.zeros``, whose pages the OS hands out only
    when first written: its spare rows reserve address space, not memory, and
    only the rows in use are copied. Its length at least doubles, so copies are
    rare; resident memory grows as rows are written.

    >>> a = with_room(np.ones((3, 2)), 3, 5)
    >>> a.shape, a[:, 0].tolist()
    ((6, 2), [1.0, 1.0, 1.0, 0.0, 0.0, 0.0])
    """
    if rows <= arr.shape[0]:
        return arr
    out = np.zeros((max(rows, 2 * arr.shape[0]), *arr.shape[1:]), dtype=arr.dtype)
    out[:used] = arr[:used]
    return out


def numbers_read_raw(cls: type[Model], state: ModelState) -> ModelState:
    """``upgrade_state`` of a model whose version 2 began scaling numbers: a version 1
    state loads with ``scale_numbers`` off, reading numbers raw as it was trained."""
    if state.kind == cls.kind and state.version == 1:
        params = {**state.params, "scale_numbers": False}
        return ModelState(state.kind, 2, params, state.arrays)
    return state


def entity_arrays(table: EntityTable, **per_entity: np.ndarray) -> dict[str, np.ndarray]:
    """The table's arrays plus one array per name, each cut to the known entities."""
    n = len(table)
    arrays = table.to_arrays()
    arrays.update({name: np.asarray(a)[:n].copy() for name, a in per_entity.items()})
    return arrays


def load_entity_arrays(
    kind: str, arrays: dict[str, np.ndarray], names: Sequence[str]
) -> tuple[EntityTable, list[np.ndarray]]:
    """The table and the named per-entity float arrays written by :func:`entity_arrays`;
    :class:`StateError` when one does not have one value per entity."""
    table = EntityTable.from_arrays(arrays)
    n = len(table)
    loaded = [np.asarray(arrays[name], dtype=np.float64) for name in names]
    for name, a in zip(names, loaded, strict=True):
        if a.shape != (n,):
            raise StateError(f"{kind}: array {name!r} has shape {a.shape}, not one value for "
                             f"each of the {n} saved entities")  # fmt: skip
    return table, loaded


def warm_up(model: Model) -> None:
    """Run a fresh model with the same settings once through every path.

    Compiled kernels are built (or loaded from their on-disk cache) on first
    use. Doing that on a throwaway instance means the live model is never held
    under its lock while a kernel compiles, which on a machine with an empty
    cache takes seconds and would stall the queries waiting for that lock.
    """
    from datetime import UTC, datetime

    fresh = type(model)(**model.get_params())
    when = datetime(2000, 1, 1, tzinfo=UTC)
    solo = MatchEvent(
        match_id="warm-up-1",
        finished_at=when,
        first=("warm-a",),
        second=("warm-b",),
        score=1.0,
        context={"warm": "up", "level": 1.0},
    )
    team = MatchEvent(
        match_id="warm-up-2",
        finished_at=when,
        first=("warm-a", "warm-c"),
        second=("warm-b", "warm-d"),
        score=0.5,
        context={"warm": "up"},
        features={"warm-c": {"warm": "up", "level": 1.0}},
    )
    fresh.learn_many([solo, team])
    fresh.learn(solo)
    fresh.learn_batch([solo, team])
    fresh.predict(solo)
    fresh.predict(team)
    fresh.predict(Matchup(first=("warm-x",), second=("warm-y",)))
