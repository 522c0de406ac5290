"""Checkpoints: model state + last applied stream id + retry record, in one blob.

A checkpoint is one :mod:`streamrate.statefile` blob (npz, no pickle): the
model's arrays, the retry record's arrays (names starting with ``_ckpt_``) and
JSON ``extra`` metadata (``last_id``, counters, time written). Because all of it
is one value written in one atomic step, a reader sees either the old or the
new checkpoint, never a model from one and a stream id from the other.

Two stores, same interface (``load() -> bytes | None``, ``save(bytes)``):

* :class:`FileCheckpointStore` - one file per space, written to a temporary file,
  fsynced, renamed (``write_atomic``). Durable on its own, independent of Redis;
  but if Redis loses stream data (no AOF) the stream may fall behind the file.
* :class:`RedisCheckpointStore` - ``SET {sr:space}:ckpt``. Lives beside the stream
  (same hash-tag slot), so a Redis backup/restore keeps both consistent; durable
  only as far as Redis persistence goes (use ``appendonly yes``,
  ``appendfsync always`` for no loss), and costs Redis memory (a one-million
  entity model is a large value; Redis caps values at 512 MB).

>>> from streamrate.dedupe import SeenIds
>>> from streamrate.models.base import ModelState
>>> import numpy as np
>>> c = Checkpoint(ModelState("demo", 1, {}, {"w": np.ones(2)}), "5-0", 3, SeenIds(10, 60))
>>> decode_checkpoint(encode_checkpoint(c), keep=10, window_s=60).last_id
'5-0'
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from streamrate.dedupe import SeenIds
from streamrate.errors import StateError
from streamrate.models.base import ModelState
from streamrate.statefile import state_from_bytes, state_to_bytes, write_atomic

_PREFIX = "_ckpt_"


@dataclass
class Checkpoint:
    """What a checkpoint holds. ``last_id`` is the newest stream id it covers."""

    state: ModelState
    last_id: str
    applied: int
    seen: SeenIds
    counters: dict[str, int] = field(default_factory=dict)
    written_at_s: float = 0.0


def encode_checkpoint(ckpt: Checkpoint) -> bytes:
    arrays = dict(ckpt.state.arrays)
    for name, arr in ckpt.seen.to_arrays().items():
        arrays[_PREFIX + name] = arr
    extra: dict[str, Any] = {
        "last_id": ckpt.last_id,
        "applied": ckpt.applied,
        "counters": ckpt.counters,
        "written_at_s": ckpt.written_at_s or time.time(),
    }
    state = ModelState(ckpt.state.kind, ckpt.state.version, ckpt.state.params, arrays)
    return state_to_bytes(state, extra)


def decode_checkpoint(data: bytes, keep: int, window_s: float) -> Checkpoint:
    """Decode a checkpoint blob; :class:`StateError` when it is not one."""
    state, extra = state_from_bytes(data)
    own = {k[len(_PREFIX) :]: v for k, v in state.arrays.items() if k.startswith(_PREFIX)}
    model_arrays = {k: v for k, v in state.arrays.items() if not k.startswith(_PREFIX)}
    try:
        seen = SeenIds.from_arrays(keep, window_s, own)
        last_id = str(extra["last_id"])
        applied = int(extra["applied"])
    except (KeyError, TypeError, ValueError) as exc:
        raise StateError(f"checkpoint metadata is incomplete: {exc!r}") from exc
    return Checkpoint(
        ModelState(state.kind, state.version, state.params, model_arrays),
        last_id,
        applied,
        seen,
        {str(k): int(v) for k, v in dict(extra.get("counters") or {}).items()},
        float(extra.get("written_at_s") or 0.0),
    )


class CheckpointStore(Protocol):
    def load(self) -> bytes | None: ...
    def save(self, data: bytes) -> None: ...


class FileCheckpointStore:
    """``<dir>/<space>.ckpt.npz``, replaced atomically."""

    def __init__(self, directory: Path | str, space: str) -> None:
        self.path = Path(directory) / f"{space}.ckpt.npz"

    def load(self) -> bytes | None:
        try:
            return self.path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError as exc:
            raise StateError(f"cannot read checkpoint {self.path}: {exc}") from exc

    def save(self, data: bytes) -> None:
        write_atomic(self.path, data)


class RedisCheckpointStore:
    """One Redis string key (``SET`` is atomic)."""

    def __init__(self, client: Any, key: str) -> None:
        self.client = client
        self.key = key

    def load(self) -> bytes | None:
        data = self.client.get(self.key)
        return None if data is None else bytes(data)

    def save(self, data: bytes) -> None:
        self.client.set(self.key, data)
