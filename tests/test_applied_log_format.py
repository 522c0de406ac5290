"""The applied log's chunk entry: events in one field, the writer's pieces kept."""

from __future__ import annotations

import fakeredis
import pytest
from hypothesis import given
from hypothesis import strategies as st

from streamrate.errors import AppliedLogError
from streamrate.stream.applied_log import AppliedLogWriter, chunk_fields, parse_entry

KEY, EPOCH = "{sr:t}:applied", "{sr:t}:epoch"


def _bytes_fields(fields: dict[str, object]) -> dict[bytes, bytes]:
    """The fields as Redis gives them back."""
    return {k.encode(): v if isinstance(v, bytes) else str(v).encode() for k, v in fields.items()}


@given(
    st.lists(st.binary(max_size=40), min_size=1, max_size=60),
    st.lists(st.integers(1, 7), min_size=1, max_size=60),
)
def test_events_and_pieces_come_back_as_written(raws: list[bytes], cuts: list[int]) -> None:
    parts, left = [], len(raws)
    for c in cuts:
        if left == 0:
            break
        parts.append(min(c, left))
        left -= parts[-1]
    if left:
        parts.append(left)
    ids = [f"{i + 1}-0" for i in range(len(raws))]
    got = parse_entry(b"9-0", _bytes_fields(chunk_fields(2, 5, ids, raws, (1, 2), parts)))
    assert got.events == tuple(raws)
    assert got.ids == tuple(ids)
    assert got.parts == tuple(parts)
    assert [e - s for s, e in got.pieces()] == parts
    assert (got.seq, got.epoch, got.version, got.dead, got.dupes) == (5, 2, ids[-1], 1, 2)


def test_an_entry_of_the_former_format_is_still_read() -> None:
    fields = {b"kind": b"chunk", b"epoch": b"1", b"seq": b"0", b"ids": b"1-0,2-0"}
    fields |= {b"e0": b'{"a": 1}', b"e1": b'{"b": 2}', b"version": b"2-0"}
    got = parse_entry(b"3-0", fields)
    assert got.events == (b'{"a": 1}', b'{"b": 2}')
    assert got.pieces() == [(0, 2)]
    assert got.dead == -1


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({b"sizes": b"3,4"}, "sizes do not match"),
        ({b"sizes": b"3"}, "sizes do not match"),
        ({b"sizes": b"x,2"}, "sizes are not counts"),
        ({b"parts": b"1"}, "parts do not add up"),
        ({b"parts": b"2,0"}, "parts do not add up"),
    ],
)
def test_a_malformed_chunk_is_refused(change: dict[bytes, bytes], message: str) -> None:
    fields = _bytes_fields(chunk_fields(1, 0, ["1-0", "2-0"], [b"abc", b"de"], None, [1, 1]))
    with pytest.raises(AppliedLogError, match=message):
        parse_entry(b"3-0", fields | change)


def test_pieces_of_a_batch_make_one_entry_and_a_promotion_ends_it() -> None:
    r = fakeredis.FakeRedis()
    log = AppliedLogWriter(r, KEY, EPOCH)
    log.start(0, "0-0", "0-0")
    counts = {"3-0": (0, 1), "5-0": (2, 1), "6-0": (2, 2)}
    log.chunk(0, ["1-0", "2-0", "3-0"], [b"a", b"b", b"c"], counts.__getitem__)
    log.chunk(3, ["4-0", "5-0"], [b"d", b"e"], counts.__getitem__)
    log.promote(5, "challenger")
    log.chunk(5, ["6-0"], [b"f"], counts.__getitem__)
    log.flush()
    rows = [parse_entry(sid, f) for sid, f in r.xrange(KEY)]
    assert [(e.kind, e.seq) for e in rows] == [
        ("start", 0),
        ("chunk", 0),
        ("promote", 5),
        ("chunk", 5),
    ]
    assert rows[1].parts == (3, 2) and rows[1].events == (b"a", b"b", b"c", b"d", b"e")
    assert (rows[1].dead, rows[1].dupes) == (2, 1)  # the counters at its last event
    assert rows[3].parts == (1,) and (rows[3].dead, rows[3].dupes) == (2, 2)
