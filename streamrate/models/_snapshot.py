"""Copy-on-write snapshots of a model's per-entity rows, for checkpoints written
while the model goes on learning.

Taking a snapshot (:class:`RowSnapshot`) copies nothing: it keeps references to
the live arrays and the number of rows ``n`` they hold at that moment. Before
the owner writes rows, it calls :meth:`RowSnapshot.before_write` with their
indices (the rows a batch touches, known before its kernel runs); the snapshot
copies those of them it still shares into its shadow arrays (once per row) and
marks them. A reader in another thread asks for the snapshot's rows in slices
(:meth:`RowSnapshot.slices`): each slice is the live rows, with the marked
ones taken from the shadow, made under the snapshot's own small lock, so the
owner waits at most for one slice while a checkpoint streams out.

The copies are kept compactly, in the order they were made, in blocks of
:data:`BLOCK_ROWS` rows (small allocations: no transparent huge page is zeroed
for a handful of rows), so their memory is that of the rows written while the
snapshot is read, not of the whole state. An array the reader has finished is
dropped from the snapshot and copied no more.

The owner's duties (the hook, :class:`CopyOnWriteRows`: the matchup models,
Elo, Glicko-2, TrueSkill, the Gaussian strengths): every write to a row
below ``n`` of a snapshot array calls :meth:`before_write` first (``None``
for "every row"); an array replaced by a larger one (growth) may stay in the
snapshot as it is, since the owner no longer writes it; :meth:`close` (by the
reader, when done or failed) ends the copying. A model made of models
(mixture, recalibrated, challengers) takes its members' snapshots
(:func:`snapshot_of_members`) and hands them out as one
(:class:`JoinedSnapshot`), its members' names under their prefixes.

>>> import numpy as np
>>> live = np.arange(6.0).reshape(3, 2)
>>> snap = RowSnapshot({"w": live}, 3, slice_rows=2)
>>> snap.before_write(np.array([1]))
>>> live[1] = -1.0  # the owner writes after the hook
>>> np.concatenate(list(snap.slices("w"))).tolist()
[[0.0, 1.0], [2.0, 3.0], [4.0, 5.0]]
>>> snap.close(); snap.active
False
"""

from __future__ import annotations

import threading
from abc import abstractmethod
from collections.abc import Callable, Iterator, Mapping
from typing import TYPE_CHECKING

import numpy as np

from streamrate.models.base import Model, ModelState

if TYPE_CHECKING:
    from streamrate.batch import EncodedBatch

SLICE_ROWS = 1 << 14
"""Rows a reader copies per slice under the snapshot's lock (16,384 rows of 33
float32 values: about 2 MB, a fraction of a millisecond)."""
BLOCK_ROWS = 1 << 12
"""Rows per block of the copies made for the owner's writes."""


class RowSnapshot:
    """The rows ``0..n`` of some live arrays as they were when it was taken."""

    def __init__(
        self, arrays: Mapping[str, np.ndarray], n: int, slice_rows: int = SLICE_ROWS
    ) -> None:
        for name, arr in arrays.items():
            if arr.shape[0] < n:
                raise ValueError(f"array {name!r} has {arr.shape[0]} rows, fewer than {n}")
        self.n = int(n)
        self.slice_rows = max(1, int(slice_rows))
        self._live: dict[str, np.ndarray] = dict(arrays)
        self._shapes = {k: (self.n, *a.shape[1:]) for k, a in arrays.items()}
        self._dtypes = {k: a.dtype for k, a in arrays.items()}
        self._blocks: dict[str, list[np.ndarray]] = {k: [] for k in arrays}
        # 1 + where a row's copy is in the blocks; 0 while the row is shared
        self._pos = np.zeros(self.n, dtype=np.int64 if self.n >= 1 << 31 else np.int32)
        self._lock = threading.Lock()
        self.active = True
        self._copied = 0

    @property
    def rows_copied(self) -> int:
        """Rows copied for the owner's writes so far (for tests and benchmarks)."""
        return self._copied

    def shape(self, name: str) -> tuple[int, ...]:
        return self._shapes[name]

    def dtype(self, name: str) -> np.dtype:
        return self._dtypes[name]

    @property
    def names(self) -> list[str]:
        return list(self._shapes)

    def before_write(self, rows: np.ndarray | None) -> None:
        """The owner is about to write ``rows`` (indices; negative and ``>= n`` are
        ignored; ``None``: every row): keep the snapshot's values of those it still
        shares. Called in the owner's thread, before the write."""
        if not self.active:
            return
        if rows is None:
            new = np.flatnonzero(self._pos == 0)
        else:
            r = np.asarray(rows, dtype=np.int64).ravel()
            r = r[(r >= 0) & (r < self.n)]
            if not r.size:
                return
            new = np.unique(r[self._pos[r] == 0])
        if not new.size:
            return
        with self._lock:
            if not self.active:
                return
            start = self._copied
            for name, live in self._live.items():
                blocks = self._blocks[name]
                done = 0
                while done < new.size:
                    at = start + done
                    b, o = divmod(at, BLOCK_ROWS)
                    if b == len(blocks):
                        blocks.append(np.empty((BLOCK_ROWS, *live.shape[1:]), live.dtype))
                    k = min(new.size - done, BLOCK_ROWS - o)
                    blocks[b][o : o + k] = live[new[done : done + k]]
                    done += k
            self._pos[new] = np.arange(start + 1, start + 1 + new.size)
            self._copied += int(new.size)

    def slices(self, name: str) -> Iterator[np.ndarray]:
        """The snapshot's rows of ``name`` in order, as private arrays of at most
        ``slice_rows`` rows each (the reader's side; any thread). Once the last
        slice is given, ``name`` is copied no more."""
        for lo in range(0, self.n, self.slice_rows):
            hi = min(lo + self.slice_rows, self.n)
            with self._lock:
                if not self.active:
                    raise RuntimeError("the snapshot was closed while it was read")
                out = self._live[name][lo:hi].copy()
                pos = self._pos[lo:hi]
                at = np.flatnonzero(pos)
                if at.size:
                    blocks = self._blocks[name]
                    b, o = np.divmod(pos[at] - 1, BLOCK_ROWS)
                    for blk in np.unique(b).tolist():
                        pick = b == blk
                        out[at[pick]] = blocks[blk][o[pick]]
            yield out
        with self._lock:  # finished: neither kept nor copied any longer
            self._live.pop(name, None)
            self._blocks.pop(name, None)

    def close(self) -> None:
        """End the snapshot: no more copies; its references and copies are dropped."""
        with self._lock:
            self.active = False
            self._live.clear()
            self._blocks.clear()


class Snapshots:
    """The snapshots an owner keeps up to date (usually none, or the one a
    checkpoint in flight reads); closed ones are forgotten."""

    def __init__(self) -> None:
        self._open: list[RowSnapshot] = []

    def add(self, snap: RowSnapshot) -> None:
        self._open = [s for s in self._open if s.active]
        self._open.append(snap)

    def before_write(self, rows: np.ndarray | None) -> None:
        if not self._open:
            return
        self._open = [s for s in self._open if s.active]
        for snap in self._open:
            snap.before_write(rows)

    def __len__(self) -> int:
        return sum(s.active for s in self._open)


class SnapshotArray:
    """One array of a snapshot as a :class:`streamrate.statefile.ArraySource`."""

    def __init__(self, snap: RowSnapshot, name: str) -> None:
        self.snap, self.name = snap, name
        self.shape = snap.shape(name)
        self.dtype = snap.dtype(name)

    def pieces(self) -> Iterator[np.ndarray]:
        return self.snap.slices(self.name)


class JoinedSnapshot(RowSnapshot):
    """Several snapshots read as one, each one's names under its prefix: the rows
    of the members of a model made of models (a mixture, a recalibrated model,
    challengers). Only the reader's side: each member keeps its own part up to
    date (the owners call :meth:`RowSnapshot.before_write` on their parts).

    >>> a = RowSnapshot({"w": np.zeros((2, 1))}, 2)
    >>> b = RowSnapshot({"w": np.ones((3, 1))}, 3)
    >>> j = JoinedSnapshot({"m0.": a, "m1.": b})
    >>> j.names, j.shape("m1.w")
    (['m0.w', 'm1.w'], (3, 1))
    >>> j.close(); a.active, b.active
    (False, False)
    """

    def __init__(self, parts: Mapping[str, RowSnapshot]) -> None:
        self._parts = list(parts.values())
        self._at: dict[str, tuple[RowSnapshot, str]] = {}
        for prefix, part in parts.items():
            for name in part.names:
                self._at[prefix + name] = (part, name)
        self._shapes = {k: p.shape(n) for k, (p, n) in self._at.items()}
        self._dtypes = {k: p.dtype(n) for k, (p, n) in self._at.items()}
        self.n = max((p.n for p in self._parts), default=0)
        self.slice_rows = max((p.slice_rows for p in self._parts), default=SLICE_ROWS)
        self._live, self._blocks = {}, {}
        self._pos = np.zeros(0, dtype=np.int32)
        self._lock = threading.Lock()
        self.active = True
        self._copied = 0

    @property
    def rows_copied(self) -> int:
        return sum(p.rows_copied for p in self._parts)

    def before_write(self, rows: np.ndarray | None) -> None:
        raise TypeError("a joined snapshot is only read: its members keep their own parts")

    def slices(self, name: str) -> Iterator[np.ndarray]:
        part, own = self._at[name]
        return part.slices(own)

    def close(self) -> None:
        self.active = False
        for p in self._parts:
            p.close()


class CopyOnWriteRows(Model):
    """A model whose per-entity state is rows of arrays (:meth:`_entity_rows`),
    saved under the same names and cut to the known entities, and which keeps
    copy-on-write snapshots of them for checkpoints written while it learns.

    The one hook of every such model: each write to rows below the number of
    entities (a kernel's batch, a season pull touching every row) is preceded by
    :meth:`before_write` with those rows (``None``: all of them). Growth that
    moves the rows into a larger array needs no call: the snapshot keeps the
    old array, which nothing writes any more."""

    _snapshots: Snapshots | None = None

    @abstractmethod
    def _entity_rows(self) -> dict[str, np.ndarray]:
        """The live per-entity arrays (at least one row per known entity) by saved name."""

    @abstractmethod
    def _state_arrays(self, rows: bool = True) -> dict[str, np.ndarray]:
        """Learned state as arrays; without the :meth:`_entity_rows` ones when ``rows``
        is false."""

    def _copying(self) -> bool:
        """Whether a snapshot is open (only then are the rows to write worth finding)."""
        return self._snapshots is not None and len(self._snapshots) > 0

    def before_write(self, rows: np.ndarray | None) -> None:
        """``rows`` of the entity arrays are about to be written (see the class)."""
        snaps = self._snapshots
        if snaps is not None:
            snaps.before_write(rows)

    def before_batch(self, b: EncodedBatch) -> None:
        """:meth:`before_write` with the rows of an encoded batch (padding ignored)."""
        if self._copying():
            self.before_write(np.concatenate([b.first.ravel(), b.second.ravel()]))

    def snapshot(self) -> tuple[ModelState, RowSnapshot]:
        """:meth:`~streamrate.models.base.Model.to_state` without copying the
        per-entity rows: those stay in a copy-on-write :class:`RowSnapshot` (a row
        is copied only when the model writes it before the snapshot is read and
        closed). Call under the model's lock."""
        arrays = self._state_arrays(rows=False)
        snap = RowSnapshot(self._entity_rows(), len(self.entities_))
        if self._snapshots is None:
            self._snapshots = Snapshots()
        self._snapshots.add(snap)
        return ModelState(self.kind, self.state_version, self.get_params(), arrays), snap


MemberState = Callable[[Model, str], ModelState]
"""How a model made of models takes a member's state: the member and the prefix
its arrays are saved under (see :class:`MemberSnapshots`)."""


def full_state(model: Model, prefix: str) -> ModelState:
    """A member's whole state (:meth:`~streamrate.models.base.Model.to_state`)."""
    return model.to_state()


class MemberSnapshots:
    """Takes the members' states for a model made of models' :meth:`snapshot`:
    each member that keeps copy-on-write snapshots leaves its rows in one, the
    others are copied as before; :meth:`joined` reads them all as one under the
    members' prefixes. Close it (or the joined snapshot) if the state is not
    used."""

    def __init__(self) -> None:
        self.parts: dict[str, RowSnapshot] = {}

    def state_of(self, model: Model, prefix: str) -> ModelState:
        state, snap = snapshot_state(model)
        if snap is not None:
            self.parts[prefix] = snap
        return state

    def joined(self) -> JoinedSnapshot:
        return JoinedSnapshot(self.parts)

    def close(self) -> None:
        for snap in self.parts.values():
            snap.close()


def snapshot_of_members(
    model: Model, build: Callable[[MemberState], ModelState]
) -> tuple[ModelState, RowSnapshot]:
    """The ``snapshot()`` of a model made of models: ``build`` makes its state taking
    each member's through the given function (as ``to_state`` does with
    :func:`full_state`); the members' snapshots are closed if it fails."""
    members = MemberSnapshots()
    try:
        state = build(members.state_of)
    except BaseException:
        members.close()
        raise
    return state, members.joined()


def snapshot_state(model: Model) -> tuple[ModelState, RowSnapshot | None]:
    """``model``'s state for a checkpoint written while it goes on learning: from a
    model that keeps copy-on-write snapshots (``snapshot()``), the state without
    its per-entity rows plus the snapshot holding them; from any other, its
    :meth:`~streamrate.models.base.Model.to_state` and ``None``. Call under the
    model's lock."""
    take = getattr(model, "snapshot", None)
    if callable(take):
        state, snap = take()
        assert isinstance(state, ModelState) and isinstance(snap, RowSnapshot)
        return state, snap
    state = model.to_state()
    assert isinstance(state, ModelState)
    return state, None
