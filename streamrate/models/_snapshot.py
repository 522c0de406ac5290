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

The owner's duties (the hook, :class:`MatchupModel`): every write to a row
below ``n`` of a snapshot array calls :meth:`before_write` first (``None``
for "every row"); an array replaced by a larger one (growth) may stay in the
snapshot as it is, since the owner no longer writes it; :meth:`close` (by the
reader, when done or failed) ends the copying.

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
from collections.abc import Iterator, Mapping

import numpy as np

from streamrate.models.base import Model, ModelState

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
        self.rows_copied = 0
        """Rows copied for the owner's writes so far (for tests and benchmarks)."""

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
            start = self.rows_copied
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
            self.rows_copied += int(new.size)

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
