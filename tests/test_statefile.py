"""State files: exact round trips, and clear failures for files that are not ours."""

from __future__ import annotations

import io
import json
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from streamrate.errors import StateError, StateVersionError
from streamrate.models.base import ModelState
from streamrate.statefile import (
    load_state,
    load_state_with_extra,
    save_state,
    state_from_bytes,
    state_to_bytes,
)

arrays = st.dictionaries(
    st.from_regex(r"[a-z][a-z_]{0,8}", fullmatch=True),
    hnp.arrays(
        dtype=st.sampled_from([np.float64, np.float32, np.int32, np.int64, np.uint8]),
        shape=hnp.array_shapes(min_dims=0, max_dims=2, max_side=5),
    ),
    max_size=4,
)


@given(
    arrays,
    st.dictionaries(
        st.text(max_size=5), st.integers() | st.floats(allow_nan=False, allow_infinity=False)
    ),
)
def test_round_trip_is_exact(arrs: dict[str, np.ndarray], params: dict[str, object]) -> None:
    state = ModelState("demo", 3, params, arrs)
    back, extra = state_from_bytes(state_to_bytes(state, extra={"last_id": "5-0"}))
    assert (back.kind, back.version, back.params) == ("demo", 3, params)
    assert extra == {"last_id": "5-0"}
    assert back.arrays.keys() == arrs.keys()
    for k, v in arrs.items():
        assert back.arrays[k].dtype == v.dtype
        np.testing.assert_array_equal(back.arrays[k], v)  # bit-exact, NaN included


def test_file_round_trip_and_atomic_replace(tmp_path: Path) -> None:
    path = tmp_path / "state.npz"
    save_state(path, ModelState("demo", 1, {}, {"w": np.arange(4.0)}))
    save_state(path, ModelState("demo", 1, {}, {"w": np.arange(5.0)}), extra={"n": 5})
    state, extra = load_state_with_extra(path)
    assert state.arrays["w"].shape == (5,) and extra == {"n": 5}
    assert [p.name for p in tmp_path.iterdir()] == ["state.npz"]  # no temporary left behind


def test_corrupt_and_foreign_files_fail_clearly(tmp_path: Path) -> None:
    good = state_to_bytes(ModelState("demo", 1, {}, {"w": np.zeros(3)}))
    with pytest.raises(StateError, match="not a readable state file"):
        state_from_bytes(good[: len(good) // 2])
    with pytest.raises(StateError, match="not a readable state file"):
        state_from_bytes(b"garbage")
    buf = io.BytesIO()
    np.savez(buf, w=np.zeros(2))
    with pytest.raises(StateError, match="no metadata"):
        state_from_bytes(buf.getvalue())
    with pytest.raises(StateError, match="cannot read"):
        load_state(tmp_path / "missing.npz")


def test_other_format_version_is_refused() -> None:
    data = state_to_bytes(ModelState("demo", 1, {}, {}))
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        meta_npy = zf.read("__meta__.npy")
    meta_arr = np.load(io.BytesIO(meta_npy), allow_pickle=False)
    meta = json.loads(bytes(meta_arr).decode())
    meta["format_version"] = 99
    buf = io.BytesIO()
    np.savez(buf, __meta__=np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8))
    with pytest.raises(StateVersionError, match="version 99"):
        state_from_bytes(buf.getvalue())


def test_object_arrays_are_refused() -> None:
    with pytest.raises(StateError, match="Python objects"):
        state_to_bytes(ModelState("demo", 1, {}, {"o": np.array([{"a": 1}], dtype=object)}))
