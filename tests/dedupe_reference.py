"""The retry record as it was before it became arrays (an ordered dict of ids):
the reference the array record is held to (tests/test_dedupe.py)."""

from __future__ import annotations

from collections import OrderedDict

import numpy as np

from streamrate.dedupe import DIGEST_BYTES, UNKNOWN_DIGEST
from streamrate.errors import StateError


class ReferenceSeenIds:
    """Recently applied match ids in arrival order: (received time in unix s, digest)."""

    def __init__(self, keep: int, window_s: float) -> None:
        self.keep = keep
        self.window_s = window_s
        self._ids: OrderedDict[str, tuple[float, bytes]] = OrderedDict()
        self._newest = float("-inf")

    def __contains__(self, match_id: object) -> bool:
        return match_id in self._ids

    def __len__(self) -> int:
        return len(self._ids)

    def ids(self) -> list[str]:
        """The remembered ids, oldest arrival first."""
        return list(self._ids)

    def digest(self, match_id: str) -> bytes | None:
        """The remembered content digest of ``match_id``; None when absent or unknown."""
        got = self._ids.get(match_id)
        if got is None or got[1] == UNKNOWN_DIGEST:
            return None
        return got[1]

    def add(self, match_id: str, received_s: float, digest: bytes = UNKNOWN_DIGEST) -> None:
        if self.keep == 0:
            return
        self._ids.pop(match_id, None)
        self._ids[match_id] = (received_s, digest)
        self._newest = max(self._newest, received_s)
        while len(self._ids) > self.keep:
            self._ids.popitem(last=False)
        horizon = self._newest - self.window_s
        while self._ids:
            first_id, (first_s, _) = next(iter(self._ids.items()))
            if first_s >= horizon:
                break
            del self._ids[first_id]

    def to_arrays(self) -> dict[str, np.ndarray]:
        blob = "\n".join(self._ids).encode("utf-8")
        n = len(self._ids)
        values = list(self._ids.values())
        return {
            "ids": np.frombuffer(blob, dtype=np.uint8).copy(),
            "received_s": np.fromiter((t for t, _ in values), dtype=np.float64, count=n),
            "digest": np.frombuffer(b"".join(d for _, d in values), dtype=np.uint8).copy(),
        }

    @classmethod
    def from_arrays(
        cls, keep: int, window_s: float, arrays: dict[str, np.ndarray]
    ) -> ReferenceSeenIds:
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
        out = cls(keep, window_s)
        for k, (i, t) in enumerate(zip(ids, times.tolist(), strict=True)):
            out.add(i, t, digests[k * DIGEST_BYTES : (k + 1) * DIGEST_BYTES])
        return out
