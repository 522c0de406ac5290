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

A checkpoint is untrusted input when read back (a file anyone with access to
the directory could replace, a Redis key): :func:`decode_checkpoint` checks
sizes before allocating (:func:`streamrate.statefile.read_npz`), bounds the
settings that size a model (:data:`SIZE_LIMITS`), requires every float array
to be finite (time arrays, named ``*_s``, may hold NaN for "never"), entity
and match ids to follow the event format's id rule, and ``last_id`` to be a
stream id. Every refusal is one :class:`~streamrate.errors.CheckpointError`
naming the checkpoint and the problem.

Versions (``checkpoint_version`` in the metadata): 3 adds the parts (below);
2 keeps, per remembered match id, the time its entry was received and a content
digest; 1 (no field) kept the event's own finish time and no digest. Older
versions still load: a version-2 checkpoint has no parts; in a version-1 one the
ids count as received at its ``last_id`` and their content as unknown (a reuse of
such an id is taken for a retry, as version 1 did).

Parts: the state of the consumer's observers (the quality windows, drift
windows and change detectors), so that a restart continues the same alerting
series. A part is a :class:`PartState` (arrays named ``_part_<name>.<key>`` in
the blob, JSON under ``parts`` in the metadata); its arrays are checked like the
model's (finite), and its owner checks the rest when it loads it
(:func:`load_parts`).

>>> from streamrate.dedupe import SeenIds
>>> from streamrate.models.base import ModelState
>>> import numpy as np
>>> c = Checkpoint(ModelState("demo", 1, {}, {"w": np.ones(2)}), "5-0", 3, SeenIds(10, 60))
>>> decode_checkpoint(encode_checkpoint(c), keep=10, window_s=60).last_id
'5-0'
"""

from __future__ import annotations

import math
import re
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any, Protocol

import numpy as np

from streamrate.dedupe import SeenIds
from streamrate.errors import CheckpointError, StateError
from streamrate.events import bad_ids
from streamrate.models.base import ModelState
from streamrate.statefile import state_from_bytes, state_to_bytes, write_atomic, write_atomic_with

_PREFIX = "_ckpt_"
_PART_PREFIX = "_part_"
CHECKPOINT_VERSION = 3
"""Written into every checkpoint; versions 1 to 3 are read."""
READ_VERSIONS = (1, 2, CHECKPOINT_VERSION)
PART_NAME = re.compile(r"^[a-z][a-z0-9_]{0,31}$")
PART_KEY = re.compile(r"^[A-Za-z0-9_.]{1,64}$")
MAX_PARTS = 16
STREAM_ID = re.compile(r"^(0|[1-9][0-9]{0,19})-(0|[1-9][0-9]{0,19})$")
_U64 = (1 << 64) - 1
MAX_ENTITIES = 100_000_000
SIZE_LIMITS: dict[str, int] = {
    "dims": 1024,
    "context_width": 1 << 16,
    "feature_width": 1 << 16,
    "feature_slots": 1024,
    "window_events": 10_000_000,
    "refit_every": 10_000_000,
    "max_iter": 1_000_000,
}
"""Largest value of each model setting that sizes an allocation, wherever it appears
(also inside the settings of challenger members or a recalibrated base)."""


class CheckpointBlob(bytes):
    """Checkpoint bytes that know where they came from (for error messages)."""

    source: str = ""

    @classmethod
    def named(cls, data: bytes, source: str) -> CheckpointBlob:
        blob = cls(data)
        blob.source = source
        return blob


@dataclass(frozen=True)
class PartState:
    """One observer's saved state: number arrays (keys ``[A-Za-z0-9_.]``) and JSON."""

    arrays: dict[str, np.ndarray]
    meta: dict[str, Any]


class Stateful(Protocol):
    """An observer whose state goes into the checkpoint under ``state_name``."""

    state_name: str

    def state(self) -> PartState: ...

    def load_state(self, part: PartState | None) -> None:
        """Install ``part`` (``None``: the checkpoint holds none, start empty);
        :class:`~streamrate.errors.StateError` when it is malformed."""
        ...


def parts_of(observers: Iterable[object]) -> dict[str, PartState]:
    """The saved states of those observers that keep one (see :class:`Stateful`)."""
    parts: dict[str, PartState] = {}
    for obs in observers:
        name = getattr(obs, "state_name", None)
        if isinstance(name, str) and callable(getattr(obs, "state", None)):
            if name in parts:
                raise StateError(f"two observers save their state as {name!r}")
            parts[name] = obs.state()  # type: ignore[attr-defined]
    return parts


def load_parts(observers: Iterable[object], parts: dict[str, PartState]) -> None:
    """Give each stateful observer its part (or ``None`` when the checkpoint has none)."""
    for obs in observers:
        name = getattr(obs, "state_name", None)
        if isinstance(name, str) and callable(getattr(obs, "load_state", None)):
            try:
                obs.load_state(parts.get(name))  # type: ignore[attr-defined]
            except StateError as exc:
                raise CheckpointError(f"part {name!r}: {exc}") from exc


@dataclass
class Checkpoint:
    """What a checkpoint holds. ``last_id`` is the newest stream id it covers."""

    state: ModelState
    last_id: str
    applied: int
    seen: SeenIds
    counters: dict[str, int] = field(default_factory=dict)
    written_at_s: float = 0.0
    parts: dict[str, PartState] = field(default_factory=dict)
    log_id: str = "0-0"
    """Id of the newest applied-log entry this checkpoint covers ("0-0": none);
    a replica that loads the checkpoint follows the log after it."""


def encode_checkpoint(ckpt: Checkpoint) -> bytes:
    return state_to_bytes(*checkpoint_contents(ckpt))


def checkpoint_contents(ckpt: Checkpoint) -> tuple[ModelState, dict[str, Any]]:
    """What :func:`encode_checkpoint` writes: all arrays as one state, and the metadata.

    Split from the encoding so that a writer can take these (cheaply, under its
    lock) and encode and store them elsewhere."""
    arrays = dict(ckpt.state.arrays)
    for name, arr in ckpt.seen.to_arrays().items():
        arrays[_PREFIX + name] = arr
    for part_name, part in ckpt.parts.items():
        if not PART_NAME.match(part_name):
            raise StateError(f"part name {part_name!r} is not of the form {PART_NAME.pattern}")
        for key, arr in part.arrays.items():
            if not PART_KEY.match(key):
                raise StateError(f"part {part_name!r}: array name {key!r} is not usable")
            arrays[f"{_PART_PREFIX}{part_name}.{key}"] = arr
    extra: dict[str, Any] = {
        "checkpoint_version": CHECKPOINT_VERSION,
        "last_id": ckpt.last_id,
        "applied": ckpt.applied,
        "counters": ckpt.counters,
        "written_at_s": ckpt.written_at_s or time.time(),
        "log_id": ckpt.log_id,
        "parts": {name: part.meta for name, part in ckpt.parts.items()},
    }
    state = ModelState(ckpt.state.kind, ckpt.state.version, ckpt.state.params, arrays)
    return state, extra


def decode_checkpoint(
    data: bytes, keep: int, window_s: float, source: str | None = None
) -> Checkpoint:
    """Decode and check a checkpoint blob; :class:`CheckpointError` when it is refused.

    ``source`` names the checkpoint in messages (default: the blob's own
    :attr:`CheckpointBlob.source`, as the stores return it).
    """
    name = source or getattr(data, "source", None)
    try:
        return _decode(data, keep, window_s)
    except StateError as exc:
        where = f"checkpoint {name}" if name else "checkpoint"
        raise CheckpointError(f"{where} refused: {exc}") from exc


def _decode(data: bytes, keep: int, window_s: float) -> Checkpoint:
    state, extra = state_from_bytes(data)
    own = {k[len(_PREFIX) :]: v for k, v in state.arrays.items() if k.startswith(_PREFIX)}
    part_arrays = {k: v for k, v in state.arrays.items() if k.startswith(_PART_PREFIX)}
    model_arrays = {
        k: v
        for k, v in state.arrays.items()
        if not k.startswith(_PREFIX) and not k.startswith(_PART_PREFIX)
    }
    version = extra.get("checkpoint_version", 1)
    if version not in READ_VERSIONS or isinstance(version, bool):
        raise StateError(
            f"checkpoint version {str(version)[:20]!r}; this code reads versions "
            f"{', '.join(map(str, READ_VERSIONS))}"
        )
    parts = _parts(extra.get("parts"), part_arrays)
    last_id = extra.get("last_id")
    if not isinstance(last_id, str) or not _is_stream_id(last_id):
        raise StateError(f"last_id {str(last_id)[:40]!r} is not a stream id (ms-seq)")
    applied = extra.get("applied")
    if not isinstance(applied, int) or isinstance(applied, bool) or applied < 0:
        raise StateError(f"applied {str(applied)[:40]!r} is not a count")
    counters = extra.get("counters") or {}
    if not isinstance(counters, dict) or not all(
        isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in counters.values()
    ):
        raise StateError("counters are not a map of counts")
    written = extra.get("written_at_s") or 0.0
    if not isinstance(written, int | float) or not math.isfinite(written):
        raise StateError("written_at_s is not a time")
    log_id = extra.get("log_id", "0-0")  # absent: written before the applied log
    if not isinstance(log_id, str) or not _is_stream_id(log_id):
        raise StateError(f"log_id {str(log_id)[:40]!r} is not a stream id (ms-seq)")
    check_params(state.params)
    check_arrays(model_arrays)
    if version == 1:  # finish times, no digests: received at the checkpoint, content unknown
        own = _seen_from_version_1(own, int(last_id.partition("-")[0]) / 1000)
    seen = SeenIds.from_arrays(keep, window_s, own)
    problem = bad_ids(seen.ids())
    if problem:
        raise StateError(f"retry record: {problem}")
    return Checkpoint(
        ModelState(state.kind, state.version, state.params, model_arrays),
        last_id,
        applied,
        seen,
        {str(k): int(v) for k, v in counters.items()},
        float(written),
        parts=parts,
        log_id=log_id,
    )


def _parts(meta: Any, arrays: dict[str, np.ndarray]) -> dict[str, PartState]:
    """The parts, checked for shape (names, JSON maps, finite arrays), not for meaning."""
    if meta is None:
        meta = {}
    if not isinstance(meta, dict) or len(meta) > MAX_PARTS:
        raise StateError(f"parts are not a map of at most {MAX_PARTS} entries")
    parts: dict[str, PartState] = {}
    for name, part_meta in meta.items():
        if not PART_NAME.match(str(name)) or not isinstance(part_meta, dict):
            raise StateError(f"part {str(name)[:40]!r} is not a named map")
        parts[name] = PartState({}, part_meta)
    for full, arr in arrays.items():
        name, _, key = full[len(_PART_PREFIX) :].partition(".")
        if name not in parts or not PART_KEY.match(key):
            raise StateError(f"array {full[:80]!r} belongs to no listed part")
        parts[name].arrays[key] = arr
    check_arrays(arrays)
    return parts


def _is_stream_id(text: str) -> bool:
    m = STREAM_ID.match(text)
    return m is not None and int(m.group(1)) <= _U64 and int(m.group(2)) <= _U64


def _seen_from_version_1(own: dict[str, np.ndarray], received_s: float) -> dict[str, np.ndarray]:
    if "ids" not in own or "finished_s" not in own:
        raise StateError("retry record (version 1) lacks its arrays")
    n = int(np.asarray(own["finished_s"]).size)
    return {
        "ids": own["ids"],
        "received_s": np.full(n, received_s),
        "digest": np.zeros(8 * n, dtype=np.uint8),
    }


def check_params(params: Any, path: str = "settings") -> None:
    """Refuse settings that would size an allocation beyond :data:`SIZE_LIMITS`."""
    if isinstance(params, dict):
        for key, value in params.items():
            where = f"{path}.{key}"
            limit = SIZE_LIMITS.get(str(key))
            if limit is not None and isinstance(value, int | float) and not 0 <= value <= limit:
                raise StateError(f"{where} = {value!r} is outside 0..{limit}")
            check_params(value, where)
    elif isinstance(params, list):
        for i, value in enumerate(params):
            check_params(value, f"{path}[{i}]")


def check_arrays(arrays: dict[str, np.ndarray]) -> None:
    """Refuse non-finite parameters, malformed entity ids and too many entities.

    Floats must be finite, except in time arrays (names ending ``_s``), where NaN
    means "never" (infinity is still refused). A finite model predicts finite
    probabilities, so no reply can carry a NaN.
    """
    for name, arr in arrays.items():
        base = re.split(r"[/.]", name)[-1]
        if arr.dtype.kind == "f" and arr.size:
            ok = ~np.isinf(arr) if base.endswith("_s") else np.isfinite(arr)
            if not ok.all():
                raise StateError(f"array {name!r} holds {int((~ok).sum())} non-finite values")
        if base == "entity_ids":
            try:
                ids = bytes(arr.astype(np.uint8)).decode("utf-8").split("\n") if arr.size else []
            except UnicodeDecodeError as exc:
                raise StateError(f"array {name!r} is not UTF-8: {exc}") from exc
            if len(ids) > MAX_ENTITIES:
                raise StateError(
                    f"array {name!r} holds {len(ids)} entities; at most {MAX_ENTITIES}"
                )
            problem = bad_ids(ids)
            if problem:
                raise StateError(f"array {name!r}: {problem}")


class CheckpointStore(Protocol):
    def load(self) -> bytes | None: ...
    def save(self, data: bytes) -> None: ...


class Fence(Protocol):
    """The writer lease seen by a store (:class:`streamrate.stream.lease.Lease`):
    ``check`` raises when the lease is no longer held; ``set`` writes a key only
    while it is."""

    def check(self) -> None: ...
    def set(self, key: str, data: bytes) -> None: ...


class FileCheckpointStore:
    """``<dir>/<space>.ckpt.npz``, replaced atomically.

    A crash while writing can leave a temporary file (``.<space>.ckpt.npz.*.tmp``)
    beside it; :meth:`load`, called at start, removes those.
    """

    def __init__(self, directory: Path | str, space: str, fence: Fence | None = None) -> None:
        self.path = Path(directory) / f"{space}.ckpt.npz"
        self.fence = fence  # the writer's lease, checked right before the rename

    def remove_leftovers(self) -> list[Path]:
        """Delete temporary files of interrupted writes; returns what was removed."""
        removed: list[Path] = []
        if not self.path.parent.is_dir():
            return removed
        for tmp in self.path.parent.glob(f".{self.path.name}.*.tmp"):
            try:
                tmp.unlink()
            except FileNotFoundError:
                continue
            except OSError as exc:
                raise StateError(f"cannot remove leftover temporary file {tmp}: {exc}") from exc
            removed.append(tmp)
        return removed

    def load(self) -> bytes | None:
        self.remove_leftovers()
        try:
            return CheckpointBlob.named(self.path.read_bytes(), str(self.path))
        except FileNotFoundError:
            return None
        except OSError as exc:
            raise StateError(f"cannot read checkpoint {self.path}: {exc}") from exc

    def save(self, data: bytes) -> None:
        write_atomic(self.path, data, None if self.fence is None else self.fence.check)

    def save_with(self, write: Callable[[IO[bytes]], object]) -> None:
        """:meth:`save` of what ``write`` writes into the file (streamed, never
        whole in memory)."""
        write_atomic_with(self.path, write, None if self.fence is None else self.fence.check)


class RedisCheckpointStore:
    """One Redis string key (``SET`` is atomic)."""

    def __init__(self, client: Any, key: str, fence: Fence | None = None) -> None:
        self.client = client
        self.key = key
        self.fence = fence  # the writer's lease: SET only while it is held

    def load(self) -> bytes | None:
        data = self.client.get(self.key)
        return None if data is None else CheckpointBlob.named(bytes(data), f"redis key {self.key}")

    def save(self, data: bytes) -> None:
        if self.fence is not None:
            self.fence.set(self.key, data)
        else:
            self.client.set(self.key, data)
