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

from dataclasses import dataclass, field
from typing import Any

import redis

from streamrate.deadletters import dead_fields
from streamrate.dedupe import SeenIds
from streamrate.errors import EventError
from streamrate.events import MatchEvent, event_digest, parse_event, time_problem
from streamrate.stream.reader import Entry, id_key

DeadEntry = tuple[str, dict[bytes, bytes], str]
"""A dead letter to write: source stream id, its fields, the reason."""


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

    valid: list[tuple[str, MatchEvent]] = field(default_factory=list)
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
        """
        out = Decision()
        batch: dict[str, bytes] = {}
        fname = self.event_field.encode()
        for sid_b, fields in entries:
            sid = sid_b.decode()
            if fields is None:
                out.dead.append((sid, {}, "entry was deleted from the stream before it was read"))
                continue
            if sid in self.poison:
                out.dead.append((sid, fields, self.poison[sid]))
                continue
            raw = fields.get(fname)
            if raw is None:
                out.dead.append((sid, fields, f"entry has no {self.event_field!r} field"))
                continue
            try:
                ev = parse_event(raw)
            except EventError as exc:
                out.dead.append((sid, fields, str(exc)))
                continue
            problem = time_problem(ev, id_key(sid)[0], self.future_limit_s)
            if problem is not None:
                out.dead.append((sid, fields, problem))
                continue
            digest = event_digest(ev)
            mid = ev.match_id
            if mid in batch or mid in self.seen:
                known = batch[mid] if mid in batch else self.seen.digest(mid)
                if known is None or known == digest:  # None: content not recorded (old record)
                    out.dupes.append(sid)
                else:
                    out.dead.append((sid, fields, _conflict(mid)))
                continue
            batch[mid] = digest
            out.digests[sid] = digest
            out.valid.append((sid, ev))
            out.raws[sid] = raw
        return out

    def remember(self, part: list[tuple[str, MatchEvent]], digests: dict[str, bytes]) -> None:
        """Add applied events to the retry record: stream-id time and content digest."""
        for sid, ev in part:
            digest = digests.get(sid)
            self.seen.add(ev.match_id, id_key(sid)[0] / 1000, digest or event_digest(ev))

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


def _conflict(match_id: str) -> str:
    return (
        f"match_id: {match_id!r} was applied before with other content "
        "(a reused id, not a retry; the first event stands)"
    )
