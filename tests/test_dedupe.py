"""The retry record as arrays: held to the former ordered-dict record, operation by
operation, for any sequence of single and batch additions."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamrate.dedupe import DIGEST_BYTES, SeenIds
from streamrate.errors import StateError
from tests.dedupe_reference import ReferenceSeenIds

ID = st.integers(0, 40).map(lambda i: f"m-{i}")
TIME = st.floats(0, 1e4)
DIGEST = st.binary(min_size=DIGEST_BYTES, max_size=DIGEST_BYTES)
ONE = st.tuples(ID, TIME, DIGEST)
OPS = st.lists(st.one_of(ONE, st.lists(ONE, max_size=12)), max_size=60)


def _same(a: SeenIds, ref: ReferenceSeenIds) -> None:
    assert a.ids() == ref.ids() and len(a) == len(ref)
    for i in range(41):
        mid = f"m-{i}"
        assert (mid in a) == (mid in ref)
        assert a.digest(mid) == ref.digest(mid)
    got, want = a.to_arrays(), ref.to_arrays()
    assert set(got) == set(want)
    for name in want:
        np.testing.assert_array_equal(got[name], want[name])
        assert got[name].dtype == want[name].dtype


@settings(max_examples=400)
@given(ops=OPS, keep=st.integers(0, 25), window=st.floats(0, 5e3))
def test_the_array_record_equals_the_ordered_dict_record(
    ops: list[object], keep: int, window: float
) -> None:
    a, ref = SeenIds(keep, window), ReferenceSeenIds(keep, window)
    for op in ops:
        if isinstance(op, tuple):
            mid, t, d = op
            a.add(mid, t, d)
            ref.add(mid, t, d)
        else:
            assert isinstance(op, list)
            a.add_many([m for m, _, _ in op], [t for _, t, _ in op], b"".join(d for *_, d in op))
            for mid, t, d in op:
                ref.add(mid, t, d)
        _same(a, ref)
        assert len(a) <= keep
    back = SeenIds.from_arrays(keep, window, a.to_arrays())
    _same(back, ref)


def test_a_long_run_compacts_its_arrays_and_stays_bounded() -> None:
    a, ref = SeenIds(1000, 50.0), ReferenceSeenIds(1000, 50.0)
    for k in range(30):
        ids = [f"b{k}-{i}" for i in range(500)]
        times = [k * 2.0 + i / 1000 for i in range(500)]
        digests = b"".join(i.to_bytes(8, "big") for i in range(500))
        a.add_many(ids, times, digests)
        for mid, t, i in zip(ids, times, range(500), strict=True):
            ref.add(mid, t, i.to_bytes(8, "big"))
        a.add(f"b{k}-3", times[-1] + 0.5, b"x" * 8)  # an id arriving again
        ref.add(f"b{k}-3", times[-1] + 0.5, b"x" * 8)
    _same(a, ref)
    assert len(a._ids) < 3 * 1000  # dropped arrivals are forgotten, not only skipped
    assert a.known(["b29-7", "nope"]) and not a.known(["b0-7", "nope"])


def test_a_record_with_an_empty_id_is_refused() -> None:
    arrays = SeenIds(10, 10).to_arrays()
    arrays = {
        "ids": np.frombuffer(b"m-1\n", dtype=np.uint8),
        "received_s": np.zeros(2),
        "digest": np.zeros(16, dtype=np.uint8),
    }
    with pytest.raises(StateError, match="empty id"):
        SeenIds.from_arrays(10, 10, arrays)


def test_one_time_and_one_digest_per_id() -> None:
    with pytest.raises(ValueError, match="one received time"):
        SeenIds(10, 10).add_many(["a", "b"], [1.0], bytes(16))
