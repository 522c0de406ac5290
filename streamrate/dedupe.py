"""Recognising producer retries and conflicting reuses: the match ids applied recently.

The record lives *inside* the checkpoint (see :mod:`streamrate.checkpoint`), so
it is always exactly the set of ids applied up to the checkpoint's stream id: a
crash rolls the model, the stream position and this record back together, and
the re-read replays the same entries in the same order, making the same
decisions. There is no separate Redis key that could disagree with the model.

Each remembered id keeps two things: the time its entry was *received* (the
stream id's millisecond clock, never the event's own ``finished_at``, which a
producer controls) and an 8-byte digest of its content
(:func:`streamrate.events.event_digest`), not the payload. An id seen again with
the same digest is a retry; with another digest it is a conflict.

Memory is bounded two ways: at most ``keep`` ids (the oldest arrivals go
first), and arrivals are dropped from the old end once they were received more
than ``window_s`` before the newest received entry. Stream ids only grow, so no
entry can move this clock by more than the stream itself moves: a far-future
``finished_at`` cannot switch the record off. The promise: a retry (or a
conflict) is recognised when its original is among the last ``keep`` applied ids
and was received within ``window_s`` of the newest applied entry.

Layout: the arrivals are three parallel arrays in arrival order (the ids, the
received times as float64, the digests as 8 bytes each), with an index from id
to position; a batch is added with one extend of each array (:meth:`SeenIds.add_many`)
and the oldest arrivals are dropped by moving a start offset. The arrays are
what a checkpoint stores, so writing the record into one is a copy of each.

>>> s = SeenIds(keep=2, window_s=3600)
>>> s.add("m-1", 0.0); s.add("m-2", 10.0); s.add("m-3", 20.0, b"12345678")
>>> "m-1" in s, "m-3" in s, s.digest("m-3"), s.digest("m-2")
(False, True, b'12345678', None)
"""

from __future__ import annotations

from array import array
from collections import deque
from collections.abc import Iterable, Sequence

import numpy as np

from streamrate.errors import StateError

DIGEST_BYTES = 8
UNKNOWN_DIGEST = bytes(DIGEST_BYTES)
"""Stored for ids whose content is not known (records from checkpoint version 1)."""
_GONE = ""
"""Marks the old place of an id that arrived again (ids are never empty)."""


class SeenIds:
    """Recently applied match ids in arrival order: (received time in unix s, digest)."""

    def __init__(self, keep: int, window_s: float) -> None:
        self.keep = keep
        self.window_s = window_s
        self._at: dict[str, int] = {}  # id -> its place in the arrays (counted from _base)
        self._ids: list[str] = []  # in arrival order; _GONE where an id arrived again later
        self._times = array("d")  # received, unix s
        self._digests = bytearray()  # DIGEST_BYTES per arrival
        self._base = 0  # the place of _ids[0]
        self._lo = 0  # index of the oldest kept arrival in the arrays
        self._gone = 0  # _GONE marks at or after _lo
        self._newest = float("-inf")

    def __contains__(self, match_id: object) -> bool:
        return match_id in self._at

    def __len__(self) -> int:
        return len(self._at)

    def ids(self) -> list[str]:
        """The remembered ids, oldest arrival first."""
        live = self._ids[self._lo :]
        return [i for i in live if i] if self._gone else live

    def digest(self, match_id: str) -> bytes | None:
        """The remembered content digest of ``match_id``; None when absent or unknown."""
        at = self._at.get(match_id)
        if at is None:
            return None
        k = (at - self._base) * DIGEST_BYTES
        got = bytes(self._digests[k : k + DIGEST_BYTES])
        return None if got == UNKNOWN_DIGEST else got

    def known(self, match_ids: Iterable[str]) -> bool:
        """Whether any of ``match_ids`` is remembered (one set operation)."""
        return not self._at.keys().isdisjoint(match_ids)

    def add(self, match_id: str, received_s: float, digest: bytes = UNKNOWN_DIGEST) -> None:
        """Remember one applied id (one that arrives again moves to the newest end)."""
        self.add_many([match_id], [received_s], digest)

    def add_many(
        self, match_ids: Sequence[str], received_s: Sequence[float], digests: bytes
    ) -> None:
        """Remember applied ids in arrival order: the same record as :meth:`add` one by
        one (``digests``: :data:`DIGEST_BYTES` per id, concatenated)."""
        n = len(match_ids)
        if self.keep == 0 or n == 0:
            return
        if len(received_s) != n or len(digests) != DIGEST_BYTES * n:
            raise ValueError("one received time and one digest per id")
        at = self._at
        if not at.keys().isdisjoint(match_ids) or len(set(match_ids)) != n:
            for i, mid in enumerate(match_ids):  # ids arriving again: one at a time
                self._append([mid], received_s[i : i + 1], digests[i * 8 : i * 8 + 8])
                self._drop()
            return
        self._append(match_ids, received_s, digests)
        self._drop()

    def _append(
        self, match_ids: Sequence[str], received_s: Sequence[float], digests: bytes
    ) -> None:
        at = self._at
        if len(match_ids) == 1:
            old = at.get(match_ids[0])
            if old is not None:
                self._ids[old - self._base] = _GONE
                self._gone += 1
        start = self._base + len(self._ids)
        at.update(zip(match_ids, range(start, start + len(match_ids)), strict=True))
        self._ids.extend(match_ids)
        self._times.extend(received_s)
        self._digests += digests
        newest = max(received_s)
        if newest > self._newest:
            self._newest = newest

    def _drop(self) -> None:
        """Drop the oldest arrivals: beyond ``keep``, then those received before the window."""
        ids, at = self._ids, self._at
        excess = len(at) - self.keep
        if excess > 0:
            if self._gone == 0:
                stop = self._lo + excess
                deque(map(at.__delitem__, ids[self._lo : stop]), maxlen=0)
                self._lo = stop
            else:
                while excess > 0:
                    mid = ids[self._lo]
                    self._lo += 1
                    if mid:
                        del at[mid]
                        excess -= 1
                    else:
                        self._gone -= 1
        horizon = self._newest - self.window_s
        times, lo, end = self._times, self._lo, len(ids)
        # The oldest kept arrival (a real one, not the old place of an id that
        # arrived again) goes while it was received before the window.
        while lo < end:
            mid = ids[lo]
            if not mid:
                self._gone -= 1
            elif times[lo] < horizon:
                del at[mid]
            else:
                break
            lo += 1
        self._lo = lo
        if lo > 4096 and 2 * lo > end:  # compact: forget what was dropped
            del ids[:lo], self._times[:lo], self._digests[: lo * DIGEST_BYTES]
            self._base += lo
            self._lo = 0

    def to_arrays(self) -> dict[str, np.ndarray]:
        """The record as a checkpoint stores it: ids ("\\n"-joined UTF-8), received
        times, digests (copies: the record goes on changing)."""
        lo = self._lo
        if self._gone:
            keep = [k for k in range(lo, len(self._ids)) if self._ids[k]]
            times = np.frombuffer(self._times, dtype=np.float64)[keep]
            d = np.frombuffer(self._digests, dtype=np.uint8).reshape(-1, DIGEST_BYTES)[keep]
        else:
            times = np.frombuffer(self._times, dtype=np.float64)[lo:].copy()
            d = np.frombuffer(self._digests, dtype=np.uint8)[lo * DIGEST_BYTES :].copy()
        blob = "\n".join(self.ids()).encode("utf-8")
        return {
            "ids": np.frombuffer(blob, dtype=np.uint8).copy(),
            "received_s": times,
            "digest": d.reshape(-1),
        }

    @classmethod
    def from_arrays(cls, keep: int, window_s: float, arrays: dict[str, np.ndarray]) -> SeenIds:
        """Rebuild from :meth:`to_arrays`; :class:`StateError` when the arrays disagree."""
        try:
            blob = bytes(np.asarray(arrays["ids"], dtype=np.uint8))
            times = np.asarray(arrays["received_s"], dtype=np.float64)
            digests = bytes(np.asarray(arrays["digest"], dtype=np.uint8))
            ids = blob.decode("utf-8").split("\n") if blob else []
        except KeyError as exc:
            raise StateError(f"retry record lacks the array {exc.args[0]!r}") from exc
        except UnicodeDecodeError as exc:
            raise StateError(f"retry record ids are not UTF-8: {exc}") from exc
        if len(ids) != len(times) or len(digests) != DIGEST_BYTES * len(times):
            raise StateError(
                f"retry record is inconsistent: {len(ids)} ids, {len(times)} times, "
                f"{len(digests)} digest bytes"
            )
        if times.size and not np.isfinite(times).all():
            raise StateError("retry record holds a time that is not finite")
        if "" in ids:
            raise StateError("retry record holds an empty id")
        out = cls(keep, window_s)
        out.add_many(ids, times.tolist(), digests)
        return out
