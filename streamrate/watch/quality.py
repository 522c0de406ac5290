"""How good the live probabilities are, over rolling windows of the stream.

Pure numpy, no I/O. The scoring convention and the batch statistics (log loss in
nats, Brier score, accuracy over decisive matches, ECE on 10 equal-width
right-closed bins, the binned Murphy decomposition of the Brier score from 'A New
Vector Partition of the Probability Score', Journal of Applied Meteorology 1973)
are those of :mod:`streamrate.calibration`. The calibration slope/intercept of
``logit P(y) = a + b logit(p)`` is fitted by
:func:`streamrate.calibration.calibration_slope_intercept`, a Newton solver
with step halving that also converges on strongly over-confident forecasts.
This module keeps them up to date per event:

* :class:`RollingQuality` -- the statistics over the last ``window_n`` events: O(1)
  per event, O(window_n) vectorised per snapshot.
* :class:`WindowPair` -- a recent window and a longer, disjoint reference window
  (an event leaving the recent window enters the reference window).
* :class:`QualityMonitor` -- windows per model and per group of a chosen context
  field (top-K values, the rest as ``"other"``), the PSI drift of
  :mod:`streamrate.watch.drift` and a Page-Hinkley detector on each model's loss.

>>> rq = RollingQuality(window_n=2)
>>> for p, y in [(0.9, 1.0), (0.2, 1.0), (0.7, 0.0)]:
...     _ = rq.add(p, y)
>>> round(rq.snapshot().brier, 4)  # the last two events only: (0.64 + 0.49) / 2
0.565
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from streamrate.calibration import (
    ECE_BINS,
    PROB_EPS,
    accuracy,
    bin_index,
    brier,
    calibration_slope_intercept,
    expected_calibration_error,
    log_loss,
    murphy_decomposition,
)
from streamrate.watch.drift import Direction, FeatureDrift, PageHinkley

Array = npt.NDArray[np.float64]

P_CLIP = PROB_EPS
"""Probabilities are clipped to [P_CLIP, 1 - P_CLIP] before logs (as in calibration)."""
DEFAULT_BINS = ECE_BINS
"""Equal-width bins used by ECE and the Murphy decomposition unless told otherwise."""


@dataclass(frozen=True)
class QualitySnapshot:
    """Every quality statistic of one window at one moment (NaN where undefined)."""

    n_events: int
    log_loss: float
    brier: float
    reliability: float
    resolution: float
    uncertainty: float
    accuracy: float
    ece: float
    slope: float
    intercept: float


@dataclass(frozen=True)
class BinnedWindow:
    """A window's reliability diagram over every equal-width bin, empty ones included.

    Bins are those of :func:`streamrate.calibration.bin_index`; an empty bin has
    count 0 and NaN means.
    """

    forecast_mean: Array
    outcome_mean: Array
    count: npt.NDArray[np.int64]


class RollingQuality:
    """Quality statistics over the last ``window_n`` events.

    Adding an event is O(1) (a ring-buffer write); a
    :meth:`snapshot` computes every statistic from the buffer with the batch
    functions of :mod:`streamrate.calibration`, vectorised, in O(window_n). A
    service reads snapshots every few hundred events, so this is much cheaper
    per event than keeping running sums in Python.
    """

    def __init__(self, window_n: int = 1000, n_bins: int = DEFAULT_BINS) -> None:
        if window_n < 1:
            raise ValueError("window_n must be at least 1")
        if n_bins < 1:
            raise ValueError("n_bins must be at least 1")
        self.window_n = window_n
        self.n_bins = n_bins
        self.p_ = [0.0] * window_n
        self.y_ = [0.0] * window_n
        self.size_ = 0
        self.head_ = 0  # slot the next event goes to

    def add(self, p: float, y: float) -> tuple[float, float] | None:
        """Add one scored event; return the ``(p, y)`` it pushed out, if the window was full."""
        p, y = float(p), float(y)
        if not (0.0 <= p <= 1.0) or not (0.0 <= y <= 1.0):
            raise ValueError(f"probability {p} and outcome {y} must lie in [0, 1]")
        h = self.head_
        out = (self.p_[h], self.y_[h]) if self.size_ == self.window_n else None
        if out is None:
            self.size_ += 1
        self.p_[h] = p
        self.y_[h] = y
        self.head_ = (h + 1) % self.window_n
        return out

    def add_many(self, p: Sequence[float], y: Sequence[float]) -> tuple[list[float], list[float]]:
        """:meth:`add` of each event in order, written a slice at a time; returns the
        ``(p, y)`` pushed out, oldest first. On a value outside [0, 1] the events
        before it are added, then the error of :meth:`add` is raised."""
        ps, ys = list(map(float, p)), list(map(float, y))
        bad = _first_outside_unit(ps, ys)
        if bad is not None:
            self.add_many(ps[:bad], ys[:bad])
            self.add(ps[bad], ys[bad])  # raises
        return self._write(ps, ys)

    def _write(self, ps: list[float], ys: list[float]) -> tuple[list[float], list[float]]:
        """:meth:`add_many` of values already checked (floats in [0, 1])."""
        out_p: list[float] = []
        out_y: list[float] = []
        n, i = self.window_n, 0
        while i < len(ps):
            h = self.head_
            k = min(len(ps) - i, n - h)  # up to the end of the ring
            if self.size_ == n:  # full: the slots written hold the oldest events
                out_p += self.p_[h : h + k]
                out_y += self.y_[h : h + k]
            else:  # not full yet: events fill the ring from slot 0, so h == size_
                self.size_ += k
            self.p_[h : h + k] = ps[i : i + k]
            self.y_[h : h + k] = ys[i : i + k]
            self.head_ = (h + k) % n
            i += k
        return out_p, out_y

    def values(self) -> tuple[Array, Array]:
        """The window's probabilities and outcomes, oldest first (copies)."""
        if self.size_ < self.window_n:
            return np.array(self.p_[: self.size_]), np.array(self.y_[: self.size_])
        h = self.head_
        return np.array(self.p_[h:] + self.p_[:h]), np.array(self.y_[h:] + self.y_[:h])

    def __len__(self) -> int:
        return self.size_

    def binned(self) -> BinnedWindow:
        """Mean forecast, mean outcome and event count of each of the ``n_bins`` bins now.

        >>> rq = RollingQuality(window_n=3, n_bins=2)
        >>> for p, y in [(0.2, 0.0), (0.3, 1.0), (0.9, 1.0)]:
        ...     _ = rq.add(p, y)
        >>> b = rq.binned()
        >>> b.count.tolist(), b.forecast_mean.round(2).tolist(), b.outcome_mean.tolist()
        ([2, 1], [0.25, 0.9], [0.5, 1.0])
        """
        p, y = self.values()
        idx = bin_index(p, self.n_bins)
        count = np.bincount(idx, minlength=self.n_bins).astype(np.int64)
        full = count > 0

        def means(weights: Array) -> Array:
            sums = np.bincount(idx, weights=weights, minlength=self.n_bins)
            return np.divide(sums, count, out=np.full(self.n_bins, math.nan), where=full)

        return BinnedWindow(means(p), means(y), count)

    def snapshot(self, with_slope: bool = True) -> QualitySnapshot:
        """All statistics of the window now (NaN where undefined)."""
        n = self.size_
        if n == 0:
            return QualitySnapshot(0, *([math.nan] * 9))
        p, y = self.values()
        parts = murphy_decomposition(p, y, self.n_bins)
        slope, intercept = (math.nan, math.nan)
        if with_slope:
            slope, intercept = calibration_slope_intercept(p, y)
        return QualitySnapshot(
            n_events=n,
            log_loss=log_loss(p, y),
            brier=brier(p, y),
            reliability=parts.reliability,
            resolution=parts.resolution,
            uncertainty=parts.uncertainty,
            accuracy=accuracy(p, y),
            ece=expected_calibration_error(p, y, self.n_bins),
            slope=slope,
            intercept=intercept,
        )


def _first_outside_unit(ps: list[float], ys: list[float]) -> int | None:
    """The position of the first event whose probability or outcome is outside [0, 1]
    (NaN included), or None. C-level passes over the lists; the loop only on a hit."""
    if len(ps) != len(ys):
        raise ValueError(f"{len(ps)} probabilities for {len(ys)} outcomes")
    if not ps or (
        min(ps) >= 0.0
        and max(ps) <= 1.0
        and min(ys) >= 0.0
        and max(ys) <= 1.0
        and not any(map(math.isnan, ps))
        and not any(map(math.isnan, ys))
    ):
        return None
    pairs = enumerate(zip(ps, ys, strict=True))
    return next(i for i, (p, y) in pairs if not (0 <= p <= 1 and 0 <= y <= 1))


def event_log_loss(p: float, y: float) -> float:
    """One event's log loss in nats (clipped like :func:`streamrate.calibration.log_loss`)."""
    pc = min(max(p, P_CLIP), 1.0 - P_CLIP)
    return -(y * math.log(pc) + (1.0 - y) * math.log1p(-pc))


def event_log_losses(p: Sequence[float], y: Sequence[float]) -> list[float]:
    """:func:`event_log_loss` of each event (the same arithmetic, in one comprehension)."""
    lo, hi, log, log1p = P_CLIP, 1.0 - P_CLIP, math.log, math.log1p
    clipped = [hi if hi < c else c for c in (lo if lo > v else v for v in p)]
    return [-(yy * log(c) + (1.0 - yy) * log1p(-c)) for c, yy in zip(clipped, y, strict=True)]


class WindowPair:
    """A recent window of the last ``recent_n`` events and a reference window of
    the ``reference_n`` events before them (disjoint: an event leaving the recent
    window enters the reference window)."""

    def __init__(
        self, recent_n: int = 1000, reference_n: int = 10000, n_bins: int = DEFAULT_BINS
    ) -> None:
        self.recent = RollingQuality(recent_n, n_bins)
        self.reference = RollingQuality(reference_n, n_bins)

    def add(self, p: float, y: float) -> None:
        """Add one event to the recent window; the one it pushes out enters the reference."""
        out = self.recent.add(p, y)
        if out is not None:
            self.reference.add(*out)

    def add_many(self, p: Sequence[float], y: Sequence[float]) -> None:
        """:meth:`add` of each event in order."""
        out_p, out_y = self.recent.add_many(p, y)
        if out_p:
            self.reference._write(out_p, out_y)

    def _write(self, ps: list[float], ys: list[float]) -> None:
        """:meth:`add_many` of values already checked (floats in [0, 1])."""
        out_p, out_y = self.recent._write(ps, ys)
        if out_p:
            self.reference._write(out_p, out_y)


ALL_GROUP = "all"
CHANGE_DIRECTIONS: tuple[Direction, ...] = ("up", "down")
OTHER_GROUP = "other"
MAX_TRACKED_VALUES = 10_000
"""Distinct values counted while choosing the top-K groups; later newcomers are not ranked."""


def _group_text(value: object) -> str:
    text = "(missing)" if value is None else str(value)
    if text in (ALL_GROUP, OTHER_GROUP):
        text += " (value)"  # a context value must not merge into a reserved group
    return text


class GroupLabels:
    """Bounded group labels for one context field: the top-K values, the rest ``"other"``.

    The top-K are the most frequent values among the first ``warmup_n`` events
    (ties: first seen wins); then the set is frozen so that label sets, and so
    Prometheus series, do not churn. Until then every event is labelled
    ``None`` (counted in the ``"all"`` group only). ``values`` fixes the set up
    front and skips the warm-up. A value spelled like a reserved group name
    (``"all"``, ``"other"``) is reported as ``"all (value)"`` / ``"other (value)"``.
    """

    def __init__(
        self, top_k: int = 8, warmup_n: int = 1000, values: Sequence[str] | None = None
    ) -> None:
        if top_k < 1:
            raise ValueError("top_k must be at least 1")
        self.top_k = top_k
        self.warmup_n = warmup_n
        self.counts_: dict[str, int] = {}
        self.seen_ = 0
        self.chosen_: frozenset[str] | None = None
        if values is not None:
            self.chosen_ = frozenset(_group_text(v) for v in values)

    def label(self, value: object) -> str | None:
        """The group label of ``value`` (``None`` while still warming up)."""
        text = _group_text(value)
        if self.chosen_ is not None:
            return text if text in self.chosen_ else OTHER_GROUP
        self.seen_ += 1
        if text in self.counts_ or len(self.counts_) < MAX_TRACKED_VALUES:
            self.counts_[text] = self.counts_.get(text, 0) + 1
        if self.seen_ >= self.warmup_n:
            ranked = sorted(self.counts_.items(), key=lambda kv: -kv[1])  # stable: first seen
            self.chosen_ = frozenset(k for k, _ in ranked[: self.top_k])
            self.counts_ = {}
        return None

    @property
    def labels(self) -> tuple[str, ...]:
        """Every label that can be reported (empty while warming up)."""
        if self.chosen_ is None:
            return ()
        return (*sorted(self.chosen_), OTHER_GROUP)


@dataclass(frozen=True)
class MonitorSettings:
    """What :class:`QualityMonitor` tracks. Windows are counted in events."""

    recent_n: int = 1000
    reference_n: int = 10000
    n_bins: int = DEFAULT_BINS
    group_field: str | None = None
    group_top_k: int = 8
    group_warmup_n: int = 1000
    drift_fields: tuple[str, ...] = ()
    change_delta: float = 0.02
    change_threshold: float = 40.0
    change_min_events: int = 30


class ModelQuality:
    """Everything tracked for one model: windows per group, drift, change detector."""

    def __init__(self, settings: MonitorSettings) -> None:
        self.settings = settings
        self.windows_: dict[str, WindowPair] = {}
        self.drift_ = FeatureDrift(settings.drift_fields, settings.recent_n, settings.reference_n)
        s = settings
        # A rise of the loss says the forecasts got worse; a fall says the world
        # changed in a way the model may not be calibrated for either.
        self.change_ = {
            d: PageHinkley(s.change_delta, s.change_threshold, s.change_min_events, d)
            for d in CHANGE_DIRECTIONS
        }
        self.events_ = 0

    def _window(self, group: str) -> WindowPair:
        w = self.windows_.get(group)
        if w is None:
            s = self.settings
            w = self.windows_[group] = WindowPair(s.recent_n, s.reference_n, s.n_bins)
        return w

    def add(
        self, p: float, y: float, context: Mapping[str, float | str], group: str | None
    ) -> tuple[str, ...]:
        """Score one event; return the directions in which the change detector fired."""
        self.events_ += 1
        self._window(ALL_GROUP).add(p, y)
        loss = event_log_loss(p, y)
        if group is not None:
            self._window(group).add(p, y)
        self.drift_.add(p, context)
        return tuple(d for d, ph in self.change_.items() if ph.update(loss))

    def add_many(
        self,
        p: Sequence[float],
        y: Sequence[float],
        contexts: Sequence[Mapping[str, float | str]],
        groups: Sequence[str | None] | None,
    ) -> list[tuple[int, Direction]]:
        """:meth:`add` of each event in order (``groups``: each event's label, or None
        for no grouping); returns (position, direction) of every firing, in the
        order :meth:`add` would report them."""
        ps, ys = list(map(float, p)), list(map(float, y))
        if _first_outside_unit(ps, ys) is not None:
            for i, (pi, yi, ctx) in enumerate(zip(p, y, contexts, strict=True)):
                self.add(pi, yi, ctx, None if groups is None else groups[i])  # raises at it
        self.events_ += len(ps)
        self._window(ALL_GROUP)._write(ps, ys)
        if groups is not None:
            for label in dict.fromkeys(g for g in groups if g is not None):
                at = [i for i, g in enumerate(groups) if g == label]
                self._window(label)._write([ps[i] for i in at], [ys[i] for i in at])
        self.drift_.add_many(p, contexts)
        losses = event_log_losses(p, y)
        fired = [(i, d) for d, ph in self.change_.items() for i in ph.update_many(losses)]
        fired.sort(key=lambda f: (f[0], CHANGE_DIRECTIONS.index(f[1])))
        return fired


class QualityMonitor:
    """Rolling quality, drift and change detection per model, fed one event at a time.

    >>> mon = QualityMonitor(MonitorSettings(recent_n=50, reference_n=100))
    >>> for i in range(120):
    ...     _ = mon.add("elo", 0.7, float(i % 10 < 7), {"map": "saltflats"})
    >>> snap = mon.models_["elo"].windows_["all"].recent.snapshot()
    >>> snap.n_events, round(snap.log_loss, 3)
    (50, 0.611)
    """

    def __init__(self, settings: MonitorSettings | None = None) -> None:
        self.settings = settings or MonitorSettings()
        self.models_: dict[str, ModelQuality] = {}
        self.groups_ = GroupLabels(self.settings.group_top_k, self.settings.group_warmup_n)

    def add(
        self, model: str, p: float, y: float, context: Mapping[str, float | str] | None = None
    ) -> tuple[str, ...]:
        """Score one prediction ``p`` of ``model`` against outcome ``y``.

        Returns the directions (``"up"``, ``"down"``) in which the model's change
        detector fired on this event, usually none.
        """
        ctx = context or {}
        group = None
        field = self.settings.group_field
        if field is not None:
            group = self.groups_.label(ctx.get(field))
        mq = self.models_.get(model)
        if mq is None:
            mq = self.models_[model] = ModelQuality(self.settings)
        return mq.add(p, y, ctx, group)

    def add_chunk(
        self,
        contexts: Sequence[Mapping[str, float | str]],
        y: Sequence[float],
        predictions: Mapping[str, Sequence[float]],
    ) -> list[tuple[int, str, Direction]]:
        """Score a chunk of events for several models at once: the same state as
        :meth:`add` called event by event, each event for every model of
        ``predictions`` in its order. Returns (position, model, direction) of every
        firing, in the order those calls would have reported them."""
        n = len(contexts)
        if len(y) != n or any(len(v) != n for v in predictions.values()):
            raise ValueError(f"a chunk of {n} contexts needs as many outcomes and forecasts")
        if not n:
            return []
        models = list(predictions)
        labels: dict[str, list[str | None]] | None = None
        field = self.settings.group_field
        if field is not None:
            values = [ctx.get(field) for ctx in contexts]
            if self.groups_.chosen_ is not None:  # frozen: a label is a function of its value
                once = list(map(self.groups_.label, values))
                labels = dict.fromkeys(models, once)
            else:  # warming up: one count per event and model, in the order of add()
                labels = {m: [] for m in models}
                for v in values:
                    for m in models:
                        labels[m].append(self.groups_.label(v))
        fired: list[tuple[int, str, Direction]] = []
        for m in models:
            mq = self.models_.get(m)
            if mq is None:
                mq = self.models_[m] = ModelQuality(self.settings)
            got = mq.add_many(predictions[m], y, contexts, None if labels is None else labels[m])
            fired += [(i, m, d) for i, d in got]
        fired.sort(key=lambda f: (f[0], models.index(f[1]), CHANGE_DIRECTIONS.index(f[2])))
        return fired
