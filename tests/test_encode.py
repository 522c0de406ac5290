"""Entity rows and feature hashing."""

from __future__ import annotations

import zlib
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from encode_reference import reference_encode_events
from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.batch import encode_events
from streamrate.encode import EntityTable, FeatureHasher
from streamrate.errors import StateError
from streamrate.events import MatchEvent, Matchup


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


@given(
    st.lists(st.text(min_size=1, max_size=8).filter(lambda s: "\n" not in s), max_size=30),
    st.lists(st.text(min_size=1, max_size=8).filter(lambda s: "\n" not in s), max_size=30),
)
def test_a_loaded_table_saves_what_a_never_saved_one_would(old: list[str], new: list[str]) -> None:
    # A loaded table keeps the saved bytes and appends only newer ids to them; what
    # it saves must equal a table that saw the same ids without a save between.
    straight = EntityTable()
    straight.rows(old + new)
    loaded = EntityTable.from_arrays(_saved(old))
    loaded.rows(new)
    assert loaded._blob_n == len(set(old))  # nothing joined again on load
    assert np.array_equal(loaded.to_arrays()["entity_ids"], straight.to_arrays()["entity_ids"])


def _saved(ids: list[str]) -> dict[str, np.ndarray]:
    table = EntityTable()
    table.rows(ids)
    return table.to_arrays()


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


# -- batch encoding ------------------------------------------------------------------
_T0 = datetime(2026, 3, 1, tzinfo=UTC)
_NAMES = [f"quill-{i}" for i in range(12)]


@st.composite
def _batches(draw: st.DrawFn) -> tuple[list[Matchup], list[str], bool]:
    """Matches and queries with sides of one to four, some ids already known."""
    out: list[Matchup] = []
    for i in range(draw(st.integers(0, 12))):
        k1, k2 = draw(st.integers(1, 4)), draw(st.integers(1, 4))
        who = draw(st.permutations(_NAMES))[: k1 + k2]
        if draw(st.booleans()):
            out.append(Matchup(first=tuple(who[:k1]), second=tuple(who[k1:])))
        else:
            out.append(
                MatchEvent(
                    match_id=f"m-{i}",
                    finished_at=_T0 + timedelta(minutes=i),
                    first=tuple(who[:k1]),
                    second=tuple(who[k1:]),
                    score=draw(st.sampled_from([0.0, 0.5, 1.0])),
                )
            )
    known = draw(st.lists(st.sampled_from(_NAMES), unique=True))
    return out, known, draw(st.booleans())


@settings(max_examples=300)
@given(case=_batches())
def test_one_pass_encoding_equals_the_former_encoder(
    case: tuple[list[Matchup], list[str], bool],
) -> None:
    events, known, add = case
    tables = (EntityTable(), EntityTable())
    for t in tables:
        t.rows(known)
    got = encode_events(events, tables[0], add=add)
    want = reference_encode_events(events, tables[1], add=add)
    for name in ("first", "second", "first_size", "second_size", "score", "time_s"):
        a, b = getattr(got, name), getattr(want, name)
        assert a.dtype == b.dtype and a.shape == b.shape, name
        assert np.array_equal(a, b, equal_nan=True), name
    # New ids were handed the same rows, in event order.
    assert tables[0].ids == tables[1].ids


context_maps = st.lists(
    st.dictionaries(
        st.sampled_from(["map", "mode", "patch", "region", "heat"]),
        st.one_of(st.sampled_from(["saltflats", "glasswood", "duel", "1.4"]), st.floats(-5, 5)),
        max_size=5,
    ),
    max_size=12,
)


@settings(max_examples=200)
@given(st.lists(context_maps, min_size=1, max_size=5), st.integers(1, 64))
def test_contexts_of_categories_from_the_table_equal_the_pair_by_pair_path(
    batches: list[list[dict[str, str | float]]], width: int
) -> None:
    """The hasher's table of category maps (a batch = two fancy indexings) gives the
    same slots and signed values as hashing each pair, batch after batch."""
    from streamrate.batch import _sparse

    fast, slow = FeatureHasher(width), FeatureHasher(width)
    slow.category_rows = lambda maps, w: None  # type: ignore[method-assign]
    for maps in batches:
        a, b = _sparse(maps, fast), _sparse(maps, slow)
        for x, y in zip(a, b, strict=True):
            assert x.dtype == y.dtype and x.shape == y.shape
            np.testing.assert_array_equal(x, y)
