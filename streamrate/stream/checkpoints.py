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

import copy
import logging
import math
import sys
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from streamrate.checkpoint import (
    Checkpoint,
    CheckpointStore,
    Fence,
    FileCheckpointStore,
    RedisCheckpointStore,
    checkpoint_contents,
    decode_checkpoint,
    parts_of,
)
from streamrate.config import SpaceSettings
from streamrate.dedupe import SeenIds
from streamrate.errors import CheckpointRefusedError, LeaseLostError, StreamrateError
from streamrate.metrics import ServiceMetrics
from streamrate.models._snapshot import RowSnapshot, SnapshotArray, snapshot_state
from streamrate.models.base import Model, ModelState
from streamrate.models.registry import model_from_state
from streamrate.statefile import state_to_bytes, write_state
from streamrate.stream.applied_log import AppliedLogWriter
from streamrate.stream.apply import LiveModel, Observer
from streamrate.stream.reader import ACK_CHUNK, StreamReader, id_key

log = logging.getLogger("streamrate.consumer")
RETRY_AFTER_S = 1.0
"""After a failed background save, the next checkpoint is tried this much later
(or after ``checkpoint_every_s`` when that is shorter)."""
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


def private_arrays(state: ModelState) -> ModelState:
    """``state`` with arrays that nothing else holds: an array that is a view, or
    that another object also references (a model's live matrices), is copied;
    one made for this state alone (the copies of the used rows) is kept as is.
    ``state`` itself is emptied (its arrays move to the result): the caller
    holds no other reference to them.

    What a checkpoint saved in the background needs: the model goes on learning
    while the copy is encoded and stored."""
    arrays = state.arrays
    out: dict[str, np.ndarray] = {}
    for name in list(arrays):
        arr = arrays.pop(name)
        # Held here only by ``arr`` and the call's argument: a count of 2.
        if not isinstance(arr, np.ndarray) or arr.base is not None or sys.getrefcount(arr) > 2:
            arr = np.array(arr, copy=True)
        out[name] = arr
    return ModelState(state.kind, state.version, copy.deepcopy(state.params), out)


@dataclass
class _Save:
    """One checkpoint on its way to the store: its contents, the stream id and
    applied-log position it covers, the entries it acknowledges once durable.
    ``rows``: the model's per-entity rows, left in a copy-on-write snapshot that
    is read while the state is written (streamed into a file store) and closed
    once written, whether or not the save succeeds."""

    state: ModelState
    extra: dict[str, Any]
    last_id: str
    log_id: str
    acks: list[bytes]
    since: int
    started: float
    done: threading.Event = field(default_factory=threading.Event)
    error: BaseException | None = None
    rows: RowSnapshot | None = None

    def run(self, store: CheckpointStore) -> None:
        """Encode and store (in the background thread or inline); never raises:
        an error is kept for the writer's thread (:meth:`Checkpointer.poll`)."""
        snap = self.rows
        sources = {n: SnapshotArray(snap, n) for n in snap.names} if snap is not None else {}
        try:
            save_with = getattr(store, "save_with", None)
            if callable(save_with):  # a file: streamed, the rows never whole in memory
                save_with(lambda fh: write_state(fh, self.state, self.extra, sources))
            else:
                store.save(state_to_bytes(self.state, self.extra, sources))
        except Exception as exc:  # loop boundary of the saving thread: kept, reported
            self.error = exc
        finally:
            if snap is not None:
                snap.close()  # the model copies no more rows for it
            self.done.set()


class Checkpointer:
    """The writer's checkpoints: when one is due, saving it, then acknowledging
    the entries it covers and trimming what no checkpoint needs any more.

    Handled entries are announced with :meth:`handled` (counted towards the
    cadence) or :meth:`covered` (re-delivered, only to acknowledge); nothing is
    acknowledged before a checkpoint covering it is durable.

    With ``background`` the model lock is held only to take the state: a model
    that keeps copy-on-write snapshots (the matchup models) leaves its
    per-entity rows in one (:func:`~streamrate.models._snapshot.snapshot_state`),
    copying a row only when a batch writes it before the save has read it; the
    rest is copied (:func:`private_arrays`). Encoding and storing run in a
    thread of their own while the writer goes on applying. At most one save is in flight: none is
    due while one is. The entries a save covers (those handled up to its last
    id) wait aside until the save is durable (:meth:`poll`), then are
    acknowledged; a save that fails acknowledges nothing, puts its entries back
    and a new checkpoint (covering them and more) is tried after
    :data:`RETRY_AFTER_S`. :meth:`save` with ``wait`` (the final checkpoint, or
    ``background`` off) first waits for the save in flight.
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
        background: bool = False,
        fence: Fence | None = None,
    ) -> None:
        self.store, self.reader, self.log, self.live = store, reader, log, live
        self.fence = fence  # the writer lease, checked before acks and trims
        self.observers, self.metrics, self.space, self.clock = observers, metrics, space, clock
        self.log_min_entries = log_min_entries
        self.background = background
        self._lbl = {"space": space.name}
        self.ckpt_id = "0-0"  # stream id the newest durable checkpoint covers
        self.log_id = "0-0"  # applied-log position of the loaded/last checkpoint
        self.prev_log_id = "0-0"  # ... and of the one before (the log is kept back to it)
        self.to_ack: list[bytes] = []  # handled, no checkpoint started that covers them
        self.durable: list[bytes] = []  # covered by a durable checkpoint, not yet acked
        self.since = 0  # entries handled since the last checkpoint
        self.last_at = clock()
        self.retry_at = -math.inf
        self.failures = 0  # saves that failed in a row
        self._job: _Save | None = None
        self._thread: threading.Thread | None = None

    def restart(self, ckpt_id: str, log_id: str) -> None:
        """After loading the checkpoint covering ``ckpt_id``: nothing awaits an ack."""
        self.ckpt_id, self.log_id, self.prev_log_id = ckpt_id, log_id, log_id
        self.to_ack, self.durable, self.since = [], [], 0
        self.last_at = self.clock()
        self.retry_at = -math.inf

    def settle(self) -> None:
        """Wait for the save in flight and forget it (before a checkpoint is loaded:
        the store then holds it or its predecessor, and the load decides)."""
        if self._thread is not None:
            self._thread.join()
        self._job = self._thread = None

    def handled(self, ids: Sequence[bytes]) -> None:
        """Entries handled (applied, dead-lettered or skipped): ack after the next save."""
        self.to_ack.extend(ids)
        self.since += len(ids)

    def covered(self, ids: Sequence[bytes]) -> None:
        """Entries re-delivered that a checkpoint already covers: ack them."""
        self.to_ack.extend(ids)

    def awaiting(self) -> set[bytes]:
        """Entries applied by this writer and not acknowledged yet."""
        pending = self._job.acks if self._job is not None else []
        return {*self.to_ack, *pending, *self.durable}

    @property
    def in_flight(self) -> bool:
        return self._job is not None

    def due(self) -> bool:
        """Every ``checkpoint_every_events`` entries, or ``checkpoint_every_s`` seconds
        when anything awaits a checkpoint or an ack; never while a save is in flight
        nor before the retry time of a failed one."""
        if self._job is not None or self.clock() < self.retry_at:
            return False
        sp = self.space
        due_n = self.since >= sp.checkpoint_every_events
        due_t = self.clock() - self.last_at >= sp.checkpoint_every_s
        return due_n or (due_t and bool(self.since or self.to_ack or self.live.changed))

    def save(
        self, last_id: str, seen: SeenIds, counters: Mapping[str, int], wait: bool = True
    ) -> None:
        """Store model + ``last_id`` + retry record durably, then ack what it covers.

        ``wait=False`` with ``background``: only copy the state here; the save runs
        in a thread and :meth:`poll` completes it. Otherwise the save in flight
        (if any) is waited for and this one runs inline; its error is raised."""
        inline = wait or not self.background
        if self._job is not None and not inline:
            return
        paused_at = time.perf_counter()  # the loop applies nothing until this returns
        if self._job is not None:
            self._wait()
        t0 = time.perf_counter()
        live = self.live
        if self.since or self.ckpt_id != last_id or live.changed:
            rows: RowSnapshot | None = None
            with live.lock:
                if inline:
                    state = live.model.to_state()
                else:
                    state, rows = snapshot_state(live.model)
                    state = private_arrays(state)
                live.changed = False
                applied = live.applied
                promoted, live.promoted = live.promoted, []
            try:
                for model in promoted:  # in the state above: logged before it is saved
                    self.log.promote(applied, model)
                log_id = self.log.flush()
                contents = checkpoint_contents(
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
                del state  # its arrays are in the contents now
                state, extra = contents
                del contents
                if not inline:
                    state = private_arrays(state)  # the retry record's and parts' arrays
                    extra = copy.deepcopy(extra)
            except BaseException:
                if rows is not None:
                    rows.close()  # no save will read it: the model copies no rows for it
                raise
            job = _Save(state, extra, last_id, log_id, self.to_ack, self.since, t0, rows=rows)
            self.to_ack, self.since = [], 0
            self.last_at = self.clock()
            self._job = job
            pause = self.metrics.checkpoint_pause.labels(**self._lbl)
            if inline:
                try:
                    job.run(self.store)
                    self._complete(raise_error=True)
                finally:
                    pause.observe(time.perf_counter() - paused_at)
            else:
                self._thread = threading.Thread(
                    target=job.run,
                    args=(self.store,),
                    name=f"checkpoint-{self.space.name}",
                )
                self._thread.start()
                pause.observe(time.perf_counter() - paused_at)
                return
        else:
            self.last_at = self.clock()
            self.durable.extend(self.to_ack)  # covered by the durable checkpoint
            self.to_ack = []
        self._after_durable()

    def poll(self) -> None:
        """Complete the save in flight if it has finished (ack, trim; or put back)."""
        if self._job is not None and self._job.done.is_set():
            self._complete(raise_error=False)
            if self._job is None and not self.failures:
                self._after_durable()

    def _wait(self) -> None:
        """Wait for the save in flight and complete it; its error is raised."""
        assert self._job is not None
        self._job.done.wait()
        self._complete(raise_error=True)
        self._after_durable()

    def _complete(self, raise_error: bool) -> None:
        job = self._job
        assert job is not None and job.done.is_set()
        if self._thread is not None:
            self._thread.join()
        self._job = self._thread = None
        if isinstance(job.error, LeaseLostError):
            raise job.error  # another writer holds the space: stop, write nothing more
        if job.error is not None:
            # Nothing it covers is acknowledged; they wait for the next checkpoint.
            self.to_ack[:0] = job.acks
            self.since += job.since
            self.live.changed = True
            self.failures += 1
            self.retry_at = self.clock() + min(RETRY_AFTER_S, self.space.checkpoint_every_s)
            self.metrics.loop_errors.labels(**self._lbl).inc()
            if raise_error:
                raise job.error
            log.warning(
                "space %s: the checkpoint up to %s could not be stored (%s: %s); "
                "nothing it covers is acknowledged, retrying (%d failed in a row)",
                self.space.name,
                job.last_id,
                type(job.error).__name__,
                job.error,
                self.failures,
            )
            return
        self.failures = 0
        self.retry_at = -math.inf
        self.ckpt_id = job.last_id
        self.prev_log_id, self.log_id = self.log_id, job.log_id
        self.durable.extend(job.acks)
        self.metrics.checkpoint_seconds.labels(**self._lbl).observe(
            time.perf_counter() - job.started
        )
        self.metrics.checkpoint_time.labels(**self._lbl).set(time.time())

    def _after_durable(self) -> None:
        """Acknowledge what durable checkpoints cover; trim stream and applied log."""
        if self.fence is not None and (self.durable or self.space.retention_s is not None):
            self.fence.check()  # a writer that lost its lease acknowledges and trims nothing
        while self.durable:
            part = self.durable[:ACK_CHUNK]
            self.reader.ack(part)
            del self.durable[: len(part)]
        self._trim()
        self.log.trim(self.prev_log_id, self.log_min_entries)

    def _trim(self) -> None:
        if self.space.retention_s is None or self.ckpt_id == "0-0":
            return
        horizon_ms = int(time.time() * 1000 - self.space.retention_s * 1000)
        ck = id_key(self.ckpt_id)
        min_id = ck if ck[0] < horizon_ms else (horizon_ms, 0)  # never past the checkpoint
        self.reader.trim(f"{min_id[0]}-{min_id[1]}")
