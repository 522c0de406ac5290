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
import os
import tempfile
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from streamrate.errors import StateError, StateVersionError
from streamrate.models.base import ModelState

FORMAT_NAME = "streamrate-state"
FORMAT_VERSION = 1
_META = "__meta__"


def state_to_bytes(state: ModelState, extra: dict[str, Any] | None = None) -> bytes:
    """Encode a state (and optional JSON-able ``extra`` metadata) as npz bytes."""
    meta = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "kind": state.kind,
        "version": state.version,
        "params": state.params,
        "extra": extra or {},
    }
    for name, arr in state.arrays.items():
        if name == _META:
            raise StateError(f"array name {_META!r} is reserved")
        if np.asarray(arr).dtype == object:
            raise StateError(f"array {name!r} holds Python objects; only numbers are saved")
    buf = io.BytesIO()
    meta_bytes = np.frombuffer(json.dumps(meta, sort_keys=True).encode("utf-8"), dtype=np.uint8)
    np.savez(buf, **{_META: meta_bytes}, **state.arrays)
    return buf.getvalue()


def state_from_bytes(data: bytes) -> tuple[ModelState, dict[str, Any]]:
    """Decode npz bytes into (state, extra metadata); :class:`StateError` if unusable."""
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as exc:
        raise StateError(f"not a readable state file: {exc}") from exc
    raw_meta = arrays.pop(_META, None)
    if raw_meta is None:
        raise StateError("not a streamrate state file: no metadata entry")
    try:
        meta = json.loads(bytes(raw_meta.astype(np.uint8)).decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
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


def write_atomic(path: Path | str, data: bytes) -> None:
    """Write bytes so that ``path`` holds either the old or the new content, never half."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
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
