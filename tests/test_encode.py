"""Entity rows and feature hashing."""

from __future__ import annotations

import zlib

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from streamrate.encode import EntityTable, FeatureHasher
from streamrate.errors import StateError


@given(st.lists(st.text(min_size=1, max_size=8).filter(lambda s: "\n" not in s), max_size=60))
def test_rows_are_dense_stable_and_survive_a_round_trip(ids: list[str]) -> None:
    table = EntityTable()
    rows = table.rows(ids)
    first_seen = list(dict.fromkeys(ids))
    assert rows == [first_seen.index(e) for e in ids]
    for r in rows:
        table.counts[r] += 1
    back = EntityTable.from_arrays(table.to_arrays())
    assert back.ids == first_seen
    assert all(back.seen(e) == ids.count(e) for e in first_seen)
    assert back.get("never-seen-id-\x01") == -1 and "never-seen-id-\x01" not in back


def test_inconsistent_saved_table_fails() -> None:
    arrays = EntityTable().to_arrays()
    arrays["entity_counts"] = np.array([1, 2])
    with pytest.raises(StateError, match="inconsistent"):
        EntityTable.from_arrays(arrays)


def test_hashing_is_stable_and_signed() -> None:
    h = FeatureHasher(width=64)
    idx, val = h.encode({"map": "saltflats", "heat": 0.5})
    # The slot is crc32 of the UTF-8 key modulo the width, its sign the top bit:
    # the same in every process (unlike Python's salted hash()).
    c = zlib.crc32(b"map=saltflats")
    assert idx[0] == c % 64 and val[0] == (-1.0 if c & 0x80000000 else 1.0)
    c = zlib.crc32(b"heat")
    assert idx[1] == c % 64 and val[1] == 0.5 * (-1.0 if c & 0x80000000 else 1.0)
    dense = h.dense({"map": "saltflats"})
    assert np.count_nonzero(dense) == 1 and abs(dense.sum()) == 1.0


def test_unseen_categories_need_no_vocabulary() -> None:
    h = FeatureHasher(width=8)
    seen = {int(h.encode({"map": f"new-map-{i}"})[0][0]) for i in range(200)}
    assert seen <= set(range(8)) and len(seen) == 8
