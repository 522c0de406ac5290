"""A checkpoint is untrusted input: sizes before allocation, finite values, well-formed ids."""

from __future__ import annotations

import io
import json
import struct
import tracemalloc
import zipfile
from pathlib import Path
from typing import Any

import fakeredis
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from streamrate.checkpoint import (
    Checkpoint,
    FileCheckpointStore,
    decode_checkpoint,
    encode_checkpoint,
)
from streamrate.config import Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.dedupe import SeenIds
from streamrate.errors import CheckpointError, CheckpointRefusedError
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import ModelState
from streamrate.models.registry import build_model
from streamrate.simulate import simulate, world_spec

EVENTS = simulate(world_spec("plain", matches=60, entities=8, seed=4)).events


def _good(kind: str = "elo", **model: Any) -> Checkpoint:
    m = build_model(kind, **model)
    m.learn_many(EVENTS)
    seen = SeenIds(100, 3600)
    seen.add("m-1", 1.0e9, b"abcdefgh")
    return Checkpoint(m.to_state(), "1780000000000-3", len(EVENTS), seen, {"applied": 60})


def _with(ck: Checkpoint, **arrays: np.ndarray) -> bytes:
    st_ = ck.state
    state = ModelState(st_.kind, st_.version, st_.params, {**st_.arrays, **arrays})
    return encode_checkpoint(Checkpoint(state, ck.last_id, ck.applied, ck.seen, ck.counters))


def _meta_of(blob: bytes) -> dict[str, Any]:
    with zipfile.ZipFile(io.BytesIO(blob)) as zf:
        arr = np.load(io.BytesIO(zf.read("__meta__.npy")), allow_pickle=False)
    return dict(json.loads(bytes(arr).decode()))


def _rezip(blob: bytes, meta: dict[str, Any] | None = None, **members: bytes) -> bytes:
    """Copy a checkpoint's members, replacing metadata or raw .npy members."""
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(blob)) as src, zipfile.ZipFile(out, "w") as dst:
        for info in src.infolist():
            name = info.filename.removesuffix(".npy")
            if name == "__meta__" and meta is not None:
                buf = io.BytesIO()
                text = json.dumps(meta, allow_nan=True).encode()
                np.save(buf, np.frombuffer(text, dtype=np.uint8))
                dst.writestr(info.filename, buf.getvalue())
            elif name in members:
                dst.writestr(info.filename, members.pop(name))
            else:
                dst.writestr(info.filename, src.read(info.filename))
        for name, raw in members.items():
            dst.writestr(name + ".npy", raw, compress_type=zipfile.ZIP_DEFLATED)
    return out.getvalue()


def _refused(blob: bytes, match: str) -> None:
    with pytest.raises(CheckpointError, match=match):
        decode_checkpoint(blob, 100, 3600, source="ck.npz")


GOOD_BLOB = encode_checkpoint(_good())


def test_a_good_checkpoint_round_trips() -> None:
    ck = decode_checkpoint(encode_checkpoint(_good()), 100, 3600)
    assert ck.last_id == "1780000000000-3" and ck.seen.digest("m-1") == b"abcdefgh"


def _with_zeros_member(
    blob: bytes, name: str, rows: int, zeros_bytes: int, zip64: bool = True
) -> bytes:
    """``blob`` plus a deflated member: a .npy header for ``rows`` float64s, then zeros."""
    header = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        header, {"descr": "<f8", "fortran_order": False, "shape": (rows,)}
    )
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(blob)) as src, zipfile.ZipFile(out, "w") as dst:
        for info in src.infolist():
            dst.writestr(info.filename, src.read(info.filename))
        member = zipfile.ZipInfo(f"{name}.npy")
        member.compress_type = zipfile.ZIP_DEFLATED
        with dst.open(member, "w", force_zip64=zip64) as fh:
            fh.write(header.getvalue())
            zero = bytes(1 << 20)
            for _ in range(zeros_bytes >> 20):
                fh.write(zero)
    return out.getvalue()


def test_a_compression_bomb_is_refused_before_decompressing_in_bounded_memory() -> None:
    expanded = 256 << 20  # 256 MiB of zeros, about 250 KiB compressed
    blob = _with_zeros_member(encode_checkpoint(_good()), "bomb", expanded // 8, expanded)
    assert len(blob) < expanded // 100
    tracemalloc.start()
    try:
        _refused(blob, r"ck\.npz refused: .*declare \d+ bytes uncompressed")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 16 << 20  # bounded: far below the 256 MiB the member would expand to


def test_a_member_that_expands_past_its_declared_size_is_refused_in_bounded_memory() -> None:
    # The sizes in both zip headers are rewritten to 800 bytes; the data gives 64 MiB.
    raw = bytearray(
        _with_zeros_member(encode_checkpoint(_good()), "liar", 84, 64 << 20, zip64=False)
    )
    declared = 128 + 8 * 84  # .npy header (128 bytes) + 84 float64s
    at = raw.find(b"liar.npy")
    while at >= 0:
        if raw[at - 30 : at - 26] == b"PK\x03\x04":  # local header: size at 22
            struct.pack_into("<I", raw, at - 30 + 22, declared)
        if raw[at - 46 : at - 42] == b"PK\x01\x02":  # central directory: size at 24
            struct.pack_into("<I", raw, at - 46 + 24, declared)
        at = raw.find(b"liar.npy", at + 1)
    blob = bytes(raw)
    tracemalloc.start()
    try:
        _refused(blob, r"ck\.npz refused: .*liar")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 16 << 20


def test_a_header_declaring_terabytes_is_refused_without_allocating() -> None:
    header = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        header, {"descr": "<f8", "fortran_order": False, "shape": (1 << 40,)}
    )
    blob = _rezip(encode_checkpoint(_good()), ratings=header.getvalue() + bytes(64))
    _refused(blob, r"ck\.npz refused: .*'ratings'.*header declares 1099511627776 x 8 bytes")


def test_object_arrays_are_refused() -> None:
    buf = io.BytesIO()
    np.save(buf, np.array([{"a": 1}], dtype=object), allow_pickle=True)
    _refused(_rezip(encode_checkpoint(_good()), ratings=buf.getvalue()), "plain number type")


def test_non_finite_parameters_are_refused() -> None:
    ck = _good()
    nan = np.full_like(ck.state.arrays["ratings"], np.nan)
    _refused(_with(ck, ratings=nan), r"array 'ratings' holds 8 non-finite values")
    inf_time = _good("glicko2")
    last = inf_time.state.arrays["last_s"].copy()
    last[0] = np.inf
    _refused(_with(inf_time, last_s=last), "'last_s' holds 1 non-finite")
    # NaN in a time array means "never" and is allowed.
    never = np.full_like(last, np.nan)
    assert decode_checkpoint(_with(inf_time, last_s=never), 100, 3600).state.kind == "glicko2"


def test_a_non_finite_learned_advantage_is_refused() -> None:
    # Glicko-2's learned first-side advantage is one number, checked as the rows are.
    ck = _good("glicko2")
    assert ck.state.arrays["advantage"].shape == (1,)
    _refused(_with(ck, advantage=np.array([np.inf])), "'advantage' holds 1 non-finite")
    _refused(_with(ck, advantage=np.array([np.nan])), "'advantage' holds 1 non-finite")


def test_nan_or_infinity_in_settings_is_refused() -> None:
    blob = encode_checkpoint(_good())
    meta = _meta_of(blob)
    meta["params"]["k"] = float("nan")
    _refused(_rezip(blob, meta), "NaN is not a finite number")


def test_settings_that_size_an_allocation_are_bounded() -> None:
    blob = encode_checkpoint(_good("blade_chest", dims=2, backend="numpy"))
    meta = _meta_of(blob)
    meta["params"]["dims"] = 10**8
    _refused(_rezip(blob, meta), r"settings\.dims = 100000000 is outside 0\.\.1024")


@pytest.mark.parametrize(
    "last_id", ["", "garbage", "12", "1-2-3", "-1-0", "1e3-0", 7, "99999999999999999999-0"]
)
def test_last_id_must_be_a_stream_id(last_id: Any) -> None:
    blob = encode_checkpoint(_good())
    meta = _meta_of(blob)
    meta["extra"]["last_id"] = last_id
    _refused(_rezip(blob, meta), "last_id .* is not a stream id")


@pytest.mark.parametrize(
    "ids", [b"kelvash\nmar low", b"kelvash\n", b"kelvash\nkelvash", b"\xff\xfe", b"a\xe2\x80\x8bb"]
)
def test_entity_ids_must_be_well_formed(ids: bytes) -> None:
    ck = _good()
    n = len(ids.split(b"\n"))
    arrays = {"entity_ids": np.frombuffer(ids, dtype=np.uint8).copy()}
    arrays["entity_counts"] = np.ones(n, dtype=np.int32)
    arrays["ratings"] = np.zeros(n)
    _refused(_with(ck, **arrays), "entity_ids")


@settings(max_examples=200)
@given(st.data())
def test_any_corruption_is_decoded_or_refused_with_one_checkpoint_error(
    data: st.DataObject,
) -> None:
    blob = bytearray(GOOD_BLOB)
    for _ in range(data.draw(st.integers(1, 8))):
        at = data.draw(st.integers(0, len(blob) - 1))
        blob[at] = data.draw(st.integers(0, 255))
    cut = data.draw(st.integers(len(blob) // 2, len(blob)))
    try:
        ck = decode_checkpoint(bytes(blob[:cut]), 100, 3600, source="ck.npz")
    except CheckpointError as exc:
        assert str(exc).startswith("checkpoint ck.npz refused: ")
        return
    for arr in ck.state.arrays.values():
        if arr.dtype.kind == "f":
            assert not np.isinf(arr).any()


def test_the_consumer_names_the_file_and_leftover_temporaries_are_removed(tmp_path: Path) -> None:
    space = SpaceSettings(name="duel", model="elo", model_settings={"compiled": False})
    keys = Settings(spaces=(space,)).keys(space)
    store = FileCheckpointStore(tmp_path, "duel")
    ck = _good()
    nan = np.full_like(ck.state.arrays["ratings"], np.nan)
    store.save(_with(ck, ratings=nan))
    leftover = tmp_path / ".duel.ckpt.npz.k2j4h1.tmp"  # what a crash mid-write leaves
    leftover.write_bytes(b"half a checkpoint")
    c = Consumer(
        fakeredis.FakeRedis(),
        space,
        keys,
        store,
        ServiceMetrics(CollectorRegistry(), ["duel"]),
        lambda: build_model("elo", compiled=False),
    )
    # The service refuses to start (CheckpointRefusedError, one line with the ways
    # out); its cause is the loader's CheckpointError naming the file and the problem.
    with pytest.raises(CheckpointRefusedError) as err:
        c.load_checkpoint()
    cause = err.value.__cause__
    assert isinstance(cause, CheckpointError)
    assert str(cause).startswith(f"checkpoint {tmp_path / 'duel.ckpt.npz'} refused: ")
    assert "non-finite" in str(err.value)
    assert not leftover.exists()
