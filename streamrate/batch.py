"""Events as arrays: the one encoding every compiled model loop reads.

:func:`encode_events` turns a list of :class:`~streamrate.events.Matchup` /
:class:`~streamrate.events.MatchEvent` into an :class:`EncodedBatch` of plain
numpy arrays. Each side is padded to its widest in the batch with ``-1``;
``first_size`` / ``second_size`` say how many slots of each row are real
members, so a ``-1`` inside the real part means "an entity the table does not
know" (only possible with ``add=False``, i.e. for queries) while a ``-1`` past
the size is padding.

Encoding does not count matches: a model that learns from the batch calls
:func:`count_matches` (the table's counts are "matches learned from").

Entity features (only when a ``features`` hasher is given) are hashed per member
into ``feat_idx`` / ``feat_val`` of shape ``(n, k1 + k2, f)``: members of the
first side come first, then the second side's, in the padded layout (member
``j`` of the second side is at ``k1 + j``). A member whose features were not
given in the event has all ``-1`` indices there; models then fall back to what
they stored for it.

Example:

>>> from datetime import datetime, timezone
>>> from streamrate.encode import EntityTable
>>> from streamrate.events import MatchEvent
>>> ev = MatchEvent(match_id="m-1", finished_at=datetime(2026, 3, 1, tzinfo=timezone.utc),
...                 first=("kestrel",), second=("marlow", "tindra"), score=1.0)
>>> b = encode_events([ev], EntityTable())
>>> b.first.tolist(), b.second.tolist(), b.second_size.tolist(), b.score.tolist()
([[0]], [[1, 2]], [2], [1.0])
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from streamrate.encode import EntityTable, FeatureHasher
from streamrate.events import Matchup

_NAN = math.nan
_EMPTY_I = np.zeros((0, 0, 0), dtype=np.int32)
_EMPTY_F = np.zeros((0, 0, 0), dtype=np.float64)


@dataclass(frozen=True)
class EncodedBatch:
    """A batch of matchups as arrays (see the module docstring for the layout)."""

    first: np.ndarray  # int32 (n, k1) entity rows, -1 = padding or unknown
    second: np.ndarray  # int32 (n, k2)
    score: np.ndarray  # float64 (n,) first side's score 1/0.5/0; NaN for queries
    ctx_idx: np.ndarray  # int32 (n, c) hashed context slots, -1 = padding
    ctx_val: np.ndarray  # float64 (n, c)
    time_s: np.ndarray  # float64 (n,) finish time as unix seconds; NaN for queries
    first_size: np.ndarray  # int32 (n,) real members of the first side
    second_size: np.ndarray  # int32 (n,)
    feat_idx: np.ndarray = field(default_factory=lambda: _EMPTY_I)  # int32 (n, k1+k2, f)
    feat_val: np.ndarray = field(default_factory=lambda: _EMPTY_F)  # float64 (n, k1+k2, f)

    def __len__(self) -> int:
        return int(self.score.shape[0])

    def take(self, sel: slice | np.ndarray) -> EncodedBatch:
        """Rows ``sel`` of every array, as a new batch."""
        has_feat = self.feat_idx.shape[0] == len(self)
        return EncodedBatch(
            self.first[sel],
            self.second[sel],
            self.score[sel],
            self.ctx_idx[sel],
            self.ctx_val[sel],
            self.time_s[sel],
            self.first_size[sel],
            self.second_size[sel],
            self.feat_idx[sel] if has_feat else _EMPTY_I,
            self.feat_val[sel] if has_feat else _EMPTY_F,
        )

    @property
    def has_features(self) -> bool:
        return self.feat_idx.ndim == 3 and self.feat_idx.shape[0] == len(self) > 0


def _rows(
    sides: list[tuple[str, ...]], get: Callable[[str, int], int]
) -> tuple[np.ndarray, np.ndarray, bool]:
    """(rows padded with -1, sizes, whether a real member is unknown).

    ``get(id, -1)`` is the table's dict lookup itself: this runs for every
    entity of every event, so no Python-level wrapper sits in between.
    """
    n = len(sides)
    width = max(map(len, sides), default=1)
    if width == 1:
        out = [get(s[0], -1) for s in sides]
        unknown = -1 in out
        return np.array(out, dtype=np.int32).reshape(n, 1), np.ones(n, dtype=np.int32), unknown
    flat: list[int] = []
    pad = [-1] * width
    sizes = []
    unknown = False
    for s in sides:
        k = len(s)
        sizes.append(k)
        members = [get(e, -1) for e in s]
        if -1 in members:
            unknown = True
        flat.extend(members)
        if k < width:
            flat.extend(pad[k:])
    rows = np.array(flat, dtype=np.int32).reshape(n, width)
    return rows, np.array(sizes, dtype=np.int32), unknown


def _register(events: Sequence[Matchup], table: EntityTable) -> None:
    # Rows are handed out in event order (first side, then second side), exactly
    # as one-event-at-a-time encoding would, so row numbers (and anything seeded
    # by them) do not depend on how a stream was cut into batches.
    row = table.row
    for e in events:
        for x in e.first:
            row(x)
        for x in e.second:
            row(x)


def _sparse(
    maps: Sequence[Mapping[str, str | float]], hasher: FeatureHasher
) -> tuple[np.ndarray, np.ndarray]:
    n = len(maps)
    width = max(map(len, maps), default=0)
    if width == 0:
        return np.full((n, 0), -1, dtype=np.int32), np.zeros((n, 0), dtype=np.float64)
    # Gather (slot, signed value) pairs in one flat list and convert once:
    # element-wise writes into numpy arrays cost more than the hashing.
    encoded = hasher.encoded_items
    pad = (-1, 0.0)
    flat: list[tuple[int, float]] = []
    for m in maps:
        flat.extend(encoded(tuple(m.items())))
        if len(m) < width:
            flat.extend([pad] * (width - len(m)))
    pairs = np.array(flat, dtype=np.float64).reshape(n, width, 2)
    return pairs[:, :, 0].astype(np.int32), np.ascontiguousarray(pairs[:, :, 1])


def _features(
    events: Sequence[Matchup], k1: int, k2: int, hasher: FeatureHasher
) -> tuple[np.ndarray, np.ndarray]:
    n = len(events)
    width = max((len(f) for e in events for f in e.features.values()), default=0)
    idx = np.full((n, k1 + k2, width), -1, dtype=np.int32)
    val = np.zeros((n, k1 + k2, width), dtype=np.float64)
    for i, e in enumerate(events):
        if not e.features:
            continue
        for j, ent in enumerate(e.first):
            fm = e.features.get(ent)
            if fm:
                a, b = hasher.encode(fm)
                idx[i, j, : len(a)], val[i, j, : len(a)] = a, b
        for j, ent in enumerate(e.second):
            fm = e.features.get(ent)
            if fm:
                a, b = hasher.encode(fm)
                idx[i, k1 + j, : len(a)], val[i, k1 + j, : len(a)] = a, b
    return idx, val


def encode_events(
    events: Sequence[Matchup],
    table: EntityTable,
    context: FeatureHasher | None = None,
    features: FeatureHasher | None = None,
    add: bool = True,
) -> EncodedBatch:
    """Encode events (or queries) into arrays.

    ``add=True`` gives new ids a row in ``table``; ``add=False`` leaves the table
    untouched and marks unknown ids with row ``-1`` (inside the side's size).
    """
    n = len(events)
    firsts = [e.first for e in events]
    seconds = [e.second for e in events]
    get = table.lookup
    first, first_size, unknown1 = _rows(firsts, get)
    second, second_size, unknown2 = _rows(seconds, get)
    if add and (unknown1 or unknown2):
        _register(events, table)
        first, first_size, _ = _rows(firsts, get)
        second, second_size, _ = _rows(seconds, get)
    try:  # the common case, all finished matches; a query lacks both fields
        score = np.array([e.score for e in events], dtype=np.float64)  # type: ignore[attr-defined]
        time_s = np.array(
            [e.finished_at.timestamp() for e in events],  # type: ignore[attr-defined]
            dtype=np.float64,
        )
    except AttributeError:
        score = np.array([getattr(e, "score", _NAN) for e in events], dtype=np.float64)
        times = [getattr(e, "finished_at", None) for e in events]
        time_s = np.array([_NAN if t is None else t.timestamp() for t in times], dtype=np.float64)
    if context is not None:
        ctx_idx, ctx_val = _sparse([e.context for e in events], context)
    else:
        ctx_idx = np.full((n, 0), -1, dtype=np.int32)
        ctx_val = np.zeros((n, 0), dtype=np.float64)
    if features is not None:
        feat_idx, feat_val = _features(events, first.shape[1], second.shape[1], features)
    else:
        feat_idx, feat_val = _EMPTY_I, _EMPTY_F
    return EncodedBatch(
        first, second, score, ctx_idx, ctx_val, time_s, first_size, second_size, feat_idx, feat_val
    )


def count_matches(batch: EncodedBatch, table: EntityTable) -> None:
    """Add one match to the count of every known member of every event in ``batch``."""
    for rows in (batch.first, batch.second):
        r = rows[rows >= 0]
        if r.size:
            np.add.at(table.counts, r, 1)


def member_places(batch: EncodedBatch) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The batch's distinct known rows (sorted), and each member's place among them.

    Returns ``(uniq, loc1, loc2)``: ``uniq[loc1[i, j]]`` is ``first[i, j]``; padding
    and unknown members get place -1. Mini-batch updates sum per entity with it.
    """
    rows = np.concatenate([batch.first.ravel(), batch.second.ravel()])
    uniq = np.unique(rows[rows >= 0]).astype(np.int64)
    loc1 = np.where(batch.first >= 0, np.searchsorted(uniq, batch.first), -1).astype(np.int64)
    loc2 = np.where(batch.second >= 0, np.searchsorted(uniq, batch.second), -1).astype(np.int64)
    return uniq, loc1, loc2
