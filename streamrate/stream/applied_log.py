"""The applied log: what the writer applied, in the order it applied it.

A Redis stream beside the event stream (``{sr:space}:applied``), written only
by the writer, read by every replica. Three kinds of entry::

    start    epoch E, seq N, ckpt_last_id, ckpt_log_id
             a writer started (or recovered) from the checkpoint that had applied
             N events; E is new (INCR {sr:space}:epoch)
    chunk    epoch E, seq N, version V, ids "1-0,2-0,..", sizes "212,208,..",
             parts "64,36", events (the raw event JSON of each, one after the
             other), dead D, dupes U
             the events applied after the first N, in this order; V is the id of
             the last one; ``sizes``: the bytes of each event in ``events``;
             ``parts``: how many events the writer applied at a time (a replica
             applies them in the same pieces, so a model whose update depends on
             its batches stays equal to the writer's); D and U: the entries up
             to V the writer dead-lettered and skipped as retries, in all (its
             counters at V; absent in entries of older versions). Entries of
             older versions hold each event in a field of its own (``e0 e1 ..``)
             and no ``parts`` (one piece): they are still read
    promote  epoch E, seq N, model M
             a promotion made after N events

The writer appends one ``chunk`` per batch (the pieces it applied under the
model lock, joined; a promotion made between two pieces ends the entry):
few fields per entry, so the write costs Redis and the client little per event.

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
    parts: tuple[int, ...] = ()  # events applied at a time; () = all in one piece

    def pieces(self) -> list[tuple[int, int]]:
        """(start, end) of each piece the writer applied at a time, in order.

        >>> LogEntry("1-0", "chunk", 1, 0, ids=("1-0", "2-0", "3-0"), parts=(2, 1)).pieces()
        [(0, 2), (2, 3)]
        """
        out, at = [], 0
        for n in self.parts or (len(self.ids),):
            out.append((at, at + n))
            at += n
        return out


Tally = Callable[[str], tuple[int, int]]
"""Dead letters and skipped retries in all up to a stream id (the writer's counters there)."""


def _joined(values: Sequence[int]) -> str:
    return ",".join(map(str, values))


def chunk_fields(
    epoch: int,
    seq: int,
    ids: Sequence[str],
    raws: Sequence[bytes],
    tally: tuple[int, int] | None = None,
    parts: Sequence[int] = (),
) -> dict[str, Any]:
    """Fields of a ``chunk`` entry (``parts``: the pieces applied at a time; none: one).

    >>> f = chunk_fields(3, 10, ["7-0", "8-0"], [b'{"a":1}', b"{}"], (1, 0), [1, 1])
    >>> (f["ids"], f["sizes"], f["parts"], f["events"], f["dead"])
    ('7-0,8-0', '7,2', '1,1', b'{"a":1}{}', 1)
    """
    raws = [raw if isinstance(raw, bytes) else str(raw).encode() for raw in raws]
    fields: dict[str, Any] = {
        "kind": "chunk",
        "epoch": epoch,
        "seq": seq,
        "version": ids[-1],
        "ids": ",".join(ids),
        "sizes": _joined(list(map(len, raws))),
        "parts": _joined(parts or [len(ids)]),
        "events": b"".join(raws),
    }
    if tally is not None:
        fields["dead"], fields["dupes"] = tally
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
    if b"events" in fields:
        events = _split_events(fields, len(ids), where)
    else:  # an entry of an older version: one field per event
        try:
            events = tuple(fields[f"e{i}".encode()] for i in range(len(ids)))
        except KeyError as exc:
            raise AppliedLogError(
                f"applied log entry {where}: lacks event {exc.args[0]!r}"
            ) from exc
    parts = _counts(fields.get(b"parts"), "parts", where) if b"parts" in fields else ()
    if parts and (sum(parts) != len(ids) or min(parts) < 1):
        raise AppliedLogError(f"applied log entry {where}: parts do not add up to its events")
    dead = _count(fields, "dead", where) if b"dead" in fields else -1
    dupes = _count(fields, "dupes", where) if b"dupes" in fields else -1
    return LogEntry(
        where,
        kind,
        epoch,
        seq,
        version=ids[-1],
        ids=ids,
        events=events,
        dead=dead,
        dupes=dupes,
        parts=parts,
    )


def _counts(raw: Any, name: str, where: str) -> tuple[int, ...]:
    try:
        got = tuple(int(x) for x in _text(raw).split(","))
    except ValueError:
        got = (-1,)
    if not got or min(got) < 0:
        raise AppliedLogError(f"applied log entry {where}: {name} are not counts")
    return got


def _split_events(fields: dict[bytes, bytes], n: int, where: str) -> tuple[bytes, ...]:
    blob = fields[b"events"]
    sizes = _counts(fields.get(b"sizes", b""), "sizes", where)
    if len(sizes) != n or sum(sizes) != len(blob):
        raise AppliedLogError(f"applied log entry {where}: sizes do not match its events")
    out, at = [], 0
    for size in sizes:
        out.append(blob[at : at + size])
        at += size
    return tuple(out)


def _nothing(replies: list[Any]) -> None:
    return None


def id_key(stream_id: str) -> tuple[int, int]:
    ms, _, seq = stream_id.partition("-")
    return int(ms), int(seq or 0)


class LogFence(Protocol):
    """The writer lease as the applied log sees it (:class:`streamrate.stream.lease.Lease`)."""

    def xadd_all(self, stream: str, entries: Sequence[dict[str, Any]]) -> list[str]: ...

    def queue_xadd(self, pipe: Any, stream: str, entries: Sequence[dict[str, Any]]) -> int: ...

    def xadd_ids(self, got: Any) -> list[str]: ...


class _Open:
    """The ``chunk`` entry being collected: pieces applied one after the other."""

    def __init__(self, epoch: int, seq: int) -> None:
        self.epoch, self.seq = epoch, seq
        self.ids: list[str] = []
        self.raws: list[bytes] = []
        self.parts: list[int] = []
        self.tally: tuple[int, int] | None = None

    def fields(self) -> dict[str, Any]:
        return chunk_fields(self.epoch, self.seq, self.ids, self.raws, self.tally, self.parts)


class AppliedLogWriter:
    """The writer's side: a new epoch per start, entries collected per batch and
    appended in one pipelined round trip before anything they cover is checkpointed.

    The pieces of a batch (applied one lock hold at a time) go into one ``chunk``
    entry, their boundaries in ``parts``; a promotion between them ends it.
    ``flush`` returns the id of the newest entry written (the checkpoint's ``log_id``).
    """

    def __init__(
        self, client: Any, key: str, epoch_key: str, fence: LogFence | None = None
    ) -> None:
        self.r, self.key, self.epoch_key, self.fence = client, key, epoch_key, fence
        self.epoch = 0
        self.last_id = "0-0"
        self.pending: list[dict[str, Any]] = []
        self._open: _Open | None = None

    def start(self, applied: int, ckpt_last_id: str, ckpt_log_id: str, epoch: int = 0) -> int:
        """Take a new epoch (or use ``epoch``, the one the lease took) and append the
        ``start`` entry (at once: it comes first)."""
        self.pending, self._open = [], None
        self.epoch = epoch or int(self.r.incr(self.epoch_key))
        self.pending.append(start_fields(self.epoch, applied, ckpt_last_id, ckpt_log_id))
        self.flush()
        return self.epoch

    def chunk(
        self, seq: int, ids: Sequence[str], raws: Sequence[bytes], tally: Tally | None = None
    ) -> None:
        """A piece applied at once: events ``seq``.. with their ids and raw JSON."""
        if not ids:
            return
        got = self._open
        if (
            got is None
            or got.epoch != self.epoch
            or got.seq + len(got.ids) != seq
            or len(got.ids) + len(ids) > MAX_CHUNK
        ):
            self._close()
            got = self._open = _Open(self.epoch, seq)
        got.ids += ids
        got.raws += raws
        got.parts.append(len(ids))
        got.tally = None if tally is None else tally(ids[-1])

    def _close(self) -> None:
        if self._open is not None:
            self.pending.append(self._open.fields())
            self._open = None

    def promote(self, seq: int, model: str) -> None:
        self._close()
        self.pending.append(promote_fields(self.epoch, seq, model))

    def flush(self) -> str:
        self._close()
        if not self.pending:
            return self.last_id
        if self.fence is not None:  # refused (LeaseLostError) once the lease is not ours
            self.last_id = self.fence.xadd_all(self.key, self.pending)[-1]
            self.pending = []
            return self.last_id
        if len(self.pending) == 1:
            got = [self.r.xadd(self.key, self.pending[0])]
        else:
            pipe = self.r.pipeline(transaction=False)
            for fields in self.pending:
                pipe.xadd(self.key, fields)
            got = pipe.execute()
        self.pending = []
        self.last_id = _text(got[-1])
        return self.last_id

    @property
    def waiting(self) -> bool:
        """Whether anything is collected and not written yet."""
        return bool(self.pending) or self._open is not None

    def carry(self, pipe: Any) -> tuple[int, Callable[[list[Any]], None]]:
        """Queue what :meth:`flush` would write on ``pipe`` (sent with the writer's
        next read: one round trip for both, see :meth:`StreamReader.read
        <streamrate.stream.reader.StreamReader.read>`). Returns the number of
        replies and the function that takes them; until it has, the entries stay
        pending (a lost reply: they are written again, and a replica skips an
        entry it has applied by its ``seq``)."""
        self._close()
        sent = list(self.pending)  # a copy: more may be added before the replies are taken
        if not sent:
            return 0, _nothing
        if self.fence is not None:
            n = self.fence.queue_xadd(pipe, self.key, sent)
        else:
            n = len(sent)
            for fields in sent:
                pipe.xadd(self.key, fields)

        def done(replies: list[Any]) -> None:
            if self.fence is not None:
                ids = [sid for got in replies for sid in self.fence.xadd_ids(got)]
            else:
                for got in replies:
                    if isinstance(got, Exception):
                        raise got
                ids = [_text(got) for got in replies]
            self.pending = self.pending[len(sent) :]
            self.last_id = ids[-1]

        return n, done

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
