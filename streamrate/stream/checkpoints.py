"""Checkpoints: loading one that fits the settings (writer and replicas), and the
writer's cadence of saving, acknowledging and trimming (:class:`Checkpointer`).

:func:`load_checked` reads the store, decodes and checks the blob
(:func:`streamrate.checkpoint.decode_checkpoint`) and refuses one written for
another model, other settings or another state format, with one
:class:`~streamrate.errors.CheckpointRefusedError` naming the checkpoint and
the ways out. The writer stops on it; a replica reports it and waits.

Exactly-once rests on the writer's side of this module: an entry is
acknowledged only after a durable checkpoint covers it, and the checkpoint holds
the model, the last handled stream id, the retry record and the applied-log
position as one atomic value. Only the writer checkpoints, acknowledges and
trims; a replica only loads.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from streamrate.checkpoint import (
    Checkpoint,
    CheckpointStore,
    Fence,
    FileCheckpointStore,
    RedisCheckpointStore,
    decode_checkpoint,
    encode_checkpoint,
    parts_of,
)
from streamrate.config import SpaceSettings
from streamrate.dedupe import SeenIds
from streamrate.errors import CheckpointRefusedError, StreamrateError
from streamrate.metrics import ServiceMetrics
from streamrate.models.base import Model
from streamrate.models.registry import model_from_state
from streamrate.stream.applied_log import AppliedLogWriter
from streamrate.stream.apply import LiveModel, Observer
from streamrate.stream.reader import ACK_CHUNK, StreamReader, id_key

RUNTIME_SETTINGS = frozenset({"compiled", "active"})
"""Model settings that do not change what a checkpoint means (how kernels run;
which challenger answers): a checkpoint is not refused over them."""


def describe_store(store: CheckpointStore) -> str:
    """Where the checkpoint lives, in words (for messages)."""
    if isinstance(store, FileCheckpointStore):
        return f"checkpoint file {store.path}"
    if isinstance(store, RedisCheckpointStore):
        return f"checkpoint in Redis key {store.key}"
    return "checkpoint"


def refusal(store: CheckpointStore, space: str, what: str) -> CheckpointRefusedError:
    """The one-line refusal of the checkpoint in ``store``, with the ways out."""
    where = describe_store(store)
    if isinstance(store, RedisCheckpointStore):
        aside = f"rename the key aside (RENAME {store.key} {store.key}.old)"
    else:
        aside = "move the file aside"
    what = " ".join(what.split())  # one line, whatever the cause's message holds
    return CheckpointRefusedError(
        f"{where} {what}. Either point space {space!r} at another checkpoint "
        f"(checkpoint.dir, the prefix or the space name), or {aside} to start afresh "
        f"from the stream's first entry"
    )


def load_checked(
    store: CheckpointStore, space: SpaceSettings, build_model: Callable[[], Model]
) -> tuple[Checkpoint, Model] | None:
    """The stored checkpoint and its model, or None when there is none;
    :class:`CheckpointRefusedError` when it is unreadable or was written for
    another model, other settings or in another format."""

    def refuse(what: str) -> CheckpointRefusedError:
        return refusal(store, space.name, what)

    try:
        data = store.load()
    except StreamrateError as exc:
        raise refuse(f"cannot be read ({exc})") from exc
    if data is None:
        return None
    try:
        ck = decode_checkpoint(data, space.dedupe_keep_ids, space.dedupe_window_s)
    except (StreamrateError, ValueError, KeyError, TypeError) as exc:
        raise refuse(f"is not a checkpoint this version reads ({exc})") from exc
    asked = build_model().to_state()
    if ck.state.kind != asked.kind:
        raise refuse(f"holds model {ck.state.kind!r}, the settings ask for {asked.kind!r}")
    diff = settings_diff(ck.state.params, asked.params)
    if diff:
        raise refuse(
            f"holds model {asked.kind!r} with other settings ({diff}) than the settings ask for"
        )
    if ck.state.version != asked.version:
        raise refuse(
            f"holds {asked.kind!r} state of format version {ck.state.version}, "
            f"this version reads {asked.version}"
        )
    try:
        model = model_from_state(ck.state)
    except (StreamrateError, ValueError, TypeError, KeyError, IndexError) as exc:
        raise refuse(f"holds {asked.kind!r} state that cannot be loaded ({exc})") from exc
    return ck, model


def _plain(value: Any) -> Any:
    """Settings as JSON-like values for comparison: lists for tuples, floats for
    numbers, runtime-only keys left out."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items() if k not in RUNTIME_SETTINGS}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    return value


def settings_diff(saved: dict[str, Any], asked: dict[str, Any], limit: int = 3) -> str:
    """The settings that differ, in words (empty when they agree)."""
    a, b = _plain(saved), _plain(asked)
    if a == b:
        return ""
    keys = sorted(set(a) | set(b))
    parts = [
        f"{k}: {_short(a.get(k, 'unset'))} in the checkpoint, {_short(b.get(k, 'unset'))} asked"
        for k in keys
        if a.get(k) != b.get(k)
    ]
    more = f"; and {len(parts) - limit} more" if len(parts) > limit else ""
    return "; ".join(parts[:limit]) + more


def _short(value: Any, width: int = 60) -> str:
    text = repr(value)
    return text if len(text) <= width else text[: width - 3] + "..."


class Checkpointer:
    """The writer's checkpoints: when one is due, saving it, then acknowledging
    the entries it covers and trimming what no checkpoint needs any more.

    Handled entries are announced with :meth:`handled` (counted towards the
    cadence) or :meth:`covered` (re-delivered, only to acknowledge); nothing is
    acknowledged before :meth:`save` has stored a checkpoint covering it.
    """

    def __init__(
        self,
        store: CheckpointStore,
        reader: StreamReader,
        log: AppliedLogWriter,
        live: LiveModel,
        observers: Sequence[Observer],
        metrics: ServiceMetrics,
        space: SpaceSettings,
        clock: Callable[[], float],
        log_min_entries: int,
        fence: Fence | None = None,
    ) -> None:
        self.store, self.reader, self.log, self.live = store, reader, log, live
        self.fence = fence  # the writer lease, checked before acks and trims
        self.observers, self.metrics, self.space, self.clock = observers, metrics, space, clock
        self.log_min_entries = log_min_entries
        self._lbl = {"space": space.name}
        self.ckpt_id = "0-0"  # stream id the newest durable checkpoint covers
        self.log_id = "0-0"  # applied-log position of the loaded/last checkpoint
        self.prev_log_id = "0-0"  # ... and of the one before (the log is kept back to it)
        self.to_ack: list[bytes] = []
        self.since = 0  # entries handled since the last checkpoint
        self.last_at = clock()

    def restart(self, ckpt_id: str, log_id: str) -> None:
        """After loading the checkpoint covering ``ckpt_id``: nothing awaits an ack."""
        self.ckpt_id, self.log_id, self.prev_log_id = ckpt_id, log_id, log_id
        self.to_ack, self.since = [], 0
        self.last_at = self.clock()

    def handled(self, ids: Sequence[bytes]) -> None:
        """Entries handled (applied, dead-lettered or skipped): ack after the next save."""
        self.to_ack.extend(ids)
        self.since += len(ids)

    def covered(self, ids: Sequence[bytes]) -> None:
        """Entries re-delivered that a checkpoint already covers: ack them."""
        self.to_ack.extend(ids)

    def due(self) -> bool:
        """Every ``checkpoint_every_events`` entries, or ``checkpoint_every_s`` seconds
        when anything awaits a checkpoint or an ack."""
        sp = self.space
        due_n = self.since >= sp.checkpoint_every_events
        due_t = self.clock() - self.last_at >= sp.checkpoint_every_s
        return due_n or (due_t and bool(self.since or self.to_ack or self.live.changed))

    def save(self, last_id: str, seen: SeenIds, counters: Mapping[str, int]) -> None:
        """Store model + ``last_id`` + retry record durably, then ack what it covers."""
        t0 = time.perf_counter()
        live = self.live
        if self.since or self.ckpt_id != last_id or live.changed:
            with live.lock:
                state = live.model.to_state()
                live.changed = False
                applied = live.applied
                promoted, live.promoted = live.promoted, []
            for model in promoted:  # in the state above: logged before it is saved
                self.log.promote(applied, model)
            log_id = self.log.flush()
            blob = encode_checkpoint(
                Checkpoint(
                    state,
                    last_id,
                    applied,
                    seen,
                    dict(counters),
                    parts=parts_of(self.observers),
                    log_id=log_id,
                )
            )
            self.store.save(blob)
            self.ckpt_id = last_id
            self.prev_log_id, self.log_id = self.log_id, log_id
            self.since = 0
            self.metrics.checkpoint_seconds.labels(**self._lbl).observe(time.perf_counter() - t0)
            self.metrics.checkpoint_time.labels(**self._lbl).set(time.time())
        self.last_at = self.clock()
        if self.fence is not None and (self.to_ack or self.space.retention_s is not None):
            self.fence.check()
        while self.to_ack:
            part = self.to_ack[:ACK_CHUNK]
            self.reader.ack(part)
            del self.to_ack[: len(part)]
        self._trim()
        self.log.trim(self.prev_log_id, self.log_min_entries)

    def _trim(self) -> None:
        if self.space.retention_s is None or self.ckpt_id == "0-0":
            return
        horizon_ms = int(time.time() * 1000 - self.space.retention_s * 1000)
        ck = id_key(self.ckpt_id)
        min_id = ck if ck[0] < horizon_ms else (horizon_ms, 0)  # never past the checkpoint
        self.reader.trim(f"{min_id[0]}-{min_id[1]}")
