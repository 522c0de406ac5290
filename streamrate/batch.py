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
...                 first=("kelvash",), second=("morvenn", "tuvrenn"), score=1.0)
>>> b = encode_events([ev], EntityTable())
>>> b.first.tolist(), b.second.tolist(), b.second_size.tolist(), b.score.tolist()
([[0]], [[1, 2]], [2], [1.0])
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from itertools import chain, repeat
from operator import add as add_tuples
from operator import attrgetter, itemgetter

import numpy as np

from streamrate.columns import EventColumns
from streamrate.encode import Encoded, EntityTable, FeatureHasher, RunningScale
from streamrate.events import MatchEvent, Matchup
from streamrate.scan import context_items, context_of

_NAN = math.nan
_FIRST, _SECOND = attrgetter("first"), attrgetter("second")
_SCORE, _FINISHED = attrgetter("score"), attrgetter("finished_at")
_ONLY = itemgetter(0)
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


def _members(
    firsts: Sequence[tuple[str, ...]],
    seconds: Sequence[tuple[str, ...]],
    table: EntityTable,
    add: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(first rows, first sizes, second rows, second sizes) of a batch, in one pass.

    Ids are looked up by ``map`` over the table's own dict lookup (no Python
    loop per event); with teams, all member ids of the batch form one
    flat list in event order (first side, then second side) and numpy lays them
    out padded. New ids get rows in that order, exactly as one-event-at-a-time
    encoding would hand them out, so row numbers (and anything seeded by them)
    do not depend on how a stream was cut into batches.
    """
    n = len(firsts)
    get = table.lookup
    if max(map(len, firsts), default=1) == 1 == max(map(len, seconds), default=1):
        # one against one: no sizes to read, no padding to lay out
        # list, then array: np.fromiter converts int by int, slower than np.array
        rows1 = np.array(list(map(get, map(_ONLY, firsts), repeat(-1))), dtype=np.int32)
        rows2 = np.array(list(map(get, map(_ONLY, seconds), repeat(-1))), dtype=np.int32)
        if add and n and min(rows1.min(), rows2.min()) < 0:
            row = table.row
            for i in np.flatnonzero((rows1 < 0) | (rows2 < 0)).tolist():
                rows1[i] = row(firsts[i][0])
                rows2[i] = row(seconds[i][0])
        ones = np.ones(n, dtype=np.int32)
        return rows1.reshape(n, 1), ones, rows2.reshape(n, 1), ones.copy()
    size1 = np.fromiter(map(len, firsts), dtype=np.int32, count=n)
    size2 = np.fromiter(map(len, seconds), dtype=np.int32, count=n)
    ids = list(chain.from_iterable(map(add_tuples, firsts, seconds)))
    rows = np.array(list(map(get, ids, repeat(-1))), dtype=np.int32)
    if add:
        row = table.row
        for k in np.flatnonzero(rows < 0).tolist():
            rows[k] = row(ids[k])
    w1, w2 = int(size1.max()), int(size2.max())
    start = np.cumsum(size1 + size2, dtype=np.int64) - (size1 + size2)
    pad = len(ids)
    rows = np.append(rows, np.int32(-1))  # the padding value, at index ``pad``
    cols1, cols2 = np.arange(w1), np.arange(w2)
    at1 = np.where(cols1 < size1[:, None], start[:, None] + cols1, pad)
    at2 = np.where(cols2 < size2[:, None], (start + size1)[:, None] + cols2, pad)
    return rows[at1], size1, rows[at2], size2


def scaled_items(hit: Encoded, scale: RunningScale | None) -> list[tuple[int, float]]:
    """The (slot, value) pairs of one mapping, its numbers as standard scores from
    ``scale`` (which this does not change) or, without one, raw."""
    pairs, numbers = hit
    if not numbers:
        return pairs
    out = list(pairs)
    for pos, name, v in numbers:
        slot, sign = out[pos]
        z = float(v) if scale is None else scale.score(name, v)
        out[pos] = (slot, sign * z)
    return out


def add_numbers(hits: Sequence[Encoded], scale: RunningScale | None) -> None:
    """Add the numbers of one event's mappings to the running statistics: after all
    of them are scored, so every number of an event is scored alike, and a model's
    prediction while it learns is the one it gave before."""
    if scale is not None:
        for _, numbers in hits:
            for _, name, v in numbers:
                scale.add(name, v)


def _sparse(
    maps: Sequence[Mapping[str, str | float]],
    hasher: FeatureHasher,
    scale: RunningScale | None = None,
    learn: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    n = len(maps)
    width = max(map(len, maps), default=0)
    if width == 0:
        return np.full((n, 0), -1, dtype=np.int32), np.zeros((n, 0), dtype=np.float64)
    got = hasher.category_rows(maps, width)
    if got is not None:  # categories only: rows of the hasher's tables, no scaling
        return got
    # Gather (slot, signed value) pairs in one flat list and convert once:
    # element-wise writes into numpy arrays cost more than the hashing.
    encoded = hasher.encoded_items
    pad = (-1, 0.0)
    flat: list[tuple[int, float]] = []
    for m in maps:
        hit = encoded(tuple(m.items()))
        if hit[1]:
            flat.extend(scaled_items(hit, scale))
            if learn:
                add_numbers((hit,), scale)
        else:
            flat.extend(hit[0])
        if len(m) < width:
            flat.extend([pad] * (width - len(m)))
    pairs = np.array(flat, dtype=np.float64).reshape(n, width, 2)
    return pairs[:, :, 0].astype(np.int32), np.ascontiguousarray(pairs[:, :, 1])


def _features(
    events: Sequence[Matchup],
    k1: int,
    k2: int,
    hasher: FeatureHasher,
    scale: RunningScale | None = None,
    learn: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    n = len(events)
    width = max((len(f) for e in events for f in e.features.values()), default=0)
    idx = np.full((n, k1 + k2, width), -1, dtype=np.int32)
    val = np.zeros((n, k1 + k2, width), dtype=np.float64)
    for i, e in enumerate(events):
        if not e.features:
            continue
        hits = []
        for off, side in ((0, e.first), (k1, e.second)):
            for j, ent in enumerate(side):
                fm = e.features.get(ent)
                if fm:
                    hit = hasher.encoded_items(tuple(fm.items()))
                    hits.append(hit)
                    for f, (slot, v) in enumerate(scaled_items(hit, scale)):
                        idx[i, off + j, f], val[i, off + j, f] = slot, v
        if learn:
            add_numbers(hits, scale)
    return idx, val


def encode_events(
    events: Sequence[Matchup],
    table: EntityTable,
    context: FeatureHasher | None = None,
    features: FeatureHasher | None = None,
    add: bool = True,
    context_scale: RunningScale | None = None,
    feature_scale: RunningScale | None = None,
) -> EncodedBatch:
    """Encode events (or queries) into arrays.

    ``add=True`` gives new ids a row in ``table``; ``add=False`` leaves the table
    untouched and marks unknown ids with row ``-1`` (inside the side's size).

    With a ``context_scale`` / ``feature_scale``, numbers of the context / of the
    entity features enter as standard scores; ``add=True`` (events to learn
    from) first adds each number to its field's statistics, event by event in
    order, so a batch is encoded exactly as its events one at a time would be.
    """
    if isinstance(events, EventColumns):
        return _encode_columns(events, table, context, features, add)
    n = len(events)
    firsts, seconds = list(map(_FIRST, events)), list(map(_SECOND, events))
    first, first_size, second, second_size = _members(firsts, seconds, table, add)
    try:  # the common case, all finished matches; a query lacks both fields
        score = np.fromiter(map(_SCORE, events), dtype=np.float64, count=n)
        time_s = np.fromiter(
            map(datetime.timestamp, map(_FINISHED, events)), dtype=np.float64, count=n
        )
    except AttributeError:
        if not any(isinstance(e, MatchEvent) for e in events):  # queries only (a lobby)
            score, time_s = np.full(n, _NAN), np.full(n, _NAN)
        else:
            score = np.array([getattr(e, "score", _NAN) for e in events], dtype=np.float64)
            times = [getattr(e, "finished_at", None) for e in events]
            time_s = np.array(
                [_NAN if t is None else t.timestamp() for t in times], dtype=np.float64
            )
    if context is not None:
        ctx_idx, ctx_val = _sparse([e.context for e in events], context, context_scale, add)
    else:
        ctx_idx = np.full((n, 0), -1, dtype=np.int32)
        ctx_val = np.zeros((n, 0), dtype=np.float64)
    if features is not None:
        feat_idx, feat_val = _features(
            events, first.shape[1], second.shape[1], features, feature_scale, add
        )
    else:
        feat_idx, feat_val = _EMPTY_I, _EMPTY_F
    return EncodedBatch(
        first, second, score, ctx_idx, ctx_val, time_s, first_size, second_size, feat_idx, feat_val
    )


def _encode_columns(
    cols: EventColumns,
    table: EntityTable,
    context: FeatureHasher | None,
    features: FeatureHasher | None,
    add: bool,
) -> EncodedBatch:
    """:func:`encode_events` of events held as columns: the same arrays, read from
    the columns (their contexts are categories only and they carry no features, so
    there is nothing to scale)."""
    n = len(cols)
    first, first_size, second, second_size = _members(cols.firsts, cols.seconds, table, add)
    if context is not None:
        got = context.key_rows(cols.context_keys, context_items)
        if got is None:  # the hasher's table is full: mapping by mapping
            maps = list(map(context_of, cols.context_keys))
            got = _sparse(maps, context, None, add)
        ctx_idx, ctx_val = got
    else:
        ctx_idx = np.full((n, 0), -1, dtype=np.int32)
        ctx_val = np.zeros((n, 0), dtype=np.float64)
    if features is not None:  # no event of the columns gives features
        k = first.shape[1] + second.shape[1]
        feat_idx = np.full((n, k, 0), -1, dtype=np.int32)
        feat_val = np.zeros((n, k, 0), dtype=np.float64)
    else:
        feat_idx, feat_val = _EMPTY_I, _EMPTY_F
    return EncodedBatch(
        first, second, np.array(cols.scores, dtype=np.float64), ctx_idx, ctx_val,
        np.array(cols.times, dtype=np.float64), first_size, second_size, feat_idx, feat_val,
    )  # fmt: skip


def count_matches(batch: EncodedBatch, table: EntityTable) -> None:
    """Add one match to the count of every known member of every event in ``batch``."""
    for rows in (batch.first, batch.second):
        r = rows[rows >= 0]
        if r.size:
            np.add.at(table.counts, r, 1)


def has_unknown(batch: EncodedBatch) -> bool:
    """Whether a real member of some event has no row (``add=False`` encoding)."""
    for rows, sizes in ((batch.first, batch.first_size), (batch.second, batch.second_size)):
        if rows.shape[1] == 1:
            if rows.size and rows.min() < 0:
                return True
        elif np.any((rows < 0) & (np.arange(rows.shape[1]) < sizes[:, None])):
            return True
    return False
