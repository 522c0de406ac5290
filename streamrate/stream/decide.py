"""Deciding what is applied: validation, time checks, retries, conflicts, poison.

The writer hands each batch read from the stream to :meth:`Decider.decide`,
which sorts it, in stream order, into a :class:`Decision`:

- ``valid``: events to apply (with their raw JSON, for the applied log, and
  their content digests, for the retry record once applied);
- ``dead``: entries to set aside in the dead-letter stream, with the reason:
  deleted before read, no event field, not an event, an untrusted time, a match
  id reused with other content, or an event the model could not learn from
  (``poison``, found in careful mode);
- ``dupes``: retries of a match already applied (same content digest): skipped.

Only the writer decides; replicas follow what it applied (the applied log).
Nothing here reads or writes Redis except :class:`DeadLetters`, which writes
the dead letters the decision named.

>>> d = Decider(SeenIds(10, 3600.0), "event", 3600.0)
>>> got = d.decide([(b"5-0", None), (b"6-0", {b"other": b"x"})])
>>> [reason for _, _, reason in got.dead]
['entry was deleted from the stream before it was read', "entry has no 'event' field"]
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from operator import attrgetter, itemgetter, methodcaller
from typing import Any, cast

import numpy as np
import redis

from streamrate.columns import EventColumns, Pairs, events_of, match_ids_of, sids_of
from streamrate.deadletters import dead_fields
from streamrate.decode import decode_events
from streamrate.dedupe import SeenIds
from streamrate.errors import EventError
from streamrate.events import (
    EARLIEST_FINISH,
    MatchEvent,
    event_digest,
    event_digests,
    time_problem,
)
from streamrate.scan import Scanned, scan_payloads
from streamrate.stream.reader import Entry, id_key

DeadEntry = tuple[str, dict[bytes, bytes], str]
"""A dead letter to write: source stream id, its fields, the reason."""
_FIRST = itemgetter(0)
_MATCH_ID = attrgetter("match_id")
_EARLIEST_S = EARLIEST_FINISH.timestamp()


@dataclass(frozen=True)
class Fresh:
    """The entries of a batch not handled before, the ids only to acknowledge
    (re-delivered after a group reset, already covered), and the highest id."""

    entries: list[Entry]
    covered: list[bytes]
    top: str


def split_fresh(entries: list[Entry], last_id: str, late: bool) -> Fresh:
    """Separate entries after ``last_id`` from those already handled
    (``late``: claimed entries, order not enforced, all of them are fresh)."""
    last = id_key(last_id)
    fresh: list[Entry]
    covered: list[bytes] = []
    if late or (entries and id_key(entries[0][0]) > last):
        # A read returns entries in stream order, so when the first is new all
        # are: no per-entry id parsing on the hot path.
        fresh = entries
    else:
        fresh = []
        for sid, fields in entries:
            if id_key(sid) <= last:
                covered.append(sid)
            else:
                fresh.append((sid, fields))
    if not fresh:
        return Fresh([], covered, "")
    top = max((sid for sid, _ in fresh), key=id_key) if late else fresh[-1][0]
    return Fresh(fresh, covered, top.decode() if isinstance(top, bytes) else top)


@dataclass
class Decision:
    """What to do with each entry of a batch (see the module docstring)."""

    valid: Sequence[tuple[str, MatchEvent]] = field(default_factory=list)
    raws: dict[str, bytes] = field(default_factory=dict)  # stream id -> event JSON, valid ones
    digests: dict[str, bytes] = field(default_factory=dict)  # stream id -> digest, valid ones
    dead: list[DeadEntry] = field(default_factory=list)
    dupes: list[str] = field(default_factory=list)

    def counts(self) -> dict[str, int]:
        """Entries per outcome, named as the writer's counters."""
        return {
            "applied": len(self.valid),
            "dead_lettered": len(self.dead),
            "duplicate": len(self.dupes),
        }


class Decider:
    """The writer's judgement of entries: the retry record (``seen``), the events
    the model could not learn from (``poison``), and how far to go carefully."""

    def __init__(self, seen: SeenIds, event_field: str, future_limit_s: float) -> None:
        self.seen = seen
        self.event_field = event_field
        self.future_limit_s = future_limit_s
        # After a failure in the loop: up to this stream id, events are applied one
        # at a time, so that one the model cannot learn from is found and set aside
        # (``poison``: stream id -> reason; such entries go to the dead letters).
        self.careful_until = "0-0"
        self.poison: dict[str, str] = {}

    def decide(self, entries: list[Entry]) -> Decision:
        """Valid events, dead letters (with reasons) and retries, in stream order.

        Time is the stream's: an event finishing more than ``future_limit_s`` after
        its entry was received (the stream id's clock), or before 2000, is a dead
        letter. A match id already applied (or earlier in this batch) is a retry
        when its content digest is the same, and a dead letter (conflict) when not.

        The batch is handled as columns: one compiled scan
        (:func:`~streamrate.scan.scan_payloads`); when it is sure of every payload
        (the common case) the decision is made on its columns and the events stay
        columns (:meth:`_columns`). Otherwise the payloads it is not sure of are
        decoded (:func:`decode_events`), then one time check, the missing digests
        in one pass, and one set operation against the retry record when no match
        id repeats.
        """
        out = Decision()
        if not entries:
            return out
        sids = stream_ids([sid for sid, _ in entries])
        fields = [f for _, f in entries]
        fname = self.event_field.encode()
        dead: list[tuple[int, DeadEntry]] = []  # (position in the batch, letter)
        if not self.poison and all(fields):
            at = list(range(len(entries)))
            raws = list(map(methodcaller("get", fname), fields))  # type: ignore[arg-type]
            if None in raws:
                at, raws = _with_payload(entries, sids, fname, self, dead)
        else:
            at, raws = _with_payload(entries, sids, fname, self, dead)
        scanned = scan_payloads(raws)
        if scanned.sure.all():  # the common batch: decided as columns
            return self._columns(sids, fields, at, raws, scanned, dead)
        decoded, times, known = _decoded(raws, scanned)
        received_ms = millis([sids[k] for k in at])
        doubtful: set[int] = set()
        for j in _refused_or_untrusted(times, received_ms, self.future_limit_s):  # usually none
            ev, k = decoded[j], at[j]
            if isinstance(ev, EventError):
                reason: str | None = str(ev)
            else:  # the exact test decides, and words the reason
                reason = time_problem(ev, received_ms[j], self.future_limit_s)
            if reason is not None:
                doubtful.add(j)
                dead.append((k, (sids[k], fields[k] or {}, reason)))
        if not doubtful:
            events = cast(list[MatchEvent], decoded)
            kept_at, kept_raws, kept_times, kept_known = at, raws, times, known
        else:
            keep = [j for j in range(len(decoded)) if j not in doubtful]
            events = [cast(MatchEvent, decoded[j]) for j in keep]
            kept_at = [at[j] for j in keep]
            kept_raws = [raws[j] for j in keep]
            kept_times = [times[j] for j in keep]
            kept_known = [known[j] for j in keep]
        digests = _digests(events, kept_times, kept_known)
        mids = list(map(_MATCH_ID, events))
        if len(set(mids)) != len(mids) or self.seen.known(mids):
            kept = self._retries(mids, digests, kept_at, sids, fields, dead, out.dupes)
            events = [events[j] for j in kept]
            kept_at = [kept_at[j] for j in kept]
            kept_raws = [kept_raws[j] for j in kept]
            digests = [digests[j] for j in kept]
        valid_sids = [sids[k] for k in kept_at]
        valid = list(zip(valid_sids, events, strict=True))
        return _filled(out, valid_sids, valid, kept_raws, digests, dead)

    def _columns(
        self,
        sids: list[str],
        fields: list[dict[bytes, bytes] | None],
        at: list[int],
        raws: list[bytes],
        got: Scanned,
        dead: list[tuple[int, DeadEntry]],
    ) -> Decision:
        """The decision on a batch whose every payload the compiled scan is sure of
        (``at``: their positions in the batch; ``dead``: the entries without one),
        as :meth:`decide` words it, made on the columns: untrusted times and
        conflicts become dead letters (an event is made only to word a time's
        reason), retries are skipped, and the valid events stay columns."""
        out = Decision()
        psids = sids if len(at) == len(sids) else [sids[k] for k in at]
        received_ms = millis(psids)
        limit = np.asarray(received_ms, dtype=np.float64) / 1000 + self.future_limit_s
        t = got.times
        ok = (t <= limit) & (t >= _EARLIEST_S)
        cols = EventColumns.from_scan(got)
        keep: list[int] | None = None  # positions among the payloads; None: all of them
        if not ok.all():
            keep = []
            for j in range(len(at)):
                reason = (
                    None
                    if ok[j]
                    else time_problem(cols.event(j), received_ms[j], self.future_limit_s)
                )
                if reason is None:  # the exact test decides, and words the reason
                    keep.append(j)
                else:
                    k = at[j]
                    dead.append((k, (sids[k], fields[k] or {}, reason)))
        mids = got.match_ids if keep is None else [got.match_ids[j] for j in keep]
        if len(set(mids)) != len(mids) or self.seen.known(mids):
            some = list(range(len(at))) if keep is None else keep
            digests = [got.digests[j] for j in some]
            kept = self._retries(
                mids, digests, [at[j] for j in some], sids, fields, dead, out.dupes
            )
            keep = [some[j] for j in kept]
        if keep is not None:
            cols = cols.take(keep)
            psids = [psids[j] for j in keep]
            received_ms = [received_ms[j] for j in keep]
            raws = [raws[j] for j in keep]
        return _filled(out, psids, Pairs(psids, cols, received_ms), raws, cols.digests, dead)

    def _retries(
        self,
        mids: list[str],
        digests: list[bytes],
        at: list[int],
        sids: list[str],
        fields: list[dict[bytes, bytes] | None],
        dead: list[tuple[int, DeadEntry]],
        dupes: list[str],
    ) -> list[int]:
        """For a batch in which some match id was applied before or comes twice: the
        positions (into ``mids``) kept once retries (skipped, into ``dupes``) and
        conflicts (dead letters) are taken out. ``at``: each one's place in the batch."""
        batch: dict[str, bytes] = {}
        kept: list[int] = []
        for j, (mid, digest, k) in enumerate(zip(mids, digests, at, strict=True)):
            if mid in batch or mid in self.seen:
                known = batch[mid] if mid in batch else self.seen.digest(mid)
                if known is None or known == digest:  # None: content not recorded (old record)
                    dupes.append(sids[k])
                else:
                    dead.append((k, (sids[k], fields[k] or {}, _conflict(mid))))
                continue
            batch[mid] = digest
            kept.append(j)
        return kept

    def remember(self, part: Sequence[tuple[str, MatchEvent]], digests: dict[str, bytes]) -> None:
        """Add applied events to the retry record: stream-id time and content digest."""
        if not part:
            return
        sids = sids_of(part)
        events = events_of(part)
        got = list(map(digests.get, sids))
        if None in got:
            got = [d or event_digest(ev) for d, ev in zip(got, events, strict=True)]
        ms = part.received_ms if isinstance(part, Pairs) else None
        received_s = [t / 1000 for t in (millis(sids) if ms is None else ms)]
        self.seen.add_many(match_ids_of(events), received_s, b"".join(got))  # type: ignore[arg-type]

    # -- poison -----------------------------------------------------------------
    def failed(self, top_in_hand: str) -> None:
        """The loop failed on a batch reaching ``top_in_hand``: go carefully up to it."""
        if top_in_hand and id_key(top_in_hand) > id_key(self.careful_until):
            self.careful_until = top_in_hand

    def careful(self, last_id: str) -> bool:
        """Whether events after ``last_id`` are to be applied one at a time."""
        return id_key(last_id) < id_key(self.careful_until)

    def set_aside(self, sid: str, exc: Exception) -> None:
        """The model could not learn from the event at ``sid``: dead-letter it next time."""
        self.poison[sid] = (
            f"the model could not learn from this event: {type(exc).__name__}: {exc}"
        )[:500]


class DeadLetters:
    """Writes dead letters with the source entry's id as their own, so a replay
    does not write them twice; the stream is kept to about ``keep`` entries."""

    def __init__(self, client: redis.Redis, key: str, max_payload_bytes: int, keep: int) -> None:
        self.r, self.key, self.cap, self.keep = client, key, max_payload_bytes, keep

    def write(self, dead: list[DeadEntry]) -> None:
        if not dead:
            return
        pipe = self.r.pipeline(transaction=False)
        for sid, fields, reason in dead:
            letter: Any = dead_fields(fields, sid, reason, self.cap)
            pipe.xadd(self.key, letter, id=sid, maxlen=self.keep, approximate=True)
        results = pipe.execute(raise_on_error=False)
        for (sid, fields, reason), res in zip(dead, results, strict=True):
            if isinstance(res, redis.ResponseError):
                # Id not above the newest dead letter: written before (replay) or out of order.
                if not self.r.xrange(self.key, min=sid, max=sid):
                    letter = dead_fields(fields, sid, reason, self.cap)
                    self.r.xadd(self.key, letter, maxlen=self.keep, approximate=True)
            elif isinstance(res, Exception):
                raise res


def stream_ids(ids: list[bytes]) -> list[str]:
    """Stream ids as text, in one decoding call (ids are ASCII digits and ``-``)."""
    return b"\n".join(ids).decode("ascii").split("\n") if ids else []


def millis(sids: list[str]) -> list[int]:
    """The millisecond part of each stream id (its clock), parsed in one pass."""
    parts = "-".join(sids).split("-")
    if len(parts) != 2 * len(sids):  # an id without its sequence part
        return [id_key(s)[0] for s in sids]
    return list(map(int, parts[::2]))


def _with_payload(
    entries: list[Entry],
    sids: list[str],
    fname: bytes,
    decider: Decider,
    dead: list[tuple[int, DeadEntry]],
) -> tuple[list[int], list[bytes]]:
    """Positions and payloads of the entries that carry one; the others (deleted,
    set aside as poison, no event field) become dead letters."""
    at: list[int] = []
    raws: list[bytes] = []
    for k, (_, fields) in enumerate(entries):
        sid = sids[k]
        if fields is None:
            dead.append((k, (sid, {}, "entry was deleted from the stream before it was read")))
        elif sid in decider.poison:
            dead.append((k, (sid, fields, decider.poison[sid])))
        elif (raw := fields.get(fname)) is None:
            dead.append((k, (sid, fields, f"entry has no {decider.event_field!r} field")))
        else:
            at.append(k)
            raws.append(raw)
    return at, raws


def _filled(
    out: Decision,
    sids: list[str],
    valid: Sequence[tuple[str, MatchEvent]],
    raws: list[bytes],
    digests: list[bytes],
    dead: list[tuple[int, DeadEntry]],
) -> Decision:
    """``out`` with its valid events (their stream ids ``sids``), their payloads and
    digests, and the dead letters in stream order."""
    out.valid = valid
    out.raws = dict(zip(sids, raws, strict=True))
    out.digests = dict(zip(sids, digests, strict=True))
    if dead:
        dead.sort(key=_FIRST)
        out.dead = [letter for _, letter in dead]
    return out


def _decoded(
    raws: list[bytes], got: Scanned
) -> tuple[list[MatchEvent | EventError], list[float], list[bytes | None]]:
    """Each payload's event or refusal, its time, and its digest where the scan gave
    one: the payloads the scan is sure of from its columns, the others decoded."""
    if not got.sure.any():
        decoded, times = decode_events(raws)
        return decoded, times, [None] * len(raws)
    sure = got.at.tolist()
    unsure = np.flatnonzero(~got.sure).tolist()
    rest, rest_times = decode_events([raws[j] for j in unsure])
    out: list[MatchEvent | EventError] = [*rest, *EventColumns.from_scan(got).events()]
    times = [*rest_times, *got.times.tolist()]
    known: list[bytes | None] = [*([None] * len(unsure)), *got.digests]
    order = np.argsort(np.array(unsure + sure, dtype=np.int64), kind="stable").tolist()
    pick = itemgetter(*order) if len(order) > 1 else (lambda xs: (xs[order[0]],))
    return list(pick(out)), list(pick(times)), list(pick(known))


def _digests(
    events: list[MatchEvent], times: list[float], known: list[bytes | None]
) -> list[bytes]:
    """The content digest of each event: the scan's where it gave one, else computed."""
    if None not in known:
        return cast(list[bytes], known)
    missing = [j for j, d in enumerate(known) if d is None]
    made = event_digests([events[j] for j in missing], [times[j] for j in missing])
    out = list(known)
    for j, d in zip(missing, made, strict=True):
        out[j] = d
    return cast(list[bytes], out)


def _refused_or_untrusted(
    times: list[float], received_ms: list[int], future_limit_s: float
) -> set[int]:
    """Positions of refused payloads (their time is NaN) and of events finishing past
    the future limit or before 2000: the test of :func:`time_problem`, on the whole
    batch at once."""
    t = np.asarray(times, dtype=np.float64)
    limit = np.asarray(received_ms, dtype=np.float64) / 1000 + future_limit_s
    bad = ~(t <= limit) | (t < _EARLIEST_S)  # NaN compares false: refused
    return set(np.flatnonzero(bad).tolist()) if bad.any() else set()


def _conflict(match_id: str) -> str:
    return (
        f"match_id: {match_id!r} was applied before with other content "
        "(a reused id, not a retry; the first event stands)"
    )
