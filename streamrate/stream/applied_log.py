"""The applied log: what the writer applied, in the order it applied it.

A Redis stream beside the event stream (``{sr:space}:applied``), written only
by the writer, read by every replica. Three kinds of entry::

    start    epoch E, seq N, ckpt_last_id, ckpt_log_id
             a writer started (or recovered) from the checkpoint that had applied
             N events; E is new (INCR {sr:space}:epoch)
    chunk    epoch E, seq N, version V, ids "1-0,2-0,..", e0 e1 .. (raw event JSON),
             dead D, dupes U
             the events applied after the first N, in this order; V is the id of
             the last one; D and U: the entries up to V the writer dead-lettered
             and skipped as retries, in all (its counters at V; absent in entries
             of older versions)
    promote  epoch E, seq N, model M
             a promotion made after N events

Dead letters and skipped retries never enter it: the writer decided, replicas
only see what was applied (and the counts D and U, so that a standby promoted
from its replica continues the writer's counters, see
:meth:`streamrate.stream.writer.Writer.adopt`). The checkpoint records the id of the newest entry it
covers (``log_id``), so a replica that loads it knows where to continue.

How a replica uses ``seq`` and ``epoch`` (see :mod:`streamrate.replica.follower`):
a chunk whose seq equals the replica's applied count is applied; one below is
skipped (already in the model); one above means entries are missing (trimmed)
and the replica reloads the checkpoint. A ``start`` below the replica's count
means the writer restarted from a checkpoint and re-applies what it had lost:
the replica reloads that checkpoint and continues after the ``start``. Entries
of an epoch older than the replica's are ignored (a writer that was replaced).

>>> e = parse_entry(b"5-0", {b"kind": b"promote", b"epoch": b"2", b"seq": b"10", b"model": b"m"})
>>> (e.kind, e.epoch, e.seq, e.model)
('promote', 2, 10, 'm')
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

from streamrate.errors import AppliedLogError

KINDS = ("start", "chunk", "promote")
MAX_CHUNK = 100_000


@dataclass(frozen=True)
class LogEntry:
    """One applied-log entry, decoded (see the module docstring)."""

    id: str
    kind: str
    epoch: int
    seq: int
    version: str = ""
    ids: tuple[str, ...] = ()
    events: tuple[bytes, ...] = ()
    model: str = ""
    ckpt_last_id: str = ""
    ckpt_log_id: str = ""
    dead: int = -1  # -1: not recorded (an entry of an older version)
    dupes: int = -1


Tally = Callable[[str], tuple[int, int]]
"""Dead letters and skipped retries in all up to a stream id (the writer's counters there)."""


def chunk_fields(
    epoch: int,
    seq: int,
    ids: Sequence[str],
    raws: Sequence[bytes],
    tally: tuple[int, int] | None = None,
) -> dict[str, Any]:
    """Fields of a ``chunk`` entry."""
    fields: dict[str, Any] = {
        "kind": "chunk",
        "epoch": epoch,
        "seq": seq,
        "version": ids[-1],
        "ids": ",".join(ids),
    }
    if tally is not None:
        fields["dead"], fields["dupes"] = tally
    for i, raw in enumerate(raws):
        fields[f"e{i}"] = raw
    return fields


def promote_fields(epoch: int, seq: int, model: str) -> dict[str, Any]:
    return {"kind": "promote", "epoch": epoch, "seq": seq, "model": model}


def start_fields(epoch: int, seq: int, ckpt_last_id: str, ckpt_log_id: str) -> dict[str, Any]:
    return {
        "kind": "start",
        "epoch": epoch,
        "seq": seq,
        "ckpt_last_id": ckpt_last_id,
        "ckpt_log_id": ckpt_log_id,
    }


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def _count(fields: dict[bytes, bytes], name: str, where: str) -> int:
    raw = fields.get(name.encode())
    try:
        value = int(_text(raw)) if raw is not None else -1
    except ValueError:
        value = -1
    if value < 0:
        raise AppliedLogError(f"applied log entry {where}: {name} is not a count")
    return value


def parse_entry(sid: bytes | str, fields: dict[bytes, bytes]) -> LogEntry:
    """Decode one entry; :class:`AppliedLogError` when it is malformed."""
    where = _text(sid)
    kind = _text(fields.get(b"kind", b""))
    if kind not in KINDS:
        raise AppliedLogError(f"applied log entry {where}: unknown kind {kind[:20]!r}")
    epoch, seq = _count(fields, "epoch", where), _count(fields, "seq", where)
    if kind == "promote":
        return LogEntry(where, kind, epoch, seq, model=_text(fields.get(b"model", b"")))
    if kind == "start":
        return LogEntry(
            where,
            kind,
            epoch,
            seq,
            ckpt_last_id=_text(fields.get(b"ckpt_last_id", b"0-0")),
            ckpt_log_id=_text(fields.get(b"ckpt_log_id", b"0-0")),
        )
    ids = tuple(_text(fields.get(b"ids", b"")).split(","))
    if not ids or not ids[0] or len(ids) > MAX_CHUNK:
        raise AppliedLogError(f"applied log entry {where}: no event ids")
    try:
        events = tuple(fields[f"e{i}".encode()] for i in range(len(ids)))
    except KeyError as exc:
        raise AppliedLogError(f"applied log entry {where}: lacks event {exc.args[0]!r}") from exc
    dead = _count(fields, "dead", where) if b"dead" in fields else -1
    dupes = _count(fields, "dupes", where) if b"dupes" in fields else -1
    return LogEntry(
        where, kind, epoch, seq, version=ids[-1], ids=ids, events=events, dead=dead, dupes=dupes
    )


def id_key(stream_id: str) -> tuple[int, int]:
    ms, _, seq = stream_id.partition("-")
    return int(ms), int(seq or 0)


class LogFence(Protocol):
    """The writer lease as the applied log sees it (:class:`streamrate.stream.lease.Lease`)."""

    def xadd_all(self, stream: str, entries: Sequence[dict[str, Any]]) -> list[str]: ...


FENCED_CHUNK = 1000
"""Events per ``chunk`` entry at most when the lease fences the log (script argument limits)."""


class AppliedLogWriter:
    """The writer's side: a new epoch per start, entries collected per batch and
    appended in one pipelined round trip before anything they cover is checkpointed.

    ``flush`` returns the id of the newest entry written (the checkpoint's ``log_id``).
    """

    def __init__(
        self, client: Any, key: str, epoch_key: str, fence: LogFence | None = None
    ) -> None:
        self.r, self.key, self.epoch_key, self.fence = client, key, epoch_key, fence
        self.epoch = 0
        self.last_id = "0-0"
        self.pending: list[dict[str, Any]] = []

    def start(self, applied: int, ckpt_last_id: str, ckpt_log_id: str, epoch: int = 0) -> int:
        """Take a new epoch (or use ``epoch``, the one the lease took) and append the
        ``start`` entry (at once: it comes first)."""
        self.pending = []
        self.epoch = epoch or int(self.r.incr(self.epoch_key))
        self.pending.append(start_fields(self.epoch, applied, ckpt_last_id, ckpt_log_id))
        self.flush()
        return self.epoch

    def chunk(
        self, seq: int, ids: Sequence[str], raws: Sequence[bytes], tally: Tally | None = None
    ) -> None:
        step = FENCED_CHUNK if self.fence is not None else max(len(ids), 1)
        for at in range(0, len(ids), step):
            part = slice(at, at + step)
            top = ids[part][-1]
            self.pending.append(
                chunk_fields(
                    self.epoch,
                    seq + at,
                    ids[part],
                    raws[part],
                    None if tally is None else tally(top),
                )
            )

    def promote(self, seq: int, model: str) -> None:
        self.pending.append(promote_fields(self.epoch, seq, model))

    def flush(self) -> str:
        if not self.pending:
            return self.last_id
        if self.fence is not None:  # refused (LeaseLostError) once the lease is not ours
            self.last_id = self.fence.xadd_all(self.key, self.pending)[-1]
            self.pending = []
            return self.last_id
        pipe = self.r.pipeline(transaction=False)
        for fields in self.pending:
            pipe.xadd(self.key, fields)
        got = pipe.execute()
        self.pending = []
        self.last_id = _text(got[-1])
        return self.last_id

    def trim(self, keep_after: str, min_entries: int) -> None:
        """Drop entries before ``keep_after`` (a position an older checkpoint covers),
        keeping at least about ``min_entries``."""
        if keep_after == "0-0":
            return
        if min_entries:
            length = int(self.r.xlen(self.key))
            if length <= min_entries:
                return
        self.r.xtrim(self.key, minid=keep_after, approximate=True)
