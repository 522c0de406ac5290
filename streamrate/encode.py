"""Turning ids and categories into array positions, online.

Two mappings live here:

* :class:`EntityTable` gives each entity id a dense row number the first time the
  id is seen, and counts the matches each entity has played. Rows are never
  reused, so a row number is stable for the life of a model.
* :class:`FeatureHasher` maps a ``name -> value`` dict to a sparse vector of fixed
  width by feature hashing (the "hashing trick"): a category ``map=saltflats``
  becomes one signed unit at ``crc32(b"map=saltflats") mod width``; a number
  ``heat=0.4`` becomes ``0.4`` (signed) at ``crc32(b"heat") mod width``. Values
  never seen before need no vocabulary and no refit: they simply land in a slot.
  Collisions are possible and are why the width is a setting (default 64); the
  sign bit (the top bit of the same crc32) makes colliding features cancel on
  average rather than add up. crc32 is used, not ``hash()``, because it is the
  same in every process and on every machine, so a saved model reads back.

A third, :class:`RunningScale`, keeps a running mean and deviation per numeric
field so that numbers enter a model as standard scores (a year such as 2004 or
a rating of 1800 would otherwise swamp every other input).

Example:

>>> h = FeatureHasher(width=16)
>>> idx, val = h.encode({"map": "saltflats", "heat": 0.5})
>>> idx.shape, val.shape
((2,), (2,))
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Callable, Iterable, Mapping, Sequence

import numpy as np
import numpy.typing as npt

from streamrate.errors import StateError

IntArray = npt.NDArray[np.int32]
FloatArray = npt.NDArray[np.float64]
Encoded = tuple[list[tuple[int, float]], tuple[tuple[int, str, float], ...]]
"""(slot, signed value) pairs of a mapping and (position, name, value) of its numbers."""


class FeatureHasher:
    """Signed feature hashing of ``name -> category | number`` into ``width`` slots."""

    def __init__(self, width: int) -> None:
        if width < 1:
            raise ValueError("width must be at least 1")
        self.width = width
        self._slots: dict[str, tuple[int, float]] = {}
        self._items: dict[tuple[str, str | float], tuple[int, float]] = {}
        self._maps: dict[tuple[tuple[str, str | float], ...], Encoded] = {}
        # Mappings of categories only, as rows of two tables (slots, signed values),
        # padded with -1 / 0 to the widest: a batch of them is two fancy indexings.
        self._rows: dict[tuple[tuple[str, str | float], ...], int] = {}
        self._key_row: dict[str, int] = {}  # the same rows by a mapping's text (columns)
        self._key_width: dict[str, int] = {}
        self._table_idx = np.full((0, 0), -1, dtype=np.int32)
        self._table_val = np.zeros((0, 0), dtype=np.float64)

    def slot(self, key: str) -> tuple[int, float]:
        """Return (slot index, sign) for a hashed key; cached, as keys repeat a lot."""
        hit = self._slots.get(key)
        if hit is None:
            h = zlib.crc32(key.encode("utf-8"))
            hit = (h % self.width, -1.0 if h & 0x80000000 else 1.0)
            if len(self._slots) < 1_000_000:
                self._slots[key] = hit
        return hit

    def item(self, name: str, value: str | float) -> tuple[int, float]:
        """(slot, signed value) of one ``name -> value`` pair; cached, as pairs repeat."""
        hit = self._items.get((name, value))
        if hit is None:
            if isinstance(value, str):
                hit = self.slot(f"{name}={value}")
            else:
                i, s = self.slot(name)
                hit = (i, s * float(value))
            if len(self._items) < 1_000_000:
                self._items[(name, value)] = hit
        return hit

    def encoded_items(self, items: tuple[tuple[str, str | float], ...]) -> Encoded:
        """(slot, signed value) of each pair of a whole mapping, and its numbers.

        The second part lists ``(position, name, value)`` of each numeric pair;
        the pair at that position then holds (slot, sign), for the caller to
        multiply by the (scaled) value. Mappings of categories only are cached
        by their items: the same context (map, mode, patch) comes back match
        after match, while numbers rarely repeat.
        """
        hit = self._maps.get(items)
        if hit is None:
            pairs: list[tuple[int, float]] = []
            numbers: list[tuple[int, str, float]] = []
            for name, v in items:
                if isinstance(v, str):
                    pairs.append(self.item(name, v))
                else:
                    pairs.append(self.slot(name))
                    numbers.append((len(pairs) - 1, name, v))
            hit = (pairs, tuple(numbers))
            if not numbers and len(self._maps) < 100_000:
                self._maps[items] = hit
        return hit

    def category_rows(
        self, maps: Sequence[Mapping[str, str | float]], width: int
    ) -> tuple[IntArray, FloatArray] | None:
        """(slots, signed values) of a batch of mappings, shape ``(len(maps), width)``
        padded with -1 / 0, when every mapping holds categories only (the common
        context: map, mode, patch); None otherwise (numbers need scaling, each in
        turn). The same pairs as :meth:`encoded_items`, in the same order."""
        try:
            keys: list[tuple[tuple[str, str | float], ...]] = list(
                map(tuple, map(dict.items, maps))  # type: ignore[arg-type]
            )
        except TypeError:  # not plain dicts
            return None
        get = self._rows.get
        rows = list(map(get, keys))
        if None in rows:
            for key in set(keys):
                if key not in self._rows and not self._add_row(key):
                    return None
            rows = list(map(get, keys))
        if self._table_idx.shape[1] < width:
            return None
        at = np.array(rows, dtype=np.intp)
        return self._table_idx[at, :width], self._table_val[at, :width]

    def key_rows(
        self,
        keys: Sequence[str],
        items_of: Callable[[str], tuple[tuple[str, str], ...]],
    ) -> tuple[IntArray, FloatArray] | None:
        """:meth:`category_rows` of mappings of categories given by a text key each
        (``items_of(key)``: the mapping's pairs in their order), padded to the
        widest of the batch; None when the table is full."""
        get = self._key_row.get
        rows = list(map(get, keys))
        if None in rows:
            for key in set(keys):
                if key in self._key_row:
                    continue
                items = items_of(key)
                if items not in self._rows and not self._add_row(items):
                    return None
                if len(self._key_row) < 100_000:
                    self._key_row[key] = self._rows[items]
                    self._key_width[key] = len(items)
                else:
                    return None
            rows = list(map(get, keys))
        width = max(map(self._key_width.__getitem__, set(keys)), default=0)
        n = len(keys)
        if width == 0:
            return np.full((n, 0), -1, dtype=np.int32), np.zeros((n, 0), dtype=np.float64)
        at = np.array(rows, dtype=np.intp)
        return self._table_idx[at, :width], self._table_val[at, :width]

    def _add_row(self, items: tuple[tuple[str, str | float], ...]) -> bool:
        """Give a mapping of categories its table row (False: it has numbers, or the
        table is full)."""
        pairs, numbers = self.encoded_items(items)
        if numbers or len(self._rows) >= 100_000:
            return False
        n, w = self._table_idx.shape
        if len(pairs) > w or n == len(self._rows):
            grown_n, grown_w = max(2 * n, 64), max(w, len(pairs))
            idx = np.full((grown_n, grown_w), -1, dtype=np.int32)
            val = np.zeros((grown_n, grown_w), dtype=np.float64)
            idx[:n, :w], val[:n, :w] = self._table_idx, self._table_val
            self._table_idx, self._table_val = idx, val
        r = len(self._rows)
        for j, (slot, v) in enumerate(pairs):
            self._table_idx[r, j], self._table_val[r, j] = slot, v
        self._rows[items] = r
        return True

    def encode(self, values: Mapping[str, str | float]) -> tuple[IntArray, FloatArray]:
        """Sparse (indices, values) of one mapping; duplicates are kept (they add)."""
        pairs = [self.item(name, v) for name, v in values.items()]
        idx = np.array([i for i, _ in pairs], dtype=np.int32)
        val = np.array([v for _, v in pairs], dtype=np.float64)
        return idx, val

    def dense(self, values: Mapping[str, str | float]) -> FloatArray:
        """The same vector as a dense array of length ``width``."""
        out = np.zeros(self.width, dtype=np.float64)
        idx, val = self.encode(values)
        np.add.at(out, idx, val)
        return out


class RunningScale:
    """Running mean and deviation of each numeric field, and standard scores from them.

    :meth:`score` gives a value's standard score ``(x - mean) / deviation`` from
    its field's statistics so far; :meth:`add` adds a value to them (Welford's
    online update, numerically stable in one pass); :meth:`observe` does both, in
    that order. Scoring before adding means a model's prediction made while it
    learns equals the one it gave before. Until a field has two different
    values, its scores are 0. Scores are clipped to
    ``+-clip`` deviations and values to ``+-1e100`` before they are added, so
    every score is finite whatever the input. A field given in other units (any
    change ``a * x + b`` with ``a > 0``) gets the same scores.

    >>> s = RunningScale()
    >>> [round(s.observe("year", y), 3) for y in (2004.0, 2010.0, 2016.0, 2013.0)]
    [0.0, 0.0, 3.0, 0.612]
    >>> round(s.score("year", 2010.0), 3), s.stats("year")[:2]
    (-0.169, (4.0, 2010.75))
    """

    LIMIT = 1e100

    def __init__(self, clip: float = 5.0) -> None:
        self.clip = clip
        self._field: dict[str, int] = {}
        self.names: list[str] = []
        # Plain lists: one value at a time, Python floats beat numpy scalars.
        self._count: list[float] = []
        self._mean: list[float] = []
        self._m2: list[float] = []

    def __len__(self) -> int:
        return len(self.names)

    def _z(self, f: int, x: float) -> float:
        n = self._count[f]
        m2 = self._m2[f]
        if n < 2.0 or m2 <= 0.0:
            return 0.0
        sd = math.sqrt(m2 / n)
        if not sd > 0.0:
            return 0.0
        z = (x - self._mean[f]) / sd
        return max(-self.clip, min(self.clip, z))

    @classmethod
    def _bounded(cls, value: float) -> float:
        try:
            x = float(value)
        except OverflowError:  # an int too large for a float
            x = math.inf if value > 0 else -math.inf
        return max(-cls.LIMIT, min(cls.LIMIT, x))

    def observe(self, name: str, value: float) -> float:
        """The standard score of ``value`` in field ``name``; then add it."""
        z = self.score(name, value)
        self.add(name, value)
        return z

    def add(self, name: str, value: float) -> None:
        """Add ``value`` to the statistics of field ``name``."""
        x = self._bounded(value)
        f = self._field.get(name)
        if f is None:
            f = self._field[name] = len(self.names)
            self.names.append(name)
            self._count.append(0.0)
            self._mean.append(0.0)
            self._m2.append(0.0)
        n = self._count[f] + 1.0
        delta = x - self._mean[f]
        mean = self._mean[f] + delta / n
        self._count[f], self._mean[f] = n, mean
        self._m2[f] += delta * (x - mean)

    def score(self, name: str, value: float) -> float:
        """The standard score of ``value`` in field ``name``; changes nothing."""
        f = self._field.get(name)
        return 0.0 if f is None else self._z(f, self._bounded(value))

    def stats(self, name: str) -> tuple[float, float, float]:
        """(count, mean, deviation) of a field; zeros if never seen."""
        f = self._field.get(name)
        if f is None:
            return 0.0, 0.0, 0.0
        n = self._count[f]
        return n, self._mean[f], math.sqrt(self._m2[f] / n) if n else 0.0

    # -- persistence -----------------------------------------------------------------
    def to_arrays(self, prefix: str) -> dict[str, np.ndarray]:
        blob = "\n".join(self.names).encode("utf-8")
        return {
            f"{prefix}_names": np.frombuffer(blob, dtype=np.uint8).copy(),
            f"{prefix}_stats": np.array(
                [self._count, self._mean, self._m2], dtype=np.float64
            ).T.reshape(-1, 3),
        }

    @classmethod
    def from_arrays(
        cls, arrays: Mapping[str, np.ndarray], prefix: str, clip: float = 5.0
    ) -> RunningScale:
        try:
            blob = bytes(np.asarray(arrays[f"{prefix}_names"], dtype=np.uint8))
            stats = np.asarray(arrays[f"{prefix}_stats"], dtype=np.float64)
        except KeyError as exc:
            raise StateError(f"saved state lacks the array {exc.args[0]!r}") from exc
        names = blob.decode("utf-8").split("\n") if blob else []
        if stats.shape != (len(names), 3) or len(set(names)) != len(names):
            raise StateError(
                f"saved state is inconsistent: {len(names)} numeric fields, statistics "
                f"of shape {stats.shape}"
            )
        scale = cls(clip)
        scale.names = names
        scale._field = {name: i for i, name in enumerate(names)}
        scale._count, scale._mean, scale._m2 = (stats[:, k].tolist() for k in range(3))
        return scale


class EntityTable:
    """Dense, stable row numbers for entity ids, with a match count per entity."""

    def __init__(self) -> None:
        self._rows: dict[str, int] = {}
        self._ids: list[str] = []
        self.counts = np.zeros(16, dtype=np.int32)  # int32: 4 bytes per entity matters at 10^6
        # The ids saved so far, newline-joined UTF-8 (ids are only ever appended):
        # a checkpoint encodes only the ids added since the last one.
        self._blob = bytearray()
        self._blob_n = 0

    def __len__(self) -> int:
        return len(self._ids)

    def __contains__(self, entity_id: object) -> bool:
        return entity_id in self._rows

    @property
    def lookup(self) -> Callable[[str, int], int]:
        """The id -> row dict's own ``get`` (call it as ``lookup(id, -1)``), for hot loops."""
        return self._rows.get

    def get(self, entity_id: str) -> int:
        """Row of a known id, or -1 for an id never seen (nothing is added)."""
        return self._rows.get(entity_id, -1)

    def row(self, entity_id: str) -> int:
        """Row of an id, adding it if new."""
        r = self._rows.get(entity_id)
        if r is None:
            r = len(self._ids)
            self._rows[entity_id] = r
            self._ids.append(entity_id)
            if r >= len(self.counts):
                # np.zeros: the spare half costs no memory until written (see
                # streamrate.models.base.with_room), unlike zeros_like + concatenate.
                grown = np.zeros(2 * len(self.counts), dtype=np.int32)
                grown[:r] = self.counts[:r]
                self.counts = grown
        return r

    def rows(self, entity_ids: Iterable[str]) -> list[int]:
        return [self.row(e) for e in entity_ids]

    def id_of(self, row: int) -> str:
        return self._ids[row]

    @property
    def ids(self) -> list[str]:
        return self._ids

    def seen(self, entity_id: str) -> int:
        """How many matches this entity has been learned from (0 if unknown)."""
        r = self._rows.get(entity_id)
        return 0 if r is None else int(self.counts[r])

    # -- persistence -----------------------------------------------------------------
    def to_arrays(self) -> dict[str, np.ndarray]:
        n = len(self._ids)
        if n > self._blob_n:
            new = "\n".join(self._ids[self._blob_n :]).encode("utf-8")
            self._blob += (b"\n" + new) if self._blob_n else new
            self._blob_n = n
        return {
            "entity_ids": np.frombuffer(self._blob, dtype=np.uint8).copy(),
            "entity_counts": self.counts[: len(self._ids)].copy(),
        }

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, np.ndarray]) -> EntityTable:
        try:
            blob = bytes(np.asarray(arrays["entity_ids"], dtype=np.uint8))
            counts = np.asarray(arrays["entity_counts"], dtype=np.int32)
        except KeyError as exc:
            raise StateError(f"saved state lacks the array {exc.args[0]!r}") from exc
        ids = blob.decode("utf-8").split("\n") if blob else []
        if len(ids) != len(counts):
            raise StateError(
                f"saved state is inconsistent: {len(ids)} entity ids but {len(counts)} counts"
            )
        table = cls()
        table._ids = ids
        table._rows = {e: i for i, e in enumerate(ids)}
        if len(table._rows) != len(ids):
            raise StateError("saved state is inconsistent: an entity id is listed twice")
        table.counts = np.zeros(max(16, 2 * len(ids)), dtype=np.int32)
        table.counts[: len(ids)] = counts
        # The loaded bytes are the saved ids: the next checkpoint encodes only newer
        # ones instead of joining every id again (under the model lock).
        table._blob, table._blob_n = bytearray(blob), len(ids)
        return table
