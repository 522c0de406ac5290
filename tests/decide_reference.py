"""The writer's decision as it was before it worked on columns (one entry at a time,
pydantic's parser, one digest and one record lookup per event): the reference
the batch decision is held to (tests/test_decide.py)."""

from __future__ import annotations

import hashlib
from typing import Any

from streamrate.dedupe import SeenIds
from streamrate.errors import EventError
from streamrate.events import MatchEvent, parse_event, time_problem
from streamrate.stream.decide import Decision, _conflict
from streamrate.stream.reader import Entry, id_key


def reference_digest(event: MatchEvent) -> bytes:
    """The content digest as first written (one event, its own timestamp)."""
    parts = [
        event.match_id,
        repr(event.finished_at.timestamp()),
        "\x1f".join(event.first),
        "\x1f".join(event.second),
        repr(event.score),
    ]
    if event.context:
        parts.append(_canonical_values(event.context))
    if event.features:
        parts.append(
            "\x1c".join(f"{k}\x1b{_canonical_values(v)}" for k, v in sorted(event.features.items()))
        )
    text = "\x1e".join(parts)
    return hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest()


def _canonical_values(values: dict[str, Any]) -> str:
    return "\x1f".join(
        f"{k}\x1ds{v}" if isinstance(v, str) else f"{k}\x1dn{float(v)!r}"
        for k, v in sorted(values.items())
    )


def reference_decide(
    seen: SeenIds, poison: dict[str, str], event_field: str, future_limit_s: float,
    entries: list[Entry],
) -> Decision:  # fmt: skip
    out = Decision()
    batch: dict[str, bytes] = {}
    fname = event_field.encode()
    for sid_b, fields in entries:
        sid = sid_b.decode()
        if fields is None:
            out.dead.append((sid, {}, "entry was deleted from the stream before it was read"))
            continue
        if sid in poison:
            out.dead.append((sid, fields, poison[sid]))
            continue
        raw = fields.get(fname)
        if raw is None:
            out.dead.append((sid, fields, f"entry has no {event_field!r} field"))
            continue
        try:
            ev = parse_event(raw)
        except EventError as exc:
            out.dead.append((sid, fields, str(exc)))
            continue
        problem = time_problem(ev, id_key(sid)[0], future_limit_s)
        if problem is not None:
            out.dead.append((sid, fields, problem))
            continue
        digest = reference_digest(ev)
        mid = ev.match_id
        if mid in batch or mid in seen:
            known = batch[mid] if mid in batch else seen.digest(mid)
            if known is None or known == digest:
                out.dupes.append(sid)
            else:
                out.dead.append((sid, fields, _conflict(mid)))
            continue
        batch[mid] = digest
        out.digests[sid] = digest
        out.valid.append((sid, ev))
        out.raws[sid] = raw
    return out


def reference_remember(
    seen: SeenIds, part: list[tuple[str, MatchEvent]], digests: dict[str, bytes]
) -> None:
    for sid, ev in part:
        digest = digests.get(sid)
        seen.add(ev.match_id, id_key(sid)[0] / 1000, digest or reference_digest(ev))
