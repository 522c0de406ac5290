"""The batch encoder as it was before the one-pass encoding: the reference the
new one is held to (tests) and the baseline of its speed (bench/bench_models.py)."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from streamrate.batch import _EMPTY_F, _EMPTY_I, _NAN, EncodedBatch, _features, _sparse
from streamrate.encode import EntityTable, FeatureHasher
from streamrate.events import Matchup


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


def reference_encode_events(
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
