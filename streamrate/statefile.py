"""Saving and loading model state without pickle.

A state file is a NumPy ``.npz`` archive: one entry per array of the model, plus
``__meta__``, a UTF-8 JSON document (as a uint8 array) with the format name, the
format version, the model kind, its state version and its settings. Files are
read with ``allow_pickle=False``, so a file can carry numbers and nothing that
executes. Writes go to a temporary file in the same directory, are fsynced and
then renamed over the target, so a reader never sees half a file.

>>> import tempfile, pathlib
>>> from streamrate.models.base import ModelState
>>> import numpy as np
>>> p = pathlib.Path(tempfile.mkdtemp()) / "m.npz"
>>> save_state(p, ModelState("demo", 1, {"k": 2}, {"w": np.arange(3.0)}))
>>> load_state(p).arrays["w"]
array([0., 1., 2.])
"""

from __future__ import annotations

import io
import json
import math
import os
import tempfile
import zipfile
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import IO, Any, Protocol

import numpy as np

from streamrate.errors import StateError, StateVersionError
from streamrate.models.base import ModelState

FORMAT_NAME = "streamrate-state"
FORMAT_VERSION = 1
_META = "__meta__"


class ArraySource(Protocol):
    """An array written piece by piece (a copy-on-write snapshot's rows): its shape
    and type, then its rows in order as C-contiguous pieces."""

    @property
    def shape(self) -> tuple[int, ...]: ...

    @property
    def dtype(self) -> np.dtype[Any]: ...

    def pieces(self) -> Iterable[np.ndarray]: ...


def _meta_bytes(state: ModelState, extra: dict[str, Any] | None, names: Iterable[str]) -> bytes:
    meta = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "kind": state.kind,
        "version": state.version,
        "params": state.params,
        "extra": extra or {},
    }
    for name in names:
        if name == _META:
            raise StateError(f"array name {_META!r} is reserved")
    for name, arr in state.arrays.items():
        if np.asarray(arr).dtype == object:
            raise StateError(f"array {name!r} holds Python objects; only numbers are saved")
    try:
        meta_text = json.dumps(meta, sort_keys=True, allow_nan=False)
    except ValueError as exc:  # NaN or infinity in settings or metadata: not readable back
        raise StateError(f"state metadata must hold finite numbers only: {exc}") from exc
    return meta_text.encode("utf-8")


def write_state(
    fh: IO[bytes],
    state: ModelState,
    extra: dict[str, Any] | None = None,
    sources: Mapping[str, ArraySource] | None = None,
) -> None:
    """Write a state as an npz archive (stored, not compressed, as ``np.savez``)
    to ``fh``; the arrays of ``sources`` are written piece by piece, so they are
    never whole in memory. What :func:`state_from_bytes` reads back."""
    sources = sources or {}
    both = [*state.arrays, *sources]
    if len(set(both)) != len(both):
        raise StateError("an array is named twice")
    meta = np.frombuffer(_meta_bytes(state, extra, both), dtype=np.uint8)
    with zipfile.ZipFile(fh, mode="w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
        for name, arr in {_META: meta, **state.arrays}.items():
            with zf.open(name + ".npy", "w", force_zip64=True) as out:
                np.lib.format.write_array(out, np.asanyarray(arr), allow_pickle=False)
        for name, src in sources.items():
            dtype = np.dtype(src.dtype)
            if dtype.kind not in _NUMBER_KINDS:
                raise StateError(f"array {name!r} is of type {dtype}; only numbers are saved")
            header = {
                "descr": np.lib.format.dtype_to_descr(dtype),
                "fortran_order": False,
                "shape": tuple(src.shape),
            }
            want = math.prod(src.shape) * dtype.itemsize
            got = 0
            with zf.open(name + ".npy", "w", force_zip64=True) as out:
                np.lib.format.write_array_header_2_0(out, header)
                for piece in src.pieces():
                    if piece.dtype != dtype:
                        raise StateError(f"array {name!r}: a piece of type {piece.dtype}")
                    data = np.ascontiguousarray(piece)
                    out.write(data.data.cast("B"))
                    got += data.nbytes
            if got != want:
                raise StateError(f"array {name!r}: {got} bytes written, its shape needs {want}")


def state_to_bytes(
    state: ModelState,
    extra: dict[str, Any] | None = None,
    sources: Mapping[str, ArraySource] | None = None,
) -> bytes:
    """Encode a state (and optional JSON-able ``extra`` metadata) as npz bytes."""
    buf = io.BytesIO()
    write_state(buf, state, extra, sources)
    return buf.getvalue()


MAX_MEMBERS = 4096
"""Most arrays one state file may hold."""
MAX_EXPANSION = 4
"""Uncompressed bytes allowed per byte of file (``np.savez`` stores, so ours are about 1)."""
EXPANSION_SLACK_BYTES = 1 << 20
HARD_LIMIT_BYTES = 64 << 30
"""No state file expands to more than this, whatever its size."""
MAX_ARRAY_DIMS = 8
_CHUNK_BYTES = 1 << 20
_NUMBER_KINDS = "biuf"


def uncompressed_cap(file_bytes: int) -> int:
    """Most uncompressed bytes a state file of ``file_bytes`` may declare in all."""
    return min(HARD_LIMIT_BYTES, MAX_EXPANSION * file_bytes + EXPANSION_SLACK_BYTES)


def _refuse_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a finite number")


def state_from_bytes(data: bytes) -> tuple[ModelState, dict[str, Any]]:
    """Decode npz bytes into (state, extra metadata); :class:`StateError` if unusable.

    The bytes are untrusted: every size is checked before anything is allocated
    or decompressed (:func:`read_npz`), and the metadata may not hold NaN or
    infinity.
    """
    arrays = read_npz(data)
    raw_meta = arrays.pop(_META, None)
    if raw_meta is None:
        raise StateError("not a streamrate state file: no metadata entry")
    try:
        text = bytes(raw_meta.astype(np.uint8)).decode("utf-8")
        meta = json.loads(text, parse_constant=_refuse_constant)
    except (UnicodeDecodeError, ValueError) as exc:
        raise StateError(f"state metadata is corrupt: {exc}") from exc
    if not isinstance(meta, dict) or meta.get("format") != FORMAT_NAME:
        raise StateError("not a streamrate state file: wrong format name")
    if meta.get("format_version") != FORMAT_VERSION:
        raise StateVersionError(
            f"state file format version {meta.get('format_version')!r}; "
            f"this code reads version {FORMAT_VERSION}"
        )
    try:
        state = ModelState(str(meta["kind"]), int(meta["version"]), dict(meta["params"]), arrays)
    except (KeyError, TypeError, ValueError) as exc:
        raise StateError(f"state metadata is incomplete: {exc}") from exc
    return state, dict(meta.get("extra") or {})


def read_npz(data: bytes) -> dict[str, np.ndarray]:
    """The arrays of an npz archive, read as untrusted input.

    Before anything is decompressed: at most :data:`MAX_MEMBERS` members, each
    member's stored bytes inside the file, and the declared uncompressed sizes
    together within :func:`uncompressed_cap` of the file size. Each member is then
    streamed into an array allocated from its ``.npy`` header, which must be a
    plain number type whose size matches the member's declared size exactly; the
    zip reader never yields more than the declared size, and its CRC check refuses
    a member that lied. Memory stays within the cap, so an archive that would
    expand a thousandfold is refused at once, not after decompressing.
    """
    try:
        zf = zipfile.ZipFile(io.BytesIO(data))
        infos = zf.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, OSError, EOFError) as exc:
        raise StateError(f"not a readable state file: {exc}") from exc
    if len(infos) > MAX_MEMBERS:
        raise StateError(f"state file has {len(infos)} members; the limit is {MAX_MEMBERS}")
    cap = uncompressed_cap(len(data))
    declared = 0
    for info in infos:
        if info.compress_size > len(data) or info.header_offset + info.compress_size > len(data):
            raise StateError(
                f"state file member {info.filename!r} claims {info.compress_size} stored bytes "
                f"past the end of the {len(data)}-byte file"
            )
        declared += info.file_size
    if declared > cap:
        raise StateError(
            f"state file members declare {declared} bytes uncompressed, more than the "
            f"{cap} allowed for a {len(data)}-byte file (a compression bomb or a corrupt file)"
        )
    arrays: dict[str, np.ndarray] = {}
    with zf:
        for info in infos:
            name = info.filename.removesuffix(".npy")
            if name == info.filename or name in arrays:
                raise StateError(f"state file member {info.filename!r} is not a single .npy array")
            try:
                with zf.open(info) as fh:
                    arrays[name] = _read_npy(fh, info.file_size)
            except StateError as exc:
                raise StateError(f"state file array {name!r}: {exc}") from exc
            except (zipfile.BadZipFile, ValueError, OSError, EOFError, RuntimeError) as exc:
                raise StateError(f"not a readable state file: array {name!r}: {exc}") from exc
    return arrays


def _read_npy(fh: IO[bytes], size: int) -> np.ndarray:
    version = np.lib.format.read_magic(fh)
    if version == (1, 0):
        shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
    elif version == (2, 0):
        shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
    else:
        raise StateError(f".npy format version {version} is not read")
    if dtype.kind not in _NUMBER_KINDS or dtype.fields is not None or dtype.subdtype is not None:
        raise StateError(f"type {dtype} is not a plain number type")
    if len(shape) > MAX_ARRAY_DIMS or any(d < 0 for d in shape):
        raise StateError(f"shape {shape} is not usable")
    count = math.prod(shape)
    payload = size - fh.tell()
    if count * dtype.itemsize != payload:
        raise StateError(
            f"header declares {count} x {dtype.itemsize} bytes, the member holds {payload}"
        )
    arr = np.empty(count, dtype=dtype)
    view = arr.data.cast("B")
    got = 0
    while got < payload:
        n = fh.readinto(view[got : min(payload, got + _CHUNK_BYTES)])  # type: ignore[attr-defined]
        if not n:
            raise StateError(f"member ends after {got} of {payload} bytes")
        got += n
    if fh.read(1):
        raise StateError("member holds more bytes than its header declares")
    return arr.reshape(shape, order="F" if fortran else "C")


def write_atomic(
    path: Path | str, data: bytes, before_replace: Callable[[], None] | None = None
) -> None:
    """Write bytes so that ``path`` holds either the old or the new content, never half.

    ``before_replace`` runs after the data is on disk and before the rename; what
    it raises stops the write (the writer lease's fence)."""
    write_atomic_with(path, lambda fh: fh.write(data), before_replace)


def write_atomic_with(
    path: Path | str,
    write: Callable[[IO[bytes]], object],
    before_replace: Callable[[], None] | None = None,
) -> None:
    """:func:`write_atomic` of what ``write`` writes into the file it is given."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        if before_replace is not None:
            before_replace()
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def save_state(path: Path | str, state: ModelState, extra: dict[str, Any] | None = None) -> None:
    write_atomic(path, state_to_bytes(state, extra))


def load_state(path: Path | str) -> ModelState:
    return load_state_with_extra(path)[0]


def load_state_with_extra(path: Path | str) -> tuple[ModelState, dict[str, Any]]:
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise StateError(f"cannot read state file {path}: {exc}") from exc
    return state_from_bytes(data)
