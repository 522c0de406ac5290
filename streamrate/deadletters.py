"""The dead-letter stream: what the consumer set aside, bounded, and how to send it back.

A dead letter is one entry of ``{sr:space}:dead`` whose id is the source entry's
id. It holds the source entry's fields plus::

    dead.source_id         the stream id of the entry that was set aside
    dead.reason            why (names the field), at most MAX_REASON_BYTES
    dead.truncated         "1" when any field below was cut or dropped
    dead.length.<field>    original length in bytes of a field that was cut
    dead.blake2b.<field>   BLAKE2b-128 (hex) of that field's original value
    dead.dropped_fields    how many fields were dropped (past MAX_DEAD_FIELDS, or
                           with a name longer than MAX_FIELD_NAME_BYTES)

Values longer than ``dead_max_payload_bytes`` keep their first bytes only, and
the stream is trimmed to about ``dead_max_entries`` entries (``XADD MAXLEN ~``),
so junk cannot grow Redis without bound. Only dead letters kept whole can be
re-sent (:func:`resend`): a truncated payload is no longer the event.

>>> f = dead_fields({b"event": b"x" * 100}, "5-0", "score: bad", max_payload_bytes=64)
>>> f[b"event"][:3], f[b"dead.length.event"], f[b"dead.truncated"]
(b'xxx', b'100', b'1')
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from typing import Any

DEAD_PREFIX = b"dead."
MAX_DEAD_FIELDS = 32
MAX_FIELD_NAME_BYTES = 256
MAX_REASON_BYTES = 1000
_PAGE = 500


def dead_fields(
    fields: dict[bytes, bytes], sid: str, reason: str, max_payload_bytes: int
) -> dict[bytes, bytes]:
    """The fields of the dead letter for source entry ``sid`` (bounded, see the module)."""
    out: dict[bytes, bytes] = {}
    dropped = 0
    truncated = False
    kept = 0
    for name, value in fields.items():
        if name.startswith(DEAD_PREFIX):
            continue
        if kept >= MAX_DEAD_FIELDS or len(name) > MAX_FIELD_NAME_BYTES:
            dropped += 1
            continue
        kept += 1
        if len(value) > max_payload_bytes:
            out[name] = value[:max_payload_bytes]
            out[DEAD_PREFIX + b"length." + name] = str(len(value)).encode()
            digest = hashlib.blake2b(value, digest_size=16).hexdigest()
            out[DEAD_PREFIX + b"blake2b." + name] = digest.encode()
            truncated = True
        else:
            out[name] = value
    if dropped:
        out[DEAD_PREFIX + b"dropped_fields"] = str(dropped).encode()
        truncated = True
    out[DEAD_PREFIX + b"source_id"] = sid.encode()
    out[DEAD_PREFIX + b"reason"] = reason.encode("utf-8", "replace")[:MAX_REASON_BYTES]
    if truncated:
        out[DEAD_PREFIX + b"truncated"] = b"1"
    return out


@dataclass(frozen=True)
class DeadLetter:
    """One dead letter as read back."""

    id: str
    reason: str
    fields: dict[bytes, bytes]
    """The source entry's fields (cut ones as kept), without the ``dead.`` fields."""
    truncated: bool
    lengths: dict[str, int] = field(default_factory=dict)

    def excerpt(self, event_field: bytes, chars: int = 60) -> str:
        """A short, one-line, printable view of the payload."""
        raw = self.fields.get(event_field)
        if raw is None:
            raw = b" ".join(k + b"=" + v for k, v in self.fields.items())
        text = raw.decode("utf-8", "replace")
        shown = "".join(c if c.isprintable() else "\N{REPLACEMENT CHARACTER}" for c in text)
        return shown[:chars] + ("..." if len(shown) > chars or self.truncated else "")

    def to_json(self, event_field: bytes) -> dict[str, Any]:
        return {
            "id": self.id,
            "reason": self.reason,
            "truncated": self.truncated,
            "lengths": self.lengths,
            "excerpt": self.excerpt(event_field, 200),
        }


def _text(b: bytes) -> str:
    return b.decode("utf-8", "replace")


def read_letter(sid: Any, raw: dict[bytes, bytes]) -> DeadLetter:
    """A dead letter from an ``XRANGE`` row."""
    own = {k: v for k, v in raw.items() if not k.startswith(DEAD_PREFIX)}
    lengths = {
        _text(k[len(DEAD_PREFIX + b"length.") :]): int(v)
        for k, v in raw.items()
        if k.startswith(DEAD_PREFIX + b"length.") and v.isdigit()
    }
    return DeadLetter(
        id=_text(sid) if isinstance(sid, bytes) else str(sid),
        reason=_text(raw.get(DEAD_PREFIX + b"reason", b"")),
        fields=own,
        truncated=raw.get(DEAD_PREFIX + b"truncated") == b"1" or bool(lengths),
        lengths=lengths,
    )


def list_dead(client: Any, dead_key: str, limit: int) -> list[DeadLetter]:
    """The newest ``limit`` dead letters, newest first."""
    rows = client.xrevrange(dead_key, count=limit)
    return [read_letter(sid, raw) for sid, raw in rows]


def _all(client: Any, dead_key: str) -> Iterator[DeadLetter]:
    start = "-"
    while True:
        rows = client.xrange(dead_key, min=start, max="+", count=_PAGE)
        for sid, raw in rows:
            yield read_letter(sid, raw)
        if len(rows) < _PAGE:
            return
        start = "(" + (_text(rows[-1][0]) if isinstance(rows[-1][0], bytes) else rows[-1][0])


@dataclass
class ResendReport:
    """What :func:`resend` did: re-sent ids (old dead-letter id -> new stream id)."""

    resent: dict[str, str] = field(default_factory=dict)
    truncated: list[str] = field(default_factory=list)
    missing: list[str] = field(default_factory=list)


def resend(client: Any, dead_key: str, events_key: str, ids: Iterable[str] | None) -> ResendReport:
    """Add chosen dead letters (``None``: all) back to the event stream, whole ones only.

    Each is re-added with its original fields under a new stream id and removed
    from the dead letters in one ``MULTI`` (both keys share a hash tag). If it is
    still refused, the consumer sets it aside again, under its new id.
    """
    report = ResendReport()
    letters: Iterable[DeadLetter]
    if ids is None:
        letters = _all(client, dead_key)
    else:
        found: list[DeadLetter] = []
        for sid in ids:
            rows = client.xrange(dead_key, min=sid, max=sid)
            if rows:
                found.append(read_letter(*rows[0]))
            else:
                report.missing.append(sid)
        letters = found
    for letter in letters:
        if letter.truncated or not letter.fields:
            report.truncated.append(letter.id)
            continue
        pipe = client.pipeline(transaction=True)
        pipe.xadd(events_key, letter.fields)
        pipe.xdel(dead_key, letter.id)
        new_id, _ = pipe.execute()
        report.resent[letter.id] = _text(new_id) if isinstance(new_id, bytes) else str(new_id)
    return report
