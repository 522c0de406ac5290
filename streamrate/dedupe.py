"""Recognising producer retries: the match ids applied recently.

The record lives *inside* the checkpoint (see :mod:`streamrate.checkpoint`), so
it is always exactly the set of ids applied up to the checkpoint's stream id: a
crash rolls the model, the stream position and this record back together, and
the re-read replays the same entries in the same order, making the same
decisions. There is no separate Redis key that could disagree with the model.

Memory is bounded two ways: at most ``keep`` ids (the oldest arrivals go
first), and arrivals are dropped from the old end while they finished more than
``window_s`` before the newest applied event. The promise: a retry is recognised
when its original is among the last ``keep`` applied ids and finished within
``window_s`` of the newest applied event. A retry later than that is applied
again (documented limit; size ``keep`` for the retry horizon of the producers).

>>> s = SeenIds(keep=2, window_s=3600)
>>> s.add("m-1", 0.0); s.add("m-2", 10.0); s.add("m-3", 20.0)
>>> "m-1" in s, "m-3" in s
(False, True)
"""

from __future__ import annotations

from collections import OrderedDict

import numpy as np

from streamrate.errors import StateError


class SeenIds:
    """Recently applied match ids in arrival order, with their finish times (unix s)."""

    def __init__(self, keep: int, window_s: float) -> None:
        self.keep = keep
        self.window_s = window_s
        self._ids: OrderedDict[str, float] = OrderedDict()
        self._newest = float("-inf")

    def __contains__(self, match_id: object) -> bool:
        return match_id in self._ids

    def __len__(self) -> int:
        return len(self._ids)

    def add(self, match_id: str, finished_s: float) -> None:
        if self.keep == 0:
            return
        self._ids.pop(match_id, None)
        self._ids[match_id] = finished_s
        self._newest = max(self._newest, finished_s)
        while len(self._ids) > self.keep:
            self._ids.popitem(last=False)
        horizon = self._newest - self.window_s
        while self._ids:
            first_id, first_s = next(iter(self._ids.items()))
            if first_s >= horizon:
                break
            del self._ids[first_id]

    def to_arrays(self) -> dict[str, np.ndarray]:
        blob = "\n".join(self._ids).encode("utf-8")
        return {
            "ids": np.frombuffer(blob, dtype=np.uint8).copy(),
            "finished_s": np.fromiter(self._ids.values(), dtype=np.float64, count=len(self._ids)),
        }

    @classmethod
    def from_arrays(cls, keep: int, window_s: float, arrays: dict[str, np.ndarray]) -> SeenIds:
        blob = bytes(np.asarray(arrays["ids"], dtype=np.uint8))
        times = np.asarray(arrays["finished_s"], dtype=np.float64)
        ids = blob.decode("utf-8").split("\n") if blob else []
        if len(ids) != len(times):
            raise StateError(f"checkpoint: {len(ids)} seen ids but {len(times)} times")
        out = cls(keep, window_s)
        for i, t in zip(ids, times.tolist(), strict=True):
            out.add(i, t)
        return out
